"""The ``fleetdb capture`` command (registered in :mod:`fleetdb.cli`).

Thin over :mod:`fleetdb.capture_store`: parse the channel map and options, make one library
call, print what was derived.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

import click

from fleetdb.cli import (
    _engine,
    _refresh_after_write,
    condition_options,
    db_option,
    friendly_errors,
    json_option,
    print_json,
)
from fleetdb.errors import InvalidValue
from fleetdb.units import from_kpa

__all__ = ["capture"]

#: Files at least this big get a progress bar while they are read (on a terminal).
PROGRESS_MIN_BYTES = 20_000_000


def _parse(items: tuple[str, ...], parser: Any, hint: str) -> list[Any]:
    out = []
    for item in items:
        try:
            out.append(parser(item))
        except InvalidValue as exc:
            raise click.BadParameter(str(exc), param_hint=hint) from exc
    return out


def _kpa_psi(kpa: float | None) -> str:
    return "-" if kpa is None else f"{kpa:,.0f} kPa ({from_kpa(kpa, 'psi'):.0f} psi)"


def _print_report(data: dict[str, Any], described: dict[str, str]) -> None:
    s = data
    head = (f"Checked {s['file']} for {s['fleet_no']} (dry run, nothing written)"
            if s["dry_run"] else
            f"Logged test {s['test_id']} for {s['fleet_no']} from {s['file']} "
            f"(capture {s['capture_id']})")
    click.echo(f"{head}: {s['samples']:,} samples at {s['sample_rate_hz']:,.0f} Hz over "
               f"{s['duration_s']:.2f} s; stored {s['stored_bytes'] / 1e6:.1f} MB "
               f"compressed (file {s['file_bytes'] / 1e6:.1f} MB).")
    for ch in s["channels"]:
        click.echo(f"  {described[ch['column']]}")
        if ch["kind"] == "pressure":
            click.echo(f"    {ch['events']} compression events at {ch['crank_rpm']:.0f} rpm; "
                       f"first {_kpa_psi(ch['first_kpa'])} = {ch['first_pct']:.0f} % of "
                       f"settled {_kpa_psi(ch['settled_kpa'])}, 90 % reached at event "
                       f"{ch['events_to_90pct']}; intake depression "
                       f"{ch['intake_depression_kpa']:.1f} kPa "
                       f"({from_kpa(ch['intake_depression_kpa'], 'inHg'):.1f} inHg)")
        elif ch["kind"] == "current":
            rel = ", ".join(f"{c}: {p:.0f} %" for c, p in ch["relative_pct"].items())
            click.echo(f"    firing order {ch['firing_order']}, sync by {ch['sync']} (first "
                       f"hump at {ch['first_hump_s']:.3f} s), {ch['humps_used']} humps, "
                       f"{ch['crank_rpm']:.0f} rpm")
            click.echo(f"    relative compression (strongest = 100 %): {rel}")
        else:
            line = (f"    mean {ch['mean_kpa']:.1f} kPa ({ch['mean_inhg']:.1f} inHg) below "
                    f"ambient, pulsation {ch['pulsation_kpa']:.1f} kPa")
            if ch.get("dip_kpa") is not None:
                line += (f"; firing pulses at {ch['firing_hz']:.1f} Hz, one place of the cycle "
                         f"{ch['dip_kpa']:.1f} kPa lower than the others over {ch['cycles']} "
                         "cycles")
            click.echo(line)
    readings = "; ".join(
        f"{r['kind']}{'' if r['cylinder'] is None else ' ' + str(r['cylinder'])} "
        f"{r['value']:g} {r['units']}" for r in s["readings"])
    click.echo(f"Readings: {readings}")
    if s["crank_rpm"] is not None:
        click.echo(f"Cranking speed: {s['conditions'].get('crank_rpm')} rpm in the test "
                   f"(derived {s['crank_rpm']:.0f} rpm)")
    if s["firing_order_saved"]:
        click.echo(f"Firing order {s['firing_order']} is now kept for this engine family.")
    for f in s["findings"]:
        click.echo(f"Finding ({f['code']}): {f['text']}")


@click.command()
@click.argument("file", type=click.Path(exists=True, dir_okay=False, path_type=Path))
@click.option("--unit", "fleet_no", required=True, metavar="FLEET_NO", help="The unit tested.")
@click.option("--at", "tested_at", required=True, metavar="'YYYY-MM-DD HH:MM'",
              help="When the capture was taken (shop local time).")
@click.option("--hours", required=True, type=float, help="Hour meter at the test.")
@click.option("--channel", "channel_specs", multiple=True, required=True,
              metavar="COLUMN=KIND[:CYL][:UNIT]",
              help="What a column holds (repeatable): COLUMN=pressure:CYL[:UNIT] (gauge, "
                   "psi/kPa/bar/MPa, add -abs for absolute), COLUMN=vacuum_cranking[:UNIT], "
                   "COLUMN=vacuum_idle[:UNIT] (below ambient, inHg/mmHg/kPa, or kPa-abs for a "
                   "MAP sensor), COLUMN=current[:A]. Default unit kPa (A for current).")
@click.option("--scale", "scale_specs", multiple=True, metavar="COLUMN=SLOPE[,OFFSET]",
              help="Transducer scale for a column (repeatable): value = SLOPE x raw + OFFSET, "
                   "in the channel's unit.")
@click.option("--time-column", default="t", show_default=True, help="The time column's name.")
@click.option("--time-unit", default="s", show_default=True,
              type=click.Choice(["s", "ms", "us"]), help="Unit of the time column.")
@click.option("--firing-order", metavar="1-3-4-2",
              help="The engine family's firing order (needed once for a current channel; "
                   "kept for the family).")
@click.option("--first-hump", type=int, metavar="CYL",
              help="Cylinder of the first current hump, when no pressure channel syncs them.")
@click.option("--idle-rpm", type=click.FloatRange(100, 5000), metavar="RPM",
              help="Approximate idle speed for an idle vacuum channel [default: from the "
                   "pulses].")
@condition_options("Cranking speed, rpm [default: derived from the capture].", "capture")
@click.option("--dry-run", is_flag=True, help="Derive and check; write nothing.")
@click.option("--by", default=None, help="Who logs it [default: your login name].")
@json_option
@db_option
@friendly_errors
def capture(file: Path, fleet_no: str, tested_at: str, hours: float,
            channel_specs: tuple[str, ...], scale_specs: tuple[str, ...], time_column: str,
            time_unit: str, firing_order: str | None, first_hump: int | None,
            idle_rpm: float | None, battery_v: str | None, crank_rpm: str | None,
            engine_temp_c: str | None, baro_kpa: str | None, throttle_open: bool | None,
            technician: str | None, note: str | None, dry_run: bool, by: str | None,
            as_json: bool, db: str | None) -> None:
    """Log a test from a transducer or current-clamp capture (CSV), and keep the capture.

    Derives each cylinder's compression (settled peak), cranking speed, relative
    compression from starter current and manifold vacuum, and stores them as the test's
    readings with the capture itself.

    \b
    Example:
        fleetdb capture crank-0302.csv --unit LT-07 --at "2026-03-02 09:15" \\
            --hours 6120 --time-column t --channel p1=pressure:1:kPa \\
            --scale p1=250,-125 --channel amps=current --firing-order 1-3-4-2 \\
            --battery-v 10.4 --throttle-open
    """
    from fleetdb import capture_files, capture_store
    from fleetdb.views import unit_id_for

    channels = _parse(channel_specs, capture_files.parse_channel, "--channel")
    scales = _parse(scale_specs, capture_files.parse_scale, "--scale")
    try:
        channels = capture_files.with_scales(channels, scales)
    except InvalidValue as exc:
        raise click.BadParameter(str(exc), param_hint="--scale") from exc
    order = None
    if firing_order is not None:
        order = _parse((firing_order,), capture_files.parse_firing_order, "--firing-order")[0]
    conditions = {"battery_v": battery_v, "crank_rpm": crank_rpm, "engine_temp_c": engine_temp_c,
                  "baro_kpa": baro_kpa, "technician": technician, "note": note,
                  "throttle_open": None if throttle_open is None else
                  ("yes" if throttle_open else "no")}
    engine = _engine(db)
    bar = None

    def progress(done: int, total: int) -> None:
        nonlocal bar
        if total < PROGRESS_MIN_BYTES or not sys.stderr.isatty():
            return
        if bar is None:
            bar = click.progressbar(length=total, label=f"reading {file.name}", file=sys.stderr)
            bar.__enter__()
        bar.update(done - bar.pos)

    try:
        report = capture_store.capture_test(
            engine, file, fleet_no, tested_at, hours, channels, time_column=time_column,
            time_unit=time_unit, firing_order=order, first_hump=first_hump, idle_rpm=idle_rpm,
            conditions=conditions, by=by, dry_run=dry_run, progress=progress)
    finally:
        if bar is not None:
            bar.__exit__(None, None, None)
    data = report.as_dict()
    if as_json:
        print_json(data)
    else:
        _print_report(data, {c.column: c.describe() for c in report.channels})
    if not dry_run:
        _refresh_after_write(engine, [unit_id_for(engine, fleet_no)], False)
