"""Benchmark: the Fleet wear page's frames, computed fresh and kept current after a write.

On the synthetic store of :mod:`tests.bench.bench_refresh` (20,000 units at full scale,
300 with ``--small``), in one process:

* **fresh**: ``fleetwear.fleet_wear`` (whole-fleet read and assessment, then the page's
  frames), what the first view of a day costs; the median of a few runs.
* **update**: for each of ``--samples`` units, a test logged (not timed) and then
  ``fleetwear.bring_up_to_date`` on the previous result, what the next view costs. Beside
  it, the baseline of bench_refresh's one-unit figure from the same run: a plain SELECT of
  that unit's compression readings and a numpy OLS per cylinder.

The last update is checked against a fresh computation (the tests frames must be equal);
a difference fails the benchmark. Goal: an update under 100 ms median (the one-unit refresh
goal). Speed is reported, never asserted. JSON to ``tests/bench/out/fleetwear-*.json``.

    python -m tests.bench.bench_fleetwear [--small] [--units N] [--samples S]
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import random
import shutil
import sqlite3
import statistics
import tempfile
import time
from pathlib import Path

import pandas as pd

from tests.bench.bench_refresh import OUT, cached_store, ols_of_unit

GOAL_UPDATE_MS = 100.0


def measure(path: str, samples: int, fresh_runs: int) -> dict:
    """Time fresh computations and updates on the store at ``path`` (changed: tests logged)."""
    from fleetdb import db, fleetwear, logbook

    engine = db.make_engine(f"sqlite:///{path}")
    plain = sqlite3.connect(path)
    day = dt.date.today()
    fresh_s, known = [], None
    for _ in range(fresh_runs):
        start = time.perf_counter()
        known = fleetwear.fleet_wear(engine, day)
        fresh_s.append(time.perf_counter() - start)
    assert known is not None
    units = plain.execute("SELECT u.id, u.fleet_no, f.cylinders, MAX(t.tested_at), "
                          "MAX(t.hours) FROM unit u JOIN engine_family f ON f.id = u.family_id "
                          "JOIN test t ON t.unit_id = u.id GROUP BY u.id").fetchall()
    picked = random.Random(11).sample(units, min(samples, len(units)))
    update_ms, base_ms = [], []
    for uid, fleet_no, cylinders, last_at, last_hours in picked:
        # A day after the unit's last test; a minute after if that is past the day assessed.
        last = pd.Timestamp(last_at[:16])
        when = last + pd.Timedelta(days=1)
        when = when if when.date() <= day else last + pd.Timedelta(minutes=1)
        logbook.log_test(engine, fleet_no, when.isoformat(sep=" "), f"{last_hours + 24:.1f}",
                         [logbook.TypedReading("compression", c, "150", "psi")
                          for c in range(1, cylinders + 1)],
                         conditions={"battery_v": "10.5", "crank_rpm": "250",
                                     "engine_temp_c": "80"})
        start = time.perf_counter()
        known = fleetwear.bring_up_to_date(engine, known)
        update_ms.append((time.perf_counter() - start) * 1000)
        start = time.perf_counter()
        ols_of_unit(plain, uid)
        base_ms.append((time.perf_counter() - start) * 1000)
    fresh = fleetwear.fleet_wear(engine, day)
    same = known.tests.equals(fresh.tests) and known.latest.equals(fresh.latest)
    engine.dispose()
    return {"fresh_s": fresh_s, "update_ms": update_ms, "baseline_ms": base_ms,
            "tests_rows": len(fresh.tests), "units_with_wear": len(fresh.wear),
            "update_equals_fresh": same}


def main(small: bool = False, units: int | None = None, samples: int = 10) -> None:
    """Build (or reuse) the synthetic store, measure on a copy, print and save the figures."""
    units = units or (300 if small else 20_000)
    store, counts = cached_store(units)
    with tempfile.TemporaryDirectory() as tmp:
        path = str(Path(tmp) / "fleetwear.sqlite")
        shutil.copyfile(store, path)
        result = measure(path, samples, fresh_runs=1 if small else 3)
    fresh = statistics.median(result["fresh_s"])
    update = statistics.median(result["update_ms"])
    base = statistics.median(result["baseline_ms"])
    print(f"fleet wear benchmark: {units} units, {counts.get('readings')} readings, "
          f"{result['tests_rows']} trustworthy dry tests")
    print(f"  fresh (whole fleet assessed): median {fresh:.2f} s, runs "
          f"{', '.join(f'{s:.2f}' for s in result['fresh_s'])}")
    print(f"  update after one logged test ({len(result['update_ms'])} samples): median "
          f"{update:.1f} ms; baseline (SELECT of the unit's readings + numpy OLS) median "
          f"{base:.1f} ms; ratio {update / base:.0f}; {fresh * 1000 / update:.0f}x quicker "
          f"than fresh  (goal < {GOAL_UPDATE_MS:.0f} ms)")
    print(f"  updated frames equal a fresh computation: {result['update_equals_fresh']}")
    OUT.mkdir(exist_ok=True)
    stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime())
    (OUT / f"fleetwear-{units}u-{stamp}.json").write_text(json.dumps(
        {"units": units, "counts": counts, "fresh_median_s": fresh, "update_median_ms": update,
         "baseline_median_ms": base, **result}, indent=1))
    if not result["update_equals_fresh"]:
        raise SystemExit("the updated Fleet wear frames differ from a fresh computation")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--small", action="store_true")
    parser.add_argument("--units", type=int)
    parser.add_argument("--samples", type=int, default=10,
                        help="units logged and brought up to date one at a time (default 10)")
    args = parser.parse_args()
    main(args.small, args.units, args.samples)
