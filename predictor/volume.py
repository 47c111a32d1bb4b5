"""The volume model: an ``xarray.Dataset`` with dims ``("z", "inline", "crossline")``.

One representation for every 3-D source, so a rotated SEG-Y survey and an axis-aligned NetCDF
cube go through the same code: 1-D coordinates ``z`` (depth or two-way time, ascending,
evenly spaced), ``inline`` and ``crossline`` (line numbers), 2-D coordinates ``cdp_x`` and
``cdp_y`` (projected metres of every trace position) and ``attrs["affine"]`` =
(x0, dx_il, dx_xl, y0, dy_il, dy_xl) with x = x0 + dx_il * inline + dx_xl * crossline (likewise
y).  ``attrs["z_domain"]`` is ``"depth"``, ``"time"`` or ``"unknown"``.

A NetCDF or Zarr cube on ``(z, y, x)`` with 1-D ``x``/``y`` coordinates is read into this
form with inline = row number along y and crossline = column number along x, both from 1.
"""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd
import xarray as xr
from numpy.typing import ArrayLike

from .errors import InputError, PredictorWarning
from .io.formats import file_format
from .sampling import interpolate

ZDomain = Literal["depth", "time", "unknown"]
DIMS = ("z", "inline", "crossline")
TIME_WORDS = ("twt", "time", "ms", "twt_ms")
DEPTH_WORDS = ("depth", "tvd", "tvdss", "md", "depth_m")


def is_volume(ds: xr.Dataset) -> bool:
    return "z" in ds.dims


def check_volume(
    ds: xr.Dataset, source: str = "volume", z_domain: ZDomain | None = None
) -> xr.Dataset:
    """Normalise a volume: dims (z, inline, crossline), ascending evenly spaced z, an affine."""
    if "z" not in ds.dims:
        raise InputError(f"{source}: no 'z' dimension; dims are {tuple(ds.dims)}")
    if "inline" not in ds.dims:
        ds = _from_xyz(ds, source)
    z = ds.z.to_numpy().astype(float)
    if z.size < 2:
        raise InputError(f"{source}: a volume needs at least 2 samples along z")
    if np.all(np.diff(z) < 0):
        ds = ds.isel(z=slice(None, None, -1))
        z = z[::-1]
    step = np.diff(z)
    if not (np.all(step > 0) and np.allclose(step, step[0], rtol=1e-6)):
        raise InputError(f"{source}: the sample axis z is not evenly spaced; resample the volume")
    if "affine" not in ds.attrs:
        ds.attrs["affine"] = fit_affine(ds, source)
    variables = [v for v in ds.data_vars if set(ds[v].dims) == set(DIMS)]
    if not variables:
        raise InputError(f"{source}: no 3-D attribute on (z, inline, crossline)")
    ds = ds[variables].transpose(*DIMS)
    for var in variables:
        if ds[var].dtype != float:
            ds[var] = ds[var].astype(float)
    domain = z_domain or ds.attrs.get("z_domain") or _domain_from_units(ds.z.attrs.get("units", ""))
    ds.attrs.update(source=str(ds.attrs.get("source", source)), z_domain=domain or "unknown")
    return ds


def _domain_from_units(units: str) -> ZDomain | None:
    units = str(units).lower()
    if units in ("ms", "s", "millisecond", "milliseconds", "second", "seconds"):
        return "time"
    if units in ("m", "metre", "meter", "metres", "meters", "ft", "feet"):
        return "depth"
    return None


def _from_xyz(ds: xr.Dataset, source: str) -> xr.Dataset:
    """A cube on (z, y, x) with 1-D map coordinates, as a volume with line numbers and an affine."""
    for name in ("x", "y"):
        if name not in ds.dims:
            raise InputError(
                f"{source}: a volume needs dims (z, inline, crossline) or (z, y, x); "
                f"dims are {tuple(ds.dims)}"
            )
        coord = ds[name].to_numpy().astype(float)
        if coord.size < 2 or not np.allclose(np.diff(coord), coord[1] - coord[0], rtol=1e-6):
            raise InputError(
                f"{source}: coordinate {name!r} is not evenly spaced; resample the volume"
            )
    x, y = ds.x.to_numpy().astype(float), ds.y.to_numpy().astype(float)
    dx, dy = x[1] - x[0], y[1] - y[0]
    inl, xln = np.arange(1, y.size + 1), np.arange(1, x.size + 1)
    out = ds.rename({"y": "inline", "x": "crossline"}).assign_coords(inline=inl, crossline=xln)
    affine = [float(x[0] - dx), 0.0, float(dx), float(y[0] - dy), float(dy), 0.0]
    out.attrs["affine"] = affine
    return _with_cdp(out)


