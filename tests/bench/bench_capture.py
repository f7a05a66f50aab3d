"""Capture benchmark: ``fleetdb capture`` of a large recording beside a plain CSV reader.

The recording is generated from the physics of tests/capture_synth.py (slider-crank
volume, polytropic compression with leakage, starter current from the gas torque, manifold
vacuum) and sampled as a scope would: time in whole microseconds, cylinder 1's pressure as
transducer volts (250 kPa/V, -125 kPa offset), starter current in A, cranking vacuum in kPa.
Full scale: about 200 MB at 200 kHz (about 30 s of cranking); ``--small``: a few MB at
20 kHz. The file is cached under tests/bench/out/capture/ (same arguments, same bytes).

Variants, each a child process, interleaved per repetition (see :data:`VARIANTS`):

* baseline: ``pandas.read_csv`` of the whole file into memory (C engine, default dtypes):
  what a plain script would do, with no checks, no analysis and nothing stored;
* ours, dry run: ``fleetdb capture --dry-run``: read in chunks, check, derive, compress;
* ours: ``fleetdb capture``: the same, then the test, its readings and the compressed
  capture written to a fresh SQLite store, and the unit's health refreshed.

Wall and CPU time and peak resident memory come from the kernel's account of each child
(``os.wait4``, as in bench_import). Throughput is samples (rows of the file) per second of
wall time, startup included. Nothing here asserts a speed.

    python -m tests.bench.bench_capture [--small] [--repeat N] [--mb N]
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

# Standard library only above: a child's peak RSS counts its parent's size at the fork.
from tests.bench.bench_import import _check, fleetdb_command, prepare_database, run_measured

REPO = Path(__file__).resolve().parents[2]
OUT = Path(__file__).resolve().parent / "out"
FLEET_CSV = REPO / "tests" / "data" / "fleet.csv"
FULL_MB, FULL_RATE = 200, 200_000
SMALL_MB, SMALL_RATE = 4, 20_000
#: What ``fleetdb capture`` is told about the recording (tests/data/fleet.csv's T-101).
CAPTURE_ARGS = ["--unit", "T-101", "--at", "2024-03-01 08:30", "--hours", "1200",
                "--time-column", "t_us", "--time-unit", "us",
                "--channel", "p1=pressure:1:kPa", "--scale", "p1=250,-125",
                "--channel", "amps=current", "--channel", "vac=vacuum_cranking:kPa",
                "--firing-order", "1-3-4-2", "--throttle-open", "--by", "bench"]
VARIANTS: dict[str, str] = {
    "baseline": "pandas.read_csv of the whole file into memory (no checks, nothing stored)",
    "dry_run": "fleetdb capture --dry-run: chunked read, checks, analysis, compression",
    "ours": "fleetdb capture: the same, then test, readings and capture stored, health refreshed",
}


# -- the recording ----------------------------------------------------------------------------

def write_recording(path: Path, megabytes: float, rate_hz: int, seed: int = 1) -> dict:
    """Write (or reuse) a synthetic cranking capture of about ``megabytes`` MB.

    Runs in a child process (numpy, pandas). A JSON beside the file records what it holds.

    :returns: ``{"rows", "bytes", "rate_hz", "duration_s"}``.
    """
    import numpy as np
    import pandas as pd

    from tests import capture_synth as synth

    meta_path = path.with_suffix(".json")
    wanted = {"megabytes": megabytes, "rate_hz": rate_hz, "seed": seed}
    if meta_path.exists() and path.exists():
        meta = json.loads(meta_path.read_text())
        if meta.get("wanted") == wanted and meta.get("bytes") == path.stat().st_size:
            return meta
    bytes_per_row = 28.0  # "1234567,0.51234,402.13,2.215\n": measured on the small file
    duration = megabytes * 1e6 / bytes_per_row / rate_hz
    sim = synth.simulate(synth.Geometry(), synth.Cranking(
        leak=(3e-4, 3e-4, 3e-3, 3e-4), intake_mean_kpa=2.0, intake_pulse_kpa=3.0,
        duration_s=duration + 0.01, sag=0.05))
    rng = np.random.default_rng(seed)
    p1 = synth.pressure_gauge(sim, 1)
    amps = synth.starter_current(sim)
    vac = synth.manifold_vacuum(sim)
    n = int(duration * rate_hz)
    path.parent.mkdir(parents=True, exist_ok=True)
    block = 1_000_000
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write("t_us,p1,amps,vac\n")
        for start in range(0, n, block):
            i = np.arange(start, min(n, start + block))
            t = i / rate_hz
            frame = pd.DataFrame({
                "t_us": np.rint(t * 1e6).astype(np.int64),
                "p1": np.round((np.interp(t, sim.time_s, p1) + rng.normal(0, 5.0, i.size)
                                + 125.0) / 250.0, 5),
                "amps": np.round(np.interp(t, sim.time_s, amps) + rng.normal(0, 2.0, i.size),
                                 2),
                "vac": np.round(np.interp(t, sim.time_s, vac) + rng.normal(0, 0.3, i.size), 3)})
            frame.to_csv(fh, header=False, index=False)
    meta = {"wanted": wanted, "rows": n, "bytes": path.stat().st_size, "rate_hz": rate_hz,
            "duration_s": round(n / rate_hz, 3)}
    meta_path.write_text(json.dumps(meta))
    return meta


def time_display(db_url: str) -> None:
    """The Unit history page's work on the stored capture: decode it, thin every channel for
    the whole waveform, then redraw a 10 ms zoom window from every sample (median of 5)."""
    from dashboard import capture_data
    from fleetdb import capture_store, db

    engine = db.get_engine(db_url)
    start = time.perf_counter()
    shown = capture_store.load_capture(engine, 1)
    load_s = time.perf_counter() - start
    whole, zoom = [], []
    for _ in range(5):
        start = time.perf_counter()
        traces = capture_data.traces(shown)
        whole.append(time.perf_counter() - start)
        middle = float(shown.time_s[shown.time_s.size // 2])
        start = time.perf_counter()
        zoomed = capture_data.traces(shown, middle, middle + 0.01)
        zoom.append(time.perf_counter() - start)
    print(json.dumps({"load_s": load_s, "whole_s": statistics.median(whole),
                      "zoom_s": statistics.median(zoom),
                      "points_whole": sum(t.time_s.size for t in traces),
                      "points_zoom": sum(t.time_s.size for t in zoomed)}))


def read_with_pandas(path: str) -> None:
    """The baseline: the whole file into a DataFrame."""
    import pandas as pd

    frame = pd.read_csv(path)
    print(json.dumps({"rows": len(frame), "columns": list(frame.columns)}))


# -- the benchmark ----------------------------------------------------------------------------

def _command(variant: str, capture: Path, db_url: str) -> list[str]:
    if variant == "baseline":
        return [sys.executable, "-m", "tests.bench.bench_capture", "--read", str(capture)]
    extra = ["--dry-run"] if variant == "dry_run" else []
    return [*fleetdb_command(), "capture", str(capture), *CAPTURE_ARGS, *extra, "--db", db_url]


def main(small: bool = False, units: int | None = None, repeat: int | None = None,
         megabytes: float | None = None) -> None:
    """Generate (or reuse) the recording, then run the variants interleaved; print the table.

    :param small: a few MB, one repetition (what CI runs).
    :param units: unused (every benchmark takes it; a capture is one unit's test).
    """
    del units
    megabytes = megabytes or (SMALL_MB if small else FULL_MB)
    rate = SMALL_RATE if small else FULL_RATE
    repeat = repeat or (1 if small else 3)
    capture = OUT / "capture" / f"crank-{megabytes:g}mb-{rate // 1000}khz.csv"
    _check(run_measured([sys.executable, "-m", "tests.bench.bench_capture", "--write",
                         str(capture), "--mb", str(megabytes), "--rate", str(rate)]),
           "writing the recording")
    meta = json.loads(capture.with_suffix(".json").read_text())
    runs: dict[str, list] = {v: [] for v in VARIANTS}
    with tempfile.TemporaryDirectory() as tmp:
        for i in range(repeat):
            for variant in VARIANTS:
                url = f"sqlite:///{Path(tmp) / f'{variant}-{i}.sqlite'}"
                if variant != "baseline":
                    prepare_database(url, FLEET_CSV)
                m = _check(run_measured(_command(variant, capture, url),
                                        rss_limit_bytes=8 * 1024**3), f"{variant} run {i + 1}")
                runs[variant].append(m)
                print(f"  {variant:9s} run {i + 1}: {m.seconds:6.1f} s, CPU "
                      f"{m.cpu_seconds:6.1f} s, peak RSS {m.peak_rss_bytes / 1e6:6.0f} MB",
                      flush=True)
        shown = subprocess.run([sys.executable, "-m", "tests.bench.bench_capture", "--display",
                                url], cwd=REPO, capture_output=True, text=True, check=True)
        display = json.loads(shown.stdout.strip().splitlines()[-1])
    rows = meta["rows"]
    base = statistics.median(m.seconds for m in runs["baseline"])
    table = {}
    print(f"\ncapture benchmark: {meta['bytes'] / 1e6:.0f} MB, {rows:,} samples at "
          f"{meta['rate_hz']:,} Hz ({meta['duration_s']:.1f} s), 4 columns, {repeat} run(s)")
    print(f"{'variant':10}{'median s':>10}{'CPU s':>9}{'samples/s':>12}{'peak MB':>9}"
          f"{'x baseline':>12}  what")
    for variant, ms in runs.items():
        wall = statistics.median(m.seconds for m in ms)
        row = {"median_s": round(wall, 2),
               "median_cpu_s": round(statistics.median(m.cpu_seconds for m in ms), 2),
               "samples_per_s": round(rows / wall),
               "peak_rss_mb": round(max(m.peak_rss_bytes for m in ms) / 1e6),
               "ratio_per_run": [round(m.seconds / b.seconds, 2)
                                 for m, b in zip(ms, runs["baseline"], strict=True)],
               "ratio": round(wall / base, 2)}
        table[variant] = row
        print(f"{variant:10}{row['median_s']:>10}{row['median_cpu_s']:>9}"
              f"{row['samples_per_s']:>12,}{row['peak_rss_mb']:>9}{row['ratio']:>12}  "
              f"{VARIANTS[variant]}")
    print(f"Unit history on the stored capture: decode {display['load_s']:.2f} s (once per "
          f"process, then cached), whole waveform thinned to {display['points_whole']:,} "
          f"points in {display['whole_s']:.3f} s, a 10 ms zoom at full "
          f"resolution ({display['points_zoom']:,} points) in {display['zoom_s']:.3f} s")
    OUT.mkdir(exist_ok=True)
    stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime())
    (OUT / f"capture-{megabytes:g}mb-{stamp}.json").write_text(json.dumps(
        {"file": meta, "repeat": repeat, "results": table, "variants": VARIANTS,
         "display": display}, indent=1))


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--small", action="store_true", help="a few MB, one run (CI)")
    parser.add_argument("--repeat", type=int, help="repetitions (default 3; 1 with --small)")
    parser.add_argument("--mb", type=float, help="size of the recording, MB")
    parser.add_argument("--rate", type=int, default=FULL_RATE, help=argparse.SUPPRESS)
    parser.add_argument("--write", metavar="CSV", help=argparse.SUPPRESS)
    parser.add_argument("--read", metavar="CSV", help=argparse.SUPPRESS)
    parser.add_argument("--display", metavar="DB", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.write:
        print(json.dumps(write_recording(Path(args.write), args.mb, args.rate)))
    elif args.read:
        read_with_pandas(args.read)
    elif args.display:
        time_display(args.display)
    else:
        main(args.small, None, args.repeat, args.mb)
