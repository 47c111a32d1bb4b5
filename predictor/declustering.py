"""Declustering weights that undo preferential drilling.

Cell declustering (Journel 1983; Deutsch 1989, Computers & Geosciences 15): a well's weight
is proportional to 1 / (wells in its cell), averaged over several placements of the cell
lattice; the cell size is chosen where the declustered mean is lowest when high values are
over-sampled (highest when low values are).  Nearest-node weights give each well its share
of the grid nodes that are closer to it than to any other well.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy.spatial import cKDTree

from .errors import InputError
from .stats import describe, weighted_mean, weighted_proportions

Direction = Literal["auto", "minimum", "maximum"]


def cell_weights(x: ArrayLike, y: ArrayLike, cell_size: float, n_offsets: int = 16) -> np.ndarray:
    """Cell-declustering weights for one cell size, averaged over ``n_offsets`` lattice origins.

    Returns weights of shape (n_wells,), positive, summing to n_wells.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if cell_size <= 0:
        raise InputError(f"cell size must be positive, got {cell_size}")
    n = x.size
    total = np.zeros(n)
    # origins spread over the cell in a fixed low-discrepancy pattern: reproducible, no seed needed
    golden = (np.sqrt(5) - 1) / 2
    x0, y0 = x.min(), y.min()
    for k in range(n_offsets):
        ox = (k / n_offsets) * cell_size
        oy = ((k * golden) % 1.0) * cell_size
        ix = np.floor((x - x0 + ox) / cell_size).astype(np.int64)
        iy = np.floor((y - y0 + oy) / cell_size).astype(np.int64)
        _, cell, counts = np.unique(
            np.stack([ix, iy]), axis=1, return_inverse=True, return_counts=True
        )
        cell = cell.ravel()
        w = 1.0 / counts[cell]
        total += w * n / w.sum()
    return total / n_offsets


@dataclass
class Declustering:
    """Weights and how they were chosen."""

    method: str
    weights: np.ndarray
    variable: str | None = None
    cell_size: float | None = None
    direction: str | None = None
    sizes: np.ndarray = field(default_factory=lambda: np.empty(0))
    curve: np.ndarray = field(default_factory=lambda: np.empty(0))
    naive_mean: float | None = None
    declustered_mean: float | None = None

    def summary(self) -> dict:
        out = {"method": self.method, "variable": self.variable}
        if self.cell_size is not None:
            out.update(
                cell_size=self.cell_size,
                direction=self.direction,
                sizes=[float(s) for s in self.sizes],
                declustered_mean_by_size=[float(c) for c in self.curve],
            )
        out.update(naive_mean=self.naive_mean, declustered_mean=self.declustered_mean)
        return out


def default_cell_sizes(x: ArrayLike, y: ArrayLike, n_sizes: int = 24) -> np.ndarray:
    """Cell sizes from half the typical well spacing up to half the larger side of the well
    extent."""
    pts = np.column_stack([x, y])
    dist, _ = cKDTree(pts).query(pts, k=2)
    nearest = np.median(dist[:, 1])
    extent = max(np.ptp(x), np.ptp(y))
    lo = max(nearest * 0.5, extent / 200)
    hi = max(extent / 2, lo * 2)
    return np.linspace(lo, hi, n_sizes)


def cell_declustering(
    x: ArrayLike,
    y: ArrayLike,
    values: ArrayLike,
    sizes: ArrayLike | None = None,
    direction: Direction = "auto",
    n_offsets: int = 16,
    variable: str | None = None,
) -> Declustering:
    """Choose a cell size from the declustered-mean curve and return the weights at that size.

    With ``direction="auto"`` the data decide: when most of the curve lies below the naive
    mean, high values are over-sampled and the minimum is taken; otherwise the maximum.
    """
    x, y, values = (np.asarray(a, dtype=float) for a in (x, y, values))
    ok = np.isfinite(values)
    if ok.sum() < 3:
        raise InputError(
            f"declustering needs at least 3 wells with a value of {variable or 'the variable'}"
        )
    xs, ys, vs = x[ok], y[ok], values[ok]
    sizes = default_cell_sizes(xs, ys) if sizes is None else np.asarray(sizes, dtype=float)
    curve = np.array([weighted_mean(vs, cell_weights(xs, ys, s, n_offsets)) for s in sizes])
    naive = float(vs.mean())
    if direction == "auto":
        direction = "minimum" if np.mean(curve < naive) >= 0.5 else "maximum"
    pick = int(np.argmin(curve) if direction == "minimum" else np.argmax(curve))
    size = float(sizes[pick])
    # every well gets a weight, also those missing this variable, from the same cell size
    weights = cell_weights(x, y, size, n_offsets)
    return Declustering(
        method="cell",
        weights=weights,
        variable=variable,
        cell_size=size,
        direction=direction,
        sizes=sizes,
        curve=curve,
        naive_mean=naive,
        declustered_mean=float(curve[pick]),
    )


def nearest_node_weights(
    x: ArrayLike, y: ArrayLike, grid_x: ArrayLike, grid_y: ArrayLike, valid: ArrayLike | None = None
) -> np.ndarray:
    """Share of the grid nodes nearest to each well, scaled to sum to n_wells.

    ``grid_x``/``grid_y`` are the node coordinates (any shape); ``valid`` masks nodes that
    count (for instance where the attribute is defined).  Exact over the map extent.  A well
    that is nowhere the nearest (it shares its spot with another) gets weight 0.
    """
    x = np.asarray(x, dtype=float)
    gx, gy = np.asarray(grid_x, dtype=float).ravel(), np.asarray(grid_y, dtype=float).ravel()
    if valid is not None:
        keep = np.asarray(valid, bool).ravel()
        gx, gy = gx[keep], gy[keep]
    _, nearest = cKDTree(np.column_stack([x, y])).query(np.column_stack([gx, gy]))
    counts = np.bincount(nearest, minlength=x.size).astype(float)
    return counts * x.size / counts.sum()


def declustered_statistics(
    wells: pd.DataFrame, weights: np.ndarray, numeric: list[str], categorical: list[str]
) -> dict:
    """Naive and declustered statistics side by side: ``{"naive": {...}, "declustered": {...}}``."""
    naive, declustered = {}, {}
    for col in numeric:
        v = wells[col].to_numpy(dtype=float)
        naive[col] = describe(v)
        declustered[col] = describe(v, weights)
    for col in categorical:
        labels = wells[col].to_numpy(dtype=object)
        naive[col] = {"proportions": weighted_proportions(labels)}
        declustered[col] = {"proportions": weighted_proportions(labels, weights)}
    return {"naive": naive, "declustered": declustered}
