"""Load benchmark: ``fleetdb serve`` under 20 reading clients and 2 writers, and how many
concurrent writers each engine holds.

Loopback only and bounded: every client makes a fixed number of requests and the run stops
by itself. Two parts:

* **serve**: the demo fleet (``fleetdb demo --no-serve``; or the synthetic fleet of
  :mod:`tests.bench.synth` with ``--units``) in a SQLite file, served by ``python -m
  fleetdb serve`` on 127.0.0.1 and a free port. 20 reader threads, each with its own
  keep-alive connection, cycle through the pages' requests: ``GET /``, ``GET
  /unit?fleet_no=...``, ``GET /_dash-layout``, ``GET /_dash-dependencies`` and the two data
  callbacks a browser POSTs to ``/_dash-update-component`` (the Health board's table, the
  Unit history's summary). Every reader logs in first (``POST /login`` as a manager)
  and sends its session cookie, so each request passes the login and role checks.
  Meanwhile 2 writer processes log tests as ``fleetdb log`` does
  (``fleetdb.logbook.log_test``, then ``fleetdb.health.refresh_units``). Baselines from
  the same run: the server's floor (20 clients fetching a static file, ``/_favicon.ico``)
  and the same request mix from one client alone. Afterwards every logged test must be in
  the store exactly once, and no request may have failed.
* **writers**: 1, 2 and 4 processes logging tests at once (``log_test``) into the demo
  fleet on SQLite (WAL, busy timeout) and on PostgreSQL (``FLEETDB_BENCH_PG_URL``, else
  the test server ``FLEETDB_TEST_PG_URL`` when it answers; a scratch database is created
  and dropped): committed tests per second, latency per test, and exactly-once.

Speed is printed, never asserted; a failed request or a lost write makes ``main`` exit 1.
Results go to ``tests/bench/out/load-*.json``.

    python -m tests.bench.bench_load            # 20 x 60 requests, writers 1/2/4 x 25 tests
    python -m tests.bench.bench_load --small    # 20 x 6 requests, writers 1/2 x 6 tests
"""

from __future__ import annotations

import argparse
import datetime as dt
import http.client
import json
import multiprocessing
import os
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import urllib.parse
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parents[2]
OUT = Path(__file__).resolve().parent / "out"
READERS = 20
WRITERS = 2
PG_ENV = "FLEETDB_BENCH_PG_URL"
TEST_PG_URL = os.environ.get("FLEETDB_TEST_PG_URL",
                             "postgresql+psycopg://postgres@127.0.0.1:5432/test")
SCALE = {  # requests per reader, tests per serve writer, writer counts, tests per writer
    "full": {"requests": 60, "serve_writes": 20, "writers": (1, 2, 4), "writes": 25},
    "small": {"requests": 6, "serve_writes": 3, "writers": (1, 2), "writes": 6},
}
KINDS = ("page /", "page /unit", "dash layout", "dash dependencies", "callback board",
         "callback unit")


# -- timings -------------------------------------------------------------------------------

@dataclass
class Timings:
    """Latencies (ms) by request kind, errors, and the wall clock of a run."""

    ms: dict[str, list[float]] = field(default_factory=dict)
    errors: list[str] = field(default_factory=list)
    seconds: float = 0.0

    def add(self, kind: str, ms: float) -> None:
        self.ms.setdefault(kind, []).append(ms)

    def all_ms(self) -> list[float]:
        return [v for values in self.ms.values() for v in values]

    def summary(self, clients: int) -> dict[str, Any]:
        values = self.all_ms()
        return {"clients": clients, "requests": len(values) + len(self.errors),
                "errors": len(self.errors), "seconds": round(self.seconds, 3),
                "per_second": round(len(values) / self.seconds, 1) if self.seconds else None,
                **percentiles(values),
                "by_kind": {k: {"n": len(v), **percentiles(v)} for k, v in self.ms.items()},
                "first_errors": self.errors[:5]}


def percentiles(values: list[float]) -> dict[str, float | None]:
    """p50 and p95 (ms), by the 'exclusive' method of ``statistics.quantiles``."""
    if len(values) < 2:
        return {"p50_ms": round(values[0], 1) if values else None, "p95_ms": None}
    cuts = statistics.quantiles(values, n=100)
    return {"p50_ms": round(statistics.median(values), 1), "p95_ms": round(cuts[94], 1)}


# -- the store ------------------------------------------------------------------------------

