"""Shapley-value helpers shared by the candidates' explanations (see :mod:`predictor.explain`)."""

from __future__ import annotations

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike

KRIGING = "kriging_of_wells"  # the explanation column for the part of a map kriged from well values
BACKGROUND = 8  # background wells for the permutation explainer


def place(values: np.ndarray, member_features: list[str], names: list[str]) -> np.ndarray:
    """Spread a model's feature columns into the full feature list (plus the kriging column,
    last)."""
    out = np.zeros(values.shape[:-1] + (len(names) + 1,))
    for j, f in enumerate(member_features):
        out[..., names.index(f)] = values[..., j]
    return out


def permutation_contributions(
    predict,
    features: list[str],
    X: pd.DataFrame,
    names: list[str],
    background: pd.DataFrame | None,
    seed: int,
) -> tuple[np.ndarray, np.ndarray]:
    """:func:`permutation_shap` of ``predict`` over ``features``, against a small spread-out
    background of ``background`` rows (sorted by the first feature), placed into ``names``."""
    bg = (background if background is not None else X)[features]
    if len(bg) > BACKGROUND:  # a small, spread-out background keeps map explanations affordable
        order = np.argsort(bg.iloc[:, 0].to_numpy(), kind="stable")
        bg = bg.iloc[order[np.linspace(0, len(bg) - 1, BACKGROUND).astype(int)]]

    def f(values: ArrayLike):
        return predict(pd.DataFrame(values, columns=features), None)

    values, base = permutation_shap(
        f, np.asarray(X[features], float), bg.to_numpy(float), seed=seed
    )
    return place(values, features, names), base


def permutation_shap(f, X: np.ndarray, background: np.ndarray, n_pairs: int = 1, seed: int = 0):
    """Interventional Shapley values by antithetic permutation sampling, vectorised over rows.

    For each sampled feature order (and its reverse) and each background row, features are
    switched from the background value to the explained value one at a time; each switch's
    change of f is that feature's contribution.  Per order the changes telescope, so
    ``base + values.sum(1) == f(X)`` exactly (local accuracy), with ``base`` the mean of f
    over the background.  With one feature, or two and one order pair, the values are the
    exact Shapley values for this background.

    Returns values of shape (n, p) and base of shape (n,).
    """
    n, p = X.shape
    rng = np.random.default_rng(seed)
    orders = []
    for _ in range(n_pairs):
        perm = rng.permutation(p)
        orders += [perm, perm[::-1]]
    values = np.zeros((n, p))
    base = 0.0
    for b in background:
        current = np.tile(b, (n, 1))
        start = f(current)
        base = base + start[0]
        for order in orders:
            current = np.tile(b, (n, 1))
            previous = start
            for j in order:
                current[:, j] = X[:, j]
                now = f(current)
                values[:, j] += now - previous
                previous = now
    values /= len(background) * len(orders)
    return values, np.full(n, base / len(background))
