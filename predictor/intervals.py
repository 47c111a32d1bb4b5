"""Prediction intervals calibrated on spatial-CV out-of-fold residuals (conformal style).

The q10 and q90 offsets are weighted quantiles of the out-of-fold residuals, with the
declustering weights, so that about 80 % of *map cells* (not of drilled spots) fall inside
[q10, q90].  Split-conformal reasoning (Lei et al. 2018, JASA; Barber et al. 2021, Annals of
Statistics for the cross-validation variant) gives coverage of at least the nominal level
under exchangeability; the levels are widened by the usual finite-sample correction, using
the effective sample size of the weights.  With ``spread`` the residuals are first divided
by a local spread (for instance the kriging standard deviation of the well ties), so
intervals narrow near wells and widen away from them.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from .stats import weighted_quantile

LOW, HIGH = 0.1, 0.9


@dataclass
class IntervalCalibration:
    lower: float  # offset of q10 from q50 (in spread units when scaled)
    upper: float  # offset of q90 from q50
    low: float = LOW
    high: float = HIGH
    scaled: bool = False
    n_effective: float = 0.0

    def to_dict(self) -> dict:
        return asdict(self)

    def apply(self, q50, spread=None) -> tuple[np.ndarray, np.ndarray]:
        """q10 and q90 around ``q50``; q10 <= q50 <= q90 everywhere."""
        q50 = np.asarray(q50, float)
        scale = np.asarray(spread, float) if (self.scaled and spread is not None) else 1.0
        return q50 + self.lower * scale, q50 + self.upper * scale


def effective_size(weights) -> float:
    w = np.asarray(weights, float)
    return float(w.sum() ** 2 / np.sum(w**2))


def calibrate(residuals, weights=None, low: float = LOW, high: float = HIGH, spread=None) -> IntervalCalibration:
    """Offsets from out-of-fold residuals (observed minus predicted)."""
    r = np.asarray(residuals, float)
    w = np.ones_like(r) if weights is None else np.asarray(weights, float)
    scaled = spread is not None
    if scaled:
        r = r / np.maximum(np.asarray(spread, float), 1e-12)
    n = effective_size(w)
    # finite-sample widening: the k-th smallest of n residuals is exceeded by a new one with
    # probability 1 - k/(n + 1), so take k = ceil((n + 1) high) and floor((n + 1) low)
    # (the small epsilon keeps k/n from rounding past the k-th value)
    hi_level = min(1.0, np.ceil((n + 1) * high - 1e-9) / n) - 1e-9
    lo_level = max(0.0, np.floor((n + 1) * low + 1e-9) / n - 1e-9)
    lower = min(float(weighted_quantile(r, lo_level, w)), 0.0)
    upper = max(float(weighted_quantile(r, hi_level, w)), 0.0)
    return IntervalCalibration(lower, upper, low, high, scaled, n)


class SpreadModel:
    """Local spread of the errors: log |residual| linear in the features, so sigma(x) = exp(.) > 0.

    Locally weighted conformal intervals (Lei et al. 2018, JASA, section 5.2) divide residuals by
    such a spread before calibrating, so intervals are wider where the model errs more (for
    instance in the more variable facies) and narrower elsewhere.
    """

    def __init__(self, features: list[str]):
        self.features = features

    def fit(self, X, residuals, weights) -> SpreadModel:
        from .models import FitData, Linear

        r = np.abs(np.asarray(residuals, float))
        floor = max(float(np.median(r)) * 0.05, 1e-12)
        target = np.log(r + floor)
        n = len(r)
        data = FitData(X.reset_index(drop=True), target, np.asarray(weights, float), np.zeros((n, 2)), np.zeros(n, int))
        self.linear_ = Linear(self.features, "spread").fit(data)
        return self

    def predict(self, X) -> np.ndarray:
        return np.exp(self.linear_.predict(X))

    def to_dict(self) -> dict:
        return {"features": self.features, "linear": self.linear_.save(None, "spread")}

    @classmethod
    def from_dict(cls, data: dict) -> SpreadModel:
        from .models import Linear

        model = cls(data["features"])
        model.linear_ = Linear.load(data["linear"], None)
        return model
