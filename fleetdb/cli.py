"""The ``fleetdb`` command: thin over the library (parse, one or two calls, format)."""

from __future__ import annotations

import functools
import importlib
import json
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import click

from fleetdb import __version__, config
from fleetdb.errors import FleetDBError

CONTEXT_SETTINGS = {"help_option_names": ["-h", "--help"], "max_content_width": 100}


def db_option(func: Callable) -> Callable:
    """``--db URL|PATH``, falling back to FLEETDB_DATABASE_URL, then the default file."""
    return click.option(
        "--db", "db", envvar=config.ENV_VAR, show_envvar=True, metavar="URL|PATH",
        help=f"Database: a SQLAlchemy URL or a SQLite file path [default: "
             f"{config.default_sqlite_path()}]")(func)


def json_option(func: Callable) -> Callable:
    """``--json`` for machine-readable output."""
    return click.option("--json", "as_json", is_flag=True,
                        help="Print JSON (shape documented in the README).")(func)


def as_of_option(func: Callable) -> Callable:
    """``--as-of DATE``: reproduce the analysis as it stood on that day."""
    return click.option("--as-of", "as_of", type=click.DateTime(["%Y-%m-%d"]), default=None,
                        help="Analyse as of this date (YYYY-MM-DD) [default: today].")(func)


def friendly_errors(func: Callable) -> Callable:
    """Turn library errors into ``Error: ...`` and exit 1, never a traceback."""
    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return func(*args, **kwargs)
        except FleetDBError as exc:
            raise click.ClickException(str(exc)) from exc
    return wrapper


def _engine(db: str | None, *, check: bool = True):  # noqa: ANN202 - sqlalchemy Engine
    from fleetdb import db as db_mod
    from fleetdb import migrate

    engine = db_mod.get_engine(config.database_url(db))
    if check:
        migrate.ensure_current(engine)
    return engine


def _end_of(day: Any) -> Any:
    """The last minute of a day, as a pandas Timestamp (None stays None)."""
    import pandas as pd

    return None if day is None else pd.Timestamp(day).normalize() + pd.Timedelta(hours=23,
                                                                                   minutes=59)


def print_json(data: Any) -> None:
    """Print data as indented JSON."""
    click.echo(json.dumps(data, indent=2, ensure_ascii=False))


def print_table(rows: list[dict[str, Any]], columns: list[tuple[str, str]]) -> None:
    """Print rows as an aligned text table; ``columns`` are (key, heading) pairs."""
    if not rows:
        click.echo("(nothing to show)")
        return
    cells = [[("" if r.get(k) is None else str(r.get(k))) for k, _ in columns] for r in rows]
    widths = [max(len(h), *(len(c[i]) for c in cells)) for i, (_, h) in enumerate(columns)]
    click.echo("  ".join(h.ljust(w) for (_, h), w in zip(columns, widths, strict=True)).rstrip())
    click.echo("  ".join("-" * w for w in widths))
    for c in cells:
        click.echo("  ".join(v.ljust(w) for v, w in zip(c, widths, strict=True)).rstrip())


class FleetGroup(click.Group):
    """The ``fleetdb`` group: the commands defined here, plus those of the sibling modules
    (``cli_plan``, ``cli_capture``, ``cli_trust``, ``cli_family``, ``cli_users``), loaded
    when first asked for. Those modules import this one's helpers, so loading them lazily
    keeps any import order working."""

    #: command name -> "module:attribute" of a command defined in a sibling module.
    lazy_commands = {
        "plan": "fleetdb.cli_plan:plan",
        "report": "fleetdb.cli_plan:report",
        "capture": "fleetdb.cli_capture:capture",
        "backup": "fleetdb.cli_trust:backup",
        "restore": "fleetdb.cli_trust:restore",
        "family": "fleetdb.cli_family:family",
        "user": "fleetdb.cli_users:user",
        "trail": "fleetdb.cli_users:trail",
    }

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted({*super().list_commands(ctx), *self.lazy_commands})

    def get_command(self, ctx: click.Context, cmd_name: str) -> click.Command | None:
        if cmd_name in self.lazy_commands and cmd_name not in self.commands:
            module, _, attribute = self.lazy_commands[cmd_name].partition(":")
            self.add_command(getattr(importlib.import_module(module), attribute), cmd_name)
        return super().get_command(ctx, cmd_name)


