"""Command line: a thin layer of arguments over the Python API.

Errors the tool raises on purpose become one line on stderr and exit status 2;
``--debug`` shows the traceback instead.
"""

from __future__ import annotations

import argparse
import signal
import sys
import warnings
from pathlib import Path

from .errors import PredictorError, PredictorWarning


def _wells_options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--wells", required=True, help="wells table (CSV or Parquet): x, y, facies, porosity, ..."
    )
    p.add_argument(
        "--grid",
        required=True,
        help=(
            "seismic attribute map (CSV long table, NetCDF, Zarr) or volume "
            "(SEG-Y, or NetCDF/Zarr with a z dimension)"
        ),
    )
    p.add_argument(
        "--x-column", help="name of the x (easting) column, when not found automatically"
    )
    p.add_argument(
        "--y-column", help="name of the y (northing) column, when not found automatically"
    )
    p.add_argument(
        "--z-column",
        help=(
            "(volumes) name of the wells' depth or time column, when not found "
            "automatically (z, depth, tvd, tvdss, twt, time)"
        ),
    )
    _volume_options(p)
    p.add_argument(
        "--porosity-percent",
        action="store_true",
        help="porosity is given in percent: divide by 100",
    )
    p.add_argument(
        "--attribute-kind",
        action="append",
        type=_kind_pair,
        metavar="ATTR=KIND",
        help=(
            "what a grid attribute is: impedance, velocity, density (positive), amplitude (signed)"
            " or other (e.g. --attribute-kind rel_ai=amplitude; repeatable); default: guessed from"
            " the name. The positivity and units checks and the rock-physics sign check follow it"
        ),
    )
    for role, example in (("porosity", "PHIT"), ("permeability", "CORE_K"), ("facies", "LITHO")):
        p.add_argument(
            f"--{role}-column",
            metavar="COLUMN",
            help=(
                f"the wells column that holds {role} (e.g. {example}), when it is not named {role}"
                " or a common mnemonic; its checks, units and transform follow"
            ),
        )


def _volume_options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--z-domain",
        choices=["depth", "time"],
        help=(
            "(volumes) the volume's sample axis is depth (m) or two-way time (ms), when the file"
            " does not say (SEG-Y)"
        ),
    )
    p.add_argument(
        "--segy-name",
        help=(
            "(SEG-Y) name of the attribute the file holds, as the model knows it (default"
            " amplitude)"
        ),
    )


def _kind_pair(text: str) -> tuple[str, str]:
    """``ATTR=KIND`` for --attribute-kind."""
    name, _, kind = text.partition("=")
    if not name or not kind:
        raise argparse.ArgumentTypeError(
            f"{text!r}: give an attribute and its kind, e.g. rel_ai=amplitude"
        )
    return name, kind


def _kinds(args) -> dict[str, str]:
    return dict(args.attribute_kind or [])


def _roles(args) -> dict[str, str]:
    """The wells columns named for the property roles (--porosity-column ...)."""
    return {
        role: getattr(args, f"{role}_column")
        for role in ("porosity", "permeability", "facies")
        if getattr(args, f"{role}_column")
    }


