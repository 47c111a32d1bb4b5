"""Maps from a model bundle: features built on the grid, predicted chunk by chunk, written
as CSV or CF NetCDF (chosen by the file extension).

Per regression target ``t``: ``t`` (the model's mean; for permeability, modelled as log10,
10 to the mean of log10, about the median), ``t_q10`` and ``t_q90``; per
classification target: ``t`` (most probable class) and ``t_prob_<class>``.  Nodes where an
attribute is missing stay empty.
"""

from __future__ import annotations

import importlib.util
import os
import warnings
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
import xarray as xr
from numpy.typing import ArrayLike

from .bundle import Bundle, in_memory, load_bundle
from .errors import InputError, PredictorWarning
from .features import build_features, feature_matrix
from .intervals import PHYSICAL_BOUNDS
from .io.atomic import atomic_file, check_target
from .io.netcdf import write_netcdf
from .volume import is_volume

if TYPE_CHECKING:
    from .training import TrainedModels

CHUNK_ROWS = 250_000
FORMAT_LIBRARIES = {
    ".tif": "rasterio",
    ".tiff": "rasterio",
    ".sgy": "segyio",
    ".segy": "segyio",
    ".zarr": "zarr",
}
RULE_LABELS = {
    "most-probable": "most probable class",
    "balanced": "largest probability relative to the class's mean probability over the map",
    "proportions": "class thresholds that reproduce the field-wide proportions",
}


class NoValidNodes(InputError):
    """No node of the grid (or of a tile of it) has every feature the model needs."""


def local_spread(spread: ArrayLike, model, X: pd.DataFrame, xy: np.ndarray) -> np.ndarray:
    """The local error spread that scales the intervals: a feature model, or the well-tie kriging
    sd."""
    if spread == "kriging":
        return np.sqrt(model.residual_variance(xy))
    return spread.predict(X)


def exceedance_name(target: str, cutoff: float) -> str:
    """Variable name of P(target > cutoff): ``porosity_prob_above_0p15`` (letters, digits, _)."""
    return f"{target}_prob_above_{f'{cutoff:g}'.replace('.', 'p').replace('-', 'minus')}"


def parse_exceedance(specs: list[str] | None) -> dict[str, list[float]]:
    """``["porosity:0.15", "permeability:100"]`` -> {target: [cutoffs]}; a class name is kept as
    text."""
    out: dict[str, list] = {}
    for spec in specs or []:
        target, sep, value = str(spec).partition(":")
        if not sep or not target or not value:
            raise InputError(f"--exceed {spec!r}: give TARGET:CUTOFF, e.g. --exceed porosity:0.15")
        try:
            cutoff: float | str = float(value)
        except ValueError:
            cutoff = value  # a class of a facies target
        out.setdefault(target.strip(), []).append(cutoff)
    return out


def check_exceedance(card: dict, exceed: dict[str, list] | None) -> None:
    """Every cutoff names a target of the bundle and lies inside the target's physical range."""
    targets = card["targets"]
    for target, cutoffs in (exceed or {}).items():
        if target not in targets:
            raise InputError(
                f"--exceed {target}: the bundle has no target {target!r}; it has "
                f"{', '.join(targets)} (e.g. --exceed {next(iter(targets))}:...)"
            )
        info = targets[target]
        for cutoff in cutoffs:
            if info["task"] == "classification":
                if str(cutoff) not in info["classes"]:
                    raise InputError(
                        f"--exceed {target}:{cutoff}: {target} has no class {cutoff!r}; its classes"
                        f" are {', '.join(info['classes'])} (their probabilities are always written"
                        f" as {target}_prob_<class>)"
                    )
                continue
            if isinstance(cutoff, str):
                raise InputError(
                    f"--exceed {target}:{cutoff}: the cutoff of a numeric target must be a number"
                )
            bounds = PHYSICAL_BOUNDS.get(target)
            if bounds and not bounds[0] < cutoff < bounds[1]:
                raise InputError(
                    f"--exceed {target}:{cutoff:g}: {target} lies between {bounds[0]:g} and "
                    f"{bounds[1]:g} (a fraction); give a cutoff inside that range, e.g. 0.15"
                )
            if info.get("transform") == "log10" and cutoff <= 0:
                raise InputError(
                    f"--exceed {target}:{cutoff:g}: {target} is positive (mD); give a cutoff"
                    " above 0"
                )