@click.group(cls=FleetGroup, context_settings=CONTEXT_SETTINGS)
@click.version_option(__version__, "--version", prog_name="fleetdb")
def cli() -> None:
    """Cranking-compression and vacuum history of a fleet's engines.

    Keeps every test per unit and cylinder, tells wear from a bad test, projects when
    each engine crosses its limits. The tool advises; it does not certify: the engine
    maker's service data, local rules and licensed practice come first.
    """
    from fleetdb import access

    # Every write of this run is recorded as made from the command line by this login.
    token = access.set_actor(access.local_actor("cli"))
    click.get_current_context().call_on_close(lambda: access.reset_actor(token))


@cli.command()
@db_option
@friendly_errors
def init(db: str | None) -> None:
    """Create the database, or upgrade it to the newest schema.

    \b
    Example:
        fleetdb init --db shop.sqlite
    """
    from fleetdb import migrate

    url = config.database_url(db)
    migrate.upgrade(url)
    click.echo(f"Database ready at schema {migrate.head_revision()}: {config.redact(url)}")


@cli.command()
@db_option
def where(db: str | None) -> None:
    """Print which database fleetdb would use, and why.

    \b
    Example:
        fleetdb where
    """
    import os

    reason = ("--db" if db and db != os.environ.get(config.ENV_VAR) else
              config.ENV_VAR if os.environ.get(config.ENV_VAR) else "default")
    click.echo(f"{config.redact(config.database_url(db))}  (from {reason})")


@cli.command(name="import")
@click.argument("files", nargs=-1, required=True,
                type=click.Path(exists=True, dir_okay=False, path_type=Path))
@click.option("--dry-run", is_flag=True, help="Check and count; write nothing.")
@click.option("--by", default=None, help="Who imports [default: your login name].")
@db_option
@friendly_errors
def import_(files: tuple[Path, ...], dry_run: bool, by: str | None, db: str | None) -> None:
    """Import fleet, tests and events CSV files (recognised by their header).

    Each file is written whole or not at all; a file imported before is skipped.

    \b
    Example:
        fleetdb import fleet.csv tests-2025-03.csv events.csv
    """
    from fleetdb import ingest

    engine = _engine(db)
    bar = None

    def progress(done: int, total: int) -> None:
        nonlocal bar
        if not sys.stderr.isatty() or total < 200_000:
            return
        if bar is None:
            bar = click.progressbar(length=total, label="writing readings", file=sys.stderr)
            bar.__enter__()
        bar.update(done - bar.pos)

    try:
        reports = ingest.import_files(engine, files, dry_run=dry_run, by=by, progress=progress)
    finally:
        if bar is not None:
            bar.__exit__(None, None, None)
    for report in reports:
        click.echo(report.summary())
    _refresh_after_write(engine, [u for r in reports for u in r.unit_ids], dry_run)


def _refresh_after_write(engine: Any, unit_ids: list[int], dry_run: bool) -> None:
    """Refresh this week's health of the units a write touched."""
    if dry_run or not unit_ids:
        return
    from fleetdb import health

    health.refresh_units(engine, sorted(set(unit_ids)))


def _cylinder_values(kind: str, text: str | None, default_unit: str) -> list[Any]:
    """Parse ``150,148,145,120`` (cylinder order) or ``2=150,4=128``; a value may carry a unit."""
    from fleetdb.logbook import TypedReading
    from fleetdb.units import parse_quantity

    if not text:
        return []
    out = []
    for position, item in enumerate(p.strip() for p in text.split(",")):
        if not item:
            continue
        cyl_text, _, value_text = item.rpartition("=")
        digits = cyl_text.strip().isascii() and cyl_text.strip().isdigit()
        cylinder = int(cyl_text) if digits else position + 1
        if cyl_text and not digits:
            raise click.BadParameter(f"{item!r}: write cylinder=value, like 2=150",
                                     param_hint=f"--{kind}")
        try:
            number, unit = parse_quantity(value_text, default_unit)
        except FleetDBError as exc:
            raise click.BadParameter(str(exc), param_hint=f"--{kind}") from exc
        out.append(TypedReading(kind, cylinder, f"{number:g}", unit))
    return out


