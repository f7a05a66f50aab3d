"""The fleetdb command end to end, on a real SQLite file and on PostgreSQL."""

from __future__ import annotations

import json
from pathlib import Path

import click
import pytest
from click.testing import CliRunner

from fleetdb.cli import cli
from tests.conftest import DATA


def run(args: list[str], db: str, code: int = 0) -> str:
    result = CliRunner().invoke(cli, [*args, "--db", db], catch_exceptions=False)
    assert result.exit_code == code, result.output
    assert "Traceback" not in result.output
    return result.output


@pytest.fixture
def store(db_url: str) -> str:
    run(["init"], db_url)
    run(["import", str(DATA / "fleet.csv"), str(DATA / "tests.csv"), str(DATA / "events.csv")],
        db_url)
    return db_url


def test_init_import_and_listings(store: str) -> None:
    units = json.loads(run(["units", "--json"], store))
    assert [u["fleet_no"] for u in units] == ["T-101", "T-102", "T-201", "T-301"]
    assert units[0]["tests"] == 1 and units[0]["last_hours"] == 1200.0
    unit = json.loads(run(["unit", "T-101", "--json", "--units", "psi"], store))
    assert unit["tests"][0]["readings"]["compression"] == {"1": 150.0, "2": 148.0, "3": 145.0,
                                                          "4": 120.0}
    assert unit["tests"][0]["readings"]["vacuum_cranking"] == {"inHg": 1.0, "kPa": 3.4}
    assert unit["events"][0]["kind"] == "valves"
    assert unit["health"]["level"] in ("act", "plan", "retest", "watch", "sound")
    kpa = json.loads(run(["unit", "T-301", "--json", "--units", "kPa"], store))
    assert kpa["tests"][0]["readings"]["compression"]["2"] == 2069.0
    text = run(["unit", "T-101", "--units", "psi"], store)
    header = next(line for line in text.splitlines() if line.startswith("test "))
    rule = text.splitlines()[text.splitlines().index(header) + 1]
    # Every column of the tests table has a heading, the test's state included.
    assert header.split()[-1] == "state" and len(rule.split()) == 9


def test_reimport_is_a_no_op(store: str) -> None:
    out = run(["import", str(DATA / "tests.csv")], store)
    assert "already imported as batch" in out


def test_board_json_shape(store: str) -> None:
    board = json.loads(run(["board", "--json", "--as-of", "2024-06-30"], store))
    assert set(board) == {"week_start", "as_of", "previous_week_start", "total", "counts",
                          "counts_by_site", "rows"}
    assert board["total"] == 4
    row = next(r for r in board["rows"] if r["fleet_no"] == "T-301")
    # Diesel cylinders 2100/2069/2000 kPa against a 2069 kPa minimum: cylinder 3 is below
    # (domain check value 17, a medium-duty truck diesel service procedure).
    assert row["level"] == "act" and "below_minimum" in row["reasons"]
    assert set(row) >= {"fleet_no", "site", "engine_family", "level", "main_code", "main_text",
                        "reasons", "projected_date", "last_tested_at", "change"}
    text = run(["board", "--as-of", "2024-06-30", "--level", "act"], store)
    assert "T-301" in text and "T-102" not in text


def test_log_then_void(store: str) -> None:
    out = run(["log", "T-102", "--at", "2024-06-01 10:00", "--hours", "950",
               "--compression", "150,149,148,151", "--vacuum-cranking", "0.5",
               "--battery-v", "10.4", "--crank-rpm", "210", "--engine-temp-c", "82",
               "--throttle-open", "--technician", "AK"], store)
    assert out.startswith("Logged test ")
    test_id = int(out.split()[2])
    out = run(["void", str(test_id), "--reason", "gauge hose leaked"], store)
    assert "Voided test" in out
    unit = json.loads(run(["unit", "T-102", "--json"], store))
    assert unit["tests"][0]["voided"] and unit["tests"][0]["void_reason"] == "gauge hose leaked"