def predict_maps(
    bundle: Bundle | TrainedModels | str | Path,
    grid: xr.Dataset,
    chunk_rows: int = CHUNK_ROWS,
    warn: bool = True,
    interior: dict | None = None,
    exceed: dict[str, list] | None = None,
    threads: int | None = None,
    smoothed: xr.Dataset | None = None,
) -> xr.Dataset:
    """Predict every target of the bundle (a folder, a loaded bundle, or the result of
    ``train`` held in memory) on every valid node of ``grid``.

    ``exceed`` (target -> cutoffs, in the target's units) adds P(target > cutoff) per node,
    from the matched CV's out-of-fold residuals around the map's prediction (each facies'
    residuals mixed by the node's facies probabilities when the bundle holds facies).  Chunks of
    ``chunk_rows`` nodes run on ``threads`` threads (default: every core); the values do not
    depend on the thread count.

    The share of nodes whose features lie outside the range seen at the wells is kept in
    ``attrs["extrapolated_share"]`` and, with ``warn``, reported as a warning.  ``interior``
    (dim -> slice) predicts only that part, with features built on the whole of ``grid``: a
    tile's halo gives context to the features and is not predicted; ``smoothed`` carries a
    tile's part of its wide context radii, smoothed beforehand over the whole map.
    """
    if not isinstance(bundle, Bundle):
        bundle = load_bundle(bundle) if isinstance(bundle, str | Path) else in_memory(bundle)
    card = bundle.card
    check_space(card, grid)
    check_exceedance(card, exceed)
    features = build_features(grid, bundle.feature_spec, threads, smoothed)
    if interior:
        features, grid = features.isel(interior), grid.isel(interior)
    names = card["features"]["names"]
    matrix, valid = feature_matrix(features, names)
    dims, shape = features[names[0]].dims, features[names[0]].shape
    del features  # the matrix holds what the models need; a large map should not keep both
    if not valid.any():
        raise NoValidNodes(
            f"grid {grid.attrs.get('source', '')}: no node has every feature the model needs"
        )
    X = pd.DataFrame(matrix, columns=names, copy=False)  # no second copy of the matrix
    xx, yy = node_xy(grid)
    xy = np.column_stack([xx[valid], yy[valid]])
    outside = np.zeros(len(X), bool)
    share = {}
    for name in names:
        lo, hi = card["features"]["training_ranges"][name]
        out = (X[name] < lo) | (X[name] > hi)
        share[name] = float(out.mean())
        outside |= out
    if outside.any() and warn:
        worst = ", ".join(
            f"{n} {v:.1%}" for n, v in sorted(share.items(), key=lambda kv: -kv[1])[:3] if v > 0
        )
        warnings.warn(
            f"{outside.mean():.1%} of the {'volume samples' if is_volume(grid) else 'map nodes'}"
            f" have feature values outside the range seen at the wells (most: {worst}); predictions"
            " there are extrapolations",
            PredictorWarning,
            stacklevel=2,
        )

    chunks = [slice(s, s + chunk_rows) for s in range(0, len(X), chunk_rows)]
    work = lambda rows: _node_values(bundle, X.iloc[rows].reset_index(drop=True), xy[rows], exceed)  # noqa: E731
    n_threads = max(1, threads or os.cpu_count() or 1)
    node_of_row = np.flatnonzero(valid)
    full: dict[
        str, np.ndarray
    ] = {}  # each output on the whole grid, filled chunk by chunk (codes: -1 empty)
    with ThreadPoolExecutor(
        max_workers=n_threads
    ) as pool:  # the models release the GIL: chunks side by side
        for rows, part in zip(
            chunks, pool.map(work, chunks) if n_threads > 1 else map(work, chunks), strict=True
        ):
            for key, v in part.items():
                if key not in full:
                    full[key] = (
                        np.full(valid.size, -1, v.dtype)
                        if v.dtype.kind == "i"
                        else np.full(valid.size, np.nan)
                    )
                full[key][node_of_row[rows]] = v

    def on_grid(key) -> np.ndarray:  # class codes and flags keep their integer dtype
        return full.pop(key).reshape(shape)

    out = xr.Dataset(
        coords={c: grid.coords[c] for c in grid.coords if set(grid.coords[c].dims) <= set(dims)}
    )
    for target, info in card["targets"].items():
        applicable = None
        if f"{target}_applicable" in full:
            applicable = xr.DataArray(
                on_grid(f"{target}_applicable"),
                dims=dims,
                attrs={
                    "long_name": (
                        f"inside the area of applicability of the {target} model (1) or not (0)"
                    ),
                    "flag_values": np.array([0, 1], dtype=np.int8),
                    "flag_meanings": "outside inside",
                    "_FillValue": np.int8(-1),
                    "comment": (
                        "Meyer & Pebesma (2021) dissimilarity index against the training wells"
                    ),
                },
            )
        if info["task"] == "classification":
            classes = info["classes"]
            rule = info.get("facies_map")
            out[target] = (dims, on_grid(target))
            out[target].attrs.update(
                flag_values=np.arange(len(classes), dtype=np.int16),
                flag_meanings=" ".join(c.replace(" ", "_") for c in classes),
                _FillValue=np.int16(-1),
                long_name=f"{target} ({RULE_LABELS[rule['rule'] if rule else 'most-probable']})",
            )
            for cls in classes:
                out[f"{target}_prob_{cls}"] = (dims, on_grid(f"{target}_prob_{cls}"))
                out[f"{target}_prob_{cls}"].attrs.update(
                    units="1", long_name=f"probability of {target} {cls}"
                )
            if applicable is not None:
                out[f"{target}_applicable"] = applicable
            continue
        log = info.get("transform") == "log10"
        # UDUNITS spells mD "millidarcy" ("mD" is not a unit there; "md" would be millidays)
        units = "millidarcy" if target == "permeability" else ("1" if target == "porosity" else "")
        point = (
            "10 to the mean of log10 (about the median)"
            if log
            else "mean (least-squares prediction)"
        )
        for suffix, label in (
            ("", point),
            ("_q10", "10th percentile (q10)"),
            ("_q90", "90th percentile (q90)"),
        ):
            out[f"{target}{suffix}"] = (dims, on_grid(f"{target}{suffix}"))
            out[f"{target}{suffix}"].attrs.update(
                units=units, long_name=f"{target} {label}" + (" in mD" if log else "")
            )
        for cutoff in (exceed or {}).get(target, []):
            name = exceedance_name(target, cutoff)
            out[name] = (dims, on_grid(name))
            out[name].attrs.update(
                units="1",
                long_name=f"probability that {target} exceeds {cutoff:g}{' mD' if log else ''}",
                cutoff=float(cutoff),
                comment=(
                    "from the matched CV's out-of-fold residuals of each facies' wells, mixed by"
                    " this node's facies probabilities"
                    if bundle.calibrations[target].class_target
                    else "from the matched CV's out-of-fold residuals of the wells predicted near"
                    " this node's value"
                ),
            )
        if applicable is not None:
            out[f"{target}_applicable"] = applicable
    # file names, not absolute paths: a shared file should not disclose the folders it was made in
    out.attrs.update(
        source="predictor",
        bundle=Path(bundle.folder).name if bundle.folder else "in memory",
        grid=Path(str(grid.attrs.get("source", ""))).name,
        caution="a predicted map is a model, not a measurement",
        percentiles="q10/q90 are non-exceedance percentiles",
        extrapolated_share=float(outside.mean()),
    )
    for key in ("affine", "z_domain", "crs_wkt"):
        if key in grid.attrs:
            out.attrs[key] = grid.attrs[key]
    return out