def condition_options(crank_rpm_help: str, what: str) -> Callable[[Callable], Callable]:
    """The test conditions a technician types, shared by ``log`` and ``capture``:
    ``--battery-v --crank-rpm --engine-temp-c --baro-kpa --throttle-open/--throttle-shut
    --technician --note``."""
    options = [
        click.option("--battery-v", help="Battery volts under crank."),
        click.option("--crank-rpm", help=crank_rpm_help),
        click.option("--engine-temp-c", help="Engine temperature, °C."),
        click.option("--baro-kpa",
                     help="Barometer at the test, kPa absolute (else from site elevation)."),
        click.option("--throttle-open/--throttle-shut", default=None,
                     help="Whether the throttle was held wide open while cranking."),
        click.option("--technician", help=f"Who took the {what}."),
        click.option("--note", help="Anything worth keeping with the test."),
    ]

    def decorate(func: Callable) -> Callable:
        for option in reversed(options):
            func = option(func)
        return func

    return decorate


@cli.command()
@click.argument("fleet_no")
@click.option("--at", "tested_at", required=True, metavar="'YYYY-MM-DD HH:MM'",
              help="When the test was taken (shop local time).")
@click.option("--hours", required=True, type=float, help="Hour meter at the test.")
@click.option("--compression", metavar="VALUES", help="Dry cranking compression per cylinder: "
              "150,148,145,120 in cylinder order, or 2=150,4=128.")
@click.option("--wet", metavar="VALUES", help="Wet test (oil added), same form.")
@click.option("--leakdown", metavar="VALUES", help="Leak-down percent per cylinder, same form.")
@click.option("--relative", metavar="VALUES", help="Relative compression percent, same form.")
@click.option("--units", "unit", default="psi", show_default=True,
              type=click.Choice(["psi", "kPa", "bar", "MPa"]), help="Unit of the pressures.")
@click.option("--vacuum-cranking", metavar="VALUE", help="Manifold vacuum while cranking, e.g. 1.5 "
              "(in --vacuum-units) or '5 kPa'.")
@click.option("--vacuum-idle", metavar="VALUE", help="Manifold vacuum at warm idle.")
@click.option("--vacuum-units", default="inHg", show_default=True,
              type=click.Choice(["inHg", "mmHg", "kPa"]))
@condition_options("Cranking speed, rpm.", "test")
@click.option("--dry-run", is_flag=True, help="Check only; write nothing.")
@click.option("--by", default=None, help="Who logs it [default: your login name].")
@db_option
@friendly_errors
def log(fleet_no: str, tested_at: str, hours: float, compression: str | None, wet: str | None,
        leakdown: str | None, relative: str | None, unit: str, vacuum_cranking: str | None,
        vacuum_idle: str | None, vacuum_units: str, battery_v: str | None,
        crank_rpm: str | None, engine_temp_c: str | None, baro_kpa: str | None,
        throttle_open: bool | None, technician: str | None, note: str | None, dry_run: bool,
        by: str | None, db: str | None) -> None:
    """Record one test from the terminal, checked like an import.

    \b
    Example:
        fleetdb log LT-07 --at "2026-03-02 09:15" --hours 6120 \\
            --compression 152,149,151,118 --vacuum-cranking 0.5 \\
            --battery-v 10.4 --crank-rpm 210 --engine-temp-c 82 --throttle-open
    """
    from fleetdb import logbook
    from fleetdb.units import parse_quantity

    readings = []
    for kind, text_, default in (("compression", compression, unit), ("wet", wet, unit),
                                 ("leakdown", leakdown, "%"), ("relative", relative, "%")):
        readings += _cylinder_values(kind, text_, default)
    for kind, text_ in (("vacuum_cranking", vacuum_cranking), ("vacuum_idle", vacuum_idle)):
        if text_:
            try:
                number, vac_unit = parse_quantity(text_, vacuum_units)
            except FleetDBError as exc:
                hint = f"--{kind.replace('_', '-')}"
                raise click.BadParameter(str(exc), param_hint=hint) from exc
            readings.append(logbook.TypedReading(kind, None, f"{number:g}", vac_unit))
    conditions = {"battery_v": battery_v, "crank_rpm": crank_rpm, "engine_temp_c": engine_temp_c,
                  "baro_kpa": baro_kpa, "technician": technician, "note": note,
                  "throttle_open": None if throttle_open is None else
                  ("yes" if throttle_open else "no")}
    engine = _engine(db)
    test_id = logbook.log_test(engine, fleet_no, tested_at, hours, readings,
                               conditions=conditions, by=by, dry_run=dry_run)
    if test_id is None:
        click.echo(f"Checked: {len(readings)} readings for {fleet_no} are acceptable "
                   "(dry run, nothing written).")
        return
    click.echo(f"Logged test {test_id} for {fleet_no}: {len(readings)} readings.")
    from fleetdb.views import unit_id_for

    _refresh_after_write(engine, [unit_id_for(engine, fleet_no)], False)