def fleetdb(*args: str, check: bool = True) -> subprocess.CompletedProcess:
    """Run ``python -m fleetdb ARGS`` (quietly) in the repository."""
    return subprocess.run([sys.executable, "-m", "fleetdb", *args], cwd=REPO, check=check,
                          capture_output=True, text=True)


def build_store(url: str, units: int | None, folder: Path) -> dict[str, Any]:
    """The demo fleet, or ``units`` synthetic units with their tests, in ``url``."""
    start = time.perf_counter()
    if units is None:
        fleetdb("demo", "--no-serve", "--db", url)
        what = "demo fleet"
    else:
        from tests.bench import synth

        paths = synth.write_fleet(folder / f"synth-{units}u", units, seed=1)
        fleetdb("init", "--db", url)
        fleetdb("import", "--db", url, str(paths["fleet"]), str(paths["tests"]))
        what = f"synthetic fleet ({units} units)"
    from sqlalchemy import create_engine, text

    engine = create_engine(url)
    with engine.connect() as conn:
        row = conn.execute(text("SELECT (SELECT COUNT(*) FROM unit), (SELECT COUNT(*) FROM "
                                "test), (SELECT COUNT(*) FROM reading)")).one()
        fleet = conn.execute(text("SELECT fleet_no FROM unit ORDER BY fleet_no")).scalars()
        fleet_nos = list(fleet)
    engine.dispose()
    if units is not None:
        fleetdb("refresh", "--db", url)
    subprocess.run([sys.executable, "-m", "fleetdb", "user", "add", READER[0], "--role",
                    "manager", "--password-stdin", "--db", url], cwd=REPO, check=True,
                   capture_output=True, text=True, input=READER[1] + "\n")
    return {"what": what, "units": row[0], "tests": row[1], "readings": row[2],
            "fleet_nos": fleet_nos, "build_seconds": round(time.perf_counter() - start, 1)}


