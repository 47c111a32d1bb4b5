"""Simple and ordinary kriging with a fitted semivariogram model.

Maps need the estimate at millions of nodes, so ordinary kriging is solved in its dual form
(common practice): the system's right-hand side is solved once per model for the weights of
the covariance functions, and an estimate is one row of covariances times that vector.  The
kriging variance, which needs a solve per node, is computed only when asked for.

Up to ``GLOBAL_WELLS`` wells one system holds every well (global neighbourhood).  Above it,
the nodes are grouped into square tiles and each tile is kriged from the ``NEIGHBOURS`` wells
nearest its centre (moving neighbourhood, with a KD-tree), so the cost grows with the wells
in a neighbourhood, not with all the wells of the field.
"""

from __future__ import annotations

import threading

import numpy as np
from numpy.typing import ArrayLike
from scipy.linalg import lu_factor, lu_solve
from scipy.spatial import cKDTree
from scipy.spatial.distance import cdist

from .errors import ModelError
from .variogram import KINDS, VariogramModel, auto_variogram

# nodes x wells of covariances held at once (2 MB): the covariance's few passes over it stay in
# cache (a 2000 x 2000 map's kriging ran a fifth faster than with 32 MB chunks)
CELLS_PER_CHUNK = 250_000
GLOBAL_WELLS = (
    1500  # above this many wells, a moving neighbourhood (the global system grows as n^3)
)
NEIGHBOURS = 100  # wells per moving neighbourhood
COMPACT_MIN_WELLS = 50  # from this many wells a short spherical range is kriged from near wells
# a tile's side holds about this many wells' share of the area: well inside its neighbourhood
WELLS_PER_TILE = 10
VARIOGRAM_WELLS = 3000  # the semivariogram of more wells is estimated from a seeded sample of them
# some OpenBLAS builds give wrong results when called from several Python threads at once
# (seen here in tiled prediction); kriging's solves are serialised, the rest runs in parallel
_BLAS = threading.Lock()


def _system(points: np.ndarray, variogram: VariogramModel):
    """LU factors of the ordinary-kriging matrix [[C, 1], [1', 0]] of ``points``."""
    n = len(points)
    lhs = np.ones((n + 1, n + 1))
    lhs[:n, :n] = variogram.covariance(cdist(points, points))
    lhs[n, n] = 0.0
    lhs[:n, :n] += np.eye(n) * 1e-10 * (variogram.nugget + variogram.sill)
    with _BLAS:
        return lu_factor(lhs)


def _dual(lu, values: np.ndarray) -> np.ndarray:
    """Dual weights: the system solved for [values, 0], so an estimate is [c(x), 1] . weights."""
    with _BLAS:
        return lu_solve(lu, np.append(values, 0.0))


def _combine(cov: np.ndarray, dual: np.ndarray) -> np.ndarray:
    # einsum without BLAS (see _BLAS): exact same sums whatever thread runs it
    return np.einsum("ij,i->j", cov, dual[:-1]) + dual[-1]


def _variance(lu, cov: np.ndarray, c0: float) -> np.ndarray:
    rhs = np.vstack([cov, np.ones((1, cov.shape[1]))])
    with _BLAS:
        sol = lu_solve(lu, rhs)
    return c0 - np.sum(sol[:-1] * cov, axis=0) - sol[-1]