@cli.command()
@click.argument("test_id", type=int)
@click.option("--reason", required=True, help="Why the test is taken out of the analysis.")
@click.option("--by", default=None, help="Who voids it [default: your login name].")
@db_option
@friendly_errors
def void(test_id: int, reason: str, by: str | None, db: str | None) -> None:
    """Take a wrong test out of the analysis; it stays in the record.

    \b
    Example:
        fleetdb void 1234 --reason "gauge hose leaked"
    """
    from fleetdb import logbook

    engine = _engine(db)
    logbook.void_test(engine, test_id, reason, by)
    click.echo(f"Voided test {test_id}: {reason}")


@cli.command()
@json_option
@db_option
@friendly_errors
def units(as_json: bool, db: str | None) -> None:
    """List the fleet: every unit with its site, engine family and last test.

    \b
    Example:
        fleetdb units --json
    """
    from fleetdb import views

    rows = views.fleet_listing(_engine(db))
    if as_json:
        print_json(rows)
        return
    print_table(rows, [("fleet_no", "fleet no"), ("site", "site"),
                       ("engine_family", "engine family"), ("fuel", "fuel"),
                       ("tests", "tests"), ("last_tested_at", "last test"),
                       ("last_hours", "hours")])


LEVEL_MARK = {"act": "[!] act", "plan": "[>] plan", "retest": "[?] retest",
              "watch": "[~] watch", "sound": "[ ] sound"}


@cli.command()
@click.argument("fleet_no")
@click.option("--units", "unit", default="psi", show_default=True,
              type=click.Choice(["psi", "kPa", "bar"]), help="Unit for compression values.")
@as_of_option
@json_option
@db_option
@friendly_errors
def unit(fleet_no: str, unit: str, as_of: Any, as_json: bool, db: str | None) -> None:
    """Show one unit: health level and reasons, wear per cylinder, every test.

    \b
    Example:
        fleetdb unit LT-07 --units kPa
    """
    from fleetdb import health, views

    engine = _engine(db)
    data = views.unit_tests(engine, fleet_no, unit)
    report = health.unit_report(engine, fleet_no, None if as_of is None else as_of.date())
    data["health"] = views.health_summary(report, unit)
    if as_json:
        print_json(data)
        return
    h = data["health"]
    click.echo(f"{data['fleet_no']}  {data['engine_family']} ({data['fuel']}, "
               f"{data['cylinders']} cyl, banks {data['banks']})  site {data['site']} "
               f"({data['site_elevation_m']:g} m)  minimum {data['min_compression']} {unit}")
    click.echo(f"Health: {LEVEL_MARK[h['level']]}   projected limit: "
               f"{h['projected_date_early'] or 'none'} (conservative), "
               f"{h['projected_date'] or 'none'} (best estimate)")
    lim = h.get("limits")
    if lim:
        click.echo(f"Judged by limits version {lim['version']} of {data['engine_family']} "
                   f"(set {lim['set_at']} UTC by {lim['set_by'] or 'unknown'}: {lim['reason']})")
    for r in h["reasons"]:
        click.echo(f"  {r['level']:<6} {r['code']}: {r['text']}")
    wear = [{"cyl": f["cylinder"], "n": f["n"], "slope": f["wear_per_1000h"],
             "method": f["method"], "cross": f["projected_hours_early"]}
            for f in h["wear"]]
    if wear:
        click.echo("")
        print_table(wear, [("cyl", "cylinder"), ("n", "tests"),
                           ("slope", f"wear {unit}/1000 h"), ("method", "slope used"),
                           ("cross", "limit at h (95 %)")])
    click.echo("")
    rows = []
    for t in data["tests"]:
        r = t["readings"]
        rows.append({
            "id": t["test_id"], "tested_at": t["tested_at"], "hours": t["hours"],
            "compression": " ".join(f"{v:g}" for v in r.get("compression", {}).values()),
            "wet": " ".join(f"{c}:{v:g}" for c, v in r.get("wet", {}).items()),
            "vac": (r.get("vacuum_cranking") or {}).get("inHg"),
            "v": t["battery_v"], "rpm": t["crank_rpm"],
            "state": f"voided: {t['void_reason']}" if t["voided"] else
            ("" if h["trust"].get(str(t["test_id"]), True) else "not trustworthy")})
    print_table(rows, [("id", "test"), ("tested_at", "tested at"), ("hours", "hours"),
                       ("compression", f"compression ({unit})"), ("wet", "wet"),
                       ("vac", "crank vac inHg"), ("v", "volts"), ("rpm", "rpm"),
                       ("state", "state")])
    for e in data["events"]:
        cyl = ",".join(map(str, e["cylinders"])) or "all"
        click.echo(f"  event {e['date']}: {e['kind']} (cylinders {cyl}) {e['note'] or ''}")