def free_port() -> int:
    """A port on 127.0.0.1 that nothing listens on now."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


@contextmanager
def served(url: str, log: Path) -> Iterator[int]:
    """``fleetdb serve`` on 127.0.0.1 and a free port, stopped afterwards; yields the port."""
    port = free_port()
    with log.open("w") as err:
        server = subprocess.Popen([sys.executable, "-m", "fleetdb", "serve", "--db", url,
                                   "--host", "127.0.0.1", "--port", str(port)],
                                  cwd=REPO, stdout=subprocess.DEVNULL, stderr=err)
        try:
            deadline = time.monotonic() + 90
            while True:
                if server.poll() is not None:
                    raise RuntimeError(f"fleetdb serve exited: {log.read_text()[-2000:]}")
                try:
                    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=5)
                    conn.request("GET", "/_favicon.ico")
                    if conn.getresponse().status == 200:
                        conn.close()
                        break
                except OSError:
                    pass
                if time.monotonic() > deadline:
                    raise RuntimeError("fleetdb serve did not answer within 90 s")
                time.sleep(0.2)
            yield port
        finally:
            server.terminate()
            try:
                server.wait(timeout=20)
            except subprocess.TimeoutExpired:
                server.kill()
                server.wait()


# -- readers ---------------------------------------------------------------------------------

#: The user every reader logs in as (a manager reads everything), made by build_store.
READER = ("bench-manager", "bench manager password")


class Client:
    """One keep-alive HTTP connection to the server, as one browser tab would hold, logged
    in as :data:`READER` (its session cookie goes with every request)."""

    def __init__(self, port: int):
        self.conn = http.client.HTTPConnection("127.0.0.1", port, timeout=60)
        self.cookie = self.login(*READER)

    def login(self, name: str, password: str) -> str:
        """POST the login form; return the session cookie to send."""
        form = urllib.parse.urlencode({"name": name, "password": password}).encode()
        self.conn.request("POST", "/login", body=form,
                          headers={"Content-Type": "application/x-www-form-urlencoded"})
        reply = self.conn.getresponse()
        reply.read()
        cookie = reply.getheader("Set-Cookie") or ""
        if reply.status != 302 or not cookie:
            raise RuntimeError(f"login as {name}: HTTP {reply.status}")
        return cookie.split(";", 1)[0]

    def call(self, method: str, path: str, body: dict[str, Any] | None = None) -> bytes:
        payload = None if body is None else json.dumps(body).encode()
        headers = {"Content-Type": "application/json"} if payload else {}
        headers["Cookie"] = self.cookie
        self.conn.request(method, path, body=payload, headers=headers)
        reply = self.conn.getresponse()
        data = reply.read()
        if reply.status != 200:
            raise RuntimeError(f"{method} {path}: HTTP {reply.status} {data[:200]!r}")
        return data

    def close(self) -> None:
        self.conn.close()


def callback_body(deps: list[dict[str, Any]], output_id: str, values: dict[str, Any],
                  trigger: str) -> dict[str, Any]:
    """The JSON a browser POSTs to run the callback whose outputs include ``output_id``."""
    dep = next(d for d in deps if output_id in
               [part.rsplit(".", 1)[0] for part in d["output"].strip(".").split("...")])
    outputs = [{"id": part.split(".")[0], "property": part.split(".")[1]}
               for part in dep["output"].strip(".").split("...")]

    def filled(items: list[dict[str, Any]]) -> list[dict[str, Any]]:
        return [{**item, "value": values.get(f"{item['id']}.{item['property']}")}
                for item in items]
    return {"output": dep["output"], "outputs": outputs if len(outputs) > 1 else outputs[0],
            "inputs": filled(dep["inputs"]), "state": filled(dep.get("state", [])),
            "changedPropIds": [trigger]}


def request_mix(port: int, fleet_nos: list[str]) -> list[tuple[str, str, str, Any]]:
    """(kind, method, path, body) of each request kind, bodies built from the server's own
    callback list."""
    from dashboard import ids

    client = Client(port)
    deps = json.loads(client.call("GET", "/_dash-dependencies"))
    client.close()
    today = dt.date.today().isoformat()
    unit = fleet_nos[len(fleet_nos) // 2]
    board = callback_body(deps, ids.BOARD_TABLE, {f"{ids.BOARD_AS_OF}.date": today,
                                                  f"{ids.BOARD_TABLE}.page_current": 0},
                          f"{ids.BOARD_AS_OF}.date")
    summary = callback_body(deps, ids.UNIT_SUMMARY, {f"{ids.UNIT_PICK}.value": unit,
                                                     f"{ids.UNIT_AS_OF}.date": today,
                                                     f"{ids.UNIT_PRESSURE_UNIT}.value": "psi"},
                            f"{ids.UNIT_PICK}.value")
    return [("page /", "GET", "/", None),
            ("page /unit", "GET", f"/unit?fleet_no={unit}", None),
            ("dash layout", "GET", "/_dash-layout", None),
            ("dash dependencies", "GET", "/_dash-dependencies", None),
            ("callback board", "POST", "/_dash-update-component", board),
            ("callback unit", "POST", "/_dash-update-component", summary)]


def read_load(port: int, mix: list[tuple[str, str, str, Any]], clients: int,
              per_client: int) -> Timings:
    """``clients`` threads, each making ``per_client`` requests of the mix in turn."""
    timings = Timings()
    lock = threading.Lock()
    go = threading.Barrier(clients + 1)

    def reader(k: int) -> None:
        client = Client(port)
        go.wait()
        for i in range(per_client):
            kind, method, path, body = mix[(k + i) % len(mix)]
            start = time.perf_counter()
            try:
                data = client.call(method, path, body)
                if method == "POST" and "response" not in json.loads(data):
                    raise RuntimeError(f"{kind}: no response in the reply")
                with lock:
                    timings.add(kind, (time.perf_counter() - start) * 1000)
            except Exception as exc:  # noqa: BLE001 - every failure is counted and shown
                with lock:
                    timings.errors.append(f"{kind}: {type(exc).__name__}: {exc}")
                client.close()
                client = Client(port)
        client.close()

    threads = [threading.Thread(target=reader, args=(k,)) for k in range(clients)]
    for thread in threads:
        thread.start()
    go.wait()
    start = time.perf_counter()
    for thread in threads:
        thread.join()
    timings.seconds = time.perf_counter() - start
    return timings


# -- writers ----------------------------------------------------------------------------------

def writer_process(url: str, name: str, jobs: list[tuple[str, str, float]], refresh: bool,
                   barrier: Any, results: Any) -> None:
    """Log each (fleet_no, tested_at, hours) test as ``fleetdb log`` does; report timings."""
    from fleetdb import db, health, logbook, views

    engine = db.make_engine(url)
    times, errors = [], []
    barrier.wait(timeout=120)
    started = time.time()
    for fleet_no, tested_at, hours in jobs:
        readings = [logbook.TypedReading("compression", c, str(150 - c), "psi")
                    for c in range(1, 5)]
        begin = time.perf_counter()
        try:
            logbook.log_test(engine, fleet_no, tested_at, hours, readings, by=name,
                             conditions={"crank_rpm": "220", "technician": "bench"})
            if refresh:
                health.refresh_units(engine, [views.unit_id_for(engine, fleet_no)])
            times.append((time.perf_counter() - begin) * 1000)
        except Exception as exc:  # noqa: BLE001 - reported, and fails the benchmark
            errors.append(f"{fleet_no} {tested_at}: {type(exc).__name__}: {exc}"[:300])
    results.put({"name": name, "ms": times, "errors": errors, "started": started,
                 "finished": time.time()})
    engine.dispose()


def writer_jobs(url: str, count: int, per_writer: int, run: int,
                cylinders4: list[str]) -> list[list[tuple[str, str, float]]]:
    """Tests for ``count`` writers: later and at more hours than anything stored, each
    unit's hours rising with its time; run ``run`` comes after the earlier runs."""
    from sqlalchemy import create_engine, text

    engine = create_engine(url)
    with engine.connect() as conn:
        top_hours, last = conn.execute(text("SELECT COALESCE(MAX(hours), 0), MAX(tested_at) "
                                            "FROM test")).one()
    engine.dispose()
    # After every stored test (the demo's history runs to the end of today), and never
    # more than a day ahead, which an import refuses.
    base = max(dt.datetime.now().replace(microsecond=0) + dt.timedelta(hours=1),
               dt.datetime.fromisoformat(str(last)[:19]) + dt.timedelta(minutes=1))
    jobs: list[list[tuple[str, str, float]]] = [[] for _ in range(count)]
    for i in range(per_writer):
        for w in range(count):
            seq = 1 + run * 1000 + i * count + w
            fleet_no = cylinders4[seq % len(cylinders4)]
            jobs[w].append((fleet_no, f"{base + dt.timedelta(seconds=seq):%Y-%m-%d %H:%M:%S}",
                            round(top_hours + 10 + seq / 100, 2)))
    return jobs