class OrdinaryKriging:
    """Ordinary kriging (unknown constant mean) of values at points.

    ``fit`` fits an omnidirectional semivariogram (of one of ``kinds``) when no model is given;
    learned state ends in ``_``.  ``neighbours`` asks for a moving neighbourhood of that many
    wells per tile of nodes (all of them when a CV fold holds fewer); None: the global system up
    to ``GLOBAL_WELLS`` wells, else ``NEIGHBOURS``.  A neighbourhood holding every well gives the
    global estimate.
    """

    def __init__(
        self,
        variogram: VariogramModel | None = None,
        neighbours: int | None = None,
        kinds: tuple[str, ...] = KINDS,
    ):
        self.variogram = variogram
        self.neighbours = neighbours
        self.kinds = kinds  # the model kinds a fitted semivariogram may take

    def fit(self, x: ArrayLike, y: ArrayLike, values: ArrayLike) -> OrdinaryKriging:
        x, y, v = (np.asarray(a, dtype=float) for a in (x, y, values))
        if v.size < 2:
            raise ModelError("ordinary kriging needs at least 2 wells")
        n = v.size
        if self.neighbours is not None and self.neighbours < 3:
            raise ModelError(f"a kriging neighbourhood of {self.neighbours} wells: give 3 or more")
        self.points_ = np.column_stack([x, y])
        self.values_ = v
        same = _coincident(self.points_)
        if same:
            raise ModelError(
                f"wells {same[0]} and {same[1]} (rows, 0-based) have identical coordinates, which"
                " makes the kriging system singular; merge them (average their values) or"
                " remove one"
            )
        if self.variogram is not None:
            self.variogram_ = self.variogram
        elif np.ptp(v) == 0 or v.size < 6:
            self.variogram_ = VariogramModel("spherical", 0.0, max(float(np.var(v)), 1e-12), 1e-9)
        elif n > VARIOGRAM_WELLS:
            pick = np.random.default_rng(0).choice(n, VARIOGRAM_WELLS, replace=False)
            self.variogram_ = auto_variogram(x[pick], y[pick], v[pick], kinds=self.kinds)
        else:
            self.variogram_ = auto_variogram(x, y, v, kinds=self.kinds)
        self.local_ = self.neighbours is not None or n > GLOBAL_WELLS
        self.neighbours_ = min(self.neighbours or NEIGHBOURS, n) if self.local_ else n
        if not self.local_:
            self.lu_ = _system(self.points_, self.variogram_)
            self.dual_ = _dual(self.lu_, v)
        else:
            self.tree_ = cKDTree(self.points_)
            lo, hi = self.points_.min(axis=0), self.points_.max(axis=0)
            area = max(float(np.prod(np.maximum(hi - lo, 1e-9))), 1e-9)
            self.tile_ = float(np.sqrt(area / n * WELLS_PER_TILE))
            self.origin_ = lo
            self._tiles: dict = {}
        return self

    def predict(self, x: ArrayLike, y: ArrayLike, return_variance: bool = False):
        q = np.column_stack([np.asarray(x, dtype=float), np.asarray(y, dtype=float)])
        est = np.empty(len(q))
        var = np.empty(len(q)) if return_variance else None
        c0 = self.variogram_.nugget + self.variogram_.sill
        if self.local_:
            groups = self._local_groups(q, return_variance)
        elif not return_variance and self._compact_reach() is not None:
            return self._compact_estimate(q)
        else:
            groups = [(np.arange(len(q)), self.points_, self.lu_, self.dual_)]
        for index, points, lu, dual in groups:
            step = max(1, CELLS_PER_CHUNK // len(points))
            for start in range(0, len(index), step):
                rows = index[start : start + step]
                cov = self.variogram_.covariance(cdist(points, q[rows]))
                est[rows] = _combine(cov, dual)
                if return_variance:
                    var[rows] = _variance(lu, cov, c0)
        return (est, np.maximum(var, 0.0)) if return_variance else est

    def _compact_reach(self) -> int | None:
        """With a spherical semivariogram a well beyond the range adds nothing to an estimate:
        the most wells any location can have within the range (those wells lie within twice
        the range of each other), when few enough to pay for a nearest-wells query instead of
        every node-well covariance; None otherwise."""
        if not hasattr(self, "reach_"):  # once; threads may race here, each setting the same
            reach, tree, n = None, None, len(self.points_)
            if self.variogram_.kind == "spherical" and n >= COMPACT_MIN_WELLS:
                tree = cKDTree(self.points_)
                most = tree.query_ball_point(
                    self.points_, 2.0 * self.variogram_.range, return_length=True
                ).max()
                reach = int(most) if most <= n // 4 else None
            self.compact_tree_ = tree  # before reach_: a thread that sees reach_ finds the tree
            self.reach_ = reach
        return self.reach_

    def _compact_estimate(self, q: np.ndarray) -> np.ndarray:
        """The dual-form estimate from the wells within the range only: the same sums as the
        dense form without its zero terms."""
        est = np.empty(len(q))
        step = max(1, CELLS_PER_CHUNK // self.reach_)
        for start in range(0, len(q), step):
            rows = slice(start, start + step)
            h, near = self.compact_tree_.query(
                q[rows], k=self.reach_, distance_upper_bound=self.variogram_.range
            )
            h, near = h.reshape(len(h), -1), near.reshape(len(near), -1)
            missing = near == len(self.points_)  # no further well within the range
            cov = self.variogram_.covariance(np.where(missing, self.variogram_.range, h))
            cov[missing] = 0.0
            est[rows] = np.einsum("ij,ij->i", cov, self.dual_[np.where(missing, 0, near)])
            est[rows] += self.dual_[-1]
        return est

    def _local_groups(self, q: np.ndarray, with_lu: bool):
        """Per tile of query points: (rows, neighbourhood points, LU or None, dual weights)."""
        cell = np.floor((q - self.origin_) / self.tile_).astype(np.int64)
        keys, inverse = np.unique(cell, axis=0, return_inverse=True)
        order = np.argsort(inverse.ravel(), kind="stable")
        bounds = np.searchsorted(inverse.ravel()[order], np.arange(len(keys) + 1))
        for k, key in enumerate(map(tuple, keys)):
            found = self._tiles.get(key)
            if found is None or (with_lu and found[1] is None):
                centre = self.origin_ + (np.asarray(key) + 0.5) * self.tile_
                near = np.sort(self.tree_.query(centre, k=self.neighbours_)[1])
                lu = _system(self.points_[near], self.variogram_)
                found = (near, lu if with_lu else None, _dual(lu, self.values_[near]))
                self._tiles[key] = (
                    found  # a small cache: the same tiles come back chunk after chunk
                )
            near, lu, dual = found
            yield order[bounds[k] : bounds[k + 1]], self.points_[near], lu, dual

    def to_dict(self) -> dict:
        return {
            "variogram": self.variogram_.to_dict(),
            "x": self.points_[:, 0].tolist(),
            "y": self.points_[:, 1].tolist(),
            "values": self.values_.tolist(),
            "neighbours": self.neighbours_ if self.local_ else None,
        }

    @classmethod
    def from_dict(cls, data: dict) -> OrdinaryKriging:
        """Rebuild from a bundle: the dual weights are solved again from the stored wells (so
        bundles written before the dual form load unchanged)."""
        model = cls(VariogramModel(**data["variogram"]), data.get("neighbours"))
        return model.fit(data["x"], data["y"], data["values"])


def _coincident(points: np.ndarray) -> tuple[int, int] | None:
    """The first two rows with identical coordinates, or None."""
    _, first, counts = np.unique(points, axis=0, return_index=True, return_counts=True)
    if counts.max() < 2:
        return None
    dup = np.flatnonzero((points == points[first[np.argmax(counts > 1)]]).all(axis=1))
    return int(dup[0]), int(dup[1])


def simple_kriging(
    x: ArrayLike,
    y: ArrayLike,
    values: ArrayLike,
    variogram: VariogramModel,
    mean: float,
    xq: ArrayLike,
    yq: ArrayLike,
):
    """Simple kriging (known mean): estimate and kriging variance at the query points."""
    pts = np.column_stack([x, y])
    q = np.column_stack([xq, yq])
    cov = variogram.covariance(cdist(pts, pts))
    c = variogram.covariance(cdist(pts, q))
    weights = np.linalg.solve(cov, c)
    est = mean + weights.T @ (np.asarray(values, dtype=float) - mean)
    var = variogram.nugget + variogram.sill - np.sum(weights * c, axis=0)
    return est, var