@cli.command()
@as_of_option
@click.option("--site", help="Only this site.")
@click.option("--family", help="Only this engine family.")
@click.option("--level", type=click.Choice(["act", "plan", "retest", "watch", "sound"]),
              help="Only this level.")
@click.option("--search", help="Fleet numbers containing this text.")
@json_option
@db_option
@friendly_errors
def board(as_of: Any, site: str | None, family: str | None, level: str | None,
          search: str | None, as_json: bool, db: str | None) -> None:
    """The weekly health board: every unit's level and main reason, worst first.

    \b
    Example:
        fleetdb board --site "North Yard" --level plan
    """
    from fleetdb import health

    data = health.board(_engine(db), None if as_of is None else as_of.date(), site=site,
                        family=family, level=level, search=search)
    if as_json:
        print_json(data)
        return
    counts = "  ".join(f"{LEVEL_MARK[k]}: {v}" for k, v in data["counts"].items())
    click.echo(f"Week of {data['week_start']} (as of {data['as_of']})   {counts}")
    rows = [{**r, "level": LEVEL_MARK[r["level"]],
             "reason": (r["main_text"] or "")[:70] + ("..." if len(r["main_text"] or "") > 70
                                                     else ""),
             "change": {"worse": f"worse (was {r['previous_level']})",
                        "better": f"better (was {r['previous_level']})",
                        "new": "new"}.get(r["change"] or "", "")}
            for r in data["rows"]]
    print_table(rows, [("fleet_no", "fleet no"), ("site", "site"),
                       ("engine_family", "engine family"), ("level", "level"),
                       ("reason", "main reason"), ("projected_date_early", "limit by"),
                       ("hours_to_limit", "hours left"), ("last_tested_at", "last test"),
                       ("change", "since last week")])


@cli.command()
@as_of_option
@click.option("--workers", type=click.IntRange(min=1), default=None,
              help="Processes to assess in (default: one per core on a large fleet). The "
                   "result is the same for any number.")
@db_option
@friendly_errors
def refresh(as_of: Any, workers: int | None, db: str | None) -> None:
    """Recompute every unit's health and store the week's snapshot.

    \b
    Example:
        fleetdb refresh --as-of 2026-06-30
    """
    from fleetdb import bulkread

    bulkread.begin(config.database_url(db))  # the read runs while the analysis is imported
    from fleetdb import health

    result = health.refresh_fleet(_engine(db), None if as_of is None else as_of.date(),
                                  workers=workers)
    counts = ", ".join(f"{k} {v}" for k, v in result["counts"].items())
    split = (f" (assessed in {result['processes']} processes)" if result["processes"] > 1
             else "")
    click.echo(f"Refreshed {result['units']} units for the week of {result['week_start']}: "
               f"{counts}{split}")


def serve_options(func: Callable) -> Callable:
    """``--host``, ``--port`` and the session limits for the dashboard."""
    for name, default, text_ in reversed(config.SESSION_SETTINGS):
        func = click.option(f"--{name.replace('_', '-')}", name, default=default, type=int,
                            show_default=True, envvar=f"FLEETDB_{name.upper()}",
                            show_envvar=True, help=text_[0].upper() + text_[1:] + ".")(func)
    func = click.option("--port", default=8050, show_default=True, type=int,
                        help="Port to listen on.")(func)
    return click.option("--host", default="127.0.0.1", show_default=True,
                        help="Address to listen on (beyond 127.0.0.1 needs an enabled "
                             "admin).")(func)