def start_writers(url: str, jobs: list[list[tuple[str, str, float]]], prefix: str,
                  refresh: bool) -> tuple[list[Any], Any, Any]:
    ctx = multiprocessing.get_context("spawn")
    barrier, results = ctx.Barrier(len(jobs) + 1), ctx.Queue()
    procs = [ctx.Process(target=writer_process, args=(url, f"{prefix}{w}", job, refresh,
                                                      barrier, results))
             for w, job in enumerate(jobs)]
    for proc in procs:
        proc.start()
    return procs, barrier, results


def collect_writers(procs: list[Any], results: Any) -> dict[str, Any]:
    reports = [results.get(timeout=600) for _ in procs]
    for proc in procs:
        proc.join(timeout=60)
    ms = [v for r in reports for v in r["ms"]]
    seconds = max(r["finished"] for r in reports) - min(r["started"] for r in reports)
    return {"writers": len(procs), "tests": len(ms), "errors": sum(len(r["errors"])
                                                                  for r in reports),
            "seconds": round(seconds, 3), "tests_per_second": round(len(ms) / seconds, 1),
            **percentiles(ms), "names": [r["name"] for r in reports],
            "first_errors": [e for r in reports for e in r["errors"]][:5]}


def stored_once(url: str, names: list[str]) -> dict[str, int]:
    """Tests stored by these writers, and how many have other than four readings."""
    from sqlalchemy import bindparam, create_engine, text

    engine = create_engine(url)
    with engine.connect() as conn:
        query = text("SELECT COUNT(*), COALESCE(SUM(CASE WHEN n <> 4 THEN 1 ELSE 0 END), 0) "
                     "FROM (SELECT t.id, COUNT(r.id) AS n FROM test t LEFT JOIN reading r "
                     "ON r.test_id = t.id WHERE t.created_by IN :names GROUP BY t.id) x"
                     ).bindparams(bindparam("names", expanding=True))
        stored, incomplete = conn.execute(query, {"names": names}).one()
    engine.dispose()
    return {"stored": int(stored), "incomplete": int(incomplete)}


