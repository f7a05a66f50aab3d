"""Import benchmark: ``fleetdb import`` of a large tests file beside the practical floor.

Each repetition starts from a fresh database (``fleetdb init``, then the fleet file) and
loads the same tests file in child processes, one per variant (see :data:`VARIANTS`):
the floor (csv module + bare driver, no checks), fleetdb's import through the library,
and the ``fleetdb import`` console script (which also refreshes the health board).

Wall time, CPU time (user + system) and peak resident memory come from the kernel's
account of each child (``os.wait4``). The variants run interleaved, so a busy spell on
a shared machine hits them alike; each repetition's own ratio is kept beside the ratio
of medians. After each run the stored counts and column sums are compared with the
floor's, so the floor is known to have stored what fleetdb stored.

Run by hand (not a test; nothing here asserts a speed)::

    python -m tests.bench.bench_import               # 20,000 units, 3 runs each
    python -m tests.bench.bench_import --small       # 300 units, 1 run (what CI runs)
    python -m tests.bench.bench_import --pg postgresql://postgres@127.0.0.1/postgres

Results print as a table and go to ``tests/bench/out/import-*.json`` (git-ignored).
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import os
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime
from decimal import Decimal
from pathlib import Path
from typing import Any

# Keep the imports above to the standard library. The floor runs this module in a child
# process and its time and memory should be the floor's own; and the parent must stay
# small, since a child's peak RSS (ru_maxrss) counts the parent's size at the fork.

REPO = Path(__file__).resolve().parents[2]
OUT = Path(__file__).resolve().parent / "out"
FULL_UNITS = 20_000
SMALL_UNITS = 300
FLOOR_CHUNK = 100_000  # reading rows per executemany / COPY while streaming the file
GOAL_RATIO = 1.5
GOAL_RSS_BYTES = 2 * 1024**3
PG_ENV = "FLEETDB_BENCH_PG_URL"
#: key -> (label, what runs). "floor" is the baseline of every ratio.
VARIANTS: dict[str, tuple[str, str]] = {
    "floor": ("floor", "csv module + the driver's executemany (SQLite) or COPY (PostgreSQL), "
              "one transaction, no checks"),
    "ingest": ("ours: import", "fleetdb.ingest.import_files: read, validate, convert, group, "
               "write, commit"),
    "cli": ("ours: CLI", "the 'fleetdb import' command: the same, then the health refresh "
            "it runs after every write"),
}


@dataclass
class Measured:
    """One child process: wall and CPU seconds, peak RSS, exit status."""

    seconds: float
    cpu_seconds: float
    peak_rss_bytes: int
    returncode: int
    killed_over_rss: bool = False
    stderr: str = ""
    #: With ``tree=True``: the highest sum over the child and its descendants, sampled.
    tree_peak_pss_bytes: int | None = None
    tree_peak_rss_bytes: int | None = None
    tree_max_processes: int | None = None


@dataclass
class Variant:
    """Every run of one variant on one database engine."""

    key: str
    backend: str
    runs: list[Measured] = field(default_factory=list)
    setup_seconds: list[float] = field(default_factory=list)  # init + fleet import, untimed
    stored: list[list[tuple]] = field(default_factory=list)  # fingerprint after each run
    error: str | None = None  # why it failed; it is not run again

    @property
    def label(self) -> str:
        """The name printed in the table."""
        return VARIANTS[self.key][0]

    def median(self, what: str = "seconds") -> float | None:
        """Median of a :class:`Measured` field over the runs (None if none completed)."""
        return statistics.median(getattr(r, what) for r in self.runs) if self.runs else None

    @property
    def peak_rss_bytes(self) -> int | None:
        """Highest peak RSS over the runs."""
        return max(r.peak_rss_bytes for r in self.runs) if self.runs else None


# -- child processes ------------------------------------------------------------------------

def run_measured(cmd: list[str], *, rss_limit_bytes: int | None = None,
                 tree: bool = False) -> Measured:
    """Run a command to completion; measure its wall time, CPU time and peak memory.

    CPU time counts the child and every descendant it waited for. The kernel's peak
    resident set (``ru_maxrss``) is that of the largest single process, not a sum: a
    command that works in several processes at once needs ``tree``.

    :param cmd: the command and its arguments.
    :param rss_limit_bytes: kill the child if its resident memory goes beyond this (the
        machine is shared: a runaway import must not take it down).
    :param tree: also sample, every 0.2 s, the memory of the child and all its
        descendants together: the sum of their PSS (proportional set size: a page shared
        by n processes, such as a forked worker's inherited data, counts 1/n in each, so
        the sum is the memory really used) and of their RSS (which counts shared pages
        in every process). A sample can miss a peak shorter than the interval.
    """
    with tempfile.TemporaryFile("w+") as err:
        start = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=err, cwd=REPO)
        killed, done = threading.Event(), threading.Event()
        if rss_limit_bytes:
            threading.Thread(target=_rss_guard, args=(proc.pid, rss_limit_bytes, killed, done),
                             daemon=True).start()
        peaks = {"pss": 0, "rss": 0, "processes": 0}
        sampler = None
        if tree:
            sampler = threading.Thread(target=_tree_sampler, args=(proc.pid, peaks, done),
                                       daemon=True)
            sampler.start()
        _, status, usage = os.wait4(proc.pid, 0)
        seconds = time.perf_counter() - start
        done.set()
        if sampler is not None:
            sampler.join()
        proc.returncode = os.waitstatus_to_exitcode(status)
        err.seek(0)
        # ru_maxrss is in kilobytes on Linux.
        return Measured(seconds, usage.ru_utime + usage.ru_stime, usage.ru_maxrss * 1024,
                        proc.returncode, killed.is_set(), err.read()[-4000:],
                        peaks["pss"] or None if tree else None,
                        peaks["rss"] or None if tree else None,
                        peaks["processes"] or None if tree else None)


def _descendants(pid: int) -> list[int]:
    """``pid`` and every process below it (from /proc/PID/task/*/children)."""
    found, queue = [], [pid]
    while queue:
        current = queue.pop()
        found.append(current)
        for task in Path(f"/proc/{current}/task").glob("*/children"):
            try:
                queue += [int(c) for c in task.read_text().split()]
            except OSError:
                continue
    return found


def _tree_sampler(pid: int, peaks: dict[str, int], done: threading.Event) -> None:
    """Record the highest PSS and RSS sums of the process tree under ``pid``."""
    while not done.wait(0.2):
        pss = rss = count = 0
        for member in _descendants(pid):
            try:
                for line in Path(f"/proc/{member}/smaps_rollup").read_text().splitlines():
                    if line.startswith("Pss:"):
                        pss += int(line.split()[1]) * 1024
                    elif line.startswith("Rss:"):
                        rss += int(line.split()[1]) * 1024
                count += 1
            except (OSError, ValueError):
                continue
        peaks["pss"], peaks["rss"] = max(peaks["pss"], pss), max(peaks["rss"], rss)
        peaks["processes"] = max(peaks["processes"], count)


def _rss_guard(pid: int, limit: int, killed: threading.Event, done: threading.Event) -> None:
    """Poll the child's resident set; kill it beyond ``limit`` bytes."""
    status = Path(f"/proc/{pid}/status")
    while not done.wait(0.2):
        try:
            rss_kb = next(int(line.split()[1]) for line in status.read_text().splitlines()
                          if line.startswith("VmRSS:"))
        except (OSError, StopIteration, ValueError):
            return
        if rss_kb * 1024 > limit:
            killed.set()
            os.kill(pid, 9)
            return


def fleetdb_command() -> list[str]:
    """The installed console script beside this interpreter, else ``python -m fleetdb``."""
    script = Path(sys.executable).parent / "fleetdb"
    return [str(script)] if script.exists() else [sys.executable, "-m", "fleetdb"]


def _check(measured: Measured, what: str) -> Measured:
    if measured.killed_over_rss:
        raise RuntimeError(f"{what}: killed, resident memory went over the limit "
                           f"(peak {measured.peak_rss_bytes / 1e9:.1f} GB)")
    if measured.returncode != 0:
        raise RuntimeError(f"{what} failed (exit {measured.returncode}):\n{measured.stderr}")
    return measured


def prepare_database(url: str, fleet_csv: Path) -> float:
    """``fleetdb init``, then the fleet file through the library; return the seconds taken.

    The fleet goes in without the CLI's health refresh: setting up is not what is measured.
    """
    start = time.perf_counter()
    _check(run_measured([*fleetdb_command(), "init", "--db", url]), "fleetdb init")
    _check(run_measured(ingest_command(fleet_csv, url)), "import of fleet.csv")
    return time.perf_counter() - start


def ingest_command(csv_file: Path, url: str) -> list[str]:
    """A child process importing one file through ``fleetdb.ingest`` (no refresh)."""
    return [sys.executable, "-m", "tests.bench.bench_import", "--ingest", str(csv_file), url]


def ingest_file(csv_file: Path, url: str) -> str:
    """Import one file as ``fleetdb import`` does, minus the health refresh afterwards.

    :param csv_file: a fleet, tests or events file.
    :param url: the database, already at the newest schema.
    :returns: the import's summary line.
    """
    from fleetdb import config, db, ingest, migrate

    engine = db.get_engine(config.database_url(url))
    migrate.ensure_current(engine)
    return "\n".join(r.summary() for r in ingest.import_files(engine, [csv_file]))


# -- the floor ------------------------------------------------------------------------------

def load_floor(tests_csv: Path, url: str) -> tuple[int, int]:
    """Load a tests file with the csv module and the bare driver: no checks of any kind.

    Writes the same columns fleetdb writes (values converted to kPa, the typed text kept,
    conditions from each test's first row), streaming in chunks inside one transaction. It
    relies on each test's rows being consecutive, as in the synthetic file; blank
    condition cells become NULL and the database's own column types parse the numbers.

    :param tests_csv: a tests file whose units are already in the database.
    :param url: ``sqlite:///path`` or a PostgreSQL URL.
    :returns: (tests written, readings written).
    """
    from fleetdb.units import KPA_PER_UNIT

    factor = {**KPA_PER_UNIT, "%": 1.0}
    db = _FloorSqlite(url) if url.startswith("sqlite") else _FloorPostgres(url)
    at = db.time(datetime.now(UTC).replace(microsecond=0))
    throttle = {"yes": db.true, "no": db.false}
    unit_ids = dict(db.query("SELECT fleet_no, id FROM unit").fetchall())
    test_id = db.query("SELECT COALESCE(MAX(id), 0) FROM test").fetchone()[0]
    batch_id = db.query(
        "INSERT INTO import_batch (file_name, content_sha256, file_kind, rows_read, "
        "rows_written, rows_present, outcome, created_at, created_by) "
        "VALUES (?, ?, 'tests', 0, 0, 0, 'imported', ?, 'bench') RETURNING id",
        (tests_csv.name, uuid.uuid4().hex, at)).fetchone()[0]
    tests: list[tuple] = []
    readings: list[tuple] = []
    n_tests = n_readings = 0
    with open(tests_csv, newline="", encoding="utf-8-sig") as handle:
        reader = csv.reader(handle)
        col = {name: i for i, name in enumerate(next(reader))}
        i_fleet, i_at, i_hours = col["fleet_no"], col["tested_at"], col["hours"]
        i_kind, i_cyl, i_value, i_unit = col["kind"], col["cylinder"], col["value"], col["units"]
        i_cond = [col[c] for c in ("battery_v", "crank_rpm", "engine_temp_c", "baro_kpa")]
        i_throttle, i_tech, i_note = col["throttle_open"], col["technician"], col["note"]
        previous = None
        for row in reader:
            key = (row[i_fleet], row[i_at], row[i_hours])
            if key != previous:
                previous = key
                test_id += 1
                stamp = row[i_at]
                stamp = stamp + (":00.000000" if len(stamp) == 16 else " 00:00:00.000000")
                tests.append((test_id, unit_ids[row[i_fleet]], stamp, row[i_hours],
                              *(row[i] or None for i in i_cond),
                              throttle.get(row[i_throttle]), row[i_tech] or None,
                              row[i_note] or None, "csv", batch_id, at, "bench"))
            value, unit = row[i_value], row[i_unit]
            readings.append((test_id, row[i_kind], row[i_cyl] or None,
                             float(value) * factor[unit], value, unit))
            if len(readings) >= FLOOR_CHUNK:
                db.write(tests, readings)
                n_tests, n_readings = n_tests + len(tests), n_readings + len(readings)
                tests, readings = [], []
    db.write(tests, readings)
    db.finish()
    return n_tests + len(tests), n_readings + len(readings)


_COLUMNS = {
    "test": ("id", "unit_id", "tested_at", "hours", "battery_v", "crank_rpm", "engine_temp_c",
             "baro_kpa", "throttle_open", "technician", "note", "source", "batch_id",
             "created_at", "created_by"),
    "reading": ("test_id", "kind", "cylinder", "value_si", "typed_value", "typed_unit"),
}


class _FloorSqlite:
    """The bare sqlite3 module, with fleetdb's pragmas (WAL, foreign keys, NORMAL sync)."""

    true, false = 1, 0

    def __init__(self, url: str):
        self.conn = sqlite3.connect(url.removeprefix("sqlite:///"), isolation_level=None)
        for pragma in ("journal_mode=WAL", "foreign_keys=ON", "synchronous=NORMAL"):
            self.conn.execute(f"PRAGMA {pragma}")
        self.conn.execute("BEGIN IMMEDIATE")
        self.insert = {table: f"INSERT INTO {table} ({', '.join(cols)}) VALUES "
                              f"({', '.join('?' * len(cols))})" for table, cols in _COLUMNS.items()}

    def time(self, moment: datetime) -> str:
        """A date-time as SQLAlchemy stores it in SQLite."""
        return moment.strftime("%Y-%m-%d %H:%M:%S.%f")

    def query(self, sql: str, params: tuple = ()) -> Any:
        return self.conn.execute(sql, params)

    def write(self, tests: list[tuple], readings: list[tuple]) -> None:
        self.conn.executemany(self.insert["test"], tests)
        self.conn.executemany(self.insert["reading"], readings)

    def finish(self) -> None:
        self.conn.execute("COMMIT")
        self.conn.close()


class _FloorPostgres:
    """Bare psycopg: COPY of each chunk, one transaction."""

    true, false = True, False

    def __init__(self, url: str):
        import psycopg

        self.conn = psycopg.connect(_libpq_url(url))

    def time(self, moment: datetime) -> datetime:
        return moment

    def query(self, sql: str, params: tuple = ()) -> Any:
        return self.conn.execute(sql.replace("?", "%s"), params)

    def write(self, tests: list[tuple], readings: list[tuple]) -> None:
        with self.conn.cursor() as cur:
            for table, rows in (("test", tests), ("reading", readings)):
                with cur.copy(f"COPY {table} ({', '.join(_COLUMNS[table])}) FROM STDIN") as copy:
                    for row in rows:
                        copy.write_row(row)

    def finish(self) -> None:
        self.conn.execute("SELECT setval(pg_get_serial_sequence('test', 'id'), "
                          "(SELECT MAX(id) FROM test))")
        self.conn.commit()
        self.conn.close()


def _libpq_url(url: str) -> str:
    """A SQLAlchemy PostgreSQL URL as libpq wants it (no ``+driver``)."""
    scheme, rest = url.split("://", 1)
    return "postgresql://" + rest if scheme.startswith("postgres") else url


# -- comparing what was stored --------------------------------------------------------------

_FINGERPRINT = (
    "SELECT COUNT(*), SUM(value_si), COUNT(cylinder), SUM(LENGTH(typed_value)) FROM reading",
    "SELECT COUNT(*), SUM(hours), SUM(battery_v), SUM(crank_rpm), "
    "COUNT(baro_kpa), SUM(CASE WHEN throttle_open THEN 1 ELSE 0 END), COUNT(note), "
    "CAST(MIN(tested_at) AS VARCHAR(40)), CAST(MAX(tested_at) AS VARCHAR(40)) FROM test",
)


def fingerprint(url: str) -> list[tuple]:
    """Counts and sums over the stored readings and tests, to compare two databases."""
    if url.startswith("sqlite"):
        conn: Any = sqlite3.connect(url.removeprefix("sqlite:///"))
    else:
        import psycopg

        conn = psycopg.connect(_libpq_url(url))
    try:
        return [tuple(conn.execute(q).fetchone()) for q in _FINGERPRINT]
    finally:
        conn.close()


def _compare_content(group: list[Variant], counts: dict[str, int]) -> list[str]:
    """Problems, if a run stored other content than the floor's first run, or not all of it."""
    floor = group[0]
    if not floor.stored:
        return []
    reference = floor.stored[0]
    if reference[0][0] != counts["readings"] or reference[1][0] != counts["tests"]:
        return [f"{floor.backend} floor stored {reference[1][0]} tests and {reference[0][0]} "
                f"readings; the file holds {counts['tests']} and {counts['readings']}"]
    problems = []
    flat_reference = [v for row in reference for v in row]
    for variant in group:
        for stored in variant.stored:
            for got, want in zip([v for row in stored for v in row], flat_reference, strict=True):
                same = (got is not None and math.isclose(float(got), float(want), rel_tol=1e-9)
                        if isinstance(want, (int, float, Decimal)) else got == want)
                if not same:
                    problems.append(f"{variant.backend} {variant.label} stored other content "
                                    f"than the floor: {stored} vs {reference}")
                    break
    return problems


@contextmanager
def _fresh_database(tmp: Path, name: str, pg_admin: str | None) -> Iterator[str]:
    """An empty database, removed afterwards: a SQLite file, or a PostgreSQL database made
    beside ``pg_admin``'s."""
    if not pg_admin:
        path = tmp / f"{name}.sqlite"
        try:
            yield f"sqlite:///{path}"
        finally:
            for suffix in ("", "-wal", "-shm"):
                Path(f"{path}{suffix}").unlink(missing_ok=True)
        return
    import psycopg

    db_name = f"fleetdb_bench_{uuid.uuid4().hex[:10]}"
    with psycopg.connect(_libpq_url(pg_admin), autocommit=True) as conn:
        conn.execute(f'CREATE DATABASE "{db_name}"')
    try:
        yield _libpq_url(pg_admin).rpartition("/")[0] + f"/{db_name}"
    finally:
        with psycopg.connect(_libpq_url(pg_admin), autocommit=True) as conn:
            conn.execute(f'DROP DATABASE IF EXISTS "{db_name}" WITH (FORCE)')


# -- the benchmark --------------------------------------------------------------------------

def run(units: int, repeat: int, *, seed: int = 1, pg_url: str | None = None,
        data_dir: Path | None = None, rss_limit_gb: float = 10.0,
        variants: tuple[str, ...] = tuple(VARIANTS)) -> dict[str, Any]:
    """Generate (or reuse) the synthetic fleet, measure each variant, print, save as JSON.

    :param units: fleet size (40 tests per unit, about 6 readings per test).
    :param repeat: runs of each variant (medians are reported).
    :param seed: seed of the synthetic fleet.
    :param pg_url: also measure on this PostgreSQL server (scratch databases are made and
        dropped beside the one named in the URL).
    :param data_dir: where the CSV files are kept between runs.
    :param rss_limit_gb: kill a child whose resident memory goes beyond this.
    :param variants: which of :data:`VARIANTS` to run; the floor is always run.
    :returns: the results, as written to the JSON file.
    :raises RuntimeError: after printing and saving, when a variant failed or stored other
        content than the floor.
    """
    data_dir = data_dir or OUT / "data" / f"synth-{units}u-seed{seed}"
    started = time.perf_counter()
    paths, counts = write_synthetic(data_dir, units, seed)
    generate_s = time.perf_counter() - started
    rows = counts["tests"] + counts["readings"]
    load_before = os.getloadavg()
    keys = ["floor"] + [k for k in VARIANTS if k in variants and k != "floor"]
    measured: list[Variant] = []
    problems: list[str] = []
    with tempfile.TemporaryDirectory(prefix="fleetdb-bench-") as tmp:
        backends = [("sqlite", None)] + ([("postgresql", pg_url)] if pg_url else [])
        for backend, admin in backends:
            group = [Variant(k, backend) for k in keys]
            for i in range(repeat):
                for variant in group:  # interleaved, so drift on the machine hits all alike
                    if variant.error is None:
                        _one_run(variant, i, paths, Path(tmp), admin,
                                 int(rss_limit_gb * 1024**3))
            problems += [f"{v.backend} {v.label}: {v.error}" for v in group if v.error]
            problems += _compare_content(group, counts)
            measured += group
    result = {
        "benchmark": "import",
        "when": datetime.now(UTC).isoformat(timespec="seconds"),
        "commit": _git_commit(),
        "machine": {"cpus": os.cpu_count(), "loadavg_before": load_before,
                    "loadavg_after": os.getloadavg(), "python": sys.version.split()[0],
                    "sqlite": sqlite3.sqlite_version},
        "data": {**counts, "rows": rows, "generate_or_reuse_seconds": round(generate_s, 1),
                 "tests_csv_bytes": paths["tests"].stat().st_size},
        "repeat": repeat,
        "goal": {"ratio": GOAL_RATIO, "peak_rss_bytes": GOAL_RSS_BYTES},
        "variants": [_as_json(v, rows, measured) for v in measured],
        "problems": problems,
    }
    _print(result, measured)
    OUT.mkdir(exist_ok=True)
    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    target = OUT / f"import-{units}u-{stamp}.json"
    target.write_text(json.dumps(result, indent=2, default=str) + "\n")
    print(f"results: {target.relative_to(REPO)}")
    if problems:
        raise RuntimeError("import benchmark: " + "; ".join(p.splitlines()[0] for p in problems))
    return result


def _git_commit() -> str:
    """HEAD of the checkout measured, with ``+dirty`` when fleetdb/ has local changes."""
    def git(*args: str) -> str:
        return subprocess.run(["git", *args], cwd=REPO, capture_output=True, text=True,
                              check=False).stdout.strip()

    dirty = git("status", "--porcelain", "--", "fleetdb", "migrations")
    return (git("rev-parse", "--short", "HEAD") or "unknown") + ("+dirty" if dirty else "")


def write_synthetic(folder: Path, units: int, seed: int) -> tuple[dict[str, Path], dict[str, int]]:
    """Write (or reuse) the synthetic fleet in a child process; return its paths and counts.

    A child, because the kernel's peak-memory figure of each measured process starts from
    this process's size at the fork: this one stays small by never importing numpy/pandas.
    """
    _check(run_measured([sys.executable, "-m", "tests.bench.synth", str(folder),
                         "--units", str(units), "--seed", str(seed)]), "tests.bench.synth")
    counts = json.loads((folder / "synth.json").read_text())
    return {"fleet": folder / "fleet.csv", "tests": folder / "tests.csv"}, counts


def _one_run(variant: Variant, i: int, paths: dict[str, Path], tmp: Path, pg_admin: str | None,
             rss_limit: int) -> None:
    """Fresh database with the fleet loaded, then the measured load of the tests file."""
    with _fresh_database(tmp, f"{variant.key}-{i}", pg_admin) as url:
        variant.setup_seconds.append(prepare_database(url, paths["fleet"]))
        command = {
            "floor": [sys.executable, "-m", "tests.bench.bench_import", "--floor",
                      str(paths["tests"]), url],
            "ingest": ingest_command(paths["tests"], url),
            "cli": [*fleetdb_command(), "import", str(paths["tests"]), "--db", url],
        }[variant.key]
        run = run_measured(command, rss_limit_bytes=rss_limit)
        try:
            _check(run, f"run {i + 1}")
        except RuntimeError as exc:
            variant.error = str(exc)
            tail = "\n".join("    " + line for line in run.stderr.strip().splitlines()[-6:])
            print(f"  {variant.backend:10s} {variant.label:12s} run {i + 1}: FAILED after "
                  f"{run.seconds:.1f} s:\n{tail}", flush=True)
            return
        variant.runs.append(run)
        variant.stored.append(fingerprint(url))
    print(f"  {variant.backend:10s} {variant.label:12s} run {i + 1}: {run.seconds:7.1f} s, "
          f"CPU {run.cpu_seconds:7.1f} s, peak RSS {run.peak_rss_bytes / 1e6:7.0f} MB",
          flush=True)


def _ratios(variant: Variant, group: list[Variant], what: str = "seconds") -> dict[str, Any]:
    """Median over the floor's median, and each repetition over the floor's same one."""
    floor = next(v for v in group if v.backend == variant.backend and v.key == "floor")
    mine, base = variant.median(what), floor.median(what)
    return {"of_medians": mine / base if mine and base else None,
            "per_run": [getattr(r, what) / getattr(f, what)
                        for r, f in zip(variant.runs, floor.runs, strict=False)]}


def _as_json(variant: Variant, rows: int, group: list[Variant]) -> dict[str, Any]:
    median = variant.median()
    return {**asdict(variant), "label": variant.label, "what": VARIANTS[variant.key][1],
            "median_seconds": median, "median_cpu_seconds": variant.median("cpu_seconds"),
            "rows_per_second": rows / median if median else None,
            "peak_rss_bytes": variant.peak_rss_bytes,
            "ratio_to_floor": _ratios(variant, group),
            "cpu_ratio_to_floor": _ratios(variant, group, "cpu_seconds")}


def _print(result: dict[str, Any], group: list[Variant]) -> None:
    data = result["data"]
    print(f"\nimport of tests.csv: {data['units']:,} units, {data['tests']:,} tests, "
          f"{data['readings']:,} readings = {data['rows']:,} rows written "
          f"({data['tests_csv_bytes'] / 1e6:.0f} MB of CSV); {result['repeat']} run(s) each, "
          f"load average before {result['machine']['loadavg_before'][0]:.1f}")
    head = (f"{'backend':10s}  {'variant':12s}  {'median s':>8s}  {'runs s':20s}  "
            f"{'rows/s':>9s}  {'CPU s':>7s}  {'peak RSS MB':>11s}  {'x floor':>7s}  "
            f"{'CPU x floor':>11s}")
    print(head + "\n" + "-" * len(head))
    for v in group:
        runs = " ".join(f"{r.seconds:.1f}" for r in v.runs) + (" FAILED" if v.error else "")
        median = v.median()
        if median is None:
            print(f"{v.backend:10s}  {v.label:12s}  {'-':>8s}  {runs:20s}")
            continue
        ratio, cpu_ratio = _ratios(v, group), _ratios(v, group, "cpu_seconds")
        print(f"{v.backend:10s}  {v.label:12s}  {median:8.1f}  {runs:20s}  "
              f"{data['rows'] / median:9,.0f}  {v.median('cpu_seconds'):7.1f}  "
              f"{v.peak_rss_bytes / 1e6:11,.0f}  "
              + ("" if v.key == "floor" else
                 f"{ratio['of_medians']:7.2f}  {cpu_ratio['of_medians']:11.2f}"))
    for v in group:
        if v.key == "floor" or v.median() is None:
            continue
        ratio, rss = _ratios(v, group), v.peak_rss_bytes or 0
        per_run = " ".join(f"{r:.2f}" for r in ratio["per_run"])
        print(f"{v.backend} {v.label}: {ratio['of_medians']:.2f} x floor [per run {per_run}] "
              f"(goal <= {GOAL_RATIO}: {'met' if ratio['of_medians'] <= GOAL_RATIO else 'NOT met'}"
              f"); peak RSS {rss / 1024**3:.2f} GiB (goal < 2 GiB: "
              f"{'met' if rss < GOAL_RSS_BYTES else 'NOT met'})")
    for key in dict.fromkeys(v.key for v in group):
        print(f"  {VARIANTS[key][0]}: {VARIANTS[key][1]}")
    for problem in result["problems"]:
        print(f"PROBLEM: {problem.splitlines()[0]}")


def main(small: bool = False, units: int | None = None) -> None:
    """Run the import benchmark (the entry point ``run_all`` calls).

    :param small: a few hundred units and one run each, as CI does.
    :param units: fleet size, overriding the scale's default.
    """
    n_units = units or (SMALL_UNITS if small else FULL_UNITS)
    run(n_units, 1 if small else 3, pg_url=os.environ.get(PG_ENV) or None)


def _cli() -> None:
    parser = argparse.ArgumentParser(
        description="Time 'fleetdb import tests.csv' against the csv + driver floor.")
    parser.add_argument("--small", action="store_true",
                        help=f"{SMALL_UNITS} units, one run each (CI)")
    parser.add_argument("--units", type=int, help=f"fleet size [default {FULL_UNITS:,}]")
    parser.add_argument("--repeat", type=int, help="runs of each variant [3; 1 with --small]")
    parser.add_argument("--seed", type=int, default=1, help="seed of the synthetic fleet")
    parser.add_argument("--pg", metavar="URL", default=os.environ.get(PG_ENV),
                        help=f"also measure on this PostgreSQL server [${PG_ENV}]")
    parser.add_argument("--data-dir", type=Path, help="where the CSV files are kept")
    parser.add_argument("--rss-limit-gb", type=float, default=10.0,
                        help="kill a child that uses more memory than this [10]")
    parser.add_argument("--variants", default=",".join(VARIANTS),
                        help=f"which to run, comma-separated, from {', '.join(VARIANTS)} "
                             "(the floor always runs)")
    parser.add_argument("--floor", nargs=2, metavar=("TESTS_CSV", "URL"), help=argparse.SUPPRESS)
    parser.add_argument("--ingest", nargs=2, metavar=("CSV", "URL"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.floor:
        n_tests, n_readings = load_floor(Path(args.floor[0]), args.floor[1])
        print(f"floor: wrote {n_tests} tests, {n_readings} readings")
        return
    if args.ingest:
        print(ingest_file(Path(args.ingest[0]), args.ingest[1]))
        return
    chosen = tuple(v.strip() for v in args.variants.split(",") if v.strip())
    if set(chosen) - set(VARIANTS):
        parser.error(f"unknown variant(s) {', '.join(sorted(set(chosen) - set(VARIANTS)))}")
    n_units = args.units or (SMALL_UNITS if args.small else FULL_UNITS)
    run(n_units, args.repeat or (1 if args.small else 3), seed=args.seed, pg_url=args.pg,
        data_dir=args.data_dir, rss_limit_gb=args.rss_limit_gb, variants=chosen)


if __name__ == "__main__":
    _cli()