def _node_values(
    bundle: Bundle, X: pd.DataFrame, xy: np.ndarray, exceed: dict | None
) -> dict[str, np.ndarray]:
    """Every output variable's values at these rows of valid nodes, by variable name."""
    values: dict[str, np.ndarray] = {}
    probabilities: dict[str, dict[str, np.ndarray]] = {}  # classes first: exceedance mixes them
    targets = bundle.card["targets"]
    for target in sorted(targets, key=lambda t: targets[t]["task"] != "classification"):
        info = targets[target]
        model = bundle.models[target]
        raw = model.predict(X, xy)
        aoa = bundle.applicability.get(target)
        if aoa is not None:
            values[f"{target}_applicable"] = aoa.inside(X).astype(np.int8)
        if info["task"] == "classification":
            rule = info.get("facies_map")  # the stated rule draws one class per node
            classes = info["classes"]
            factors = (
                np.array([rule["rule_factors"][c] for c in classes])
                if rule
                else np.ones(len(classes))
            )
            values[target] = np.argmax(raw * factors, axis=1).astype(np.int16)
            probabilities[target] = dict(zip(classes, raw.T, strict=True))
            for i, cls in enumerate(classes):
                values[f"{target}_prob_{cls}"] = raw[:, i]
            continue
        cal = bundle.calibrations[target]
        spread = local_spread(bundle.spreads[target], model, X, xy) if cal.scaled else None
        q10, q90 = cal.apply(raw, spread)
        raw = cal.clip(raw)
        log = info.get("transform") == "log10"
        back = (lambda v: 10.0**v) if log else (lambda v: v)
        for suffix, v in (("", raw), ("_q10", q10), ("_q90", q90)):
            values[f"{target}{suffix}"] = back(v)
        for cutoff in (exceed or {}).get(target, []):
            model_cutoff = np.log10(cutoff) if log else cutoff
            values[exceedance_name(target, cutoff)] = cal.exceedance(
                raw, model_cutoff, spread, probabilities.get(cal.class_target)
            )
    return values


