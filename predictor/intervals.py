"""Prediction intervals calibrated on spatial-CV out-of-fold residuals (weighted conformal).

The q10 and q90 offsets are weighted quantiles of the out-of-fold residuals of the fold design
that matches the map's prediction distances, weighted by the declustering weights, so that
about 80 % of *map cells* (not of drilled spots) fall inside [q10, q90].  Weighted
split-conformal prediction (Tibshirani, Barber, Candes & Ramdas 2019, NeurIPS; Barber et al.
2021, Annals of Statistics for the cross-validation variant): the calibration residuals carry
masses w_i / (sum w + w_test) and the test point's own mass w_test / (sum w + w_test) sits at
+infinity (at -infinity for the lower bound); leaving it out would break coverage.  The
weights are normalised to the effective number of calibration points (samples), so the test
point, one node or one volume sample, counts as one.  Its tie with itself counts a random
share of that mass, as in the smoothed conformal predictor, whose coverage is the nominal one
rather than at least it; the bounds are averaged over the share (:func:`smoothed_bound`).
With ``spread`` the residuals are first divided by a local spread, so intervals are wider
where the model errs more.  ``bounds`` keeps a target in its physical range (porosity in
[0, 1]).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from numpy.typing import ArrayLike

LOW, HIGH = 0.1, 0.9
RESIDUAL_LEVELS = np.linspace(
    0.0, 1.0, 101
)  # where the residual distribution is kept (min, percentiles, max)
LOCAL_POINTS = 25  # prediction values at which the local residual distributions are tabulated
CLASS_WELLS = 5  # wells of a facies below which its residuals fall back to the pooled ones
# the smoothed conformal predictor's random share of the test point's mass, evenly spread over
# [0, 1]: with the whole mass (share 1) the map's q10/q90 covered 0.84 of the truth on average
# (tuning seeds of experiments/matched_cv.py), the conservative side of the guarantee with a
# few dozen wells
SHARES = (np.arange(32) + 0.5) / 32
PHYSICAL_BOUNDS = {
    "porosity": (0.0, 1.0)
}  # a fraction (common practice); permeability is mapped as log10


@dataclass
class IntervalCalibration:
    lower: float  # offset of q10 from q50 (in spread units when scaled)
    upper: float  # offset of q90 from q50
    low: float = LOW
    high: float = HIGH
    scaled: bool = False
    n_effective: float = 0.0
    bounds: tuple[float, float] | None = None
    method: str = "weighted split-conformal, smoothed"
    n_effective_wells: float = 0.0
    residual_quantiles: list[float] | None = None  # at RESIDUAL_LEVELS: the predictive distribution
    held_out_coverage: float | None = (
        None  # wells inside [q10, q90] when calibrated without their fold
    )
    # the residual distribution of the wells predicted near each of these values (see
    # local_quantiles)
    local_predictions: list[float] | None = None
    local_quantiles: list[list[float]] | None = None
    # the residual distribution of the wells of each facies (see class_quantiles), mixed by the
    # probabilities of the classification target ``class_target`` at each node
    class_target: str | None = None
    class_quantiles: dict[str, list[float]] | None = None

    def exceedance(
        self,
        q50: ArrayLike,
        cutoff: float,
        spread: ArrayLike | None = None,
        class_probabilities: dict[str, np.ndarray] | None = None,
    ) -> np.ndarray:
        """P(value > ``cutoff``) at each node: one minus the weighted CDF of the out-of-fold
        residuals (in spread units when scaled) at the cutoff's distance from ``q50``.

        With ``class_probabilities`` (each facies' probability at each node) and a calibration
        that holds each facies' residuals, the CDF is their mixture, sum_c p_c(node) F_c (a
        facies without enough wells uses the pooled F). Otherwise the CDF of the wells predicted
        near ``q50`` when the calibration holds it (bundles from earlier versions: the pooled
        CDF)."""
        q50 = np.asarray(q50, float)
        scale = np.asarray(spread, float) if (self.scaled and spread is not None) else 1.0
        z = np.broadcast_to((cutoff - q50) / np.maximum(scale, 1e-12), q50.shape)
        if self.class_quantiles and class_probabilities:
            below, total = np.zeros(q50.shape), np.zeros(q50.shape)
            for cls, p in class_probabilities.items():
                quantiles = self.class_quantiles.get(cls, self.residual_quantiles)
                below += p * np.interp(z, quantiles, RESIDUAL_LEVELS, left=0.0, right=1.0)
                total += p
            return 1.0 - below / np.maximum(total, 1e-12)
        if self.local_quantiles is None:
            below = np.interp(z, self.residual_quantiles, RESIDUAL_LEVELS, left=0.0, right=1.0)
            return 1.0 - below
        # linear in q50 between the two nearest tabulated distributions
        table, at = (
            np.asarray(self.local_quantiles, float),
            np.asarray(self.local_predictions, float),
        )
        t = np.interp(q50, at, np.arange(at.size))
        lower = (
            np.minimum(np.floor(t).astype(int), at.size - 2)
            if at.size > 1
            else np.zeros(q50.shape, int)
        )
        share = t - lower
        below = np.empty(q50.shape)
        for row in np.unique(lower):
            nodes = lower == row
            upper_row = min(row + 1, at.size - 1)
            cdf = [
                np.interp(z[nodes], table[r], RESIDUAL_LEVELS, left=0.0, right=1.0)
                for r in (row, upper_row)
            ]
            below[nodes] = (1.0 - share[nodes]) * cdf[0] + share[nodes] * cdf[1]
        return 1.0 - below

    def to_dict(self) -> dict:
        return asdict(self)

    def clip(self, values: ArrayLike) -> np.ndarray:
        values = np.asarray(values, float)
        return values if self.bounds is None else np.clip(values, *self.bounds)

    def apply(
        self, q50: ArrayLike, spread: ArrayLike | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """q10 and q90 around ``q50``, inside the physical bounds; q10 <= q50 <= q90 everywhere
        once ``q50`` is clipped to the same bounds (see :meth:`clip`)."""
        q50 = np.asarray(q50, float)
        scale = np.asarray(spread, float) if (self.scaled and spread is not None) else 1.0
        return self.clip(q50 + self.lower * scale), self.clip(q50 + self.upper * scale)


def effective_size(weights: ArrayLike, units: ArrayLike | None = None) -> float:
    """Kish's effective sample size (sum w)^2 / sum w^2; with ``units`` (the well of each row)
    the weights are summed per well first: samples along one well are not independent."""
    w = np.asarray(weights, float)
    if units is not None:
        w = np.bincount(np.unique(np.asarray(units), return_inverse=True)[1], weights=w)
    return float(w.sum() ** 2 / np.sum(w**2))


def conformal_quantile(
    scores: ArrayLike,
    weights: ArrayLike,
    level: float,
    test_mass: float,
    share: float | ArrayLike = 1.0,
) -> float | np.ndarray:
    """The ``level`` quantile of sum_i p_i delta(score_i) + p_test delta(+inf) with p_i = w_i /
    (sum w + test_mass) (Tibshirani et al. 2019); +inf when the residuals' mass cannot reach it.

    ``share`` < 1 is the smoothed (randomised) conformal predictor (Vovk, Gammerman & Shafer
    2005, *Algorithmic Learning in a Random World*, section 2.4, recalled from memory): the test
    point's tie with itself counts ``share`` of its mass, so that with ``share`` uniform on
    [0, 1] the coverage is exactly ``level`` rather than at least ``level``. The residuals then
    need a cumulative mass of ``level`` sum w + (share - 1 + level) test_mass; ``share`` = 1 is
    the conservative quantile above. An array of shares gives one quantile per share."""
    order = np.argsort(scores)
    s, w = np.asarray(scores, float)[order], np.asarray(weights, float)[order]
    needed = level * w.sum() + (np.asarray(share, float) - 1.0 + level) * test_mass
    k = np.searchsorted(np.cumsum(w), needed - 1e-12 * (w.sum() + test_mass))
    out = np.where(k < len(s), s[np.minimum(k, len(s) - 1)], np.inf)
    return float(out) if out.ndim == 0 else out


def smoothed_bound(scores: ArrayLike, weights: ArrayLike, level: float) -> float:
    """The smoothed conformal quantile averaged over its random share (:data:`SHARES`), the
    test point weighing one unit of ``weights``; where the residuals' mass cannot reach the
    level, the largest residual stands in.

    One draw of the share would jump between neighbouring residuals, which with a few dozen
    wells lie far apart in the tail; their average is the bound a map can carry at every node."""
    scores = np.asarray(scores, float)
    bounds = conformal_quantile(scores, weights, level, 1.0, SHARES)
    return float(np.mean(np.where(np.isfinite(bounds), bounds, scores.max())))


def _quantile_function(r: np.ndarray, mass: np.ndarray) -> np.ndarray:
    """Weighted quantiles at RESIDUAL_LEVELS, interpolated between residuals, ends at min and
    max."""
    order = np.argsort(r)
    cdf = (np.cumsum(mass[order]) - 0.5 * mass[order]) / mass.sum()
    quantiles = np.interp(RESIDUAL_LEVELS, cdf, r[order])
    quantiles[0], quantiles[-1] = r.min(), r.max()
    return quantiles


def local_quantiles(
    predicted: ArrayLike, r: ArrayLike, mass: ArrayLike, points: int = LOCAL_POINTS
) -> tuple[np.ndarray, np.ndarray]:
    """Residual distributions of the wells predicted near each of ``points`` prediction values.

    Between facies the error is skewed: a node predicted at the mixture's mean porosity is
    more often shale just below it than sand well above it, which one pooled distribution
    cannot say. So each tabulated value gets the residuals weighted by a Gaussian kernel in
    prediction (bandwidth one weighted standard deviation of the out-of-fold predictions;
    Nadaraya-Watson estimate of a conditional distribution, Hall, Wolff & Yao 1999, JASA
    94:154-163, recalled from memory) times their declustering mass.  The bandwidth was chosen
    on the tuning fields of experiments/field_wide.py: narrower kernels were noisier.
    """
    predicted, r, mass = (np.asarray(a, float) for a in (predicted, r, mass))
    mean = np.average(predicted, weights=mass)
    bandwidth = max(float(np.sqrt(np.average((predicted - mean) ** 2, weights=mass))), 1e-12)
    at = np.unique(np.quantile(predicted, np.linspace(0.0, 1.0, points)))
    table = [
        _quantile_function(r, mass * np.exp(-0.5 * ((predicted - a) / bandwidth) ** 2)) for a in at
    ]
    return at, np.array(table)


def class_quantiles(
    r: np.ndarray, mass: np.ndarray, codes: ArrayLike, names: list[str], units: ArrayLike
) -> dict[str, list[float]]:
    """The residual distribution of the wells of each facies (codes index ``names``; -1 where a
    well has none), for facies held by at least CLASS_WELLS wells.

    Between facies the error is skewed: a node between sand and shale is either shale a little
    below its prediction or sand well above it. Mixing each facies' residuals by the node's
    facies probabilities says so, and the probabilities carry what the seismic knows about the
    map away from the sand-rich wells (a mixture predictive distribution; on the fields of
    experiments/field_wide.py it was the best calibrated of the forms measured, see the
    README).
    """
    codes, units = np.asarray(codes), np.asarray(units)
    out = {}
    for k, name in enumerate(names):
        rows = codes == k
        if np.unique(units[rows]).size >= CLASS_WELLS:
            out[name] = [float(v) for v in _quantile_function(r[rows], mass[rows])]
    return out


def calibrate(
    residuals: ArrayLike,
    weights: ArrayLike | None = None,
    low: float = LOW,
    high: float = HIGH,
    spread: ArrayLike | None = None,
    units: ArrayLike | None = None,
    bounds: tuple[float, float] | None = None,
    predicted: ArrayLike | None = None,
    classes: tuple[str, ArrayLike, list[str]] | None = None,
) -> IntervalCalibration:
    """Offsets from out-of-fold residuals (observed minus predicted); with ``predicted`` (the
    out-of-fold predictions) also the local residual distributions for exceedance; with
    ``classes`` (the classification target's name, each row's class code, the class names)
    each facies' residual distribution, which exceedance mixes by the facies probabilities."""
    r = np.asarray(residuals, float)
    w = np.ones_like(r) if weights is None else np.asarray(weights, float)
    scaled = spread is not None
    if scaled:
        r = r / np.maximum(np.asarray(spread, float), 1e-12)
    # the test point is one node (one sample in a volume), so masses are counted in samples;
    # the effective number of wells is recorded beside it (samples of a well are alike)
    n = effective_size(w)
    mass = w * n / w.sum()  # the weights in effective samples; the test point weighs one
    upper = smoothed_bound(r, mass, high)
    lower = -smoothed_bound(-r, mass, 1.0 - low)
    local = (None, None) if predicted is None else local_quantiles(predicted, r, mass)
    return IntervalCalibration(
        min(lower, 0.0),
        max(upper, 0.0),
        low,
        high,
        scaled,
        n,
        None if bounds is None else tuple(bounds),
        n_effective_wells=effective_size(w, units) if units is not None else n,
        residual_quantiles=[float(v) for v in _quantile_function(r, mass)],
        local_predictions=None if predicted is None else [float(v) for v in local[0]],
        local_quantiles=None if predicted is None else local[1].tolist(),
        class_target=None if classes is None else classes[0],
        class_quantiles=None
        if classes is None
        else class_quantiles(
            r, mass, classes[1], classes[2], np.arange(len(r)) if units is None else units
        ),
    )