def build_parser() -> argparse.ArgumentParser:
    from .options import add_arguments
    from .training import TrainOptions

    parser = argparse.ArgumentParser(prog="predictor", description=__doc__.splitlines()[0])
    parser.add_argument("--debug", action="store_true", help="show the full traceback on errors")
    parser.add_argument("--quiet", action="store_true", help="no progress bars")
    # the same two options after the subcommand too (predictor train ... --quiet)
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument(
        "--debug", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS
    )
    common.add_argument(
        "--quiet", action="store_true", default=argparse.SUPPRESS, help="no progress bars"
    )
    commands = parser.add_subparsers(dest="command", required=True)

    def sub_parser(name: str, summary: str):
        description, writes, example = COMMAND_HELP[name]
        return commands.add_parser(
            name,
            help=summary,
            parents=[common],
            description=f"{description}\n\n{writes}",
            epilog=f"example:\n  {example}",
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )

    qc = sub_parser(
        "qc",
        "check wells and grid: statistics, non-physical values, duplicates, "
        "outliers per facies, drilling bias, declustering",
    )
    _wells_options(qc)
    qc.add_argument("--json", help="write the full QC record as JSON here")
    qc.add_argument("--figures", help="write QC figures (PNG) into this folder")
    qc.add_argument(
        "--duplicate-distance",
        type=float,
        default=1.0,
        help="wells closer than this (m) count as duplicates (default 1)",
    )

    tr = sub_parser(
        "train", "train facies/porosity/permeability models with spatial CV; write a bundle"
    )
    _wells_options(tr)
    tr.add_argument(
        "--out",
        required=True,
        help="bundle folder to write (refused if it exists, see --overwrite)",
    )
    tr.add_argument("--overwrite", action="store_true", help="replace an existing bundle folder")
    tr.add_argument(
        "--attribute", action="append", help="grid attribute to use as a feature (default: all)"
    )
    tr.add_argument(
        "--context-radius",
        action="append",
        type=float,
        default=[],
        help="add smoothed and local-contrast features at this radius in metres (repeatable)",
    )
    tr.add_argument(
        "--gradient", action="store_true", help="add the gradient magnitude of each attribute"
    )
    tr.add_argument(
        "--vertical-radius",
        action="append",
        type=float,
        default=[],
        help=(
            "(volumes) add smoothed and contrast features along z at this radius in z units "
            "(m or ms; repeatable)"
        ),
    )
    tr.add_argument(
        "--z-trend",
        action="store_true",
        help="(volumes) add z itself as a feature (compaction trend)",
    )
    tr.add_argument(
        "--location",
        action="store_true",
        help="add coordinate features (off by default: they let a model memorise the wells)",
    )
    add_arguments(tr, TrainOptions)  # the options table (training.TrainOptions)

    pr = sub_parser(
        "predict", "map every target of a bundle on a grid (CSV or NetCDF by extension)"
    )
    pr.add_argument("bundle", help="bundle folder written by `predictor train`")
    pr.add_argument(
        "--grid", required=True, help="map or volume with the attributes the bundle was trained on"
    )
    _volume_options(pr)
    pr.add_argument(
        "--out",
        required=True,
        help=(
            "maps file: .csv, .nc (CF NetCDF), .tif (GeoTIFF; class codes in <stem>_classes.tif),"
            " or .zarr (tile by tile with bounded memory, for grids larger than memory); volumes:"
            " .csv, .nc, .zarr, .sgy (one SEG-Y file per output variable)"
        ),
    )
    pr.add_argument(
        "--tile",
        type=int,
        help=(
            "with .zarr: tile side in nodes or traces (default 512 for maps; "
            "for volumes about a million samples per tile)"
        ),
    )
    pr.add_argument(
        "--threads",
        type=int,
        help=(
            "threads predicting chunks of nodes (or tiles, with .zarr) side "
            "by side (default: all cores; the maps do not depend on it)"
        ),
    )
    pr.add_argument(
        "--workers", type=int, help="with .zarr: start a local Dask cluster of this many workers"
    )
    pr.add_argument(
        "--scheduler", help="with .zarr: address of an existing dask.distributed scheduler"
    )
    pr.add_argument(
        "--crs",
        help="coordinate reference system of the maps, e.g. EPSG:32631 (default: the grid's)",
    )
    pr.add_argument(
        "--exceed",
        action="append",
        metavar="TARGET:CUTOFF",
        help=(
            "also map the probability that a target exceeds a cutoff, in the target's units, from"
            " the out-of-fold residual distribution of each facies mixed by the facies"
            " probabilities (how well calibrated: see the README), e.g. --exceed porosity:0.15"
            " --exceed permeability:100 (written as porosity_prob_above_0p15); repeatable"
        ),
    )
    pr.add_argument("--overwrite", action="store_true", help="replace an existing maps file")

    ex = sub_parser(
        "explain",
        "SHAP importance, summary and dependence plots, SHAP at the wells and "
        "contribution maps for every target of a bundle",
    )
    ex.add_argument("bundle", help="bundle folder written by `predictor train`")
    ex.add_argument(
        "--grid",
        help="grid for contribution maps (optional; a volume is shown at the wells' middle z)",
    )
    _volume_options(ex)
    ex.add_argument("--out", default="explanations", help="output folder (default explanations)")
    ex.add_argument("--overwrite", action="store_true", help="replace an existing output folder")

    rp = sub_parser("report", "one self-contained HTML report of a bundle (figures embedded)")
    rp.add_argument("bundle", help="bundle folder written by `predictor train`")
    rp.add_argument("--out", default="report.html", help="HTML file to write (default report.html)")
    rp.add_argument("--grid", help="grid to map (default: the grid the bundle was trained on)")
    _volume_options(rp)
    rp.add_argument("--overwrite", action="store_true", help="replace an existing report")

    demo = sub_parser("demo", "run the whole job on the bundled synthetic Tarnwick field")
    demo.add_argument("--out", default="demo_output", help="output folder (default demo_output)")
    demo.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    demo.add_argument(
        "--volume",
        action="store_true",
        help="the 3-D scenario instead: well samples and a SEG-Y impedance volume (generated)",
    )
    return parser


