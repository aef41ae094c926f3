"""``python -m benchmarks [--quick] [--only NAME ...]``: every part, one table."""

from __future__ import annotations

import argparse
import importlib
import sys
import time

from benchmarks._common import Row, print_table

PARTS = ("ingest", "overhead", "predict", "leaderboard", "efficiency", "parallel")


def main() -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks", description=__doc__)
    parser.add_argument("--quick", action="store_true",
                        help="small sizes: a smoke run that checks the benchmarks still work")
    parser.add_argument("--only", nargs="*", choices=PARTS, help="run only these parts")
    parser.add_argument("--strict", action="store_true",
                        help="exit non-zero when a target is missed")
    args = parser.parse_args()
    rows: list[Row] = []
    for name in args.only or PARTS:
        start = time.perf_counter()
        part = importlib.import_module(f"benchmarks.{name}")
        rows.extend(part.run(quick=args.quick))
        print(f"[{name} done in {time.perf_counter() - start:.0f} s]", file=sys.stderr)
    print_table(rows)
    return 1 if args.strict and not all(r.passed for r in rows) else 0


if __name__ == "__main__":
    sys.exit(main())
