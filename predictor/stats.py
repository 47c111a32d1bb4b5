"""Weighted summary statistics shared by declustering, scoring and interval calibration."""

from __future__ import annotations

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike


def _clean(values, weights):
    values = np.asarray(values, dtype=float)
    weights = np.ones_like(values) if weights is None else np.asarray(weights, dtype=float)
    ok = np.isfinite(values) & np.isfinite(weights) & (weights > 0)
    return values[ok], weights[ok]


def weighted_mean(values: ArrayLike, weights: ArrayLike | None = None) -> float:
    v, w = _clean(values, weights)
    return float(np.sum(v * w) / np.sum(w)) if v.size else float("nan")


def weighted_std(values: ArrayLike, weights: ArrayLike | None = None) -> float:
    """Population standard deviation with weights (no small-sample correction)."""
    v, w = _clean(values, weights)
    if not v.size:
        return float("nan")
    m = np.sum(v * w) / np.sum(w)
    return float(np.sqrt(np.sum(w * (v - m) ** 2) / np.sum(w)))


def weighted_quantile(values: ArrayLike, q: ArrayLike, weights: ArrayLike | None = None):
    """Quantile by inversion of the weighted empirical CDF.

    The smallest value whose cumulative weight share reaches ``q``: the same definition as
    ``numpy.quantile(values, q, weights=weights, method="inverted_cdf")``.
    """
    v, w = _clean(values, weights)
    q = np.asarray(q, dtype=float)
    if not v.size:
        return np.full(q.shape, np.nan) if q.ndim else float("nan")
    order = np.argsort(v, kind="stable")
    v, w = v[order], w[order]
    cdf = np.cumsum(w)
    cdf /= cdf[-1]
    idx = np.searchsorted(cdf, q, side="left")
    out = v[np.clip(idx, 0, v.size - 1)]
    return out if q.ndim else float(out)


def weighted_proportions(labels: ArrayLike, weights: ArrayLike | None = None) -> dict[str, float]:
    """Share of total weight per class label (labels as strings, sorted)."""
    labels = np.asarray(labels, dtype=object)
    weights = np.ones(labels.size) if weights is None else np.asarray(weights, dtype=float)
    keep = np.array([lab is not None and lab == lab for lab in labels], dtype=bool)
    labels, weights = labels[keep].astype(str), weights[keep]
    total = weights.sum()
    return {str(c): float(weights[labels == c].sum() / total) for c in sorted(set(labels))}


def describe(values: ArrayLike, weights: ArrayLike | None = None) -> dict[str, float]:
    """Count, mean, std, quartiles, min and max; weighted when weights are given."""
    v, w = _clean(values, weights)
    q = weighted_quantile(v, [0.1, 0.25, 0.5, 0.75, 0.9], w) if v.size else [np.nan] * 5
    return {
        "count": int(v.size),
        "mean": weighted_mean(v, w),
        "std": weighted_std(v, w),
        "min": float(v.min()) if v.size else float("nan"),
        "q10": float(q[0]),
        "q25": float(q[1]),
        "q50": float(q[2]),
        "q75": float(q[3]),
        "q90": float(q[4]),
        "max": float(v.max()) if v.size else float("nan"),
    }


def design_effect(values: ArrayLike, groups: ArrayLike) -> tuple[float, float]:
    """Kish's design effect of a mean over samples clustered in groups (samples along wells):
    ``1 + (m - 1) * icc`` with ``m`` the mean group size and ``icc`` the intraclass correlation
    from the one-way ANOVA estimator (Kish 1965, Survey Sampling, section 5.4; common practice).

    Returns (design effect, icc); ``n / design effect`` samples carry the information of
    independent ones. Groups of one sample each give 1.
    """
    v = pd.Series(np.asarray(values, dtype=float))
    g = pd.Series(np.asarray(groups))
    ok = v.notna().to_numpy()
    v, g = v[ok], g[ok]
    sizes = g.value_counts().to_numpy(dtype=float)
    n, k = float(len(v)), len(sizes)
    if k < 2 or n <= k:
        return 1.0, 0.0
    means = v.groupby(g.to_numpy()).transform("mean")
    msw = float(((v - means) ** 2).sum()) / (n - k)
    msb = float(((means - v.mean()) ** 2).sum()) / (k - 1)
    m0 = (n - float((sizes**2).sum()) / n) / (k - 1)
    denom = msb + (m0 - 1) * msw
    icc = float(np.clip((msb - msw) / denom, 0.0, 1.0)) if denom > 0 else 0.0
    return 1.0 + (n / k - 1.0) * icc, icc
