"""Features built once on the grid; the wells read them back from the grid with the same code.

Building features on the map and sampling them at the wells (rather than computing them from
well values) means training sees exactly what prediction sees: no train/predict skew.
"""

from __future__ import annotations

import os
import re
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.fft
import xarray as xr
from scipy.ndimage import gaussian_filter1d
from scipy.signal import oaconvolve

from .errors import InputError
from .grid import sample_at, spacing
from .volume import (
    fractional_index,
    is_volume,
    lateral_spacing,
    locate_samples,
    report_unsampled,
    values_at,
    z_step,
)


@dataclass
class FeatureSpec:
    """Which features to build from which grid attributes.

    Parameters
    ----------
    attributes : grid variables used as they are
    context_radii : smoothing radii (m) for multi-scale context: a smoothed attribute and its
        local contrast (attribute minus smoothed) per radius
    gradient : add the gradient magnitude of each attribute
    location : add coordinates (x, y and coordinates rotated by ``rotation`` degrees); off by
        default because coordinates let a model memorise where the wells are
    vertical_radii : (volumes) smoothing radii along z, in z units (m or ms): a smoothed
        attribute and its contrast per radius, for the layering around each sample
    z_coordinate : (volumes) add z itself, for a compaction or depth trend
    chosen_by : how this set was chosen (recorded in the card)
    """

    attributes: list[str]
    context_radii: list[float] = field(default_factory=list)
    gradient: bool = False
    location: bool = False
    rotation: float = 45.0
    vertical_radii: list[float] = field(default_factory=list)
    z_coordinate: bool = False
    chosen_by: str = "given by the user"

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> FeatureSpec:
        return cls(**data)


TRUNCATE = 4.0  # kernel half-width in standard deviations (scipy.ndimage's default)
FFT_TAPS = (
    129  # longer kernels run by FFT: the same sums to rounding, at a cost independent of the radius
)
WIDE_HALO = (
    256  # nodes: a wider halo makes tiles mostly halo, so tiled maps smooth such radii beforehand
)


def gaussian(values: np.ndarray, sigma_cells) -> np.ndarray:
    """Separable Gaussian smoothing, edges extended by their nearest value.

    The kernel is scipy.ndimage.gaussian_filter1d's (truncated at ``TRUNCATE`` sd); short
    kernels run through it, long ones (a context radius of many nodes) as an FFT convolution
    of the edge-padded array, which agrees with it to rounding (tests/test_features.py).
    """
    out = np.asarray(values, dtype=float)
    for axis, sigma in enumerate(sigma_cells):
        if sigma <= 1e-15:  # not smoothed along this axis (as scipy.ndimage.gaussian_filter)
            continue
        radius = int(TRUNCATE * sigma + 0.5)
        if 2 * radius + 1 <= FFT_TAPS:
            out = gaussian_filter1d(out, sigma, axis=axis, mode="nearest", truncate=TRUNCATE)
            continue
        taps = np.exp(-0.5 * (np.arange(-radius, radius + 1) / sigma) ** 2)
        shape = [1] * out.ndim
        shape[axis] = taps.size
        pad = [(0, 0)] * out.ndim
        pad[axis] = (radius, radius)
        out = oaconvolve(
            np.pad(out, pad, mode="edge"),
            (taps / taps.sum()).reshape(shape),
            mode="valid",
            axes=axis,
        )
    return out


def _lateral(grid: xr.Dataset) -> tuple[tuple[str, ...], tuple[str, str], tuple[float, float]]:
    """(dims, the two lateral dims, their spacings): maps (y, x); volumes (z, inline, crossline)."""
    if is_volume(grid):
        return ("z", "inline", "crossline"), ("inline", "crossline"), lateral_spacing(grid)
    dx, dy = spacing(grid)
    return ("y", "x"), ("y", "x"), (dy, dx)


