"""Command line: a thin layer of arguments over the Python API.

Errors the tool raises on purpose become one line on stderr and exit status 2;
``--debug`` shows the traceback instead.
"""

from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path

from .errors import PredictorError, PredictorWarning


def _wells_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--wells", required=True, help="wells table (CSV or Parquet): x, y, facies, porosity, ...")
    p.add_argument("--grid", required=True, help="seismic attribute grid (CSV long table or NetCDF)")
    p.add_argument("--x-column", help="name of the x (easting) column, when not found automatically")
    p.add_argument("--y-column", help="name of the y (northing) column, when not found automatically")
    p.add_argument("--porosity-percent", action="store_true", help="porosity is given in percent: divide by 100")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="predictor", description=__doc__.splitlines()[0])
    parser.add_argument("--debug", action="store_true", help="show the full traceback on errors")
    sub = parser.add_subparsers(dest="command", required=True)

    qc = sub.add_parser("qc", help="check wells and grid: statistics, non-physical values, duplicates, "
                        "outliers per facies, drilling bias, declustering")
    _wells_options(qc)
    qc.add_argument("--json", help="write the full QC record as JSON here")
    qc.add_argument("--figures", help="write QC figures (PNG) into this folder")
    qc.add_argument("--duplicate-distance", type=float, default=1.0,
                    help="wells closer than this (m) count as duplicates (default 1)")

    demo = sub.add_parser("demo", help="run the whole job on the bundled synthetic Tarnwick field")
    demo.add_argument("--out", default="demo_output", help="output folder (default demo_output)")
    demo.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    return parser


def _cmd_qc(args) -> int:
    from .checks import check_files

    check = check_files(args.wells, args.grid, args.json, args.figures, args.porosity_percent,
                        args.x_column, args.y_column, args.duplicate_distance)
    for line in check.qc.lines():
        print(line)
    d = check.declustering
    print(f"declustering: cell size {d.cell_size:.0f} m ({d.direction} of the declustered-mean curve); "
          f"mean {d.variable}: naive {d.naive_mean:.4g}, declustered {d.declustered_mean:.4g}")
    if args.json:
        print(f"QC record: {args.json}")
    if args.figures:
        print(f"figures: {args.figures}")
    if check.qc.errors:
        print(f"predictor: QC found {len(check.qc.errors)} error(s); fix them before modelling", file=sys.stderr)
        return 2
    return 0


def _cmd_demo(args) -> int:
    from .demo import run_demo

    summary = run_demo(Path(args.out), overwrite=args.overwrite)
    for line in summary:
        print(line)
    return 0


COMMANDS = {"qc": _cmd_qc, "demo": _cmd_demo}


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    warnings.simplefilter("always", PredictorWarning)
    warnings.showwarning = _show_warning
    try:
        return COMMANDS[args.command](args)
    except PredictorError as err:
        if args.debug:
            raise
        print(f"predictor: error: {err}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("predictor: interrupted; no partial outputs were kept", file=sys.stderr)
        return 130


def _show_warning(message, category, filename, lineno, file=None, line=None):
    if issubclass(category, PredictorWarning):
        print(f"predictor: warning: {message}", file=sys.stderr)
    else:
        print(f"{category.__name__}: {message}", file=sys.stderr)


if __name__ == "__main__":
    sys.exit(main())