def four_cylinder_units(url: str) -> list[str]:
    from sqlalchemy import create_engine, text

    engine = create_engine(url)
    with engine.connect() as conn:
        units = conn.execute(text("SELECT u.fleet_no FROM unit u JOIN engine_family f ON "
                                  "f.id = u.family_id WHERE f.cylinders = 4 ORDER BY 1")).all()
    engine.dispose()
    return [u[0] for u in units]


# -- the two parts ---------------------------------------------------------------------------

def serve_part(url: str, info: dict[str, Any], scale: dict[str, Any], tmp: Path) -> dict:
    """Readers and writers against ``fleetdb serve``, with the floor and the lone client."""
    with served(url, tmp / "serve.log") as port:
        mix = request_mix(port, info["fleet_nos"])
        read_load(port, mix, 2, len(mix))  # warm-up: every kind once per client, untimed
        floor = read_load(port, [("static file", "GET", "/_favicon.ico", None)], READERS,
                          scale["requests"])
        alone = read_load(port, mix, 1, scale["requests"])
        units4 = four_cylinder_units(url)
        jobs = writer_jobs(url, WRITERS, scale["serve_writes"], 0, units4)
        procs, barrier, results = start_writers(url, jobs, "bench-serve-writer", True)
        barrier.wait(timeout=120)
        loaded = read_load(port, mix, READERS, scale["requests"])
        writes = collect_writers(procs, results)
    writes.update(stored_once(url, writes["names"]))
    server_log = None
    if floor.errors or alone.errors or loaded.errors:  # keep the server's tracebacks
        OUT.mkdir(parents=True, exist_ok=True)
        server_log = OUT / f"load-serve-{dt.datetime.now(dt.UTC):%Y%m%dT%H%M%SZ}.log"
        server_log.write_text((tmp / "serve.log").read_text())
    return {"floor": floor.summary(READERS), "alone": alone.summary(1),
            "loaded": loaded.summary(READERS), "writes": writes,
            "server_log": None if server_log is None else str(server_log.relative_to(REPO))}


def writers_part(url: str, engine_name: str, scale: dict[str, Any]) -> list[dict[str, Any]]:
    """1, 2, 4 processes logging tests at once (no server): tests per second, exactly once."""
    rows = []
    units4 = four_cylinder_units(url)
    for run, count in enumerate(scale["writers"], start=1):
        jobs = writer_jobs(url, count, scale["writes"], run, units4)
        procs, barrier, results = start_writers(url, jobs, f"bench-{engine_name}-{count}w-",
                                                False)
        barrier.wait(timeout=120)
        row = {"engine": engine_name, **collect_writers(procs, results)}
        row.update(stored_once(url, row["names"]))
        rows.append(row)
    return rows


@contextmanager
def pg_scratch() -> Iterator[str | None]:
    """A scratch PostgreSQL database (dropped afterwards), or None without a server."""
    import psycopg
    from sqlalchemy.engine import make_url

    admin = make_url(os.environ.get(PG_ENV) or TEST_PG_URL).set(drivername="postgresql")
    admin_dsn = admin.render_as_string(hide_password=False)
    try:
        psycopg.connect(admin_dsn, autocommit=True, connect_timeout=3).close()
    except psycopg.Error:
        yield None
        return
    name = f"fleetdb_bench_{uuid.uuid4().hex[:10]}"
    with psycopg.connect(admin_dsn, autocommit=True) as conn:
        conn.execute(f'CREATE DATABASE "{name}"')
    try:
        yield admin.set(drivername="postgresql+psycopg", database=name).render_as_string(
            hide_password=False)
    finally:
        with psycopg.connect(admin_dsn, autocommit=True) as conn:
            conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


# -- report ------------------------------------------------------------------------------------

def _row(label: str, s: dict[str, Any]) -> str:
    rate = s.get("per_second", s.get("tests_per_second"))
    return (f"| {label} | {s.get('clients', s.get('writers'))} | "
            f"{s.get('requests', s.get('tests'))} | {s['errors']} | {rate} | "
            f"{s['p50_ms']} | {s['p95_ms']} |")