def _with_cdp(ds: xr.Dataset) -> xr.Dataset:
    x0, dxi, dxx, y0, dyi, dyx = ds.attrs["affine"]
    gi, gj = np.meshgrid(ds.inline.to_numpy(), ds.crossline.to_numpy(), indexing="ij")
    return ds.assign_coords(
        cdp_x=(("inline", "crossline"), x0 + dxi * gi + dxx * gj),
        cdp_y=(("inline", "crossline"), y0 + dyi * gi + dyx * gj),
    )


def fit_affine(ds: xr.Dataset, source: str = "volume") -> list[float]:
    """Least-squares affine from (inline, crossline) to the 2-D cdp_x/cdp_y coordinates."""
    if "cdp_x" not in ds.coords or "cdp_y" not in ds.coords:
        raise InputError(
            f"{source}: a volume on (inline, crossline) needs 2-D cdp_x and cdp_y coordinates"
        )
    gi, gj = np.meshgrid(ds.inline.to_numpy(), ds.crossline.to_numpy(), indexing="ij")
    A = np.column_stack([np.ones(gi.size), gi.ravel(), gj.ravel()])
    cx, cy = ds.cdp_x.to_numpy().ravel(), ds.cdp_y.to_numpy().ravel()
    ok = np.isfinite(cx) & np.isfinite(cy)
    (x0, a, b), *_ = np.linalg.lstsq(A[ok], cx[ok], rcond=None)
    (y0, c, d), *_ = np.linalg.lstsq(A[ok], cy[ok], rcond=None)
    return [float(v) for v in (x0, a, b, y0, c, d)]


def read_volume(
    path: str | Path, lazy: bool = False, z_domain: ZDomain | None = None, name: str = "amplitude"
) -> xr.Dataset:
    """Read a volume from SEG-Y (``name`` is the attribute's name), NetCDF or a Zarr store."""
    path = Path(path)
    kind = file_format(path)
    if kind == "segy":
        from .io.segy import read_segy

        return check_volume(read_segy(path, name=name), str(path), z_domain)
    if not path.exists():
        raise InputError(f"{path}: file not found; check the path")
    try:
        if kind == "zarr":
            ds = xr.open_zarr(path)
        else:
            ds = xr.open_dataset(path, engine="h5netcdf", chunks={} if lazy else None)
        if not lazy:
            ds = ds.load()
    except Exception as err:  # the file libraries raise many types on a damaged file
        raise InputError(
            f"{path}: not a readable NetCDF/Zarr volume ({err.__class__.__name__}:"
            f" {str(err)[:120]})"
        ) from None
    ds.attrs["source"] = str(path)
    if isinstance(ds.attrs.get("affine"), np.ndarray):
        ds.attrs["affine"] = [float(v) for v in ds.attrs["affine"]]
    return check_volume(ds, str(path), z_domain)


def _lines(vol: xr.Dataset) -> tuple[float, float, float, float]:
    """(first inline, inline step, first crossline, crossline step) of the volume's lattice."""
    il, xl = vol.inline.to_numpy().astype(float), vol.crossline.to_numpy().astype(float)
    return (
        il[0],
        il[1] - il[0] if il.size > 1 else 1.0,
        xl[0],
        xl[1] - xl[0] if xl.size > 1 else 1.0,
    )


def lateral_spacing(vol: xr.Dataset) -> tuple[float, float]:
    """Distance in metres between neighbouring inlines and between neighbouring crosslines."""
    _, dxi, dxx, _, dyi, dyx = vol.attrs["affine"]
    _, step_il, _, step_xl = _lines(vol)
    return float(np.hypot(dxi, dyi) * step_il), float(np.hypot(dxx, dyx) * step_xl)


def z_step(vol: xr.Dataset) -> float:
    return float(vol.z[1] - vol.z[0])