@pytest.mark.parametrize(("args", "message"), [
    (["log", "T-101", "--at", "2024-06-01", "--hours", "1300", "--compression",
      "150,150,150,150,150"], "cylinder 5 on a 4-cylinder engine"),
    (["log", "T-101", "--at", "2024-06-01", "--hours", "900", "--compression", "150"],
     "hour meters only go forward"),
    (["log", "NOPE", "--at", "2024-06-01", "--hours", "900", "--compression", "150"],
     "unknown fleet number 'NOPE'"),
    (["log", "T-101", "--at", "2024-06-01", "--hours", "1300", "--compression", "abc"],
     "is not a number with a unit"),
    (["unit", "NOPE"], "no unit with fleet number 'NOPE'"),
    (["void", "999", "--reason", "x"], "no test with id 999"),
])
def test_errors_are_messages_not_tracebacks(store: str, args: list[str], message: str) -> None:
    result = CliRunner().invoke(cli, [*args, "--db", store])
    assert result.exit_code != 0
    assert message in result.output
    assert result.exception is None or isinstance(result.exception, SystemExit)


def test_bad_file_names_line_and_column(store: str, tmp_path: Path) -> None:
    bad = tmp_path / "bad.csv"
    bad.write_text("fleet_no,tested_at,hours,kind,cylinder,value,units\n"
                   "T-101,2024-07-01,1400,compression,9,150,psi\n")
    result = CliRunner().invoke(cli, ["import", str(bad), "--db", store])
    assert result.exit_code == 1
    assert f"{bad}, line 2, column cylinder: cylinder 9 on a 4-cylinder engine" in result.output


def test_uninitialised_database_says_what_to_do(tmp_path: Path) -> None:
    result = CliRunner().invoke(cli, ["units", "--db", str(tmp_path / "new.sqlite")])
    assert result.exit_code == 1
    assert "run 'fleetdb init'" in result.output


