"""Command-line parsers for measure, compare and demo (filled in as the API lands)."""
from __future__ import annotations

import sys


def add_parsers(sub) -> None:
    p = sub.add_parser("demo", help="run a small invented study end to end")
    p.add_argument("--out", default="quietedge-demo", help="output folder (default ./quietedge-demo)")


def run(args) -> int:
    if args.command == "demo":
        print("quietedge demo: measuring is not built yet; run 'quietedge simulate --out DIR' to make "
              "virtual SEM images with known roughness.", file=sys.stderr)
        return 0
    return 2
