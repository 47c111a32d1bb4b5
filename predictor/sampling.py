"""Values of a map or volume at points between its nodes: one interpolation for any number of dims.

Maps give fractional (row, column) indices, volumes (z, inline, crossline); each node's weight
is the product of its 1-D linear weights, and nodes with no value (NaN) are left out with the
remaining weights renormalised, so a well next to a gap still gets a value.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import xarray as xr


def interpolate(
    ds: xr.Dataset, dims: tuple[str, ...], fractions: list[np.ndarray], nearest: bool = False
) -> tuple[pd.DataFrame, np.ndarray]:
    """Every variable of ``ds`` at fractional node indices (one array per dim of ``dims``, clipped
    to the nodes): multilinear over the valid nodes around each point, or the ``nearest`` node.

    Returns the values (one column per variable) and whether the nearest node of some variable
    holds no value (a gap).
    """
    sizes = [ds.sizes[d] for d in dims]
    fractions = [
        np.clip(np.asarray(f, float), 0, n - 1) for f, n in zip(fractions, sizes, strict=True)
    ]
    near = tuple(np.round(f).astype(int) for f in fractions)
    out, gap = {}, np.zeros(fractions[0].size, bool)
    for var in ds.data_vars:
        arr = ds[var].transpose(*dims).to_numpy()
        at_nearest = arr[near]
        gap |= np.isnan(at_nearest)
        out[str(var)] = at_nearest if nearest else multilinear(arr, fractions)
    return pd.DataFrame(out), gap


def multilinear(arr: np.ndarray, fractions: list[np.ndarray]) -> np.ndarray:
    """Linear interpolation of ``arr`` at fractional indices along each of its axes, over valid
    nodes."""
    lower = [
        np.clip(np.floor(f).astype(int), 0, max(n - 2, 0))
        for f, n in zip(fractions, arr.shape, strict=True)
    ]
    offsets = [f - i0 for f, i0 in zip(fractions, lower, strict=True)]
    total = np.zeros(fractions[0].size)
    weight = np.zeros(fractions[0].size)
    for corner in itertools.product((0, 1), repeat=arr.ndim):
        w = np.ones(fractions[0].size)
        for step, t in zip(corner, offsets, strict=True):
            w = w * (t if step else 1 - t)
        index = tuple(
            np.minimum(i0 + step, n - 1)
            for i0, step, n in zip(lower, corner, arr.shape, strict=True)
        )
        v = arr[index]
        ok = ~np.isnan(v)
        total += np.where(ok, v * w, 0.0)
        weight += np.where(ok, w, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(weight > 0, total / weight, np.nan)