def test_where_and_env(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("FLEETDB_DATABASE_URL", str(tmp_path / "env.sqlite"))
    out = CliRunner().invoke(cli, ["where"]).output
    assert "env.sqlite" in out and "FLEETDB_DATABASE_URL" in out
    out = CliRunner().invoke(cli, ["where", "--db", str(tmp_path / "flag.sqlite")]).output
    assert "flag.sqlite" in out and "(from --db)" in out


def test_defaults_lists_sources() -> None:
    rows = json.loads(CliRunner().invoke(cli, ["defaults", "--json"]).output)
    by_name = {r["name"]: r for r in rows}
    assert by_name["spread_min_ratio"]["value"] == 0.75
    assert by_name["min_crank_rpm_spark"]["source"] == "from memory, unverified"
    assert all(r["source"] for r in rows)


def test_every_command_has_help_with_example() -> None:
    ctx = click.Context(cli)
    for name in cli.list_commands(ctx):
        command = cli.get_command(ctx, name)
        out = CliRunner().invoke(cli, [name, "--help"]).output
        assert command.help and "Example:" in out, name
        readme = (Path(__file__).parent.parent / "README.md").read_text()
        assert f"fleetdb {name}" in readme, f"README does not mention 'fleetdb {name}'"


def test_demo_twice_changes_nothing(db_url: str) -> None:
    first = run(["demo", "--as-of", "2026-12-01", "--no-serve"], db_url)
    assert "wrote" in first and "Week of 2026-11-30" in first
    before = json.loads(run(["units", "--json"], db_url))
    second = run(["demo", "--as-of", "2026-12-01", "--no-serve"], db_url)
    assert "already in this database" in second
    assert json.loads(run(["units", "--json"], db_url)) == before


def test_fresh_machine_default_store_folder_is_created(tmp_path: Path) -> None:
    """A newcomer's first run: no --db, no FLEETDB_DATABASE_URL, and no data folder yet
    (a fresh home directory). The installed ``fleetdb`` script must create the folder."""
    import os
    import subprocess
    import sys

    home = tmp_path / "home"
    home.mkdir()
    env = {k: v for k, v in os.environ.items()
           if k not in ("FLEETDB_DATABASE_URL", "XDG_DATA_HOME")}
    env["HOME"] = str(home)
    script = Path(sys.executable).parent / "fleetdb"
    where = subprocess.run([str(script), "where"], env=env, capture_output=True, text=True,
                           check=True).stdout
    assert str(home) in where and "default" in where
    init = subprocess.run([str(script), "init"], env=env, capture_output=True, text=True)
    assert init.returncode == 0, init.stderr
    assert "Traceback" not in init.stderr
    stored = list(home.rglob("fleetdb.sqlite"))
    assert len(stored) == 1 and stored[0].stat().st_size > 0
    units = subprocess.run([str(script), "units", "--json"], env=env, capture_output=True,
                           text=True, check=True).stdout
    assert json.loads(units) == []


def test_refresh_in_worker_processes(store: str, monkeypatch) -> None:  # noqa: ANN001
    # The same counts from one process and from a worker per engine family bin; the command
    # says when it split the work. (It forks only from a single-threaded process; the test
    # says this one is, whatever threads earlier tests left.)
    from fleetdb import health

    monkeypatch.setattr(health.threading, "active_count", lambda: 1)
    alone = run(["refresh", "--as-of", "2024-06-03", "--workers", "1"], store)
    split = run(["refresh", "--as-of", "2024-06-03", "--workers", "2"], store)
    assert "processes" not in alone and split.endswith("(assessed in 2 processes)\n")
    assert split.replace(" (assessed in 2 processes)", "") == alone
    assert "Invalid value for '--workers'" in run(["refresh", "--workers", "0"], store, code=2)


def test_the_command_imports_no_analysis_before_it_runs() -> None:
    # `fleetdb refresh` starts its bulk read before pandas, SQLAlchemy and scipy load
    # (fleetdb.bulkread): the command module itself must not import them.
    import subprocess
    import sys

    heavy = ("pandas", "numpy", "sqlalchemy", "scipy", "sqlmodel", "alembic", "pyarrow")
    loaded = subprocess.run(
        [sys.executable, "-c", "import sys, fleetdb.cli, fleetdb.bulkread; "
         f"print(','.join(m for m in {heavy!r} if m in sys.modules))"],
        capture_output=True, text=True, check=True).stdout.strip()
    assert loaded == ""


def test_refresh_with_its_read_begun_early(sqlite_url: str, monkeypatch) -> None:  # noqa: ANN001
    # The same result whether the Arrow read is begun by the command before the analysis
    # is imported, started by the analysis itself, or not used (the plain read).
    from fleetdb import bulkread, frames, health

    run(["init"], sqlite_url)
    run(["import", str(DATA / "fleet.csv"), str(DATA / "tests.csv"),
         str(DATA / "events.csv")], sqlite_url)
    monkeypatch.setattr(health.threading, "active_count", lambda: 1)
    args = ["refresh", "--as-of", "2024-06-03", "--workers", "2"]
    plain = run(args, sqlite_url)
    board = run(["board", "--as-of", "2024-06-03", "--json"], sqlite_url)
    monkeypatch.setattr(frames, "ARROW_READ_MIN_ROWS", 1)
    assert run(args, sqlite_url) == plain
    taken = []
    monkeypatch.setattr(bulkread, "ARROW_READ_MIN_ROWS", 1)

    def take(path: str, details: bool) -> bulkread.FleetRead | None:
        taken.append(bulkread._begun.pop(path, None))
        assert details is False  # the refresh's lean columns
        return taken[-1]

    monkeypatch.setattr(bulkread, "take", take)
    assert run(args, sqlite_url) == plain
    assert len(taken) == 1 and taken[0] is not None  # begun by the command, then taken
    assert run(["board", "--as-of", "2024-06-03", "--json"], sqlite_url) == board
    assert not bulkread._begun


def test_the_command_freezes_its_objects_on_the_way_out(monkeypatch) -> None:  # noqa: ANN001
    import gc
    import sys

    from fleetdb import cli as cli_mod

    monkeypatch.setattr(sys, "argv", ["fleetdb", "--version"])
    gc.unfreeze()
    try:
        with pytest.raises(SystemExit):
            cli_mod.main()
        assert gc.get_freeze_count() > 0
    finally:
        gc.unfreeze()  # this test process goes on


def test_the_command_leaves_no_write_ahead_log_behind(tmp_path: Path) -> None:
    # The command skips the collector's walk on its way out, but closes the store's
    # connections first: SQLite folds the write-ahead log back into the file on the last
    # close, so a copy of the file alone has every committed write (as after a normal
    # shutdown).
    import subprocess
    import sys

    path = tmp_path / "shop.sqlite"
    for args in (["init"], ["import", str(DATA / "fleet.csv"), str(DATA / "tests.csv")],
                 ["refresh", "--as-of", "2024-06-03"], ["board", "--as-of", "2024-06-03"]):
        done = subprocess.run([sys.executable, "-m", "fleetdb", *args, "--db", str(path)],
                              capture_output=True, text=True)
        assert done.returncode == 0, done.stderr
        assert not Path(f"{path}-wal").exists(), args
