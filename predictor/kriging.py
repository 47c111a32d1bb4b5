"""Simple and ordinary kriging with a fitted semivariogram model.

Kriging here uses every well (global neighbourhood): wells number in the tens to thousands,
so one factorised system serves all map nodes, which are processed in chunks.
"""

from __future__ import annotations

import threading

import numpy as np
from scipy.linalg import lu_factor, lu_solve
from scipy.spatial.distance import cdist

from .errors import ModelError
from .variogram import VariogramModel, auto_variogram

CHUNK = 20_000
# some OpenBLAS builds give wrong results when called from several Python threads at once
# (seen here in tiled prediction); kriging's solves are serialised, the rest runs in parallel
_BLAS = threading.Lock()


class OrdinaryKriging:
    """Ordinary kriging (unknown constant mean) of values at points.

    ``fit`` fits an omnidirectional semivariogram when no model is given; learned state ends in ``_``.
    """

    def __init__(self, variogram: VariogramModel | None = None):
        self.variogram = variogram

    def fit(self, x, y, values) -> OrdinaryKriging:
        x, y, v = (np.asarray(a, dtype=float) for a in (x, y, values))
        if v.size < 2:
            raise ModelError("ordinary kriging needs at least 2 wells")
        self.points_ = np.column_stack([x, y])
        self.values_ = v
        if self.variogram is not None:
            self.variogram_ = self.variogram
        elif np.ptp(v) == 0 or v.size < 6:
            self.variogram_ = VariogramModel("spherical", 0.0, max(float(np.var(v)), 1e-12), 1e-9)
        else:
            self.variogram_ = auto_variogram(x, y, v)
        n = v.size
        lhs = np.ones((n + 1, n + 1))
        lhs[:n, :n] = self.variogram_.covariance(cdist(self.points_, self.points_))
        lhs[n, n] = 0.0
        lhs[:n, :n] += np.eye(n) * 1e-10 * (self.variogram_.nugget + self.variogram_.sill)
        self.lu_ = lu_factor(lhs)
        return self

    def predict(self, x, y, return_variance: bool = False):
        q = np.column_stack([np.asarray(x, dtype=float), np.asarray(y, dtype=float)])
        est = np.empty(len(q))
        var = np.empty(len(q))
        n = self.values_.size
        c0 = self.variogram_.nugget + self.variogram_.sill
        for start in range(0, len(q), CHUNK):
            block = q[start:start + CHUNK]
            rhs = np.ones((n + 1, len(block)))
            rhs[:n] = self.variogram_.covariance(cdist(self.points_, block))
            with _BLAS:
                sol = lu_solve(self.lu_, rhs)
                est[start:start + CHUNK] = sol[:n].T @ self.values_
            var[start:start + CHUNK] = c0 - np.sum(sol[:n] * rhs[:n], axis=0) - sol[n]
        return (est, np.maximum(var, 0.0)) if return_variance else est

    def to_dict(self) -> dict:
        return {"variogram": self.variogram_.to_dict(), "x": self.points_[:, 0].tolist(),
                "y": self.points_[:, 1].tolist(), "values": self.values_.tolist()}

    @classmethod
    def from_dict(cls, data: dict) -> OrdinaryKriging:
        return cls(VariogramModel(**data["variogram"])).fit(data["x"], data["y"], data["values"])


def simple_kriging(x, y, values, variogram: VariogramModel, mean: float, xq, yq):
    """Simple kriging (known mean): estimate and kriging variance at the query points."""
    pts = np.column_stack([x, y])
    q = np.column_stack([xq, yq])
    cov = variogram.covariance(cdist(pts, pts))
    c = variogram.covariance(cdist(pts, q))
    weights = np.linalg.solve(cov, c)
    est = mean + weights.T @ (np.asarray(values, dtype=float) - mean)
    var = variogram.nugget + variogram.sill - np.sum(weights * c, axis=0)
    return est, var
