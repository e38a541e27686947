"""``mfbridge compare FIT_DIR FIT_DIR ...``: rank fitted models by N·ΣJ at their optima.

Prints a table (Markdown) of N·ΣJ(θ̂), the differences Δ from the best model and the implied
likelihood ratios e^Δ, with the caution that these are leading-order large-deviation estimates;
``--out FILE`` also writes it. Exit status 2 for bad input (a folder that is not a finished fit,
different N or snapshot times).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from mfbridge.errors import MFBridgeError


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="mfbridge compare",
        description="Compare models fitted to the same snapshots (mfbridge fit ... --out DIR): "
                    "N·ΣJ at their optima and the implied likelihood ratios.")
    parser.add_argument("fits", nargs="+", metavar="FIT_DIR", help="fit folders (two or more)")
    parser.add_argument("--labels", nargs="+", default=None,
                        help="model names (default: the folder names)")
    parser.add_argument("--out", default=None, metavar="FILE", help="also write the table here")
    return parser


def main(argv: list[str]) -> int:
    from mfbridge.runs.fitting import compare_fits, comparison_table

    args = _parser().parse_args(argv)
    try:
        table = comparison_table(compare_fits(args.fits, args.labels))
    except MFBridgeError as exc:
        print(f"mfbridge compare: {exc}", file=sys.stderr)
        return 2
    print(table)
    if args.out:
        Path(args.out).write_text(table + "\n")
        print(f"table: {args.out}")
    return 0
