"""The grid model: an ``xarray.Dataset`` with dims ``("y", "x")``, attributes as data variables.

Also lattice detection for long tables and sampling of grid values at well locations, so
that training sees exactly the values the map will see.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr
from numpy.typing import ArrayLike

from .errors import InputError, PredictorWarning, list_rows
from .io.formats import file_format
from .io.tables import X_NAMES, Y_NAMES, find_column, numeric_column, read_table
from .options import SampleMethod
from .sampling import interpolate


def _typical_step(values: np.ndarray, others: np.ndarray) -> float:
    """Most common spacing between neighbouring nodes along one axis, row by row."""
    order = np.lexsort((values, others))
    v, o = values[order], others[order]
    steps = np.diff(v)[(np.diff(o) == 0) & (np.diff(v) > 0)]
    if steps.size == 0:
        steps = np.diff(np.unique(values))
    rounded = np.round(steps, 6)
    uniq, counts = np.unique(rounded, return_counts=True)
    return float(uniq[np.argmax(counts)])


def _lattice_axis(values: np.ndarray, others: np.ndarray, source: str, column: str) -> np.ndarray:
    """Regular axis (ascending) on which all ``values`` lie; error naming rows that do not."""
    unique = np.unique(values)
    if unique.size == 1:
        raise InputError(
            f"{source}: column {column!r} has a single value; a map needs at least 2 nodes along x"
            " and y"
        )
    step = _typical_step(values, others)
    span = unique[-1] - unique[0]
    n = int(round(span / step)) + 1
    if n > 200_000:
        raise InputError(
            f"{source}: column {column!r} spacing {step:g} gives {n} nodes; the values are not on a"
            " lattice"
        )
    k = (values - unique[0]) / step
    off = np.abs(k - np.round(k)) > 1e-3
    if off.any():
        rows = np.flatnonzero(off)
        raise InputError(
            f"{source}: grid not on a regular lattice: column {column!r} at"
            f" {list_rows([f'line {i + 2}' for i in rows])} is off the spacing {step:g} from origin"
            f" {unique[0]:g}; resample the attribute onto a regular grid (rotated lattices: give"
            " NetCDF with x/y coordinates)"
        )
    return unique[0] + step * np.arange(n)


def grid_from_table(frame: pd.DataFrame, x: str | None = None, y: str | None = None) -> xr.Dataset:
    """Build a grid from a long table (one row per node; x, y and one column per attribute)."""
    source = frame.attrs.get("source", "table")
    xc = find_column(frame, x, X_NAMES, "the x coordinate (easting)")
    yc = find_column(frame, y, Y_NAMES, "the y coordinate (northing)")
    xs = numeric_column(frame, xc, allow_missing=False)
    ys = numeric_column(frame, yc, allow_missing=False)
    for col, v in ((xc, xs), (yc, ys)):
        bad = np.flatnonzero(~np.isfinite(v))
        if bad.size:
            raise InputError(
                f"{source}: column {col!r} is infinite at"
                f" {list_rows([f'line {i + 2}' for i in bad])}"
            )
    attributes = [c for c in frame.columns if c not in (xc, yc)]
    if not attributes:
        raise InputError(
            f"{source}: no attribute columns besides {xc!r} and {yc!r}; add at least one (e.g."
            " impedance)"
        )
    xaxis = _lattice_axis(xs, ys, source, xc)
    yaxis = _lattice_axis(ys, xs, source, yc)
    ix = np.round((xs - xaxis[0]) / (xaxis[1] - xaxis[0])).astype(int)
    iy = np.round((ys - yaxis[0]) / (yaxis[1] - yaxis[0])).astype(int)
    flat = iy * xaxis.size + ix
    dup = pd.Series(flat).duplicated(keep="first").to_numpy()
    if dup.any():
        raise InputError(
            f"{source}: {dup.sum()} nodes appear twice, at"
            f" {list_rows([f'line {i + 2}' for i in np.flatnonzero(dup)])}; keep one row per (x, y)"
        )
    data = {}
    for col in attributes:
        values = numeric_column(frame, col)
        cube = np.full(yaxis.size * xaxis.size, np.nan)
        cube[flat] = values
        data[col] = (("y", "x"), cube.reshape(yaxis.size, xaxis.size))
    ds = xr.Dataset(data, coords={"x": xaxis, "y": yaxis})
    ds.attrs.update(source=str(source), columns_taken=f"x={xc}, y={yc}")
    return check_grid(ds, source)


def check_grid(ds: xr.Dataset, source: str = "grid") -> xr.Dataset:
    """Normalise a grid: dims (y, x), ascending coordinates, float attributes; clear errors
    otherwise."""
    if not ds.data_vars:
        raise InputError(f"{source}: no attribute variables on the grid")
    for name in ("x", "y"):
        if name not in ds.dims:
            raise InputError(f"{source}: no {name!r} dimension; dims are {tuple(ds.dims)}")
    ds = ds.transpose("y", "x", ...)
    for name in ("x", "y"):
        coord = ds[name].to_numpy()
        if coord.size < 2:
            raise InputError(f"{source}: a map needs at least 2 nodes along {name}")
        step = np.diff(coord)
        if np.all(step < 0):
            ds = ds.isel({name: slice(None, None, -1)})
            step = -step[::-1]
        if not (np.all(step > 0) and np.allclose(step, step[0], rtol=1e-6)):
            raise InputError(
                f"{source}: coordinate {name!r} is not evenly spaced; resample onto a regular grid"
            )
    for var in list(ds.data_vars):
        if ds[var].dims != ("y", "x"):
            ds = ds.drop_vars(var)
            continue
        ds[var] = ds[var].astype(float)
    if not ds.data_vars:
        raise InputError(f"{source}: no 2-D attribute on (y, x)")
    ds.attrs.setdefault("source", str(source))
    return ds


def read_grid(
    path: str | Path, x: str | None = None, y: str | None = None, lazy: bool = False
) -> xr.Dataset:
    """Read a grid from a CSV/Parquet long table, a NetCDF file, a Zarr store or a GeoTIFF
    (by the file's signature, else its extension: :func:`predictor.io.formats.file_format`).

    With ``lazy`` NetCDF and Zarr grids stay on disk (dask-backed) until a part is used, so a
    grid larger than memory can be mapped tile by tile.
    """
    path = Path(path)
    kind = file_format(path)
    if kind in ("netcdf", "zarr"):
        from .io.netcdf import read_netcdf_grid

        return check_grid(read_netcdf_grid(path, lazy=lazy), str(path))
    if kind == "geotiff":
        from .io.geotiff import read_geotiff

        return check_grid(read_geotiff(path, classes=False), str(path))
    if kind == "segy":
        raise InputError(
            f"{path}: a SEG-Y file holds a volume; read it with read_seismic or read_volume"
        )
    return grid_from_table(read_table(path), x=x, y=y)


ATTRIBUTE_KINDS = ("impedance", "velocity", "density", "amplitude", "other")
POSITIVE_KINDS = ("impedance", "velocity", "density")
_KIND_HINTS = (
    ("imped", "impedance"),
    ("velocity", "velocity"),
    ("vp", "velocity"),
    ("vs", "velocity"),
    ("density", "density"),
    ("rho", "density"),
    ("ampl", "amplitude"),
)


def attribute_kind(grid: xr.Dataset, var: str) -> str:
    """What an attribute is: as the user said (``attrs["kind"]``), else guessed from its name."""
    given = grid[var].attrs.get("kind")
    if given:
        return given
    return next((kind for hint, kind in _KIND_HINTS if hint in var.lower()), "other")


def set_attribute_kinds(grid: xr.Dataset, kinds: dict[str, str] | None) -> xr.Dataset:
    """Record what each named attribute is (``{"relative_ai": "amplitude"}``); the positivity and
    units checks and the rock-physics sign check follow the kind, not the name."""
    source = grid.attrs.get("source", "grid")
    for var, kind in (kinds or {}).items():
        if var not in grid.data_vars:
            raise InputError(
                f"{source}: --attribute-kind names {var!r}, which is not an attribute of the grid;"
                f" the attributes are {', '.join(map(str, grid.data_vars))}"
            )
        if kind not in ATTRIBUTE_KINDS:
            raise InputError(
                f"--attribute-kind {var}={kind}: the kind must be one of"
                f" {', '.join(ATTRIBUTE_KINDS)} (impedance, velocity and density must be positive;"
                " amplitude is signed)"
            )
        grid[var].attrs["kind"] = kind
    return grid


def read_seismic(
    path: str | Path,
    lazy: bool = False,
    z_domain: str | None = None,
    name: str | None = None,
    x: str | None = None,
    y: str | None = None,
    kinds: dict[str, str] | None = None,
) -> xr.Dataset:
    """Read a map (CSV/Parquet long table, NetCDF, Zarr) or a volume (SEG-Y, or NetCDF/Zarr with
    a ``z`` dimension), whichever the file holds; see :mod:`predictor.volume` for volumes.

    ``z_domain`` ("depth" or "time") names a volume's sample axis when the file does not;
    ``name`` is the attribute a SEG-Y file holds (default "amplitude"); ``kinds`` what each
    attribute is (see :func:`set_attribute_kinds`).
    """
    return set_attribute_kinds(_read_seismic(path, lazy, z_domain, name, x, y), kinds)


def _read_seismic(path, lazy, z_domain, name, x, y) -> xr.Dataset:
    from .volume import read_volume

    path = Path(path)
    kind = file_format(path)
    if kind == "segy":
        return read_volume(path, lazy=lazy, z_domain=z_domain, name=name or "amplitude")
    if kind in ("netcdf", "zarr") and path.exists():
        try:
            with (
                xr.open_zarr(path) if kind == "zarr" else xr.open_dataset(path, engine="h5netcdf")
            ) as peek:
                volume = "z" in peek.dims
        except Exception:  # unreadable: the grid reader below names the problem
            volume = False
        if volume:
            return read_volume(path, lazy=lazy, z_domain=z_domain)
    if z_domain:
        raise InputError(f"{path}: holds a map; --z-domain applies to volumes only")
    return read_grid(path, x=x, y=y, lazy=lazy)


def spacing(ds: xr.Dataset) -> tuple[float, float]:
    """Node spacing (dx, dy) in coordinate units."""
    return float(ds.x[1] - ds.x[0]), float(ds.y[1] - ds.y[0])


def node_table(ds: xr.Dataset) -> pd.DataFrame:
    """The grid as a long table: one row per node, columns x, y and each variable (row-major, y
    outer)."""
    xx, yy = np.meshgrid(ds.x.to_numpy(), ds.y.to_numpy())
    table = {"x": xx.ravel(), "y": yy.ravel()}
    for var in ds.data_vars:
        table[var] = ds[var].to_numpy().ravel()
    return pd.DataFrame(table)


def _geographic(x, y) -> bool:
    """Coordinates that fit longitude/latitude in degrees (|x| <= 180, |y| <= 90)."""
    x, y = np.asarray(x, float), np.asarray(y, float)
    return bool(np.nanmax(np.abs(x)) <= 180 and np.nanmax(np.abs(y)) <= 90)


def sample_at(
    ds: xr.Dataset,
    x: np.ndarray,
    y: np.ndarray,
    labels: ArrayLike | None = None,
    method: SampleMethod = "bilinear",
    drop_outside: bool = False,
) -> tuple[pd.DataFrame, np.ndarray]:
    """Sample every grid variable at points (x, y).

    Bilinear interpolation uses the valid nodes among the four around a point (weights
    renormalised), so a well next to a gap still gets a value; ``nearest`` takes the nearest
    node.  A point outside the grid, or whose nearest node is NaN, is an error naming it;
    with ``drop_outside`` it is dropped with a warning instead.

    Returns
    -------
    values : DataFrame of shape (n_kept, n_variables)
    kept : boolean array of shape (n_points,)
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    labels = np.arange(x.size) if labels is None else np.asarray(labels)
    dx, dy = spacing(ds)
    fx = (x - float(ds.x[0])) / dx
    fy = (y - float(ds.y[0])) / dy
    nx, ny = ds.sizes["x"], ds.sizes["y"]
    half = 0.5  # a point within half a cell of the outer nodes still belongs to the map
    outside = (fx < -half) | (fx > nx - 1 + half) | (fy < -half) | (fy > ny - 1 + half)
    values, gap = interpolate(ds, ("y", "x"), [fy, fx], nearest=method == "nearest")
    gap &= ~outside
    problems = []
    if outside.any():
        problems.append(f"outside the grid: {list_rows(labels[outside])}")
    if gap.any():
        problems.append(f"on a node with no attribute value (NaN): {list_rows(labels[gap])}")
    kept = ~(outside | gap)
    if problems:
        message = "; ".join(problems)
        if (
            outside.all()
        ):  # every well off the map: most often the two are in different coordinate systems
            message += (
                f"; the wells span x {np.nanmin(x):.6g} to {np.nanmax(x):.6g}, y {np.nanmin(y):.6g}"
                f" to {np.nanmax(y):.6g}, the grid x {float(ds.x.min()):.6g} to"
                f" {float(ds.x.max()):.6g}, y {float(ds.y.min()):.6g} to {float(ds.y.max()):.6g}"
            )
            if _geographic(x, y) != _geographic(ds.x.to_numpy(), ds.y.to_numpy()):
                message += (
                    "; one of them looks like longitude/latitude in degrees and the other like"
                    " projected metres: give both in the same projected CRS"
                )
        if not drop_outside:
            raise InputError(
                f"wells {message} (grid {ds.attrs.get('source', '')}); fix the coordinates, or pass"
                " --drop-outside to leave them out"
            )
        warnings.warn(f"left out wells {message}", PredictorWarning, stacklevel=2)
    return values[kept].reset_index(drop=True), kept
