"""Maps from a model bundle: features built on the grid, predicted chunk by chunk, written
as CSV or CF NetCDF (chosen by the file extension).

Per regression target ``t``: ``t`` (the median, q50), ``t_q10`` and ``t_q90``; per
classification target: ``t`` (most probable class) and ``t_prob_<class>``.  Nodes where an
attribute is missing stay empty.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from .bundle import Bundle, load_bundle
from .errors import InputError, PredictorWarning
from .features import build_features, feature_matrix
from .io.atomic import atomic_file, check_target
from .io.netcdf import write_netcdf

CHUNK_ROWS = 250_000


def _predict_chunks(model, X: pd.DataFrame, xy: np.ndarray, chunk_rows: int) -> np.ndarray:
    parts = [model.predict(X.iloc[s:s + chunk_rows].reset_index(drop=True), xy[s:s + chunk_rows])
             for s in range(0, len(X), chunk_rows)]
    return np.concatenate(parts) if parts else np.empty(0)


def local_spread(spread, model, X: pd.DataFrame, xy: np.ndarray) -> np.ndarray:
    """The local error spread that scales the intervals: a feature model, or the well-tie kriging sd."""
    if spread == "kriging":
        return np.sqrt(model.residual_variance(xy))
    return spread.predict(X)


def predict_maps(bundle: Bundle | str | Path, grid: xr.Dataset, chunk_rows: int = CHUNK_ROWS,
                 warn: bool = True) -> xr.Dataset:
    """Predict every target of the bundle on every valid node of ``grid``.

    The share of nodes whose features lie outside the range seen at the wells is kept in
    ``attrs["extrapolated_share"]`` and, with ``warn``, reported as a warning.
    """
    if not isinstance(bundle, Bundle):
        bundle = load_bundle(bundle)
    card = bundle.card
    features = build_features(grid, bundle.feature_spec)
    names = card["features"]["names"]
    matrix, valid = feature_matrix(features, names)
    if not valid.any():
        raise InputError(f"grid {grid.attrs.get('source', '')}: no node has every feature the model needs")
    X = pd.DataFrame(matrix, columns=names)
    xx, yy = np.meshgrid(grid.x.to_numpy(), grid.y.to_numpy())
    xy = np.column_stack([xx.ravel()[valid], yy.ravel()[valid]])
    outside = np.zeros(len(X), bool)
    share = {}
    for name in names:
        lo, hi = card["features"]["training_ranges"][name]
        out = (X[name] < lo) | (X[name] > hi)
        share[name] = float(out.mean())
        outside |= out
    if outside.any() and warn:
        worst = ", ".join(f"{n} {v:.1%}" for n, v in sorted(share.items(), key=lambda kv: -kv[1])[:3] if v > 0)
        warnings.warn(f"{outside.mean():.1%} of the map nodes have feature values outside the range seen at the "
                      f"wells (most: {worst}); predictions there are extrapolations", PredictorWarning, stacklevel=2)
    shape = (grid.sizes["y"], grid.sizes["x"])

    def on_grid(values) -> np.ndarray:
        full = np.full(valid.size, np.nan)
        full[valid] = values
        return full.reshape(shape)

    out = xr.Dataset(coords={"x": grid.x, "y": grid.y})
    for target, info in card["targets"].items():
        model = bundle.models[target]
        raw = _predict_chunks(model, X, xy, chunk_rows)
        aoa = bundle.applicability.get(target)
        applicable = None
        if aoa is not None:
            flags = np.full(valid.size, -1, dtype=np.int8)
            flags[valid] = (aoa.index(X) <= aoa.threshold).astype(np.int8)
            applicable = xr.DataArray(flags.reshape(shape), dims=("y", "x"), attrs={
                "long_name": f"inside the area of applicability of the {target} model (1) or not (0)",
                "flag_values": np.array([0, 1], dtype=np.int8), "_FillValue": np.int8(-1),
                "comment": "Meyer & Pebesma (2021) dissimilarity index against the training wells"})
        if info["task"] == "classification":
            classes = info["classes"]
            codes = np.full(valid.size, -1, dtype=np.int16)
            codes[valid] = np.argmax(raw, axis=1)
            out[target] = (("y", "x"), codes.reshape(shape))
            out[target].attrs.update(flag_values=np.arange(len(classes), dtype=np.int16),
                                     flag_meanings=" ".join(c.replace(" ", "_") for c in classes),
                                     _FillValue=np.int16(-1), long_name=f"most probable {target}")
            for i, cls in enumerate(classes):
                out[f"{target}_prob_{cls}"] = (("y", "x"), on_grid(raw[:, i]))
                out[f"{target}_prob_{cls}"].attrs.update(units="1", long_name=f"probability of {target} {cls}")
            if applicable is not None:
                out[f"{target}_applicable"] = applicable
            continue
        cal = bundle.calibrations[target]
        spread = local_spread(bundle.spreads[target], model, X, xy) if cal.scaled else None
        q10, q90 = cal.apply(raw, spread)
        back = (lambda v: 10.0**v) if info.get("transform") == "log10" else (lambda v: v)
        units = "mD" if target == "permeability" else ("1" if target == "porosity" else "")
        for suffix, values, label in (("", raw, "median (q50)"), ("_q10", q10, "10th percentile (q10)"),
                                      ("_q90", q90, "90th percentile (q90)")):
            out[f"{target}{suffix}"] = (("y", "x"), on_grid(back(values)))
            out[f"{target}{suffix}"].attrs.update(units=units, long_name=f"{target} {label}")
        if applicable is not None:
            out[f"{target}_applicable"] = applicable
    out.attrs.update(source="predictor", bundle=str(bundle.folder), grid=str(grid.attrs.get("source", "")),
                     caution="a predicted map is a model, not a measurement",
                     percentiles="q10/q90 are non-exceedance percentiles",
                     extrapolated_share=float(outside.mean()))
    return out


def maps_table(maps: xr.Dataset) -> pd.DataFrame:
    """Long table of the maps: x, y, then per target its columns; classes as labels."""
    xx, yy = np.meshgrid(maps.x.to_numpy(), maps.y.to_numpy())
    table = {"x": xx.ravel(), "y": yy.ravel()}
    for var in maps.data_vars:
        values = maps[var].to_numpy().ravel()
        meanings = maps[var].attrs.get("flag_meanings")
        if meanings:
            labels = np.array(meanings.split(" ") + [""], dtype=object)
            values = labels[np.where(values >= 0, values, len(labels) - 1)]
        elif "_FillValue" in maps[var].attrs:  # integer flags: the fill value becomes an empty cell
            values = pd.array(np.where(values == maps[var].attrs["_FillValue"], None, values), dtype="Int8")
        table[str(var)] = values
    return pd.DataFrame(table)


def write_maps(maps: xr.Dataset, path: str | Path, overwrite: bool = False, crs_wkt: str | None = None) -> Path:
    """Write maps to CSV (.csv), CF NetCDF (.nc) or GeoTIFF (.tif), atomically."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".csv", ".nc", ".tif", ".tiff"):
        raise InputError(f"{path}: unknown map format {suffix!r}; use .csv, .nc or .tif")
    check_target(path, overwrite)
    if suffix in (".tif", ".tiff"):
        from .io.geotiff import write_geotiff

        return write_geotiff(maps, path, crs_wkt, overwrite=overwrite)
    if suffix == ".csv":
        table = maps_table(maps)
        for col in table.columns[2:]:  # about 6 significant digits; coordinates are kept exact
            if pd.api.types.is_float_dtype(table[col]):
                top = np.nanmax(np.abs(table[col].to_numpy())) if table[col].notna().any() else 1.0
                table[col] = table[col].round(max(0, 6 - int(np.ceil(np.log10(max(top, 1e-12))))))
        with atomic_file(path) as tmp:
            table.to_csv(tmp, index=False, lineterminator="\n")
        return path
    return write_netcdf(maps, path, overwrite=overwrite, crs_wkt=crs_wkt)
