"""The ``fleetdb family`` commands: an engine family's limits and their history.

Registered in :mod:`fleetdb.cli`; thin over :func:`fleetdb.registry.set_limits` and
:func:`fleetdb.limits.history`.
"""

from __future__ import annotations

from typing import Any

import click

from fleetdb.cli import _engine, db_option, friendly_errors, json_option, print_json, print_table
from fleetdb.units import from_kpa

__all__ = ["family"]


@click.group()
def family() -> None:
    """Engine families: their limits and the history of every change.

    \b
    Example:
        fleetdb family limits TEST-L4 --json
    """


def _limits_text(v: dict[str, Any]) -> str:
    """One version's limits in a line (typed minimum, kPa for the rest)."""
    unit = v["min_compression_unit"]
    parts = [f"minimum {v['min_compression_typed']} {unit}"]
    if v["spread_rule"] == "diff":
        parts.append(f"spread: highest - lowest <= {from_kpa(v['max_diff_kpa'], unit):.4g} "
                     f"{unit}")
    else:
        parts.append(f"spread: {v['spread_rule']} >= {v['min_ratio']:g}")
    if v["expected_kpa"] is not None:
        parts.append(f"expected {from_kpa(v['expected_kpa'], unit):.4g} {unit}")
    parts.append(f"cranking >= {v['min_crank_rpm']:g} rpm" if v["min_crank_rpm"] is not None
                 else "cranking rpm: fuel default")
    parts.append("tested warm" if v["warm_test"] else "tested cold")
    parts.append(f"every {v['test_interval_days']} days")
    return "; ".join(parts)


@family.command()
@click.argument("name")
@click.option("--min-compression", metavar="VALUE",
              help="Minimum cranking compression, with its unit: 120psi, 830kPa, 8.3bar.")
@click.option("--expected", "expected_compression", metavar="VALUE",
              help="Expected (standard) compression, with its unit; 'none' clears it.")
@click.option("--spread-rule", type=click.Choice(["ratio", "diff", "ratio_mean"]),
              help="ratio: lowest/highest >= min ratio; diff: highest - lowest <= max "
                   "difference; ratio_mean: each >= min ratio x mean.")
@click.option("--min-ratio", metavar="RATIO", help="For ratio rules, e.g. 0.75.")
@click.option("--max-difference", metavar="VALUE",
              help="For the diff rule, with its unit: 20psi; 'none' clears it.")
@click.option("--min-crank-rpm", metavar="RPM",
              help="Lowest cranking speed of a valid test; 'none': the fuel's default.")
@click.option("--warm-test", type=click.Choice(["yes", "no"]),
              help="Whether the family's test is taken warm.")
@click.option("--test-interval-days", metavar="DAYS", help="Days between tests.")
@click.option("--reason", help="Why the limits change (required with a change).")
@click.option("--by", default=None, help="Who changes them [default: your login name].")
@json_option
@db_option
@friendly_errors
def limits(name: str, reason: str | None, by: str | None, as_json: bool, db: str | None,
           **changes: str | None) -> None:
    """Show an engine family's limits and their history, or change them.

    With no change option it lists every version. With one or more it checks the values
    like a fleet file and keeps them as a new version, with who, when and why; earlier
    versions stay. Every health level and test verdict names the version it was judged by.

    \b
    Example:
        fleetdb family limits "LPG-4 2.0" --min-compression 125psi \\
            --reason "service data revision C"
    """
    from fleetdb import limits as limits_mod
    from fleetdb import registry

    engine = _engine(db)
    typed = {k: v for k, v in changes.items() if v is not None}
    if typed:
        if not reason:
            raise click.UsageError("say why with --reason when changing limits")
        result = registry.set_limits(engine, name, typed, reason=reason, by=by)
        if as_json:
            print_json(result)
            return
        v = result["limits"]
        if result["changed"]:
            click.echo(f"Limits of {name} are now version {v['version']}: {_limits_text(v)}")
        else:
            click.echo(f"Limits of {name} unchanged: version {v['version']} already says so.")
        return
    data = limits_mod.history(engine, name)
    if as_json:
        print_json(data)
        return
    click.echo(f"{data['engine_family']}: limits version {data['current_version']} in force")
    rows = [{"version": v["version"], "set_at": v["set_at"], "set_by": v["set_by"],
             "source": v["source"] + (f" (batch {v['batch_id']})" if v["batch_id"] else ""),
             "reason": v["reason"], "limits": _limits_text(v)} for v in data["versions"]]
    print_table(rows, [("version", "version"), ("set_at", "set at (UTC)"),
                       ("set_by", "by"), ("source", "from"), ("reason", "why"),
                       ("limits", "limits")])
