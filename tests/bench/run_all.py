"""Run every benchmark in tests/bench: each ``bench_*.py`` module's ``main(small, units)``.

    python -m tests.bench.run_all            # full scale (minutes)
    python -m tests.bench.run_all --small    # a few hundred units, well under a minute (CI)
    python -m tests.bench.run_all --only import --units 2000

Each benchmark runs in its own process, prints its table and writes its JSON to
tests/bench/out/. A benchmark module is any ``bench_*.py`` here with a
``main(small: bool, units: int | None) -> None``. A benchmark that fails (an import
that exits with an error, a floor that stores other content) makes the whole run exit
with status 1, so CI notices one that has rotted; speed never fails it.
"""

from __future__ import annotations

import argparse
import importlib
import pkgutil
import subprocess
import sys
import time
from pathlib import Path

BENCH_DIR = Path(__file__).resolve().parent


def discover() -> list[str]:
    """The benchmark module names (``bench_*``) in tests/bench, sorted."""
    return sorted(m.name for m in pkgutil.iter_modules([str(BENCH_DIR)])
                  if m.name.startswith("bench_"))


def run_one(module: str, small: bool, units: int | None) -> None:
    """Import one benchmark module and call its ``main(small, units)``.

    :param module: e.g. ``bench_import``.
    """
    entry = getattr(importlib.import_module(f"tests.bench.{module}"), "main", None)
    if not callable(entry):
        print(f"{module} has no main(small, units); skipped")
        return
    entry(small=small, units=units)


def run_all(small: bool, units: int | None, only: list[str] | None = None) -> list[str]:
    """Run the benchmarks one after the other, each in its own process.

    A process each, so that one benchmark's imports and memory neither slow nor inflate
    the next one's figures (a child's peak RSS starts from its parent's size).

    :param small: a few hundred units, one run each.
    :param units: fleet size for every benchmark, overriding its default.
    :param only: run just these benchmarks (names with or without ``bench_``).
    :returns: the modules that failed.
    """
    modules = discover()
    wanted = {name if name.startswith("bench_") else f"bench_{name}" for name in only or ()}
    unknown = sorted(wanted - set(modules))
    if unknown:
        raise SystemExit(f"no benchmark {', '.join(unknown)}; there are: {', '.join(modules)}")
    failed = []
    for module in modules:
        if wanted and module not in wanted:
            continue
        print(f"== {module} ({'small' if small else 'full'} scale"
              f"{f', {units} units' if units else ''})", flush=True)
        start = time.perf_counter()
        cmd = [sys.executable, "-m", "tests.bench.run_all", "--one", module]
        cmd += ["--small"] if small else []
        cmd += ["--units", str(units)] if units else []
        code = subprocess.run(cmd, cwd=BENCH_DIR.parents[1], check=False).returncode
        if code != 0:
            failed.append(module)
        print(f"== {module}: {'FAILED' if code else 'done'} in "
              f"{time.perf_counter() - start:.0f} s\n", flush=True)
    return failed


def main() -> None:
    """Command line of ``python -m tests.bench.run_all``."""
    parser = argparse.ArgumentParser(description="Run the fleetdb benchmarks.")
    parser.add_argument("--small", action="store_true",
                        help="a few hundred units, one run each (what CI runs)")
    parser.add_argument("--units", type=int, help="fleet size, for every benchmark")
    parser.add_argument("--only", action="append", metavar="NAME",
                        help="run only this benchmark (repeatable), e.g. --only import")
    parser.add_argument("--one", help=argparse.SUPPRESS)  # the child running one module
    args = parser.parse_args()
    if args.one:
        run_one(args.one, args.small, args.units)
        return
    failed = run_all(args.small, args.units, args.only)
    if failed:
        print(f"benchmarks that failed: {', '.join(failed)}", file=sys.stderr)
        sys.exit(1)


if __name__ == "__main__":
    main()
