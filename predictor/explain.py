"""Why a model predicts what it does: SHAP contributions, trust warnings, area of applicability.

Contributions are additive: for every node, ``base + sum(contributions) = model output`` (local
accuracy, Lundberg & Lee 2017).  Each part of a model is explained in its own exact way:

- LightGBM: TreeSHAP built into LightGBM (``pred_contrib``), path-dependent, in the model's raw
  output (the property itself, or per-class log-odds for facies);
- linear and logistic models: exact interventional SHAP with the training mean as background,
  ``coef * (x - mean)`` (per-class logits for logistic regression);
- kriging (of the wells, or of residuals in regression kriging and well ties): one column,
  ``kriging_of_wells``: the part of the map that comes from well values by location;
- blends and well ties: the sum of their parts' contributions, weighted as in the model;
- the facies mixture (a product of probabilities and regressions): the shap package's
  permutation explainer with a small background sample of training wells (interventional).

Classifier blends average probabilities, which log-odds contributions cannot add up to; their
members are explained one by one, weighted by their blend weight (documented in the output).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .models import (
    Blend,
    FaciesMixture,
    Kriging,
    LightGBM,
    Linear,
    Logistic,
    RegressionKriging,
    WellTies,
)

KRIGING = "kriging_of_wells"


def _place(values: np.ndarray, member_features: list[str], names: list[str]) -> np.ndarray:
    """Spread a member's columns into the full feature list (plus the kriging column)."""
    out = np.zeros(values.shape[:-1] + (len(names) + 1,))
    for j, f in enumerate(member_features):
        out[..., names.index(f)] = values[..., j]
    return out


def contributions(model, X: pd.DataFrame, xy: np.ndarray, names: list[str], background: pd.DataFrame | None = None,
                  seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Additive contributions of every feature (and of kriging) to the model's raw output.

    Returns
    -------
    values : array of shape (n, n_features + 1) for regression, (n, n_classes, n_features + 1)
        for classification (log-odds); the last column is ``kriging_of_wells``
    base : array of shape (n,) or (n, n_classes), so that base + values.sum(-1) is the output
    """
    n = len(X)
    if isinstance(model, LightGBM):
        raw = model.booster_.predict(np.asarray(X[model.features], float), pred_contrib=True, num_threads=1)
        p = len(model.features)
        if model.task == "classification":
            k = raw.shape[1] // (p + 1)
            raw = raw.reshape(n, k, p + 1)
        return _place(raw[..., :p], model.features, names), raw[..., p]
    if isinstance(model, Linear):
        z = (np.asarray(X[model.features], float) - model.mean_) / model.scale_
        return _place(z * model.coef_[1:], model.features, names), np.full(n, model.coef_[0])
    if isinstance(model, Logistic):
        z = (np.asarray(X[model.features], float) - model.mean_) / model.scale_
        per_class = z[:, None, :] * model.coef_[None, :, :]
        return _place(per_class, model.features, names), np.tile(model.intercept_, (n, 1))
    if isinstance(model, Kriging):
        values = np.zeros((n, len(names) + 1))
        values[:, -1] = model.predict(X, xy)
        return values, np.zeros(n)
    if isinstance(model, RegressionKriging):
        values, base = contributions(model.drift_, X, xy, names)
        values[:, -1] += model.kriging_.predict(xy[:, 0], xy[:, 1])
        return values, base
    if isinstance(model, WellTies):
        values, base = contributions(model.base, X, xy, names, background, seed)
        values[..., -1] += model.kriging_.predict(xy[:, 0], xy[:, 1])
        return values, base
    if isinstance(model, Blend):
        total, base = None, None
        for w, member in zip(model.weights, model.members, strict=True):
            if w <= 0:
                continue
            v, b = contributions(member, X, xy, names, background, seed)
            total = w * v if total is None else total + w * v
            base = w * b if base is None else base + w * b
        return total, base
    if isinstance(model, FaciesMixture):
        return _permutation(model, X, xy, names, background, seed)
    raise TypeError(f"no explanation for {type(model).__name__}")


def _permutation(model, X, xy, names, background, seed):
    import shap

    feats = model.features
    bg = background if background is not None else X
    bg = bg[feats].sample(min(len(bg), 24), random_state=seed) if len(bg) > 24 else bg[feats]

    def f(values):
        return model.predict(pd.DataFrame(values, columns=feats), None)

    explainer = shap.PermutationExplainer(f, shap.maskers.Independent(bg.to_numpy(float), max_samples=len(bg)),
                                          seed=seed)
    result = explainer(np.asarray(X[feats], float), max_evals=2 * len(feats) + 1, silent=True)
    return _place(result.values, feats, names), np.asarray(result.base_values, float)


def output(model, X: pd.DataFrame, xy: np.ndarray) -> np.ndarray:
    """The raw output that the contributions add up to (log-odds for classifiers)."""
    if isinstance(model, LightGBM) and model.task == "classification":
        return model.booster_.predict(np.asarray(X[model.features], float), raw_score=True, num_threads=1)
    if isinstance(model, Logistic):
        z = (np.asarray(X[model.features], float) - model.mean_) / model.scale_
        return z @ model.coef_.T + model.intercept_
    if isinstance(model, Blend) and model.task == "classification":
        return sum(w * output(m, X, xy) for w, m in zip(model.weights, model.members, strict=True) if w > 0)
    return model.predict(X, xy)


def importance(values: np.ndarray, weights: np.ndarray, names: list[str]) -> pd.Series:
    """Declustering-weighted mean |contribution| per feature (summed over classes), largest first."""
    a = np.abs(values)
    if a.ndim == 3:
        a = a.sum(axis=1)
    w = np.asarray(weights, float) / np.sum(weights)
    return pd.Series(w @ a, index=list(names) + [KRIGING]).sort_values(ascending=False)
