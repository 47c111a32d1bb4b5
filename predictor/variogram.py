"""Experimental semivariograms (omnidirectional and directional) and fitted models.

Model ranges are practical ranges: the lag at which the model reaches 95 % of its sill for the
exponential and Gaussian models, and the sill itself for the spherical model.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import curve_fit, nnls
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

    def covariance(self, h: ArrayLike) -> np.ndarray:
        """C(h) = total sill - gamma(h); C(0) includes the nugget.

        Evaluated in place (a map asks for nodes x wells of them): sill * (1 - shape) off the
        wells, plus the nugget at distance 0.
        """
        h = np.asarray(h, dtype=float)
        if self.kind == "spherical":  # 1 - 1.5 r + 0.5 r^3 for r < 1, else 0
            c = h / self.range
            np.minimum(c, 1.0, out=c)
            c *= c * c * 0.5 - 1.5
            c += 1.0
        elif self.kind == "exponential":
            c = h * (-3.0 / self.range)
            np.exp(c, out=c)
        elif self.kind == "gaussian":
            c = h / self.range
            c *= c
            c *= -3.0
            np.exp(c, out=c)
        else:
            _shape(self.kind, h, self.range)  # raises for an unknown kind
        c *= self.sill
        c[h == 0] += self.nugget
        return c

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass
class Experimental:
    lags: np.ndarray  # mean pair distance per bin
    gamma: np.ndarray
    counts: np.ndarray


def _binned(dist, sq, n_lags: int, max_lag: float | None) -> Experimental:
    """Mean half squared difference per lag bin (equal bins up to ``max_lag``, default half the
    largest distance); coincident pairs and empty bins are dropped."""
    max_lag = float(max_lag) if max_lag else float(dist.max()) / 2.0
    edges = np.linspace(0.0, max_lag, n_lags + 1)
    which = np.digitize(dist, edges) - 1
    inside = (which >= 0) & (which < n_lags) & (dist > 0)
    counts = np.bincount(which[inside], minlength=n_lags)
    total = np.bincount(which[inside], weights=sq[inside], minlength=n_lags)
    lagsum = np.bincount(which[inside], weights=dist[inside], minlength=n_lags)
    have = counts > 0
    return Experimental(lagsum[have] / counts[have], total[have] / counts[have], counts[have])


def experimental(
    x: ArrayLike,
    y: ArrayLike,
    values: ArrayLike,
    n_lags: int = 15,
    max_lag: float | None = None,
    azimuth: float | None = None,
    tolerance: float = 22.5,
    z: ArrayLike | None = None,
    z_tolerance: float = 0.0,
) -> Experimental:
    """Experimental semivariogram: gamma(h) = mean of (v_i - v_j)^2 / 2 over pairs in each lag bin.

    ``azimuth`` (degrees clockwise from north, y) restricts pairs to that direction within
    ``tolerance`` degrees; None gives the omnidirectional semivariogram.  With ``z`` (samples
    along wells) only pairs within ``z_tolerance`` of the same z count, so the lateral
    semivariogram does not mix in the vertical variability.  Empty bins are dropped.
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
    if z is not None:
        keep = pdist(np.asarray(z, dtype=float)[ok][:, None]) <= z_tolerance
        dist, sq = dist[keep], sq[keep]
    return _binned(dist, sq, n_lags, max_lag)


def along_wells(
    z: ArrayLike, values: ArrayLike, wells, n_lags: int = 12, max_lag: float | None = None
) -> Experimental:
    """Vertical experimental semivariogram of samples along wells: only pairs of samples of one
    well, the lag their z separation (deviated wells: the lateral drift is ignored)."""
    z, v, wells = np.asarray(z, float), np.asarray(values, float), np.asarray(wells)
    ok = np.isfinite(z) & np.isfinite(v)
    pairs = [
        (
            pdist(z[ok & (wells == w)][:, None]),
            0.5 * pdist(v[ok & (wells == w)][:, None], "sqeuclidean"),
        )
        for w in np.unique(wells[ok])
    ]
    pairs = [p for p in pairs if p[0].size]
    if not pairs:
        raise ModelError("a vertical semivariogram needs wells with at least 2 samples")
    dist, sq = (np.concatenate(part) for part in zip(*pairs, strict=True))
    return _binned(dist, sq, n_lags, max_lag)


