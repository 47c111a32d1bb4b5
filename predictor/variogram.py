"""Experimental semivariograms (omnidirectional and directional) and fitted models.

Model ranges are practical ranges: the lag at which the model reaches 95 % of its sill for the
exponential and Gaussian models, and the sill itself for the spherical model.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Literal

import numpy as np
from scipy.optimize import curve_fit
from scipy.spatial.distance import pdist

from .errors import ModelError

ModelKind = Literal["spherical", "exponential", "gaussian"]
KINDS: tuple[ModelKind, ...] = ("spherical", "exponential", "gaussian")


def _shape(kind: str, h: np.ndarray, a: float) -> np.ndarray:
    r = np.asarray(h, dtype=float) / a
    if kind == "spherical":
        return np.where(r < 1, 1.5 * r - 0.5 * r**3, 1.0)
    if kind == "exponential":
        return 1.0 - np.exp(-3.0 * r)
    if kind == "gaussian":
        return 1.0 - np.exp(-3.0 * r**2)
    raise ValueError(f"unknown variogram model {kind!r}; use one of {', '.join(KINDS)}")


@dataclass
class VariogramModel:
    """gamma(h) = nugget + sill * shape(h / range) for h > 0, and 0 at h = 0."""

    kind: str
    nugget: float
    sill: float  # partial sill, above the nugget
    range: float
    pure_nugget: bool = False  # no spatial structure found: the range means nothing

    def __call__(self, h) -> np.ndarray:
        h = np.asarray(h, dtype=float)
        return np.where(h > 0, self.nugget + self.sill * _shape(self.kind, h, self.range), 0.0)

    def covariance(self, h) -> np.ndarray:
        """C(h) = total sill - gamma(h); C(0) includes the nugget."""
        return (self.nugget + self.sill) - self(h)

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass
class Experimental:
    lags: np.ndarray  # mean pair distance per bin
    gamma: np.ndarray
    counts: np.ndarray


def experimental(x, y, values, n_lags: int = 15, max_lag: float | None = None, azimuth: float | None = None,
                 tolerance: float = 22.5) -> Experimental:
    """Experimental semivariogram: gamma(h) = mean of (v_i - v_j)^2 / 2 over pairs in each lag bin.

    ``azimuth`` (degrees clockwise from north, y) restricts pairs to that direction within
    ``tolerance`` degrees; None gives the omnidirectional semivariogram.  Empty bins are dropped.
    """
    x, y, v = (np.asarray(a, dtype=float) for a in (x, y, values))
    ok = np.isfinite(v)
    x, y, v = x[ok], y[ok], v[ok]
    if v.size < 3:
        raise ModelError("a semivariogram needs at least 3 values")
    pts = np.column_stack([x, y])
    dist = pdist(pts)
    sq = 0.5 * pdist(v[:, None], "sqeuclidean")
    if azimuth is not None:
        i, j = np.triu_indices(v.size, k=1)
        ang = np.degrees(np.arctan2(x[j] - x[i], y[j] - y[i])) % 180.0  # bearing from north, folded
        diff = np.abs(ang - (azimuth % 180.0))
        keep = np.minimum(diff, 180.0 - diff) <= tolerance
        dist, sq = dist[keep], sq[keep]
    max_lag = float(max_lag) if max_lag else float(dist.max()) / 2.0
    edges = np.linspace(0.0, max_lag, n_lags + 1)
    which = np.digitize(dist, edges) - 1
    inside = (which >= 0) & (which < n_lags) & (dist > 0)
    counts = np.bincount(which[inside], minlength=n_lags)
    total = np.bincount(which[inside], weights=sq[inside], minlength=n_lags)
    lagsum = np.bincount(which[inside], weights=dist[inside], minlength=n_lags)
    have = counts > 0
    return Experimental(lagsum[have] / counts[have], total[have] / counts[have], counts[have])


START_RANGES = (0.1, 0.25, 0.5, 1.0, 2.0)  # starting ranges, as fractions of the largest lag
STRUCTURE_GAIN = 0.2  # a structured model must cut the misfit of a flat line by this share


def fit_variogram(exp: Experimental, kinds: tuple[str, ...] = KINDS) -> VariogramModel:
    """Least-squares fit (weighted by pair counts) of each model kind from several starting
    ranges (one start can stop in a local minimum); the best fit is returned.

    When no model fits the experimental values clearly better than a flat line at their mean
    (pure nugget: no spatial correlation at these lags), the result has ``pure_nugget=True``.
    """
    if exp.lags.size < 3:
        raise ModelError("too few lag bins with pairs to fit a semivariogram (need 3); add wells or lags")
    top = float(np.max(exp.gamma))
    h_max = float(np.max(exp.lags))
    h_min = float(np.min(exp.lags))
    sigma = 1.0 / np.sqrt(exp.counts)
    best, best_err = None, np.inf
    for kind in kinds:
        def model(h, nugget, sill, rng, kind=kind):
            return nugget + sill * _shape(kind, h, rng)

        bounds = ([0.0, 1e-12, h_min * 0.5], [top * 1.5 + 1e-12, top * 3 + 1e-12, h_max * 4])
        for share in START_RANGES:
            start = [min(exp.gamma[0], 0.5 * top), max(top - exp.gamma[0], 0.1 * top),
                     float(np.clip(share * h_max, bounds[0][2] * 1.01, bounds[1][2] * 0.99))]
            try:
                params, _ = curve_fit(model, exp.lags, exp.gamma, p0=start, sigma=sigma, bounds=bounds, maxfev=5000)
            except (RuntimeError, ValueError):
                continue
            err = float(np.sum(exp.counts * (model(exp.lags, *params) - exp.gamma) ** 2))
            if err < best_err:
                best, best_err = VariogramModel(kind, float(params[0]), float(params[1]), float(params[2])), err
    if best is None:
        raise ModelError("no semivariogram model could be fitted to the experimental values")
    flat = float(np.sum(exp.counts * (exp.gamma - np.average(exp.gamma, weights=exp.counts)) ** 2))
    if best_err > (1 - STRUCTURE_GAIN) * flat:
        best.pure_nugget = True
    return best


MIN_NUGGET_SHARE = 0.02


def auto_variogram(x, y, values, n_lags: int = 12) -> VariogramModel:
    """Experimental omnidirectional semivariogram and the best-fitting model in one call.

    The nugget is kept at 2 % of the total sill or more: a (near) nugget-free model, the
    Gaussian above all, makes the kriging system ill-conditioned and its estimates swing wildly
    between wells (common practice).
    """
    values = np.asarray(values, dtype=float)
    if np.ptp(values[np.isfinite(values)]) == 0:
        raise ModelError("the values are constant: there is nothing to fit a semivariogram to")
    model = fit_variogram(experimental(x, y, values, n_lags=n_lags))
    total = model.nugget + model.sill
    if model.nugget < MIN_NUGGET_SHARE * total:
        model = VariogramModel(model.kind, MIN_NUGGET_SHARE * total, (1 - MIN_NUGGET_SHARE) * total, model.range,
                               model.pure_nugget)
    return model