COMMAND_HELP = {  # per subcommand: what it does, what it writes, an example on the demo files
    "qc": (
        (
            "Check the wells and the grid before modelling: statistics per column and facies,"
            " non-physical values, duplicated wells, outliers, how far the wells' attribute values"
            " are from the map's (drilling bias) and the declustering weights."
        ),
        "Writes: a summary on screen; with --json the full record; with --figures PNG figures.",
        (
            "predictor qc --wells demo_data/wells.csv --grid demo_data/seismic.csv --figures"
            " qc_figures"
        ),
    ),
    "train": (
        (
            "Train facies, porosity or permeability models from the grid's attributes, scored"
            " against linear/logistic, kriging and regression-kriging baselines on the same spatial"
            " CV folds."
        ),
        (
            "Writes: a bundle folder (models, model_card.json with the leaderboard and field-wide"
            " numbers, out-of-fold predictions per well)."
        ),
        (
            "predictor train --wells demo_data/wells.csv --grid demo_data/seismic.csv --target"
            " porosity --target facies --out models/demo"
        ),
    ),
    "predict": (
        (
            "Map every target of a bundle on a grid or volume: the prediction, q10/q90, class "
            "probabilities and the area of applicability."
        ),
        (
            "Writes: one maps file, its format chosen by the extension (.csv, .nc, .tif, .zarr;"
            " volumes also .sgy)."
        ),
        "predictor predict models/demo --grid demo_data/seismic.csv --out maps.nc",
    ),
    "explain": (
        (
            "Why the models predict what they do: SHAP importance, summary and dependence plots,"
            " SHAP at the wells and, with --grid, contribution maps."
        ),
        "Writes: a folder of PNG figures and CSV tables.",
        "predictor explain models/demo --grid demo_data/seismic.csv --out explanations",
    ),
    "report": (
        (
            "One self-contained HTML report of a bundle: data, validation, maps, uncertainty,"
            " field-wide numbers and explanations, with the cautions."
        ),
        "Writes: one HTML file with its figures embedded.",
        "predictor report models/demo --out report.html",
    ),
    "demo": (
        (
            "Run the whole job on the invented Tarnwick field: checks, training, maps, explanations"
            " and the report, compared with the field's known truth."
        ),
        "Writes: a folder with the inputs, the bundle, maps, figures and the report.",
        "predictor demo --out demo_output",
    ),
}


def _cmd_qc(args) -> int:
    from .checks import check_files

    check = check_files(
        args.wells,
        args.grid,
        args.json,
        args.figures,
        args.porosity_percent,
        args.x_column,
        args.y_column,
        args.duplicate_distance,
        z=args.z_column,
        z_domain=args.z_domain,
        segy_name=args.segy_name,
        roles=_roles(args),
        kinds=_kinds(args),
    )
    for line in check.qc.lines():
        print(line)
    d = check.declustering
    print(
        f"declustering: cell size {d.cell_size:.0f} m ({d.direction} of the declustered-mean"
        f" curve); mean {d.variable}: naive {d.naive_mean:.4g}, declustered"
        f" {d.declustered_mean:.4g}"
    )
    if args.json:
        print(f"QC record: {args.json}")
    if args.figures:
        print(f"figures: {args.figures}")
    if check.qc.errors:
        print(
            f"predictor: QC found {len(check.qc.errors)} error(s); fix them before modelling",
            file=sys.stderr,
        )
        return 2
    return 0


def _cmd_train(args) -> int:
    from .options import from_arguments
    from .training import TrainOptions
    from .workflow import train_files

    trained, folder = train_files(
        args.wells,
        args.grid,
        args.out,
        attributes=args.attribute,
        context_radii=args.context_radius,
        gradient=args.gradient,
        location=args.location,
        porosity_percent=args.porosity_percent,
        x=args.x_column,
        y=args.y_column,
        z=args.z_column,
        z_domain=args.z_domain,
        segy_name=args.segy_name,
        vertical_radii=args.vertical_radius,
        z_trend=args.z_trend,
        overwrite=args.overwrite,
        roles=_roles(args),
        kinds=_kinds(args),
        **from_arguments(args, TrainOptions),
    )
    from .workflow import field_wide_lines, leaderboard_lines

    for line in leaderboard_lines(trained) + field_wide_lines(trained):
        print(line)
    for note in trained.warnings:
        print(f"note: {note}")
    print(f"bundle: {folder}")
    return 0


