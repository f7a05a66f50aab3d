"""``python -m demo_fleet OUT_DIR [--as-of DATE] [--seed N]``: write the demo CSV files."""

from __future__ import annotations

import argparse
import datetime
import sys
from pathlib import Path

from demo_fleet.generator import build


def main(argv: list[str] | None = None) -> int:
    """Write fleet.csv, tests.csv and events.csv of the demo fleet.

    :param argv: command-line arguments (default: sys.argv[1:]).
    """
    parser = argparse.ArgumentParser(prog="python -m demo_fleet",
                                     description="Write the invented demo fleet as CSV files.")
    parser.add_argument("out_dir", type=Path, help="folder to write the CSV files into")
    parser.add_argument("--as-of", type=datetime.date.fromisoformat, default=None,
                        help="build day, YYYY-MM-DD: the last test is on it (default: today)")
    parser.add_argument("--seed", type=int, default=42, help="random seed (default: 42)")
    args = parser.parse_args(argv)
    demo = build(as_of=args.as_of, seed=args.seed)
    for path in demo.write_csv(args.out_dir).values():
        print(path)
    return 0


if __name__ == "__main__":
    sys.exit(main())