def check_space(card: dict, grid: xr.Dataset) -> None:
    """A map model predicts maps and a volume model volumes, in the z domain it was trained in."""
    space = card.get("space", {"kind": "map"})
    source = grid.attrs.get("source", "")
    if space["kind"] == "volume" and not is_volume(grid):
        raise InputError(
            f"{source}: this model was trained on a volume; give a volume (z, inline, crossline)"
        )
    if space["kind"] == "map" and is_volume(grid):
        raise InputError(
            f"{source}: this model was trained on a map; give a map (y, x), or train on the volume"
        )
    if space["kind"] == "volume":
        trained, given = space.get("z_domain", "unknown"), grid.attrs.get("z_domain", "unknown")
        if "unknown" not in (trained, given) and trained != given:
            raise InputError(
                f"{source}: the volume is in {given} but the model was trained in {trained}; "
                "give a volume in the same z domain"
            )
        lo, hi = space["z_range"]
        z = grid.z.to_numpy()
        if z[-1] < lo or z[0] > hi:
            raise InputError(
                f"{source}: the volume's sample axis ({z[0]:g} to {z[-1]:g}) does not overlap the z"
                f" of the training wells ({lo:g} to {hi:g}); check the volume's z domain and units"
            )


def node_xy(grid: xr.Dataset) -> tuple[np.ndarray, np.ndarray]:
    """Map coordinates of every node of a grid or volume, flattened in the variables' order."""
    if is_volume(grid):
        shape = (grid.sizes["z"], grid.sizes["inline"], grid.sizes["crossline"])
        return (
            np.broadcast_to(grid.cdp_x.to_numpy(), shape).ravel(),
            np.broadcast_to(grid.cdp_y.to_numpy(), shape).ravel(),
        )
    xx, yy = np.meshgrid(grid.x.to_numpy(), grid.y.to_numpy())
    return xx.ravel(), yy.ravel()


