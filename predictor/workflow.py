"""File-to-file steps behind ``predictor train`` and ``predictor predict``.

Each reads its inputs, calls the API (:func:`predictor.training.train`,
:func:`predictor.predict.predict_maps`) and writes its outputs atomically.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from .bundle import Bundle, load_bundle, save_bundle, sha256
from .features import FeatureSpec
from .field_wide import METHOD_LABELS
from .grid import read_seismic
from .io.atomic import check_target
from .io.tables import read_wells
from .predict import check_exceedance, check_format, predict_maps, write_maps
from .training import TrainedModels, TrainOptions, train
from .volume import is_volume


def train_files(
    wells_path: str | Path,
    grid_path: str | Path,
    out: str | Path,
    targets: list[str],
    attributes: list[str] | None = None,
    context_radii: Sequence[float] = (),
    gradient: bool = False,
    location: bool = False,
    porosity_percent: bool = False,
    x: str | None = None,
    y: str | None = None,
    overwrite: bool = False,
    vertical_radii: Sequence[float] = (),
    z_trend: bool = False,
    z: str | None = None,
    z_domain: str | None = None,
    segy_name: str | None = None,
    roles: dict[str, str] | None = None,
    kinds: dict[str, str] | None = None,
    **options: Any,
) -> tuple[TrainedModels, Path]:
    """Read wells and a map or volume, train, and write the bundle to ``out``; returns (trained,
    folder).

    ``roles`` names the file columns of porosity, permeability and facies (see
    :func:`predictor.io.tables.read_wells`), ``kinds`` what each attribute is (see
    :func:`predictor.grid.set_attribute_kinds`); ``options`` are :class:`TrainOptions` fields."""
    check_target(out, overwrite)  # fail before the long work, not after it
    wells = read_wells(wells_path, x=x, y=y, z=z, porosity_percent=porosity_percent, roles=roles)
    grid = read_seismic(grid_path, z_domain=z_domain, name=segy_name, kinds=kinds)
    spec = (
        None  # no feature flags: the tool's default set (attributes plus context, compared by CV)
    )
    if attributes or context_radii or gradient or location or vertical_radii or z_trend:
        spec = FeatureSpec(
            attributes=list(attributes) if attributes else [str(v) for v in grid.data_vars],
            context_radii=list(context_radii),
            gradient=gradient,
            location=location,
            vertical_radii=list(vertical_radii),
            z_coordinate=z_trend,
        )
    trained = train(wells, grid, TrainOptions(targets=list(targets), features=spec, **options))
    inputs = {
        "wells": {
            "path": str(wells_path),
            "sha256": sha256(Path(wells_path)),
            "columns_taken": wells.attrs.get("columns_taken", {}),
            "porosity_percent": porosity_percent,
        },
        "grid": {
            "path": str(grid_path),
            "sha256": sha256(Path(grid_path)) if Path(grid_path).is_file() else None,
            "from_bundle": os.path.relpath(Path(grid_path).resolve(), Path(out).resolve()),
            "z_domain": z_domain,
            "segy_name": segy_name,
        },
    }
    return trained, save_bundle(trained, out, inputs, overwrite=overwrite)


def predict_files(
    bundle,
    grid_path: str | Path,
    out: str | Path,
    overwrite: bool = False,
    crs: str | None = None,
    z_domain: str | None = None,
    segy_name: str | None = None,
    exceed: dict | None = None,
    threads: int | None = None,
) -> Path:
    """Predict the bundle's targets on a grid file and write the maps (CSV, NetCDF or GeoTIFF).

    ``crs`` (e.g. "EPSG:32631") labels NetCDF and GeoTIFF outputs; without it a CRS carried by
    the input grid is kept.  ``threads`` (default: every core) predict chunks of nodes side by side.
    """
    check_target(out, overwrite)
    if not isinstance(bundle, Bundle):
        bundle = load_bundle(bundle)
    check_exceedance(bundle.card, exceed)  # before the long work, not after it
    grid = read_seismic(grid_path, z_domain=z_domain, name=segy_name)
    check_format(out, is_volume(grid))  # before the long work, not after it
    maps = predict_maps(bundle, grid, exceed=exceed, threads=threads)
    crs = crs or grid.attrs.get("crs_wkt")
    if crs and Path(out).suffix.lower() == ".nc":
        from .io.geotiff import crs_to_wkt

        crs = crs_to_wkt(crs)
    return write_maps(maps, out, overwrite=overwrite, crs_wkt=crs)


def leaderboard_lines(trained: TrainedModels) -> list[str]:
    """The leaderboard as text: CV of the chosen design and random CV per candidate, chosen
    marked."""
    lines = []
    for name, tm in trained.targets.items():
        key = "rmse" if tm.task == "regression" else "balanced_accuracy"
        unit = " (log10 mD)" if tm.transform == "log10" else ""
        design = tm.distances["designs"][tm.distances["chosen"]]
        lines.append(
            f"{name}: {design['description']}; held-out wells a median"
            f" {design['median_cv_distance']:.0f} m from training wells, map nodes"
            f" {tm.distances['map_median_distance']:.0f} m from a well; declustering-weighted"
            f" {key}{unit}"
        )
        for row in tm.leaderboard:
            mark = "*" if row["chosen"] else " "
            kind = "baseline" if row["baseline"] else "candidate"
            random = f"{row['cv_random'][key]:.4f}" if row["cv_random"] else "(not run)"
            lines.append(
                f"  {mark} {row['candidate']:<32} {kind:<9} {tm.distances['chosen']}"
                f" {row['cv'][key]:.4f}   random {random}"
            )
        map_error = tm.distances.get("map_error")
        if map_error:
            interval = map_error.get("interval")
            noise = (
                f" (q10-q90 {interval['q10']:.4f}-{interval['q90']:.4f}: the CV's own sampling"
                " noise over the wells)"
                if interval
                else ""
            )
            lines.append(
                f"  expected map RMSE {map_error['rmse']:.4f}{noise}: the chosen model's"
                f" {tm.distances['chosen']} CV times the square root of the kriging-variance ratio"
                f" {map_error['kriging_variance_ratio']:.3f} of map nodes to held-out wells and"
                f" times {map_error['training_size']['factor']:.3f} for training on every well,"
                " not a fold's"
            )
        coverage = tm.calibration.held_out_coverage if tm.calibration else None
        if coverage is not None:
            lines.append(
                f"  q10-q90 intervals held {coverage:.0%} of the wells when calibrated without"
                " their fold (nominal 80 %)"
            )
    return lines


def field_wide_lines(trained: TrainedModels) -> list[str]:
    """The recommended field-wide estimate per target, beside the raw wells' and the declustered
    one."""
    lines = []
    for name, tm in trained.targets.items():
        wide = tm.field_wide
        if wide is None:
            continue
        est = wide.estimates
        if tm.task == "regression":
            iv = wide.interval
            lines.append(
                f"field-wide mean {name}: {est[wide.recommended]['mean']:.4g} (q10-q90"
                f" {iv['q10']:.4g}-{iv['q90']:.4g}, {METHOD_LABELS[wide.recommended]}); raw wells"
                f" {est['naive']['mean']:.4g}, declustered"
                f" {est['declustered_nearest_node']['mean']:.4g}"
            )
            continue
        shares = est[wide.recommended]["proportions"]
        parts = [
            f"{c} {v:.1%} (raw wells {est['naive']['proportions'][c]:.1%})"
            for c, v in shares.items()
        ]
        lines.append(
            f"field-wide {name} proportions ({METHOD_LABELS[wide.recommended]}): "
            + ", ".join(parts)
        )
    return lines