def report(result: dict[str, Any]) -> list[str]:
    """Print the tables; return the problems (failed requests, lost writes)."""
    serve, store = result["serve"], result["store"]
    print(f"\nLoad on fleetdb serve (waitress, 8 threads), 127.0.0.1, {store['what']}: "
          f"{store['units']} units, {store['tests']} tests; load average "
          f"{result['loadavg_before']} before, {result['loadavg_after']} after")
    print("| run | clients | requests | errors | per s | p50 ms | p95 ms |")
    print("|---|---:|---:|---:|---:|---:|---:|")
    print(_row("floor: static file, 20 clients", serve["floor"]))
    print(_row("one client alone, page mix", serve["alone"]))
    print(_row("ours: 20 readers, page mix, 2 writers", serve["loaded"]))
    w = serve["writes"]
    print(_row("ours: the 2 writers (log + refresh)", w))
    by_kind = serve["loaded"]["by_kind"]
    for kind in (k for k in KINDS if k in by_kind):
        s = by_kind[kind]
        print(f"|   {kind} | | {s['n']} | | | {s['p50_ms']} | {s['p95_ms']} |")
    print(f"Writes: {w['tests']} logged, {w['stored']} stored, {w['incomplete']} incomplete")
    print("\nConcurrent writers (log_test, no server): tests committed per second")
    print("| engine | writers | tests | errors | tests/s | p50 ms | p95 ms | stored |")
    print("|---|---:|---:|---:|---:|---:|---:|---:|")
    for r in result["writers"]:
        print(f"| {r['engine']} | {r['writers']} | {r['tests']} | {r['errors']} | "
              f"{r['tests_per_second']} | {r['p50_ms']} | {r['p95_ms']} | {r['stored']} |")
    for note in result["notes"]:
        print(f"note: {note}")
    problems = []
    for label, part in (("floor", serve["floor"]), ("alone", serve["alone"]),
                        ("loaded", serve["loaded"])):
        problems += [f"{label}: {e}" for e in part["first_errors"]]
    for r in [w, *result["writers"]]:
        problems += r["first_errors"]
        if r["stored"] != r["tests"] or r["incomplete"]:
            problems.append(f"lost or partial writes: {r['tests']} logged, {r['stored']} "
                            f"stored, {r['incomplete']} incomplete ({r['names'][0]}...)")
    for problem in problems:
        print(f"PROBLEM: {problem}")
    return problems


def run(small: bool, units: int | None) -> dict[str, Any]:
    """Both parts; the result as JSON-ready data."""
    scale = SCALE["small" if small else "full"]
    result: dict[str, Any] = {"scale": "small" if small else "full", "notes": [],
                              "loadavg_before": [round(x, 1) for x in os.getloadavg()],
                              "started": dt.datetime.now(dt.UTC).isoformat(timespec="seconds")}
    with tempfile.TemporaryDirectory(prefix="fleetdb-load-") as folder:
        tmp = Path(folder)
        url = f"sqlite:///{tmp / 'load.sqlite'}"
        info = build_store(url, units, OUT / "data")
        result["store"] = {k: v for k, v in info.items() if k != "fleet_nos"}
        result["serve"] = serve_part(url, info, scale, tmp)
        writers_url = f"sqlite:///{tmp / 'writers.sqlite'}"
        build_store(writers_url, None, tmp)
        result["writers"] = writers_part(writers_url, "sqlite", scale)
        with pg_scratch() as pg_url:
            if pg_url is None:
                result["notes"].append("PostgreSQL: no server answered; writers not measured")
            else:
                build_store(pg_url, None, tmp)
                result["writers"] += writers_part(pg_url, "postgresql", scale)
    result["loadavg_after"] = [round(x, 1) for x in os.getloadavg()]
    return result


def main(small: bool = False, units: int | None = None) -> None:
    """Run the load benchmark (the entry point ``run_all`` calls); exit 1 on any failure.

    :param small: 6 requests per reader and fewer writes, as CI runs it.
    :param units: serve a synthetic fleet of this many units instead of the demo fleet.
    """
    result = run(small, units)
    problems = report(result)
    OUT.mkdir(parents=True, exist_ok=True)
    stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%SZ")
    label = f"{units}u" if units else "demo"
    path = OUT / f"load-{label}-{'small' if small else 'full'}-{stamp}.json"
    path.write_text(json.dumps({**result, "problems": problems}, indent=2) + "\n")
    print(f"\nwritten {path.relative_to(REPO)}")
    if problems:
        sys.exit(1)


def _cli() -> None:
    parser = argparse.ArgumentParser(description="Bounded load on fleetdb serve (loopback) "
                                                 "and concurrent writers on both engines.")
    parser.add_argument("--small", action="store_true", help="a few requests each (CI)")
    parser.add_argument("--units", type=int, help="serve a synthetic fleet of this size")
    args = parser.parse_args()
    main(args.small, args.units)


if __name__ == "__main__":
    _cli()