def maps_table(maps: xr.Dataset) -> pd.DataFrame:
    """Long table of the maps: x, y (volumes: inline, crossline, z, x, y), then per target its
    columns; classes as labels."""
    xx, yy = node_xy(maps)
    table = {}
    if is_volume(maps):
        zz, ii, jj = np.meshgrid(
            maps.z.to_numpy(), maps.inline.to_numpy(), maps.crossline.to_numpy(), indexing="ij"
        )
        table = {"inline": ii.ravel(), "crossline": jj.ravel(), "z": zz.ravel()}
    table.update(x=xx, y=yy)
    for var in maps.data_vars:
        values = maps[var].to_numpy().ravel()
        meanings = maps[var].attrs.get("flag_meanings")
        if (
            meanings and maps[var].dtype == np.int16
        ):  # class codes become labels; 0/1 flags (int8) stay numbers
            labels = np.array(meanings.split(" ") + [""], dtype=object)
            values = labels[np.where(values >= 0, values, len(labels) - 1)]
        elif "_FillValue" in maps[var].attrs:  # integer flags: the fill value becomes an empty cell
            values = pd.array(
                np.where(values == maps[var].attrs["_FillValue"], None, values), dtype="Int8"
            )
        table[str(var)] = values
    return pd.DataFrame(table)


def check_format(path: str | Path, volume: bool) -> Path:
    """The output path, if its extension names a format maps (or volumes) can be written in."""
    path = Path(path)
    suffix = path.suffix.lower()
    formats = (
        (".csv", ".nc", ".zarr", ".sgy", ".segy") if volume else (".csv", ".nc", ".tif", ".tiff")
    )
    if suffix not in formats:
        what = "volume" if volume else "map"
        hint = " (GeoTIFF holds maps, not volumes)" if suffix in (".tif", ".tiff") else ""
        raise InputError(
            f"{path}: unknown {what} format {suffix!r}{hint}; use {', '.join(formats)}"
        )
    library = FORMAT_LIBRARIES.get(suffix)
    if (
        library and importlib.util.find_spec(library) is None
    ):  # refused before the prediction, not after it
        raise InputError(
            f"{path}: writing {suffix} needs {library}, which is not installed; `pip install"
            f" {library}` (a dependency of predictor: reinstalling predictor brings it) or choose"
            " another format"
        )
    return path


def write_maps(
    maps: xr.Dataset, path: str | Path, overwrite: bool = False, crs_wkt: str | None = None
) -> Path:
    """Write maps to CSV (.csv), CF NetCDF (.nc) or GeoTIFF (.tif), atomically; volumes to
    CSV, NetCDF, Zarr (.zarr) or SEG-Y (.sgy: one file per variable, ``<stem>_<variable>.sgy``)."""
    volume = is_volume(maps)
    path = check_format(path, volume)
    suffix = path.suffix.lower()
    check_target(path, overwrite)
    if suffix in (".tif", ".tiff"):
        from .io.geotiff import write_geotiff

        return write_geotiff(maps, path, crs_wkt, overwrite=overwrite)
    if suffix in (".sgy", ".segy"):
        from .io.segy import write_segy_set

        return write_segy_set(maps, path, overwrite=overwrite)
    if suffix == ".zarr":
        from .io.netcdf import write_zarr

        return write_zarr(maps, path, overwrite=overwrite, crs_wkt=crs_wkt)
    if suffix == ".csv":
        table = maps_table(maps)
        n_coords = 5 if volume else 2
        for col in table.columns[
            n_coords:
        ]:  # 7 significant digits per value; coordinates kept exact
            if pd.api.types.is_float_dtype(table[col]):
                values = table[col].to_numpy(float)
                text = np.char.mod("%.7g", values)  # per value: 0.01503 mD stays 0.01503, not 0.02
                table[col] = np.where(np.isfinite(values), text, "")
        with atomic_file(path) as tmp:
            table.to_csv(tmp, index=False, lineterminator="\n")
        return path
    return write_netcdf(maps, path, overwrite=overwrite, crs_wkt=crs_wkt)
