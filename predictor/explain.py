"""Why a model predicts what it does: SHAP contributions, trust warnings, area of applicability.

Contributions are additive: for every node, ``base + sum(contributions) = model output`` (local
accuracy, Lundberg & Lee 2017).  Each part of a model is explained in its own exact way:

- LightGBM: TreeSHAP built into LightGBM (``pred_contrib``), path-dependent, in the model's raw
  output (the property itself, or per-class log-odds for facies);
- linear and logistic models: exact interventional SHAP with the training mean as background,
  ``coef * (x - mean)`` (per-class logits for logistic regression);
- the spline logistic (one smooth curve per feature, added in log-odds): each feature's curve
  at the node minus its weighted mean over the training wells, exact for an additive model;
- kriging (of the wells, or of residuals in regression kriging and well ties): one column,
  ``kriging_of_wells``: the part of the map that comes from well values by location;
- blends and well ties: the sum of their parts' contributions, weighted as in the model;
- the facies mixture (a product of probabilities and regressions): interventional Shapley
  values by antithetic permutation sampling against a small background of training wells,
  vectorised over map nodes (:func:`permutation_shap`, checked against the shap package's
  exact explainer in the tests).

Each candidate implements its own part (``Candidate.contributions``).  Classifier blends
average probabilities, which log-odds contributions cannot add up to; their
members are explained one by one, weighted by their blend weight (documented in the output).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike

# the explanation helpers live with the models; re-exported here for callers of this module
from .shapley import KRIGING, permutation_shap  # noqa: F401


def contributions(
    model,
    X: pd.DataFrame,
    xy: np.ndarray,
    names: list[str],
    background: pd.DataFrame | None = None,
    seed: int = 0,
) -> tuple[np.ndarray, np.ndarray]:
    """Additive contributions of every feature (and of kriging) to the model's raw output.

    Returns
    -------
    values : array of shape (n, n_features + 1) for regression, (n, n_classes, n_features + 1)
        for classification (log-odds); the last column is ``kriging_of_wells``
    base : array of shape (n,) or (n, n_classes), so that base + values.sum(-1) is
        ``model.raw_output(X, xy)``

    Each candidate explains itself (:meth:`predictor.models.Candidate.contributions`).
    """
    return model.contributions(X, xy, names, background, seed)


def importance(values: np.ndarray, weights: np.ndarray, names: list[str]) -> pd.Series:
    """Declustering-weighted mean |contribution| per feature (summed over classes), largest
    first."""
    a = np.abs(values)
    if a.ndim == 3:
        a = a.sum(axis=1)
    w = np.asarray(weights, float) / np.sum(weights)
    return pd.Series(w @ a, index=list(names) + [KRIGING]).sort_values(ascending=False)


LOCATION = ("x_coord", "y_coord", "x_rotated", "y_rotated")


class Applicability:
    """Area of applicability (Meyer & Pebesma 2021, Methods in Ecology and Evolution 12).

    The dissimilarity index of a node is its distance to the nearest training well in the space
    of standardised features weighted by their importance, divided by the mean distance between
    training wells.  The threshold is the upper whisker (Q3 + 1.5 IQR, capped at the maximum) of
    the training wells' own index, each computed against the wells outside its CV fold (the
    whisker rule as recalled from memory of the method).
    """

    def __init__(
        self,
        features: list[str],
        mean,
        scale,
        weights,
        points,
        mean_distance: float,
        threshold: float,
    ):
        self.features = features
        self.mean, self.scale, self.weights = (np.asarray(a, float) for a in (mean, scale, weights))
        self.points = np.asarray(points, float)
        self.mean_distance = float(mean_distance)
        self.threshold = float(threshold)

    def _space(self, X) -> np.ndarray:
        return (np.asarray(X[self.features], float) - self.mean) / self.scale * self.weights

    def index(self, X: ArrayLike) -> np.ndarray:
        return self._distance(X) / self.mean_distance

    def _tree(self):
        from scipy.spatial import cKDTree

        if (
            getattr(self, "tree_", None) is None
        ):  # built once per loaded model, reused by every tile
            self.tree_ = cKDTree(self.points)
        return self.tree_

    def _nearest_1d(self, q: np.ndarray) -> np.ndarray:
        """Distance to the nearest training point for a single feature: a sorted search, exact."""
        points = np.sort(self.points[:, 0])
        i = np.searchsorted(points, q[:, 0])
        below = np.abs(q[:, 0] - points[np.clip(i - 1, 0, points.size - 1)])
        above = np.abs(points[np.clip(i, 0, points.size - 1)] - q[:, 0])
        return np.minimum(below, above)

    def _distance(self, X, bound: float = np.inf, chunk: int = 50_000) -> np.ndarray:
        """Distance to the nearest training point in the weighted feature space (inf beyond
        ``bound``)."""
        q = self._space(X)
        if q.shape[1] == 1:  # a sorted search: exact, and much faster than a tree in one dimension
            return self._nearest_1d(q)
        tree = self._tree()
        out = np.empty(len(q))
        for s in range(0, len(q), chunk):
            out[s : s + chunk] = tree.query(q[s : s + chunk], distance_upper_bound=bound)[0]
        return out

    def inside(self, X: ArrayLike) -> np.ndarray:
        """Whether each row's index is within the threshold; the same as ``index(X) <= threshold``
        but faster, since the nearest-neighbour search stops at the threshold distance."""
        bound = (
            self.threshold * self.mean_distance * (1 + 1e-12)
        )  # the bound is strict; the threshold is not
        return self._distance(X, bound) / self.mean_distance <= self.threshold

    def to_dict(self) -> dict:
        return {
            "features": self.features,
            "mean": self.mean.tolist(),
            "scale": self.scale.tolist(),
            "weights": self.weights.tolist(),
            "points": self.points.tolist(),
            "mean_distance": self.mean_distance,
            "threshold": self.threshold,
        }

    @classmethod
    def from_dict(cls, d: dict) -> Applicability:
        return cls(
            d["features"],
            d["mean"],
            d["scale"],
            d["weights"],
            d["points"],
            d["mean_distance"],
            d["threshold"],
        )


def fit_applicability(
    X: pd.DataFrame, imp: pd.Series, folds: np.ndarray
) -> tuple[Applicability, np.ndarray]:
    """The applicability model and the CV-based index of each training well."""
    from scipy.spatial.distance import cdist, pdist

    features = [f for f in X.columns if f in imp.index]
    values = np.asarray(X[features], float)
    mean, scale = values.mean(axis=0), values.std(axis=0)
    scale = np.where(scale > 0, scale, 1.0)
    w = imp.reindex(features).fillna(0.0).to_numpy(float)
    w = w / w.sum() if w.sum() > 0 else np.full(len(features), 1.0 / len(features))
    points = (values - mean) / scale * w
    mean_distance = float(np.mean(pdist(points))) or 1.0
    d = cdist(points, points)
    d[folds[:, None] == folds[None, :]] = np.inf  # distance to wells of the other folds only
    di = d.min(axis=1) / mean_distance
    q1, q3 = np.percentile(di[np.isfinite(di)], [25, 75])
    threshold = float(min(q3 + 1.5 * (q3 - q1), np.max(di[np.isfinite(di)])))
    return Applicability(features, mean, scale, w, points, mean_distance, threshold), di


def trust_warnings(
    target: str,
    task: str,
    imp: pd.Series,
    X: pd.DataFrame,
    values: np.ndarray,
    cv: dict,
    cv_random: dict,
    n_classes: int,
    fold_sizes: list[int],
    location_limit: float = 0.3,
    impedance: list[str] = (),
) -> tuple[list[str], dict]:
    """Plain-words warnings about what the model leans on and how far its scores can be trusted.

    ``impedance``: the attributes that are impedances (by what the user said they are, or their
    name); porosity is expected to fall as they, and their smoothed versions, rise."""
    warnings_, facts = [], {}
    total = float(imp.sum()) or 1.0
    loc = float(imp.reindex([f for f in imp.index if f in LOCATION]).sum())
    krig = float(imp.get(KRIGING, 0.0))
    facts["location_share"] = (loc + krig) / total
    facts["location_features_share"] = loc / total
    facts["kriging_share"] = krig / total
    if (loc + krig) / total > location_limit:
        warnings_.append(
            f"{target}: location features and kriging of the wells carry {(loc + krig) / total:.0%}"
            f" of the total |SHAP| ({loc / total:.0%} and {krig / total:.0%}; limit"
            f" {location_limit:.0%}): the map leans on where the wells are rather than on the"
            " seismic"
        )
    if task == "regression" and target in ("porosity", "permeability"):
        names = list(X.columns)
        levels = [f for f in names if any(f == a or f.startswith(f"{a}_smooth") for a in impedance)]
        for f in levels:
            if imp.get(f, 0) > 0.02 * total:
                r = np.corrcoef(X[f].to_numpy(float), values[:, names.index(f)])[0, 1]
                facts[f"sign_{f}"] = float(r)
                if r > 0.1:
                    warnings_.append(
                        f"{target}: its contribution rises with {f} (correlation {r:+.2f}); rock"
                        " physics expects it to fall as impedance rises: check the data or"
                        " constrain the model"
                    )
    if task == "regression":
        if cv["r2"] < 0.1:
            warnings_.append(
                f"{target}: CV R2 is {cv['r2']:.2f}: next to no skill away from the wells"
            )
        if cv_random and cv_random["rmse"] < 0.8 * cv["rmse"]:
            warnings_.append(
                f"{target}: random k-fold RMSE {cv_random['rmse']:.3g} is far below the blocked "
                f"{cv['rmse']:.3g}: nearby wells are alike, trust the blocked figure"
            )
    else:
        chance = 1.0 / max(n_classes, 1)
        if cv["balanced_accuracy"] < chance + 0.05:
            warnings_.append(
                f"{target}: CV balanced accuracy {cv['balanced_accuracy']:.2f} is near chance "
                f"({chance:.2f})"
            )
        if cv_random and cv_random["balanced_accuracy"] > cv["balanced_accuracy"] + 0.1:
            warnings_.append(
                f"{target}: random k-fold balanced accuracy is much higher than blocked: nearby"
                " wells are alike, trust the blocked figure"
            )
    if fold_sizes and min(fold_sizes) < 5:
        warnings_.append(
            f"{target}: the smallest CV fold holds {min(fold_sizes)} wells: scores are noisy"
        )
    return warnings_, facts