N_RANGES = (
    60  # ranges profiled per model kind, log-spaced from half the shortest lag to 4 x the longest
)
STRUCTURE_GAIN = 0.2  # a structured model must cut the misfit of a flat line by this share


def fit_variogram(exp: Experimental, kinds: tuple[str, ...] = KINDS) -> VariogramModel:
    """Least-squares fit (weighted by pair counts) of each model kind; the best fit is returned.

    For a given range the model is linear in nugget and sill, so the range is profiled on a
    log-spaced grid with a non-negative least-squares solve at each (a global search: no start
    can stop in a local minimum), then the best grid point is refined by ``curve_fit``.

    When no model fits the experimental values clearly better than a flat line at their mean
    (pure nugget: no spatial correlation at these lags), the result has ``pure_nugget=True``.
    """
    if exp.lags.size < 3:
        raise ModelError(
            "too few lag bins with pairs to fit a semivariogram (need 3); add wells or lags"
        )
    top = float(np.max(exp.gamma))
    h_max = float(np.max(exp.lags))
    h_min = float(np.min(exp.lags))
    root = np.sqrt(exp.counts)
    upper = (top * 1.5 + 1e-12, top * 3 + 1e-12)

    def misfit(kind, params) -> float:
        return float(
            np.sum(
                exp.counts
                * (params[0] + params[1] * _shape(kind, exp.lags, params[2]) - exp.gamma) ** 2
            )
        )

    best, best_err = None, np.inf
    for kind in kinds:
        for rng in np.geomspace(h_min * 0.5, h_max * 4, N_RANGES):
            design = (
                np.column_stack([np.ones_like(exp.lags), _shape(kind, exp.lags, rng)])
                * root[:, None]
            )
            (nugget, sill), _ = nnls(design, exp.gamma * root)
            sill = max(sill, 1e-12)  # no structure at this range: a flat line, judged below
            if nugget > upper[0] or sill > upper[1]:
                continue
            err = misfit(kind, (nugget, sill, rng))
            if err < best_err:
                best, best_err = (kind, [float(nugget), float(sill), float(rng)]), err
    if best is None:
        raise ModelError("no semivariogram model could be fitted to the experimental values")
    kind, start = best
    bounds = ([0.0, 1e-12, h_min * 0.5], [upper[0], upper[1], h_max * 4])
    start = [float(np.clip(v, lo, hi)) for v, lo, hi in zip(start, *bounds, strict=True)]
    try:
        refined, _ = curve_fit(
            lambda h, n, s_, r: n + s_ * _shape(kind, h, r),
            exp.lags,
            exp.gamma,
            p0=start,
            sigma=1.0 / root,
            bounds=bounds,
            maxfev=2000,
        )
        if misfit(kind, refined) < best_err:
            start, best_err = [float(v) for v in refined], misfit(kind, refined)
    except (RuntimeError, ValueError):
        pass
    model = VariogramModel(kind, *start)
    flat = float(np.sum(exp.counts * (exp.gamma - np.average(exp.gamma, weights=exp.counts)) ** 2))
    if best_err > (1 - STRUCTURE_GAIN) * flat:
        model.pure_nugget = True
    return model


MIN_NUGGET_SHARE = 0.02


def auto_variogram(
    x: ArrayLike,
    y: ArrayLike,
    values: ArrayLike,
    n_lags: int = 12,
    kinds: tuple[str, ...] = KINDS,
) -> VariogramModel:
    """Experimental omnidirectional semivariogram and the best-fitting model in one call.

    The nugget is kept at 2 % of the total sill or more: a (near) nugget-free model, the
    Gaussian above all, makes the kriging system ill-conditioned and its estimates swing wildly
    between wells (common practice).
    """
    values = np.asarray(values, dtype=float)
    if np.ptp(values[np.isfinite(values)]) == 0:
        raise ModelError("the values are constant: there is nothing to fit a semivariogram to")
    model = fit_variogram(experimental(x, y, values, n_lags=n_lags), kinds)
    total = model.nugget + model.sill
    if model.nugget < MIN_NUGGET_SHARE * total:
        model = VariogramModel(
            model.kind,
            MIN_NUGGET_SHARE * total,
            (1 - MIN_NUGGET_SHARE) * total,
            model.range,
            model.pure_nugget,
        )
    return model