def _cmd_predict(args) -> int:
    from .predict import parse_exceedance
    from .workflow import predict_files

    exceed = parse_exceedance(args.exceed)
    if args.out.lower().endswith(".zarr"):
        from .chunked import predict_to_zarr

        path = predict_to_zarr(
            args.bundle,
            args.grid,
            args.out,
            tile=args.tile,
            threads=args.threads,
            workers=args.workers,
            scheduler=args.scheduler,
            overwrite=args.overwrite,
            z_domain=args.z_domain,
            segy_name=args.segy_name,
            exceed=exceed,
            crs=args.crs,
        )
    else:
        path = predict_files(
            args.bundle,
            args.grid,
            args.out,
            overwrite=args.overwrite,
            crs=args.crs,
            z_domain=args.z_domain,
            segy_name=args.segy_name,
            exceed=exceed,
            threads=args.threads,
        )
    print(f"maps: {path}")
    return 0


def _cmd_explain(args) -> int:
    from .explanations import explain_bundle
    from .grid import read_seismic

    grid = (
        read_seismic(args.grid, z_domain=args.z_domain, name=args.segy_name) if args.grid else None
    )
    for line in explain_bundle(args.bundle, args.out, grid, overwrite=args.overwrite):
        print(line)
    print(f"explanations: {args.out}")
    return 0


def _cmd_report(args) -> int:
    from .report import build_report

    path = build_report(
        args.bundle,
        args.out,
        args.grid,
        overwrite=args.overwrite,
        z_domain=args.z_domain,
        segy_name=args.segy_name,
    )
    print(f"report: {path}")
    return 0


def _cmd_demo(args) -> int:
    from .demo import run_demo, run_volume_demo

    summary = (run_volume_demo if args.volume else run_demo)(
        Path(args.out), overwrite=args.overwrite
    )
    for line in summary:
        print(line)
    return 0


COMMANDS = {
    "qc": _cmd_qc,
    "train": _cmd_train,
    "predict": _cmd_predict,
    "explain": _cmd_explain,
    "report": _cmd_report,
    "demo": _cmd_demo,
}


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    from .progress import set_quiet

    set_quiet(args.quiet)
    # warning display, the unraisable hook, signal handlers and the stop flag are this call's
    # alone: a notebook that calls main() finds them as they were afterwards
    with warnings.catch_warnings():  # restores filters and showwarning on the way out
        warnings.simplefilter("always", PredictorWarning)
        warnings.showwarning = _show_warning
        hook, sys.unraisablehook = sys.unraisablehook, _quiet_unraisable
        try:  # on SIGINT/SIGTERM: stop, clean up half-written outputs, commit nothing more
            previous = {s: signal.signal(s, _stop) for s in (signal.SIGINT, signal.SIGTERM)}
        except ValueError:  # not the main thread: leave signals alone
            previous = {}
        try:
            return _run(args)
        finally:
            for sig, handler in previous.items():
                signal.signal(sig, handler)
            sys.unraisablehook = hook
            from .io.atomic import clear_interrupt

            clear_interrupt()


def _run(args) -> int:
    try:
        return COMMANDS[args.command](args)
    except PredictorError as err:
        if args.debug:
            raise
        print(f"predictor: error: {err}", file=sys.stderr)
        return 2
    except OSError as err:  # a full disk, a read-only folder: the outputs were not kept
        if args.debug:
            raise
        where = f" {err.filename}" if err.filename else ""
        print(
            f"predictor: error: cannot read or write{where}: {err.strerror or err}; nothing was"
            " written",
            file=sys.stderr,
        )
        return 2
    except KeyboardInterrupt:
        print("predictor: interrupted; no partial outputs were kept", file=sys.stderr)
        return 130


def _quiet_unraisable(unraisable):
    # a stop signal that lands in library clean-up code is reported as "Exception ignored";
    # the stop is still honoured (nothing more is committed), so say nothing about it
    if not issubclass(unraisable.exc_type, KeyboardInterrupt):
        sys.__unraisablehook__(unraisable)


def _stop(signum, frame):
    from .io.atomic import interrupt

    interrupt()
    raise KeyboardInterrupt


def _show_warning(message, category, filename, lineno, file=None, line=None):
    if issubclass(category, PredictorWarning):
        print(f"predictor: warning: {message}", file=sys.stderr)
    else:
        print(f"{category.__name__}: {message}", file=sys.stderr)


if __name__ == "__main__":
    sys.exit(main())