def fractional_index(vol: xr.Dataset, x: ArrayLike, y: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """Fractional (inline index, crossline index) of map points, through the inverse affine."""
    x0, dxi, dxx, y0, dyi, dyx = vol.attrs["affine"]
    M = np.array([[dxi, dxx], [dyi, dyx]])
    lines = np.linalg.solve(M, np.vstack([np.asarray(x, float) - x0, np.asarray(y, float) - y0]))
    il0, step_il, xl0, step_xl = _lines(vol)
    return (lines[0] - il0) / step_il, (lines[1] - xl0) / step_xl


def trace_footprint(vol: xr.Dataset) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(cdp_x, cdp_y, live) of every trace position; live = some attribute value along the trace."""
    live = np.zeros((vol.sizes["inline"], vol.sizes["crossline"]), bool)
    for var in vol.data_vars:
        live |= np.isfinite(vol[var].to_numpy()).any(axis=0)
    return vol.cdp_x.to_numpy(), vol.cdp_y.to_numpy(), live


def domain_of_column(column: str | None) -> ZDomain:
    """The z domain a wells column name implies (twt/time: time; depth/tvd/tvdss: depth)."""
    name = (column or "").lower()
    if any(name == w or name.startswith(w + "_") for w in TIME_WORDS):
        return "time"
    if any(name == w or name.startswith(w + "_") for w in DEPTH_WORDS):
        return "depth"
    return "unknown"


def well_heads(wells: pd.DataFrame) -> tuple[pd.DataFrame, np.ndarray]:
    """One row per well (mean position and mean numeric values of its samples) and the row of
    ``heads`` each sample belongs to."""
    codes, ids = pd.factorize(wells["well_id"])
    numeric = [c for c in ("porosity", "permeability") if c in wells]
    heads = wells.groupby(codes, sort=True)[["x", "y", *numeric]].mean().reset_index(drop=True)
    heads.insert(0, "well_id", np.asarray(ids, dtype=object))
    heads.attrs = dict(wells.attrs)
    return heads, codes


def wells_z_domain(wells: pd.DataFrame) -> ZDomain:
    """The z domain of a wells table, from the name of the file column that became ``z``."""
    if wells.attrs.get("z_domain"):
        return wells.attrs["z_domain"]
    return domain_of_column(wells.attrs.get("columns_taken", {}).get("z"))


def check_z_domain(
    vol: xr.Dataset, z: np.ndarray, labels: np.ndarray, wells_domain: ZDomain, source: str = "wells"
) -> np.ndarray:
    """Samples whose z lies on the volume's sample axis; a clear error when the domains disagree.

    The wells' z must be in the volume's domain (depth with depth, time with time) and mostly
    inside its sample range; samples above or below the volume are left out with a warning.
    """
    vol_domain = vol.attrs.get("z_domain", "unknown")
    zs = vol.z.to_numpy()
    lo, hi = float(zs[0]), float(zs[-1])
    span = f"{lo:g} to {hi:g}"
    if "unknown" not in (vol_domain, wells_domain) and vol_domain != wells_domain:
        raise InputError(
            f"{source}: the wells' z is {wells_domain} but the volume {vol.attrs.get('source', '')}"
            f" is in {vol_domain} ({span}); convert one of them (a velocity model) so both are in"
            " the same domain, or name the domain with --z-domain"
        )
    half = 0.5 * z_step(vol)
    inside = (z >= lo - half) & (z <= hi + half)
    if inside.mean() < 0.5:
        raise InputError(
            f"{source}: {np.count_nonzero(~inside)} of {z.size} well samples (z {np.min(z):g} to"
            f" {np.max(z):g}) lie outside the volume's sample axis ({span}, {vol_domain}); the"
            " wells' z and the volume do not match (depth against time, metres against feet, or"
            " seconds against milliseconds?): convert one of them"
        )
    if not inside.all():
        wells = _wells_list(np.asarray(labels)[~inside])
        warnings.warn(
            f"left out {np.count_nonzero(~inside)} well samples above or below the volume ({span}) "
            f"in wells {wells}",
            PredictorWarning,
            stacklevel=2,
        )
    return inside


def locate_samples(
    vol: xr.Dataset,
    x: ArrayLike,
    y: ArrayLike,
    z: ArrayLike,
    labels: ArrayLike,
    wells_domain: ZDomain = "unknown",
    source: str = "wells",
) -> tuple[np.ndarray, np.ndarray]:
    """(laterally outside the survey, on the sample axis) masks of points (x, y, z); geometry
    only."""
    fi, fj = fractional_index(vol, x, y)
    ni, nj = vol.sizes["inline"], vol.sizes["crossline"]
    half = (
        0.5  # a point within half a trace spacing of the outer traces still belongs to the survey
    )
    outside = (fi < -half) | (fi > ni - 1 + half) | (fj < -half) | (fj > nj - 1 + half)
    return outside, check_z_domain(vol, np.asarray(z, float), labels, wells_domain, source)


def values_at(
    vol: xr.Dataset, x: ArrayLike, y: ArrayLike, z: ArrayLike
) -> tuple[pd.DataFrame, np.ndarray]:
    """Trilinear values of every variable at points inside ``vol`` (a whole volume or a window
    of one), and whether the nearest node holds no value for some variable (a gap)."""
    fi, fj = fractional_index(vol, x, y)
    fk = (np.asarray(z, float) - float(vol.z[0])) / z_step(vol)
    return interpolate(vol, DIMS, [fk, fi, fj])


def report_unsampled(
    outside: np.ndarray, gap: np.ndarray, labels: ArrayLike, drop_outside: bool, source: str
) -> None:
    """Error naming the wells with samples outside the survey or in gaps (or, when dropping, a
    warning)."""
    labels = np.asarray(labels)
    problems = []
    if outside.any():
        problems.append(f"outside the survey: {_wells_list(labels[outside])}")
    if gap.any():
        problems.append(
            "at volume samples with no attribute value (NaN, e.g. a missing trace): "
            f"{_wells_list(labels[gap])}"
        )
    if not problems:
        return
    message = "; ".join(problems)
    if not drop_outside:
        raise InputError(
            f"wells {message} (volume {source}); fix the coordinates, or pass --drop-outside "
            "to leave those samples out"
        )
    warnings.warn(f"left out samples of wells {message}", PredictorWarning, stacklevel=3)


def _wells_list(labels: np.ndarray) -> str:
    """'TL-03 (60 samples), TL-07 (2 samples)': the wells, with how many of their samples."""
    counts = pd.Series(labels).value_counts(sort=False)
    names = [f"{w} ({n} sample{'s' if n > 1 else ''})" for w, n in counts.items()]
    shown = ", ".join(names[:5])
    return shown + (f" and {len(names) - 5} more wells" if len(names) > 5 else "")


def sample_volume(
    vol: xr.Dataset,
    x: ArrayLike,
    y: ArrayLike,
    z: ArrayLike,
    labels: ArrayLike | None = None,
    drop_outside: bool = False,
    wells_domain: ZDomain = "unknown",
) -> tuple[pd.DataFrame, np.ndarray]:
    """Every volume variable at points (x, y, z), by trilinear interpolation over valid nodes.

    Points laterally outside the survey, or whose nearest node holds no value, are an error
    naming the wells (with ``drop_outside``: left out with a warning); points above or below
    the sample axis are handled by :func:`check_z_domain`.

    Returns
    -------
    values : DataFrame of shape (n_kept, n_variables)
    kept : boolean array of shape (n_points,)
    """
    x, y, z = (np.asarray(v, float) for v in (x, y, z))
    labels = np.arange(x.size) if labels is None else np.asarray(labels)
    outside, in_z = locate_samples(vol, x, y, z, labels, wells_domain, "wells")
    values, gap = values_at(vol, x, y, z)
    gap &= ~outside & in_z
    report_unsampled(outside, gap, labels, drop_outside, vol.attrs.get("source", ""))
    kept = ~(outside | gap) & in_z
    return values[kept].reset_index(drop=True), kept


def view_depth(vol: xr.Dataset, wells: pd.DataFrame | None = None) -> float:
    """The z a map view of the volume shows: the middle of the wells' samples, else of the
    volume."""
    if wells is not None and "z" in wells and len(wells):
        return float(np.median(wells["z"]))
    return float(vol.z[vol.sizes["z"] // 2])


def map_view(vol: xr.Dataset, z: float) -> xr.Dataset:
    """The slice of a volume nearest to ``z`` as a map on survey lines: dims (y, x) with y the
    inline and x the crossline numbers, so the map figures can show it (axes in line numbers)."""
    part = vol.sel(z=z, method="nearest")
    z_shown = float(part.z)
    part = part.drop_vars([c for c in ("z", "cdp_x", "cdp_y") if c in part.coords])
    part = part.rename({"inline": "y", "crossline": "x"}).transpose("y", "x")
    part = part.assign_coords(x=part.x.astype(float), y=part.y.astype(float))
    part.attrs = {**vol.attrs, "axis_labels": ["crossline", "inline"], "z_shown": z_shown}
    return part


def wells_in_view(wells: pd.DataFrame, vol: xr.Dataset, z: float) -> pd.DataFrame:
    """Each well's sample nearest to ``z``, placed in survey line numbers as :func:`map_view`
    draws."""
    nearest = wells.assign(_dz=(wells["z"] - z).abs()).sort_values("_dz").drop_duplicates("well_id")
    fi, fj = fractional_index(vol, nearest["x"], nearest["y"])
    il0, step_il, xl0, step_xl = _lines(vol)
    return (
        nearest.drop(columns="_dz").assign(x=xl0 + fj * step_xl, y=il0 + fi * step_il).sort_index()
    )


def depths_to_show(wells: pd.DataFrame, n: int = 3) -> list[float]:
    """``n`` depths spread over the wells' samples (their 20th to 80th percentiles), for slices."""
    return [float(v) for v in np.quantile(wells["z"], np.linspace(0.2, 0.8, n))]


def section_through_wells(
    vol: xr.Dataset, wells: pd.DataFrame, n_wells: int = 5
) -> tuple[xr.Dataset, pd.DataFrame]:
    """A vertical section along a path through ``n_wells`` wells spread along the field's long
    axis (the first principal axis of the well heads), the volume's nearest trace at every step.

    Returns the section (dims ``("z", "distance")``, distance in metres along the path) and the
    wells on it (``well_id``, ``distance``, the samples' ``z`` and values), each sample placed
    at its well's head: a deviated well is drawn projected onto the section.
    """
    heads, _ = well_heads(wells)
    xy = heads[["x", "y"]].to_numpy(float)
    centred = xy - xy.mean(axis=0)
    axis = (
        np.linalg.svd(centred, full_matrices=False)[2][0] if len(xy) > 1 else np.array([1.0, 0.0])
    )
    along = centred @ axis
    order = np.argsort(along)
    picks = order[
        np.unique(np.round(np.linspace(0, len(order) - 1, min(n_wells, len(order)))).astype(int))
    ]
    path = xy[picks]
    legs = np.hypot(*np.diff(path, axis=0).T)
    at_well = np.concatenate([[0.0], np.cumsum(legs)])
    step = min(lateral_spacing(vol))
    distance = np.arange(0.0, at_well[-1] + step / 2, step) if at_well[-1] > 0 else np.array([0.0])
    px, py = np.interp(distance, at_well, path[:, 0]), np.interp(distance, at_well, path[:, 1])
    fi, fj = (np.rint(f).astype(int) for f in fractional_index(vol, px, py))
    inside = (fi >= 0) & (fi < vol.sizes["inline"]) & (fj >= 0) & (fj < vol.sizes["crossline"])
    il, xl = (
        xr.DataArray(np.clip(fi, 0, vol.sizes["inline"] - 1), dims="distance"),
        xr.DataArray(np.clip(fj, 0, vol.sizes["crossline"] - 1), dims="distance"),
    )
    section = vol.drop_vars([c for c in ("cdp_x", "cdp_y") if c in vol.coords]).isel(
        inline=il, crossline=xl
    )
    section = section.drop_vars([c for c in ("inline", "crossline") if c in section.coords])
    section = section.where(xr.DataArray(inside, dims="distance")).assign_coords(distance=distance)
    section.attrs = {**vol.attrs, "wells": [str(heads["well_id"].iloc[i]) for i in picks]}
    chosen = heads["well_id"].iloc[picks].to_numpy()
    on = wells[wells["well_id"].isin(chosen)].copy()
    on["distance"] = on["well_id"].map(dict(zip(chosen, at_well, strict=True))).astype(float)
    return section, on