def _serve(url: str, host: str, port: int, *, auth: bool, idle_minutes: int,
           max_hours: int) -> None:
    import datetime as dt

    from dashboard import create_app
    from fleetdb.users import SessionLimits

    limits = SessionLimits(idle=dt.timedelta(minutes=idle_minutes),
                           absolute=dt.timedelta(hours=max_hours))
    app = create_app(url, auth=auth, session_limits=limits)
    click.echo(f"Dashboard on http://{host}:{port}/  (Ctrl-C to stop)")
    if auth:
        click.echo(f"Login required; sessions end after {idle_minutes} min idle or "
                   f"{max_hours} h.")
    else:
        click.echo("No login: anyone who can open this address on this computer acts as "
                   f"{_os_user()} with every right.")
    from waitress import serve as waitress_serve

    waitress_serve(app.server, host=host, port=port, threads=8, _quiet=True)


def _os_user() -> str:
    from fleetdb.access import os_user

    return os_user()


@cli.command()
@serve_options
@click.option("--no-auth", is_flag=True,
              help="Serve without login (on 127.0.0.1 only): every request acts as you.")
@db_option
@friendly_errors
def serve(host: str, port: int, session_idle_minutes: int, session_max_hours: int,
          no_auth: bool, db: str | None) -> None:
    """Serve the dashboard: health board, unit history, test logging, fleet wear, trails.

    Asks for a login (fleetdb user add); refuses an address beyond 127.0.0.1 unless an
    enabled admin exists, and --no-auth anywhere but 127.0.0.1.

    \b
    Example:
        fleetdb serve --port 8050
        fleetdb serve --host 0.0.0.0 --session-idle-minutes 15
    """
    from fleetdb import users

    url = config.database_url(db)
    users.check_serve(_engine(db), host, no_auth)
    _serve(url, host, port, auth=not no_auth, idle_minutes=session_idle_minutes,
           max_hours=session_max_hours)


@cli.command()
@as_of_option
@click.option("--seed", default=42, show_default=True, help="Random seed of the demo history.")
@click.option("--serve/--no-serve", "then_serve", default=True, show_default=True,
              help="Serve the dashboard afterwards, until Ctrl-C.")
@serve_options
@db_option
@friendly_errors
def demo(as_of: Any, seed: int, then_serve: bool, host: str, port: int,
         session_idle_minutes: int, session_max_hours: int, db: str | None) -> None:
    """Build the invented demo fleet, print its board, then serve the dashboard.

    Running it again on the same database changes nothing. On 127.0.0.1 (the default) the
    demo is served without login, for this computer only; on any other address it asks
    for a login like fleetdb serve.

    \b
    Example:
        fleetdb demo --db demo.sqlite --no-serve
    """
    from fleetdb import demo as demo_mod
    from fleetdb import migrate

    url = config.database_url(db)
    migrate.upgrade(url)
    engine = _engine(db)
    click.echo(f"Database: {config.redact(url)}")
    for line in demo_mod.build_into(engine, None if as_of is None else as_of.date(), seed):
        click.echo(line)
    click.echo("")
    ctx = click.get_current_context()
    ctx.invoke(board, as_of=as_of, site=None, family=None, level=None, search=None,
               as_json=False, db=db)
    if then_serve:
        from fleetdb import users

        no_auth = users.is_loopback(host)
        users.check_serve(engine, host, no_auth)
        if no_auth:
            click.echo("\nThe demo is served WITHOUT LOGIN, on this computer only. For users "
                       "and roles: fleetdb user add NAME --role admin, then fleetdb serve.")
        _serve(url, host, port, auth=not no_auth, idle_minutes=session_idle_minutes,
               max_hours=session_max_hours)


@cli.command()
@json_option
def defaults(as_json: bool) -> None:
    """List every default limit fleetdb ships, with its source.

    An engine family's own service data overrides each of them; local rules apply.

    \b
    Example:
        fleetdb defaults --json
    """
    from fleetdb.defaults import defaults_table

    table = defaults_table().reset_index()
    rows = table.to_dict("records")
    if as_json:
        print_json(rows)
        return
    for r in rows:
        r["value"] = f"{r['value']:g} {r['unit']}"
    print_table(rows, [("name", "name"), ("value", "value"), ("ref", "ref"),
                       ("source", "source")])
    click.echo("\nEvery limit is a default: the engine family's service data overrides it; "
               "local regulations apply. fleetdb advises; it does not certify.")


def main() -> None:
    """Console-script entry point."""
    from fleetdb import shortlived

    try:
        cli(prog_name="fleetdb")
    finally:  # click ends the command with SystemExit
        shortlived.freeze_for_exit()