def held_out_coverage(
    observed: ArrayLike,
    predicted: ArrayLike,
    weights: ArrayLike,
    splits: list[tuple[np.ndarray, np.ndarray]],
    spread: ArrayLike | None = None,
    units: ArrayLike | None = None,
    bounds: tuple[float, float] | None = None,
) -> float:
    """Declustering-weighted share of wells inside [q10, q90] when the offsets were calibrated
    on the other folds' residuals only (a cross-conformal check; Vovk 2015, Annals of
    Mathematics and Artificial Intelligence 74:9-28, recalled from memory). The calibration
    used for the map covers its own residuals by construction; this share says whether it
    holds on wells it did not see."""
    observed, predicted, weights = (np.asarray(a, float) for a in (observed, predicted, weights))
    spread = None if spread is None else np.asarray(spread, float)
    units = None if units is None else np.asarray(units)
    inside = np.zeros(len(observed), bool)
    for train, test in splits:
        cal = calibrate(
            observed[train] - predicted[train],
            weights[train],
            spread=None if spread is None else spread[train],
            units=None if units is None else units[train],
            bounds=bounds,
        )
        q10, q90 = cal.apply(cal.clip(predicted[test]), None if spread is None else spread[test])
        inside[test] = (q10 <= observed[test]) & (observed[test] <= q90)
    return float(np.average(inside, weights=weights))