def smooth_store(
    grid: xr.Dataset,
    spec: FeatureSpec,
    radii: list[float],
    store: str | Path,
    block_values: int = 1 << 20,
) -> xr.Dataset:
    """The laterally smoothed attributes of ``radii`` over the whole of a (lazily opened) map or
    volume, written to the Zarr ``store`` without holding it: the Gaussian is separable, so it
    runs along the first lateral axis over blocks of whole columns, then along the second over
    blocks of whole rows (a volume: every z slice alike), as :func:`_smooth` does in memory (the
    same sums, to rounding).  A block holds at most ``block_values`` values (8 MB in float64;
    the FFT of a long kernel pads it several-fold) and is a whole number of the store's chunks,
    so no chunk is written twice.  Returns the store, opened lazily."""
    import zarr

    dims, (first, second), (d1, d2) = _lateral(grid)
    shape = tuple(grid.sizes[d] for d in dims)
    a1, a2 = dims.index(first), dims.index(second)
    depth = int(np.prod([n for d, n in zip(dims, shape, strict=True) if d not in (first, second)]))
    step = max(
        8, min(512, block_values // (depth * max(shape[a1], shape[a2])))
    )  # rows or columns per block
    root = zarr.open_group(str(store), mode="w", zarr_format=2)
    root.attrs["radii"] = [float(r) for r in radii]  # tiles leave these out of their halo
    chunks = tuple(
        min(n, step) if d in (first, second) else n for d, n in zip(dims, shape, strict=True)
    )
    names = []

    def along(axis: int, sigma: float) -> tuple:
        return tuple(sigma if k == axis else 0.0 for k in range(len(dims)))

    def where(axis: int, start: int, size: int) -> tuple:
        return tuple(
            slice(start, start + size) if k == axis else slice(None) for k in range(len(dims))
        )

    for attr in spec.attributes:
        for radius in radii:
            name = f"{attr}_smooth{radius:g}m"
            parts = {
                k: root.create_array(f"{name}.{k}", shape=shape, chunks=chunks, dtype=dtype)
                for k, dtype in (("num", "f8"), ("den", "f8"), ("valid", "u1"))
            }
            any_missing = False
            for c0 in range(
                0, shape[a2], step
            ):  # along the first axis, a block of whole columns at a time
                block = where(a2, c0, step)
                values = (
                    grid[attr]
                    .isel({second: slice(c0, c0 + step)})
                    .transpose(*dims)
                    .to_numpy()
                    .astype(float)
                )
                valid = np.isfinite(values)
                any_missing |= not valid.all()
                parts["valid"][block] = (
                    valid  # pass 2 masks with it instead of reading the input again
                )
                parts["num"][block] = gaussian(np.where(valid, values, 0.0), along(a1, radius / d1))
                parts["den"][block] = gaussian(valid.astype(float), along(a1, radius / d1))
            out = root.create_array(
                name,
                shape=shape,
                chunks=chunks,
                dtype="f8",
                fill_value=np.nan,
                attributes={"_ARRAY_DIMENSIONS": list(dims)},
            )
            for r0 in range(
                0, shape[a1], step
            ):  # then along the second, a block of whole rows at a time
                block = where(a1, r0, step)
                num = gaussian(parts["num"][block], along(a2, radius / d2))
                valid = parts["valid"][block].astype(bool)
                if any_missing:
                    den = gaussian(parts["den"][block], along(a2, radius / d2))
                    with np.errstate(invalid="ignore", divide="ignore"):
                        num = num / den
                out[block] = np.where(valid, num, np.nan)
            for k in parts:
                del root[f"{name}.{k}"]
            names.append(name)
    smoothed = xr.open_zarr(str(store), consolidated=False, zarr_format=2)
    return smoothed.assign_coords({d: grid[d].to_numpy() for d in dims if d in grid.coords})[names]


def _smooth(values: np.ndarray, sigma_cells) -> np.ndarray:
    """Gaussian smoothing that ignores NaN nodes (normalised convolution)."""
    valid = np.isfinite(values)
    if valid.all():  # the weights sum to one: no normalisation needed
        return gaussian(values, sigma_cells)
    num = gaussian(np.where(valid, values, 0.0), sigma_cells)
    den = gaussian(valid.astype(float), sigma_cells)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = num / den
    return np.where(valid, out, np.nan)


def build_features(
    grid: xr.Dataset,
    spec: FeatureSpec,
    threads: int | None = None,
    smoothed: xr.Dataset | None = None,
) -> xr.Dataset:
    """Every feature of ``spec`` as a variable on the grid or volume (same dims and coordinates).

    ``threads`` (default: every core) run the FFTs of long smoothing kernels; the values do
    not depend on it.  ``smoothed`` holds ``<attribute>_smooth<R>m`` variables already
    smoothed over the whole grid, on the same nodes as ``grid`` (a tile's part of them).
    """
    with scipy.fft.set_workers(max(1, threads or os.cpu_count() or 1)):
        return _build_features(grid, spec, smoothed)


def _build_features(
    grid: xr.Dataset, spec: FeatureSpec, smoothed: xr.Dataset | None = None
) -> xr.Dataset:
    """One path for maps (y, x) and volumes (z, inline, crossline): lateral context and gradients
    act over the two lateral dims (in each z slice of a volume), vertical context along z."""
    missing = [a for a in spec.attributes if a not in grid.data_vars]
    if missing:
        raise InputError(
            f"grid {grid.attrs.get('source', '')} lacks the attribute(s) {', '.join(missing)} the"
            f" model needs; it has {', '.join(map(str, grid.data_vars))}; give a grid with the same"
            " attribute names as in training"
        )
    volume = is_volume(grid)
    if not volume and (spec.vertical_radii or spec.z_coordinate):
        raise InputError(
            f"grid {grid.attrs.get('source', '')} is a map: vertical features need a volume "
            "(z, inline, crossline)"
        )
    dims, lateral, (d1, d2) = _lateral(grid)
    a1, a2 = dims.index(lateral[0]), dims.index(lateral[1])

    def sigma(cells: dict[int, float]) -> tuple[float, ...]:  # Gaussian sigma in nodes, per dim
        return tuple(cells.get(k, 0.0) for k in range(len(dims)))

    out = {}
    for attr in spec.attributes:
        values = grid[attr].transpose(*dims).to_numpy().astype(float)
        out[attr] = values
        for radius in spec.context_radii:
            name = f"{attr}_smooth{radius:g}m"
            if smoothed is not None and name in smoothed:
                smooth = smoothed[name].transpose(*dims).to_numpy()
            else:
                smooth = _smooth(values, sigma({a1: radius / d1, a2: radius / d2}))
            out[name] = smooth
            out[f"{attr}_contrast{radius:g}m"] = values - smooth
        for radius in spec.vertical_radii:  # volumes only (checked above)
            smooth = _smooth(values, sigma({dims.index("z"): radius / z_step(grid)}))
            out[f"{attr}_vsmooth{radius:g}"] = smooth
            out[f"{attr}_vcontrast{radius:g}"] = values - smooth
        if spec.gradient:
            g1, g2 = np.gradient(values, d1, d2, axis=(a1, a2))
            out[f"{attr}_gradient"] = np.hypot(g1, g2)
    shape = tuple(grid.sizes[d] for d in dims)
    if spec.location:
        xx, yy = node_positions(grid, shape)
        theta = np.deg2rad(spec.rotation)
        out["x_coord"], out["y_coord"] = xx, yy
        out["x_rotated"] = xx * np.cos(theta) + yy * np.sin(theta)
        out["y_rotated"] = -xx * np.sin(theta) + yy * np.cos(theta)
    if spec.z_coordinate:
        out["z_coord"] = np.broadcast_to(grid.z.to_numpy()[:, None, None], shape)
    coords = grid.coords if volume else {"x": grid.x, "y": grid.y}
    ds = xr.Dataset({k: (dims, v) for k, v in out.items()}, coords=coords)
    ds.attrs = dict(grid.attrs)
    return ds


def node_positions(grid: xr.Dataset, shape: tuple[int, ...]) -> tuple[np.ndarray, np.ndarray]:
    """Map x and y of every node, in the grid's shape (a volume: each trace's, at every z)."""
    if is_volume(grid):
        return np.broadcast_to(grid.cdp_x.to_numpy(), shape), np.broadcast_to(
            grid.cdp_y.to_numpy(), shape
        )
    xx, yy = np.meshgrid(grid.x.to_numpy(), grid.y.to_numpy())
    return xx, yy


def halo_cells(
    spec: FeatureSpec, dx: float, dy: float, skip: list[float] | None = None
) -> tuple[int, int]:
    """Nodes of context a tile needs on each side so its features equal those of the whole grid
    (``skip``: context radii smoothed beforehand over the whole grid, which need none)."""
    hy = hx = 1 if spec.gradient else 0
    for radius in spec.context_radii:
        if radius in (skip or []):
            continue
        hy = max(hy, int(TRUNCATE * radius / dy + 0.5) + 1)
        hx = max(hx, int(TRUNCATE * radius / dx + 0.5) + 1)
    return hy, hx


def wide_radii(spec: FeatureSpec, dx: float, dy: float, max_halo: int | None = None) -> list[float]:
    """Context radii whose halo would exceed ``max_halo`` nodes (at most ``WIDE_HALO``): a tiled
    map or volume smooths them beforehand."""
    limit = WIDE_HALO if max_halo is None else min(max_halo, WIDE_HALO)
    return [r for r in spec.context_radii if TRUNCATE * r / min(dx, dy) > limit]


def location_features(names: list[str]) -> list[str]:
    """Map-coordinate features (z_coord is a depth trend, not a location, and is not among them)."""
    return [n for n in names if n in ("x_coord", "y_coord", "x_rotated", "y_rotated")]


def features_at_wells(
    features: xr.Dataset, wells: pd.DataFrame, method: str = "bilinear", drop_outside: bool = False
) -> tuple[pd.DataFrame, np.ndarray]:
    """Sample the feature grid at the wells: (table of shape (n_kept, n_features), kept mask)."""
    return sample_at(
        features, wells["x"], wells["y"], wells["well_id"], method=method, drop_outside=drop_outside
    )


def features_at_samples(
    volume: xr.Dataset,
    spec: FeatureSpec,
    wells: pd.DataFrame,
    drop_outside: bool = False,
    wells_domain: str = "unknown",
) -> tuple[pd.DataFrame, np.ndarray]:
    """Features at well samples (x, y, z) of a volume: (table of shape (n_kept, n_features), kept
    mask).

    Features are built on a window around each well, wide enough (the tiling halo) that they
    equal the whole volume's, so training never holds the features of a large volume at once.
    """
    x, y, z = (wells[c].to_numpy(float) for c in ("x", "y", "z"))
    labels = wells["well_id"].to_numpy()
    outside, in_z = locate_samples(
        volume, x, y, z, labels, wells_domain, wells.attrs.get("source", "wells")
    )
    ok = ~outside & in_z
    d_il, d_xl = lateral_spacing(volume)
    h_il, h_xl = halo_cells(spec, d_xl, d_il)
    fi, fj = fractional_index(volume, x, y)
    ni, nj = volume.sizes["inline"], volume.sizes["crossline"]
    windows = []
    for well in pd.unique(labels[ok]):
        rows = np.flatnonzero(ok & (labels == well))
        i0 = max(0, int(np.floor(fi[rows].min())) - h_il - 1)
        i1 = min(ni, int(np.ceil(fi[rows].max())) + h_il + 2)
        j0 = max(0, int(np.floor(fj[rows].min())) - h_xl - 1)
        j1 = min(nj, int(np.ceil(fj[rows].max())) + h_xl + 2)
        windows.append((rows, slice(i0, i1), slice(j0, j1)))
    whole = sum((w[1].stop - w[1].start) * (w[2].stop - w[2].start) for w in windows) >= ni * nj
    if whole:  # the windows would cover the survey more than once: build the features once
        windows = [(np.flatnonzero(ok), slice(0, ni), slice(0, nj))]
    names, parts = None, []
    gap = np.zeros(x.size, bool)
    for rows, si, sj in windows:
        part = volume.isel(inline=si, crossline=sj).load()
        part.attrs = dict(volume.attrs)
        values, holes = values_at(build_features(part, spec), x[rows], y[rows], z[rows])
        names = list(values.columns)
        parts.append(values.set_index(rows))
        gap[rows] = holes
    report_unsampled(outside, gap, labels, drop_outside, volume.attrs.get("source", ""))
    kept = ok & ~gap
    if names is None:
        return pd.DataFrame(), kept
    table = pd.concat(parts).sort_index()
    return table.loc[np.flatnonzero(kept)].reset_index(drop=True), kept


def feature_matrix(features: xr.Dataset, names: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Flattened features at every node: (matrix of shape (n_valid, n_features), valid mask of the
    grid)."""
    first = features[names[0]]
    stack = np.empty((first.size, len(names)))
    on_grid = stack.reshape(*first.shape, len(names))  # a view: filling it fills the matrix
    for j, name in enumerate(names):  # column by column: no second copy of every feature at once
        on_grid[..., j] = features[name].to_numpy()
    valid = np.all(np.isfinite(stack), axis=1)
    return (stack if valid.all() else stack[valid]), valid


_FEATURE_WORDS = (
    (r"(.+)_smooth([\d.]+)m", "{0} smoothed over {1:,.0f} m"),
    (r"(.+)_contrast([\d.]+)m", "{0} minus its {1:,.0f} m smoothing"),
    (r"(.+)_vsmooth([\d.]+)", "{0} smoothed vertically over {1:g} (z units)"),
    (r"(.+)_vcontrast([\d.]+)", "{0} minus its vertical smoothing over {1:g} (z units)"),
    (r"(.+)_gradient", "lateral gradient of {0}"),
)
_PLAIN = {
    "x_coord": "easting",
    "y_coord": "northing",
    "x_rotated": "rotated easting",
    "y_rotated": "rotated northing",
    "z_coord": "z",
    "kriging_of_wells": "kriging of the wells",
}


def describe_feature(name: str) -> str:
    """A feature's name in words, for figure titles: ``impedance_smooth1000m`` is "impedance
    smoothed over 1,000 m"."""
    if name in _PLAIN:
        return _PLAIN[name]
    for pattern, words in _FEATURE_WORDS:
        match = re.fullmatch(pattern, name)
        if match:
            parts = [match.group(1), *(float(g) for g in match.groups()[1:])]
            return words.format(*parts)
    return name
