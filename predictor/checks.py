"""The data check step as one call: QC, drilling bias, declustering, figures and a JSON record.

This is what ``predictor qc`` runs; a notebook user calls :func:`check_data` the same way.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from .declustering import (
    Declustering,
    cell_declustering,
    declustered_statistics,
    nearest_node_weights,
)
from .errors import InputError, PredictorWarning
from .grid import read_seismic, sample_at
from .io.jsonfile import write_json
from .io.tables import read_wells
from .qc import QCReport, attribute_label, numeric_properties, run_qc
from .volume import (
    is_volume,
    map_view,
    sample_volume,
    trace_footprint,
    view_depth,
    well_heads,
    wells_in_view,
)


@dataclass
class DataCheck:
    wells: pd.DataFrame
    grid: xr.Dataset
    qc: QCReport
    declustering: Declustering
    nearest_node: np.ndarray
    statistics: dict

    def to_dict(self) -> dict:
        out = self.qc.to_dict()
        out["declustering"] = self.declustering.summary()
        out["declustering"]["weights"] = dict(
            zip(self.wells["well_id"], self.declustering.weights, strict=True)
        )
        out["nearest_node_weights"] = dict(
            zip(self.wells["well_id"], self.nearest_node, strict=True)
        )
        out["statistics"] = self.statistics
        return out


def decluster(
    wells: pd.DataFrame, grid: xr.Dataset, variable: str | None = None
) -> tuple[Declustering, np.ndarray]:
    """Cell declustering on ``variable`` (porosity by default) and nearest-node weights on the grid.

    With a volume, ``wells`` holds one row per well (its mean position and values) and the
    nearest-node weights share out the survey's live traces.
    """
    numeric = numeric_properties(wells)
    variable = variable or (
        "porosity" if "porosity" in wells else (numeric[0] if numeric else None)
    )
    values = wells[variable].to_numpy(dtype=float) if variable else np.ones(len(wells))
    cell = cell_declustering(wells["x"], wells["y"], values, variable=variable)
    if is_volume(grid):  # the survey's live traces stand in for the map's nodes
        xx, yy, valid = trace_footprint(grid)
    else:
        xx, yy = np.meshgrid(grid.x.to_numpy(), grid.y.to_numpy())
        valid = np.all([np.isfinite(grid[v].to_numpy()) for v in grid.data_vars], axis=0)
    nearest = nearest_node_weights(wells["x"], wells["y"], xx, yy, valid)
    return cell, nearest


def decluster_samples(
    wells: pd.DataFrame, volume: xr.Dataset
) -> tuple[Declustering, np.ndarray, np.ndarray]:
    """Lateral declustering of wells sampled along their paths: (cell declustering of the wells,
    nearest-node weights of the wells, the well of each sample).  A sample carries its well's
    weight, so a well counts by the thickness it samples."""
    heads, codes = well_heads(wells)
    cell, nearest = decluster(heads, volume)
    return cell, nearest, codes


def check_data(wells: pd.DataFrame, grid: xr.Dataset, tolerance: float = 1.0) -> DataCheck:
    """Run every check and compute the declustering weights (no files written)."""
    qc = run_qc(wells, grid, tolerance)
    if is_volume(grid):
        cell, nearest, codes = decluster_samples(wells, grid)
        cell = replace(cell, weights=cell.weights[codes])
        nearest = nearest[codes]
    else:
        cell, nearest = decluster(wells, grid)
    categorical = ["facies"] if "facies" in wells else []
    stats = declustered_statistics(wells, cell.weights, numeric_properties(wells), categorical)
    return DataCheck(wells, grid, qc, cell, nearest, stats)


def write_check(
    check: DataCheck, json_path: str | Path | None = None, figures: str | Path | None = None
) -> list[Path]:
    """Write the JSON record and the QC figures; returns the paths written."""
    from . import plots  # matplotlib loads when a figure is drawn, not on import

    written = []
    if json_path:
        written.append(write_json(check.to_dict(), json_path))
    if figures:
        folder = Path(figures)
        folder.mkdir(parents=True, exist_ok=True)
        wells, grid = check.wells, check.grid
        attribute = next(iter(grid.data_vars))
        label = attribute_label(grid, attribute)
        props = [
            c for c in ("facies", "porosity", "permeability") if c in wells
        ] or numeric_properties(wells)[:3]
        if is_volume(grid):  # the map view at the wells' middle z, in survey line numbers
            z = view_depth(grid, wells)
            written.append(
                plots.location_maps(
                    wells_in_view(wells, grid, z),
                    map_view(grid, z),
                    attribute,
                    props,
                    folder / "wells_on_map.png",
                    label,
                )
            )
        else:
            written.append(
                plots.location_maps(
                    wells, grid, attribute, props, folder / "wells_on_map.png", label
                )
            )
        for var, bias in check.qc.bias.items():
            at_wells = _at_wells(wells, grid, var)
            written.append(
                plots.bias_figure(
                    at_wells,
                    grid[var].to_numpy().ravel(),
                    attribute_label(grid, var),
                    bias["verdict"],
                    folder / f"bias_{var}.png",
                )
            )
        numeric = [c for c in ("porosity", "permeability") if c in wells] + [label]
        if "facies" in wells:
            table = wells.assign(**{label: _at_wells(wells, grid, attribute)})
            written.append(
                plots.facies_distributions(table, numeric, folder / "facies_distributions.png")
            )
        measured = [
            c for c in ("porosity", "permeability") if c in wells and wells[c].notna().sum() >= 6
        ]
        if measured:
            written.append(
                plots.crossplot(
                    wells,
                    label,
                    _at_wells(wells, grid, attribute),
                    measured,
                    folder / "crossplot.png",
                )
            )
            if not is_volume(
                grid
            ):  # one value per well; in a volume the lateral semivariogram needs well means
                written.append(plots.semivariograms(wells, measured, folder / "semivariograms.png"))
        written.append(
            plots.declustering_figure(check.declustering, folder / "declustering_curve.png")
        )
        if check.declustering.variable:
            var = check.declustering.variable
            written.append(
                plots.weighted_histograms(
                    wells[var], check.declustering.weights, var, folder / f"declustered_{var}.png"
                )
            )
    return written


def _at_wells(wells: pd.DataFrame, grid: xr.Dataset, var: str) -> np.ndarray:
    """Attribute at every well (volumes: every well sample); NaN for those off the grid."""
    out = np.full(len(wells), np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PredictorWarning)
        if is_volume(grid):
            sampled, kept = sample_volume(
                grid[[var]], wells["x"], wells["y"], wells["z"], drop_outside=True
            )
        else:
            sampled, kept = sample_at(grid[[var]], wells["x"], wells["y"], drop_outside=True)
    out[kept] = sampled[var].to_numpy()
    return out


def check_files(
    wells_path: str | Path,
    grid_path: str | Path,
    json_path: str | Path | None = None,
    figures=None,
    porosity_percent: bool = False,
    x: str | None = None,
    y: str | None = None,
    tolerance: float = 1.0,
    z: str | None = None,
    z_domain: str | None = None,
    segy_name: str | None = None,
    roles: dict[str, str] | None = None,
    kinds: dict[str, str] | None = None,
) -> DataCheck:
    """Read the files, run :func:`check_data` and write the outputs (``roles``: see
    :func:`predictor.io.tables.read_wells`; ``kinds``: :func:`predictor.grid.set_attribute_kinds`).
    """
    wells = read_wells(wells_path, x=x, y=y, z=z, porosity_percent=porosity_percent, roles=roles)
    grid = read_seismic(grid_path, z_domain=z_domain, name=segy_name, kinds=kinds)
    if is_volume(grid) and "z" not in wells:
        raise InputError(
            f"{wells_path}: a volume needs wells as samples with z (depth or two-way time): add a"
            " z, depth or twt column, one row per sample"
        )
    check = check_data(wells, grid, tolerance)
    write_check(check, json_path, figures)
    return check