class SpreadModel:
    """Local spread of the errors: log |residual| linear in the features, so sigma(x) = exp(.) > 0.

    Locally weighted conformal intervals (Lei et al. 2018, JASA, section 5.2) divide residuals by
    such a spread before calibrating, so intervals are wider where the model errs more (for
    instance in the more variable facies) and narrower elsewhere.
    """

    def __init__(self, features: list[str]):
        self.features = features

    def fit(self, X: ArrayLike, residuals: ArrayLike, weights: ArrayLike) -> SpreadModel:
        from .models import FitData, Linear

        r = np.abs(np.asarray(residuals, float))
        floor = max(float(np.median(r)) * 0.05, 1e-12)
        target = np.log(r + floor)
        n = len(r)
        data = FitData(
            X.reset_index(drop=True),
            target,
            np.asarray(weights, float),
            np.zeros((n, 2)),
            np.zeros(n, int),
        )
        self.linear_ = Linear(self.features, "spread").fit(data)
        return self

    def predict(self, X: ArrayLike) -> np.ndarray:
        return np.exp(self.linear_.predict(X))

    def to_dict(self) -> dict:
        return {"features": self.features, "linear": self.linear_.save(None, "spread")}

    @classmethod
    def from_dict(cls, data: dict) -> SpreadModel:
        from .models import Linear

        model = cls(data["features"])
        model.linear_ = Linear.load(data["linear"], None)
        return model
