"""Candidate models: LightGBM, linear/logistic baselines, kriging baselines, the facies mixture,
and well ties (kriging of out-of-fold residuals) wrapped around any of them.

Every candidate is a :class:`Candidate`: a scikit-learn estimator (parameters stored as given
in ``__init__``, fitted state in attributes ending in ``_``, copied unfitted by
``sklearn.base.clone``) with one small interface, so cross-validation, selection, explanation,
saving and prediction treat them alike:

- ``fit(data)`` with a :class:`FitData` (the wells' features, target, weights, coordinates and
  the spatial context nested folds and early stopping need), returning ``self``;
- ``predict(X, xy)`` with X a table holding (at least) the candidate's features and xy an
  array of shape (n, 2): values of shape (n,) for regression, class probabilities of shape
  (n, n_classes) for classification;
- ``contributions(X, xy, names, background, seed)`` and ``raw_output(X, xy)``: additive
  explanations (see :mod:`predictor.explain`) that add up to the raw output;
- ``save(folder, stem)`` returning a JSON-able description; :func:`load_candidate` reverses it.

A new candidate is one subclass here with a ``kind`` (its name in saved bundles) and a test;
the registry of loaders fills itself.

Fitted state is kept as plain arrays or LightGBM boosters, so what is saved (JSON and LightGBM
text, never pickle) predicts exactly what was fitted.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass, field
from pathlib import Path

import lightgbm as lgb
import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from sklearn.base import BaseEstimator, clone
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import GroupKFold
from sklearn.preprocessing import SplineTransformer

from .kriging import OrdinaryKriging
from .shapley import permutation_contributions, place

PARALLEL_ROWS = 5000  # LightGBM trains on several threads from this many rows
PROBABILITY_FLOOR = 1e-3  # kriged facies probabilities are clipped here before rescaling
INDICATOR_KINDS = ("spherical", "exponential")  # semivariograms of facies residuals


@dataclass
class FitData:
    """What a candidate is trained on.

    X : table of shape (n_wells, n_features); y : target of shape (n_wells,) (class codes
    0..K-1 for classification); weights : declustering weights; xy : coordinates (n_wells, 2);
    groups : spatial block labels (for early stopping); facies : facies codes or -1 where
    unknown (for the facies mixture); units : the well of each row (several rows per well in a
    volume); map_distances : the map's nearest-well distances, which inner folds (well ties)
    are matched to; rows : each row's index in the target's full training table (a blend
    refits its weights on the out-of-fold predictions of exactly these rows).
    """

    X: pd.DataFrame
    y: np.ndarray
    weights: np.ndarray
    xy: np.ndarray
    groups: np.ndarray
    classes: list[str] = field(default_factory=list)
    facies: np.ndarray | None = None
    facies_classes: list[str] = field(default_factory=list)
    seed: int = 0
    n_threads: int | None = None
    units: np.ndarray | None = None
    map_distances: np.ndarray | None = None
    rows: np.ndarray | None = None
    n_splits: int = 5
    kriging_neighbours: int | None = None  # None: kriging's own default (see kriging.GLOBAL_WELLS)

    def __post_init__(self):
        n = len(self.y)
        self.units = np.arange(n) if self.units is None else np.asarray(self.units)
        self.rows = np.arange(n) if self.rows is None else np.asarray(self.rows)

    def subset(self, index: ArrayLike) -> FitData:
        return FitData(
            self.X.iloc[index].reset_index(drop=True),
            self.y[index],
            self.weights[index],
            self.xy[index],
            self.groups[index],
            self.classes,
            None if self.facies is None else self.facies[index],
            self.facies_classes,
            self.seed,
            self.n_threads,
            self.units[index],
            self.map_distances,
            self.rows[index],
            self.n_splits,
            self.kriging_neighbours,
        )

    def inner_splits(self) -> list[tuple[np.ndarray, np.ndarray]]:
        """Folds over these rows for a nested CV: matched to the map's distances when known
        (kNNDM), else whole spatial blocks."""
        from .cv_design import design_folds, unit_heads

        heads, heads_index = unit_heads(self.xy, self.units)
        k = max(2, min(self.n_splits, len(heads)))
        if self.map_distances is not None and len(heads) >= 2 * k:
            return design_folds(
                "matched", heads, heads_index, self.map_distances, k, 1.0, seed=self.seed
            ).splits
        k = max(2, min(k, np.unique(self.groups).size))
        return list(GroupKFold(n_splits=k).split(np.zeros(len(self.y)), None, self.groups))


def _softmax(z: np.ndarray) -> np.ndarray:
    z = z - z.max(axis=1, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=1, keepdims=True)


def _standardise(model, data: FitData) -> np.ndarray:
    """Store the training mean and scale of the model's features on it; return the standardised
    matrix."""
    X = data.X[model.features].to_numpy(float)
    model.mean_ = X.mean(axis=0)
    model.scale_ = np.where(X.std(axis=0) > 0, X.std(axis=0), 1.0)
    return (X - model.mean_) / model.scale_


def _multinomial(Z: np.ndarray, data: FitData) -> tuple[np.ndarray, np.ndarray]:
    """Weighted multinomial logistic regression of the class codes on the columns of ``Z``:
    coefficients (n_classes, n_columns) and intercepts, with a row for every class of the
    target, so a class absent from these wells (a CV fold, say) gets about zero probability."""
    k = len(data.classes)
    present = np.unique(data.y)
    coef, intercept = np.zeros((k, Z.shape[1])), np.full(k, -30.0)
    if present.size == 1:
        intercept[present[0]] = 0.0
        return coef, intercept
    model = LogisticRegression(C=1.0, max_iter=2000)
    model.fit(Z, data.y, sample_weight=data.weights)
    if present.size == 2:  # scikit-learn keeps one row for two classes
        coef[present[1]] = model.coef_[0]
        intercept[present] = [0.0, model.intercept_[0]]
    else:
        coef[present] = model.coef_
        intercept[present] = model.intercept_
    return coef, intercept


LOADERS: dict[str, type] = {}  # kind -> candidate class, filled as the classes are defined


class Candidate(BaseEstimator):
    """What every candidate, blend and well tie implements (see the module docstring)."""

    kind = ""  # the type written in saved bundles; a subclass with a kind registers its loader
    task = "regression"

    def __init_subclass__(cls, **keywords):
        super().__init_subclass__(**keywords)
        if cls.kind:
            LOADERS[cls.kind] = cls

    def fit(self, data: FitData) -> Candidate:
        raise NotImplementedError

    def predict(self, X: pd.DataFrame, xy: np.ndarray | None = None) -> np.ndarray:
        raise NotImplementedError

    def contributions(
        self,
        X: pd.DataFrame,
        xy: np.ndarray,
        names: list[str],
        background: pd.DataFrame | None = None,
        seed: int = 0,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Additive contributions of each of ``names`` plus the kriging column (last) to the raw
        output, and the base they add to: ``base + values.sum(-1) == raw_output(X, xy)``."""
        raise NotImplementedError

    def raw_output(self, X: pd.DataFrame, xy: np.ndarray) -> np.ndarray:
        """The output the contributions add up to: the prediction, or log-odds for classifiers."""
        return self.predict(X, xy)

    def save(self, folder: Path, stem: str) -> dict:
        raise NotImplementedError

    @classmethod
    def load(cls, desc: dict, folder: Path) -> Candidate:
        raise NotImplementedError


class Linear(Candidate):
    """Weighted least-squares regression on standardised features."""

    kind = "linear"

    def __init__(self, features: list[str], name: str = "linear"):
        self.features = features
        self.name = name

    def fit(self, data: FitData) -> Linear:
        Z = _standardise(self, data)
        Z = np.column_stack([np.ones(len(Z)), Z])
        sw = np.sqrt(np.asarray(data.weights, float))
        coef, *_ = np.linalg.lstsq(Z * sw[:, None], data.y * sw, rcond=None)
        self.coef_ = coef
        return self

    def _z(self, X) -> np.ndarray:
        return (np.asarray(X[self.features], float) - self.mean_) / self.scale_

    def predict(self, X: ArrayLike, xy: ArrayLike | None = None) -> np.ndarray:
        return self.coef_[0] + self._z(X) @ self.coef_[1:]

    def contributions(
        self,
        X: ArrayLike,
        xy: ArrayLike,
        names: list[str],
        background: np.ndarray | None = None,
        seed: int = 0,
    ) -> tuple[np.ndarray, np.ndarray]:
        # exact interventional SHAP with the training mean as background: coef * (x - mean)
        return place(self._z(X) * self.coef_[1:], self.features, names), np.full(
            len(X), self.coef_[0]
        )

    def save(self, folder: Path, stem: str) -> dict:
        return {
            "type": self.kind,
            "name": self.name,
            "features": self.features,
            "mean": self.mean_.tolist(),
            "scale": self.scale_.tolist(),
            "coef": self.coef_.tolist(),
        }

    @classmethod
    def load(cls, desc: dict, folder: Path) -> Linear:
        model = cls(desc["features"], desc["name"])
        model.mean_, model.scale_, model.coef_ = (
            np.array(desc[k]) for k in ("mean", "scale", "coef")
        )
        return model


class Logistic(Candidate):
    """Multinomial logistic regression on standardised features (scikit-learn), weighted."""

    kind = "logistic"
    task = "classification"
    STATE = ("mean", "scale", "coef", "intercept")  # fitted arrays saved in the bundle

    def __init__(self, features: list[str], name: str = "logistic"):
        self.features = features
        self.name = name

    def fit(self, data: FitData) -> Logistic:
        self.coef_, self.intercept_ = _multinomial(_standardise(self, data), data)
        return self

    def _z(self, X) -> np.ndarray:
        return (np.asarray(X[self.features], float) - self.mean_) / self.scale_

    def _design(self, X) -> np.ndarray:
        """The columns the coefficients multiply: the standardised features."""
        return self._z(X)

    def raw_output(self, X: ArrayLike, xy: ArrayLike | None = None) -> np.ndarray:
        return self._design(X) @ self.coef_.T + self.intercept_

    def predict(self, X: ArrayLike, xy: ArrayLike | None = None) -> np.ndarray:
        return _softmax(self.raw_output(X))

    def contributions(
        self,
        X: ArrayLike,
        xy: ArrayLike,
        names: list[str],
        background: np.ndarray | None = None,
        seed: int = 0,
    ) -> tuple[np.ndarray, np.ndarray]:
        per_class = self._z(X)[:, None, :] * self.coef_[None, :, :]  # per-class logits, exact
        return place(per_class, self.features, names), np.tile(self.intercept_, (len(X), 1))

    def save(self, folder: Path, stem: str) -> dict:
        state = {key: getattr(self, f"{key}_").tolist() for key in self.STATE}
        return {"type": self.kind, "name": self.name, "features": self.features, **state}

    @classmethod
    def load(cls, desc: dict, folder: Path) -> Logistic:
        model = cls(desc["features"], desc["name"])
        for key in cls.STATE:
            setattr(model, f"{key}_", np.array(desc[key]))
        return model


class SplineLogistic(Logistic):
    """Additive logistic regression: each standardised feature through a cubic B-spline basis
    (scikit-learn's SplineTransformer, knots evenly spread over the training range, linear beyond
    it), then the weighted multinomial fit of :class:`Logistic` on the basis.  Each class's
    log-odds is a sum of one smooth curve per feature (a generalised additive model; Hastie &
    Tibshirani 1990), so it bends where facies change faster than linearly with the seismic yet
    keeps the logistic's steady extrapolation, and its contributions are exact.

    Five knots with the default penalty (C = 1) were chosen on the tuning fields of
    experiments/facies_candidates.py (facies trained alone, each variant fitted on all wells
    and scored on the map): 0.90 x the logistic's Brier score on average, against 0.93 with 3
    knots, 0.91 with 7, 0.95 with C = 10, 1.15 with C = 0.1 and 0.98 for the linear logistic on
    the same features.
    """

    kind = "spline_logistic"
    STATE = (*Logistic.STATE, "knots", "centre")
    KNOTS, DEGREE = 5, 3

    def __init__(self, features: list[str], name: str = "logistic_splines"):
        self.features = features
        self.name = name

    def fit(self, data: FitData) -> SplineLogistic:
        Z = _standardise(self, data)
        low, high = Z.min(axis=0), Z.max(axis=0)
        high = np.where(high > low, high, low + 1.0)  # a constant feature: knots must differ
        self.knots_, self.splines_ = np.linspace(low, high, self.KNOTS), None
        B = self._basis(Z)
        self.coef_, self.intercept_ = _multinomial(B, data)
        # each feature's curve is centred on its weighted training mean, so the contributions
        # say how far a node's value moves the log-odds from that of an average well
        terms = self._terms(B)
        self.centre_ = np.average(terms, axis=0, weights=data.weights)
        return self

    def _basis(self, Z: np.ndarray) -> np.ndarray:
        if getattr(self, "splines_", None) is None:  # built from the stored knots once
            self.splines_ = SplineTransformer(
                knots=self.knots_, degree=self.DEGREE, extrapolation="linear"
            ).fit(self.knots_)
        return self.splines_.transform(Z)

    def _terms(self, B: np.ndarray) -> np.ndarray:
        """Per-class log-odds of each feature's curve: shape (n, n_classes, n_features)."""
        per = B.shape[1] // len(self.features)
        parts = B.reshape(len(B), len(self.features), per)
        coef = self.coef_.reshape(len(self.coef_), len(self.features), per)
        return np.einsum("nfb,kfb->nkf", parts, coef)

    def _design(self, X) -> np.ndarray:
        return self._basis(self._z(X))

    def raw_output(self, X: ArrayLike, xy: ArrayLike | None = None) -> np.ndarray:
        """The log-odds, feature by feature from the four basis functions that are not zero at
        each value: the same sums as the basis matrix times the coefficients without building
        that mostly zero matrix (3 x faster on a map's millions of nodes)."""
        Z = self._z(X)
        n_features = len(self.features)
        coef = self.coef_.reshape(len(self.coef_), n_features, -1)
        out = np.tile(self.intercept_, (len(Z), 1))
        for f in range(n_features):
            first, values = _uniform_cubic_pieces(Z[:, f], self.knots_[:, f])
            table = coef[:, f, :].T  # basis function x class
            for k, value in enumerate(values):
                out += value[:, None] * table[first + k]
        return out

    def contributions(
        self,
        X: ArrayLike,
        xy: ArrayLike,
        names: list[str],
        background: np.ndarray | None = None,
        seed: int = 0,
    ) -> tuple[np.ndarray, np.ndarray]:
        terms = self._terms(self._design(X)) - self.centre_  # exact: the model is additive
        base = self.intercept_ + self.centre_.sum(axis=1)
        return place(terms, self.features, names), np.tile(base, (len(X), 1))


def _uniform_cubic_pieces(z: np.ndarray, knots: np.ndarray) -> tuple[np.ndarray, list]:
    """For each value of ``z``, the first of the four cubic B-spline basis functions on the
    evenly spaced ``knots`` that are not zero there, and their four values: the uniform cubic
    B-spline polynomials (de Boor 1978, A Practical Guide to Splines), continued linearly with
    their end slopes beyond the first and last knot as SplineTransformer(extrapolation="linear")
    does."""
    u = (z - knots[0]) / (knots[1] - knots[0])  # position in knot steps
    first = np.clip(np.floor(u), 0, len(knots) - 2)
    s = np.clip(u - first, 0.0, 1.0)
    beyond = u - first - s  # steps past the first (< 0) or last (> 0) knot; 0 between them
    s2, r = s * s, 1.0 - s
    s3 = s2 * s
    values = [
        r * r * r / 6 - r * r / 2 * beyond,
        (3 * s3 - 6 * s2 + 4) / 6 + (9 * s2 - 12 * s) / 6 * beyond,
        (-3 * s3 + 3 * s2 + 3 * s + 1) / 6 + (-9 * s2 + 6 * s + 3) / 6 * beyond,
        s3 / 6 + s2 / 2 * beyond,
    ]
    return first.astype(np.intp), values


def lightgbm_params(
    task: str, n: int, n_classes: int, seed: int, n_threads: int, monotone=None
) -> dict:
    """Defaults sized for tens to hundreds of wells: shallow trees, large leaves, shrinkage."""
    params = {
        "objective": "regression" if task == "regression" else "multiclass",
        "learning_rate": 0.05,
        "num_leaves": 7,
        "max_depth": 3,
        "min_data_in_leaf": max(5, n // 15),
        "min_data_in_bin": 1,
        "lambda_l2": 1.0,
        "bagging_fraction": 0.8,
        "bagging_freq": 1,
        "feature_pre_filter": False,
        "deterministic": True,
        "force_row_wise": True,
        # threads pay off only on large tables: the demo's 60 wells trained in 12.1 s on one
        # thread and 13.2 s on two; results are the same either way (deterministic, row-wise)
        "num_threads": (n_threads or os.cpu_count() or 1) if n >= PARALLEL_ROWS else 1,
        "seed": seed,
        "verbose": -1,
    }
    if task == "classification":
        params["num_class"] = n_classes
    if monotone is not None:
        params["monotone_constraints"] = list(monotone)
        params["monotone_constraints_method"] = "advanced"
    return params


class LightGBM(Candidate):
    """LightGBM regressor or classifier with early stopping on held-out blocks of the training
    wells."""

    kind = "lightgbm"

    def __init__(
        self,
        task: str,
        features: list[str],
        name: str = "lightgbm",
        monotone: dict | None = None,
        max_rounds: int = 400,
    ):
        self.task = task
        self.features = features
        self.name = name
        self.monotone = monotone
        self.max_rounds = max_rounds

    def _params(self, data: FitData) -> dict:
        mono = [int(self.monotone.get(f, 0)) for f in self.features] if self.monotone else None
        return lightgbm_params(
            self.task, len(data.y), max(len(data.classes), 1), data.seed, data.n_threads, mono
        )

    def fit(self, data: FitData) -> LightGBM:
        params = self._params(data)
        X = data.X[self.features].to_numpy(float)
        rounds = self.max_rounds
        blocks = np.unique(data.groups)
        if blocks.size >= 4 and len(data.y) >= 20:
            # early stopping: hold out about a fifth of the training blocks, then refit on all wells
            rng = np.random.default_rng(data.seed)
            held = rng.choice(blocks, size=max(1, blocks.size // 5), replace=False)
            val = np.isin(data.groups, held)
            train_set = lgb.Dataset(
                X[~val], data.y[~val], weight=data.weights[~val], params={"verbose": -1}
            )
            val_set = lgb.Dataset(
                X[val], data.y[val], weight=data.weights[val], reference=train_set
            )
            probe = lgb.train(
                params,
                train_set,
                num_boost_round=self.max_rounds,
                valid_sets=[val_set],
                callbacks=[lgb.early_stopping(30, verbose=False)],
            )
            rounds = max(20, probe.best_iteration or self.max_rounds)
        else:
            rounds = 150
        full = lgb.Dataset(X, data.y, weight=data.weights, params={"verbose": -1})
        self.booster_ = lgb.train(params, full, num_boost_round=rounds)
        self.rounds_ = rounds
        return self

    def _matrix(self, X) -> np.ndarray:
        return np.asarray(X[self.features], float)

    def predict(self, X: ArrayLike, xy: ArrayLike | None = None) -> np.ndarray:
        return self.booster_.predict(self._matrix(X), num_threads=1)

    def raw_output(self, X: ArrayLike, xy: ArrayLike | None = None) -> np.ndarray:
        return self.booster_.predict(self._matrix(X), raw_score=True, num_threads=1)

    def contributions(
        self,
        X: ArrayLike,
        xy: ArrayLike,
        names: list[str],
        background: np.ndarray | None = None,
        seed: int = 0,
    ) -> tuple[np.ndarray, np.ndarray]:
        # TreeSHAP built into LightGBM (path-dependent), in the raw output
        raw = self.booster_.predict(self._matrix(X), pred_contrib=True, num_threads=1)
        p = len(self.features)
        if self.task == "classification":
            raw = raw.reshape(len(X), raw.shape[1] // (p + 1), p + 1)
        return place(raw[..., :p], self.features, names), raw[..., p]

    def save(self, folder: Path, stem: str) -> dict:
        name = f"{stem}.lgb.txt"
        # the thread count is recorded in the text but does not change the model: normalise it so
        # the same data and seed give byte-identical files whatever the thread count
        text = re.sub(r"\[num_threads: \d+\]", "[num_threads: 0]", self.booster_.model_to_string())
        (folder / name).write_text(text, encoding="utf-8")
        return {
            "type": self.kind,
            "task": self.task,
            "name": self.name,
            "features": self.features,
            "monotone": self.monotone or {},
            "rounds": self.rounds_,
            "file": name,
        }

    @classmethod
    def load(cls, desc: dict, folder: Path) -> LightGBM:
        model = cls(desc["task"], desc["features"], desc["name"], desc.get("monotone") or None)
        model.booster_ = lgb.Booster(model_str=(folder / desc["file"]).read_text(encoding="utf-8"))
        model.rounds_ = desc["rounds"]
        return model


def _kriging_only(values: np.ndarray, n_names: int) -> np.ndarray:
    """Contributions where all of the output is the kriging column."""
    out = np.zeros((len(values), n_names + 1))
    out[:, -1] = values
    return out


class Kriging(Candidate):
    """Ordinary kriging of the target from well locations alone (a baseline)."""

    kind = "kriging"

    def __init__(self, name: str = "ordinary_kriging"):
        self.name = name

    @property
    def features(self) -> list[str]:
        return []

    def fit(self, data: FitData) -> Kriging:
        self.kriging_ = OrdinaryKriging(neighbours=data.kriging_neighbours).fit(
            data.xy[:, 0], data.xy[:, 1], data.y
        )
        return self

    def predict(self, X: ArrayLike, xy: ArrayLike) -> np.ndarray:
        return self.kriging_.predict(xy[:, 0], xy[:, 1])

    def contributions(
        self,
        X: ArrayLike,
        xy: ArrayLike,
        names: list[str],
        background: np.ndarray | None = None,
        seed: int = 0,
    ) -> tuple[np.ndarray, np.ndarray]:
        return _kriging_only(self.predict(X, xy), len(names)), np.zeros(len(X))

    def save(self, folder: Path, stem: str) -> dict:
        return {"type": self.kind, "name": self.name, "kriging": self.kriging_.to_dict()}

    @classmethod
    def load(cls, desc: dict, folder: Path) -> Kriging:
        model = cls(desc["name"])
        model.kriging_ = OrdinaryKriging.from_dict(desc["kriging"])
        return model


class RegressionKriging(Candidate):
    """Linear drift on the attribute(s) plus ordinary kriging of its residuals (a baseline)."""

    kind = "regression_kriging"

    def __init__(self, features: list[str], name: str = "regression_kriging"):
        self.features = features
        self.name = name

    def fit(self, data: FitData) -> RegressionKriging:
        self.drift_ = Linear(self.features).fit(data)
        resid = data.y - self.drift_.predict(data.X)
        self.kriging_ = OrdinaryKriging(neighbours=data.kriging_neighbours).fit(
            data.xy[:, 0], data.xy[:, 1], resid
        )
        return self

    def predict(self, X: ArrayLike, xy: ArrayLike) -> np.ndarray:
        return self.drift_.predict(X) + self.kriging_.predict(xy[:, 0], xy[:, 1])

    def contributions(
        self,
        X: ArrayLike,
        xy: ArrayLike,
        names: list[str],
        background: np.ndarray | None = None,
        seed: int = 0,
    ) -> tuple[np.ndarray, np.ndarray]:
        values, base = self.drift_.contributions(X, xy, names)
        values[:, -1] += self.kriging_.predict(xy[:, 0], xy[:, 1])
        return values, base

    def save(self, folder: Path, stem: str) -> dict:
        return {
            "type": self.kind,
            "name": self.name,
            "features": self.features,
            "drift": self.drift_.save(folder, stem),
            "kriging": self.kriging_.to_dict(),
        }

    @classmethod
    def load(cls, desc: dict, folder: Path) -> RegressionKriging:
        model = cls(desc["features"], desc["name"])
        model.drift_ = Linear.load(desc["drift"], folder)
        model.kriging_ = OrdinaryKriging.from_dict(desc["kriging"])
        return model


class FaciesMixture(Candidate):
    """Per-facies linear regressors mixed by facies probabilities from a spline logistic.

    The porosity of a node is sum over facies c of P(c | seismic) * f_c(seismic).  The
    classifier sees every feature.  It is the spline logistic rather than LightGBM: refitted on
    all wells of the tuning fields of experiments/matched_cv.py, LightGBM's facies probabilities
    scored 1.15 x the logistic's Brier score on the map, the spline logistic's 0.90 (trees hold
    the last leaf's sand-rich probability beyond the wells' attribute range; the candidates are
    scored this way by experiments/facies_candidates.py), and with the spline logistic inside
    the mixture the porosity map went from 0.885 to 0.878 x regression kriging's RMSE on
    average (worst field 1.074 to 1.046; tuning seeds of experiments/matched_cv.py).  Bundles
    with a LightGBM classifier still load.

    A facies' regressor uses every feature when the facies has ``MIN_PER_FEATURE`` wells per
    coefficient, else only ``member_features`` (the attributes) if it has that many for them,
    else the facies' weighted mean; its output is held within the facies' observed range
    widened by a quarter, so a regressor fitted on a handful of wells cannot extrapolate to
    absurd values.  Explained by permutation Shapley values (a product of
    probabilities and regressions has no exact additive form).
    """

    kind = "facies_mixture"
    MIN_PER_FEATURE = 5

    def __init__(
        self,
        features: list[str],
        name: str = "facies_mixture",
        member_features: list[str] | None = None,
    ):
        self.features = features
        self.name = name
        self.member_features = member_features

    def fit(self, data: FitData) -> FaciesMixture:
        known = data.facies >= 0
        classifier_data = FitData(
            data.X[known].reset_index(drop=True),
            data.facies[known],
            data.weights[known],
            data.xy[known],
            data.groups[known],
            data.facies_classes,
            seed=data.seed,
            n_threads=data.n_threads,
        )
        self.classifier_ = SplineLogistic(self.features, "facies_classifier").fit(classifier_data)
        self.members_, self.limits_ = [], []
        for code in range(len(data.facies_classes)):
            sel = data.facies == code
            values = data.y[sel] if sel.any() else data.y
            spread = 0.25 * float(np.ptp(values))
            self.limits_.append([float(values.min()) - spread, float(values.max()) + spread])
            usable = [
                f
                for f in (self.features, self.member_features)
                if f and sel.sum() >= self.MIN_PER_FEATURE * (len(f) + 1)
            ]
            if usable:
                self.members_.append(Linear(usable[0]).fit(data.subset(np.flatnonzero(sel))))
            else:
                mean = (
                    float(np.average(data.y[sel], weights=data.weights[sel]))
                    if sel.any()
                    else float(data.y.mean())
                )
                self.members_.append(mean)
        return self

    def _member(self, i, X) -> np.ndarray:
        member = self.members_[i]
        values = member.predict(X) if isinstance(member, Linear) else np.full(len(X), member)
        return np.clip(values, *self.limits_[i])

    def predict(self, X: ArrayLike, xy: ArrayLike | None = None) -> np.ndarray:
        proba = self.classifier_.predict(X)
        return sum(proba[:, i] * self._member(i, X) for i in range(len(self.members_)))

    def contributions(
        self,
        X: ArrayLike,
        xy: ArrayLike,
        names: list[str],
        background: np.ndarray | None = None,
        seed: int = 0,
    ) -> tuple[np.ndarray, np.ndarray]:
        return permutation_contributions(self.predict, self.features, X, names, background, seed)

    def save(self, folder: Path, stem: str) -> dict:
        return {
            "type": self.kind,
            "name": self.name,
            "features": self.features,
            "member_features": self.member_features,
            "limits": self.limits_,
            "classifier": self.classifier_.save(folder, f"{stem}.classifier"),
            "members": [
                m.save(folder, stem) if isinstance(m, Linear) else m for m in self.members_
            ],
        }

    @classmethod
    def load(cls, desc: dict, folder: Path) -> FaciesMixture:
        model = cls(desc["features"], desc["name"], desc.get("member_features"))
        model.classifier_ = load_candidate(desc["classifier"], folder)
        model.members_ = [
            Linear.load(m, folder) if isinstance(m, dict) else float(m) for m in desc["members"]
        ]
        model.limits_ = desc.get("limits") or [[-np.inf, np.inf]] * len(model.members_)
        return model


class WellTies(Candidate):
    """A model corrected near the wells by kriging its out-of-fold residuals.

    The residuals come from an inner cross-validation of the training wells with folds matched
    to the map's prediction distances, so they are the errors the model makes as far from its
    training data as a map node is from its nearest well, which is what the map needs.

    For facies the residuals are each class's indicator minus its predicted probability, kriged
    class by class and added to the probabilities (kriging of indicators around a locally
    varying mean from the seismic, common practice), with the order-relation correction of
    indicator kriging: clipped to [PROBABILITY_FLOOR, 1] and rescaled to sum to one (common
    practice).  Their semivariograms are spherical or exponential only: a Gaussian fit to an
    indicator's residuals swung the kriged probabilities far outside [0, 1] between wells.
    """

    kind = "well_ties"

    def __init__(self, base: Candidate):
        self.base = base

    @property
    def name(self) -> str:
        return f"{self.base.name}+well_ties"

    @property
    def task(self) -> str:
        return self.base.task

    @property
    def features(self) -> list[str]:
        return self.base.features

    def fit(self, data: FitData) -> WellTies:
        oof = out_of_fold(self.base, data)
        self.base_ = clone(self.base).fit(data)
        x, y = data.xy[:, 0], data.xy[:, 1]
        if self.task == "classification":
            residuals = np.eye(len(data.classes))[data.y.astype(int)] - oof
            self.kriging_ = [
                OrdinaryKriging(neighbours=data.kriging_neighbours, kinds=INDICATOR_KINDS).fit(
                    x, y, r
                )
                for r in residuals.T
            ]
        else:
            self.kriging_ = OrdinaryKriging(neighbours=data.kriging_neighbours).fit(
                x, y, data.y - oof
            )
        return self

    def _ties(self, xy) -> np.ndarray:
        if self.task == "classification":
            return np.column_stack([k.predict(xy[:, 0], xy[:, 1]) for k in self.kriging_])
        return self.kriging_.predict(xy[:, 0], xy[:, 1])

    def _tied(self, proba: np.ndarray, xy) -> np.ndarray:
        p = np.clip(proba + self._ties(xy), PROBABILITY_FLOOR, 1.0)
        return p / p.sum(axis=1, keepdims=True)

    def _raw_shift(self, X, xy) -> np.ndarray:
        """What the ties add to the base's raw output: the values themselves, or for facies
        log(tied / untied probability), which the softmax turns into the tied probabilities."""
        if self.task == "regression":
            return self._ties(xy)
        proba = self.base_.predict(X, xy)
        return np.log(self._tied(proba, xy) / np.maximum(proba, 1e-300))

    def predict(self, X: ArrayLike, xy: ArrayLike) -> np.ndarray:
        if self.task == "classification":
            return self._tied(self.base_.predict(X, xy), xy)
        return self.base_.predict(X, xy) + self._ties(xy)

    def raw_output(self, X: ArrayLike, xy: ArrayLike) -> np.ndarray:
        return self.base_.raw_output(X, xy) + self._raw_shift(X, xy)

    def contributions(
        self,
        X: ArrayLike,
        xy: ArrayLike,
        names: list[str],
        background: np.ndarray | None = None,
        seed: int = 0,
    ) -> tuple[np.ndarray, np.ndarray]:
        values, base = self.base_.contributions(X, xy, names, background, seed)
        values[..., -1] += self._raw_shift(X, xy)
        return values, base

    def residual_variance(self, xy: ArrayLike) -> np.ndarray:
        return self.kriging_.predict(xy[:, 0], xy[:, 1], return_variance=True)[1]

    def save(self, folder: Path, stem: str) -> dict:
        kriging = self.kriging_
        return {
            "type": self.kind,
            "name": self.name,
            "base": self.base_.save(folder, stem),
            "kriging": (
                [k.to_dict() for k in kriging] if isinstance(kriging, list) else kriging.to_dict()
            ),
        }

    @classmethod
    def load(cls, desc: dict, folder: Path) -> WellTies:
        model = cls(load_candidate(desc["base"], folder))
        model.base_ = model.base
        kriging = desc["kriging"]
        model.kriging_ = (
            [OrdinaryKriging.from_dict(k) for k in kriging]
            if isinstance(kriging, list)
            else OrdinaryKriging.from_dict(kriging)
        )
        return model


class Blend(Candidate):
    """Weighted average of fitted candidates (stacking with non-negative weights summing to one).

    The weights are fitted to the members' out-of-fold predictions (Breiman 1996, stacked
    regressions), so they reward what each member does away from its training wells.  With
    ``member_oof`` (the members' out-of-fold predictions for every row of the target's table,
    shape (n, m) or (n, m, k)) ``fit`` refits the weights on the rows it is given, so a blend
    cross-validated inside a fold (well ties around it, say) never sees the held-out wells;
    without it the given ``weights`` are kept.  Classifier blends average probabilities, which
    log-odds contributions cannot add up to: their members are explained one by one, weighted
    by their blend weight.
    """

    kind = "blend"

    def __init__(
        self, members: list[Candidate], weights, name: str = "blend", member_oof=None, y_all=None
    ):
        self.members = members
        self.weights = weights
        self.name = name
        self.member_oof = member_oof
        self.y_all = y_all

    @property
    def task(self) -> str:
        return self.members[0].task

    @property
    def features(self) -> list[str]:
        return sorted({f for m in self.members for f in m.features})

    def fit(self, data: FitData) -> Blend:
        if self.member_oof is not None:
            self.weights_ = blend_weights(
                self.member_oof[data.rows], self.y_all[data.rows], data.weights, data.units
            )
        else:
            self.weights_ = np.asarray(self.weights, float)
        self.members_ = [clone(m).fit(data) for m in self.members]
        return self

    def _weighted(self, part) -> list:
        return [w * part(m) for w, m in zip(self.weights_, self.members_, strict=True) if w > 0]

    def predict(self, X: ArrayLike, xy: ArrayLike) -> np.ndarray:
        return sum(self._weighted(lambda m: m.predict(X, xy)))

    def raw_output(self, X: ArrayLike, xy: ArrayLike) -> np.ndarray:
        return sum(self._weighted(lambda m: m.raw_output(X, xy)))

    def contributions(
        self,
        X: ArrayLike,
        xy: ArrayLike,
        names: list[str],
        background: np.ndarray | None = None,
        seed: int = 0,
    ) -> tuple[np.ndarray, np.ndarray]:
        parts = [
            (w, m.contributions(X, xy, names, background, seed))
            for w, m in zip(self.weights_, self.members_, strict=True)
            if w > 0
        ]
        return sum(w * v for w, (v, _) in parts), sum(w * b for w, (_, b) in parts)

    def save(self, folder: Path, stem: str) -> dict:
        return {
            "type": self.kind,
            "name": self.name,
            "weights": self.weights_.tolist(),
            "members": [m.save(folder, f"{stem}.member{i}") for i, m in enumerate(self.members_)],
        }

    @classmethod
    def load(cls, desc: dict, folder: Path) -> Blend:
        model = cls(
            [load_candidate(m, folder) for m in desc["members"]], desc["weights"], desc["name"]
        )
        model.members_, model.weights_ = model.members, np.asarray(desc["weights"], float)
        return model


def combine(predictions: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Weighted sum over the member axis (1) of (n, m) values or (n, m, k) class probabilities."""
    return (
        np.tensordot(predictions, weights, axes=([1], [0]))
        if predictions.ndim == 2
        else np.einsum("nmk,m->nk", predictions, weights)
    )


BLEND_BAGS = 40  # bootstrap resamples of the wells whose value-blend weights are averaged
BLEND_FLOOR = 0.01  # bagged weights below this are dropped


def blend_weights(
    predictions: np.ndarray,
    y: np.ndarray,
    sample_weight: np.ndarray,
    units: np.ndarray | None = None,
    bags: int = BLEND_BAGS,
) -> np.ndarray:
    """Non-negative weights summing to one that minimise the weighted squared error (values of
    shape (n, m)) or the weighted log-loss (class probabilities of shape (n, m, k), y codes).

    Value weights are averaged over ``bags`` bootstrap resamples of the wells (``units``: the
    well of each row; bagging, Breiman 1996): with a few dozen wells one fit's weights follow
    the noise of a few wells.  On the tuning fields of experiments/matched_cv.py the bagged
    weights mapped porosity better than one fit on 12 of 16 fields (0.866 against 0.874 times
    regression kriging's RMSE on average); for facies probabilities the gain was 0.005 in the
    Brier ratio and the worst field worse, so class weights are one fit.  The resamples come
    from a fixed seed: the same wells give the same weights.
    """
    y = np.asarray(y)
    sw = np.asarray(sample_weight, float)
    if predictions.ndim == 3:
        return _log_loss_weights(predictions[np.arange(len(y)), :, y.astype(int)], sw)
    units = np.arange(len(y)) if units is None else np.asarray(units)
    _, unit_of_row = np.unique(units, return_inverse=True)
    n_units = unit_of_row.max() + 1
    if bags > 1:
        draws = np.random.default_rng(0).integers(0, n_units, (bags, n_units))
        counts = np.stack([np.bincount(d, minlength=n_units) for d in draws])
    else:
        counts = np.ones((1, n_units))
    bag_weights = sw * counts[:, unit_of_row]  # (bags, n)
    # the squared error of each bag is w'Gw - 2h'w + const
    gram = np.einsum("bn,nm,nk->bmk", bag_weights, predictions, predictions)
    linear = (bag_weights * y) @ predictions
    w = _simplex_quadratic_minimum(gram, linear).mean(axis=0)
    # the bags leave small weights on most members, and every kept member is predicted at
    # every node: those under 1 % are dropped
    w[w < BLEND_FLOOR] = 0.0
    return w / w.sum()


def _simplex_quadratic_minimum(gram: np.ndarray, linear: np.ndarray) -> np.ndarray:
    """argmin over the simplex of w'Gw - 2h'w for each of a stack of (G, h), exactly: as
    non-negative least squares (Lawson & Hanson's active set, scipy's ``nnls``) of ||Aw - b||^2
    with A'A = G and A'b = h (from G's eigenvectors, so members that predict alike are no
    trouble), plus a heavily weighted row that holds sum(w) = 1."""
    from scipy.optimize import nnls

    m = linear.shape[1]
    out = np.full_like(linear, 1.0 / m)
    for k, (g, h) in enumerate(zip(gram, linear, strict=True)):
        values, vectors = np.linalg.eigh(g)
        kept = values > 1e-12 * max(values[-1], 0.0)
        if not kept.any():  # every member predicts zero on these wells: nothing to choose
            continue
        root = np.sqrt(values[kept])
        A, b = root[:, None] * vectors[:, kept].T, (vectors[:, kept].T @ h) / root
        pull = 1e4 * np.sqrt(values[-1])  # sum(w) - 1 costs pull^2 per unit squared
        w, _ = nnls(np.vstack([A, np.full(m, pull)]), np.append(b, pull))
        out[k] = w / w.sum()
    return out


def _log_loss_weights(own: np.ndarray, sw: np.ndarray) -> np.ndarray:
    """One constrained fit of the weights minimising the weighted log-loss; ``own`` holds each
    member's probability of each row's observed class, shape (n, m)."""
    from scipy.optimize import minimize

    def loss_and_gradient(w: np.ndarray):
        p = np.clip(own @ w, 1e-12, None)
        return float(-np.sum(sw * np.log(p))), -own.T @ (sw / p)

    m = own.shape[1]
    start = np.full(m, 1.0 / m)
    result = minimize(
        loss_and_gradient,
        start,
        jac=True,
        method="SLSQP",
        bounds=[(0.0, 1.0)] * m,
        constraints=[{"type": "eq", "fun": lambda w: np.sum(w) - 1.0}],
    )
    w = np.clip(result.x if result.success else start, 0.0, None)
    w[w < 1e-3] = 0.0
    return w / w.sum()


def fold_predictions(
    splits: list[tuple[np.ndarray, np.ndarray]], n: int, fit_predict
) -> np.ndarray:
    """The one fold loop of the project: ``fit_predict(train_rows, test_rows)`` for each split,
    its values placed at the test rows of an array of ``n`` rows."""
    out = None
    for train, test in splits:
        values = np.asarray(fit_predict(train, test))
        if out is None:
            out = np.zeros((n,) + values.shape[1:])
        out[test] = values
    return out


def out_of_fold(
    candidate, data: FitData, splits: list[tuple[np.ndarray, np.ndarray]] | None = None
) -> np.ndarray:
    """Out-of-fold predictions of ``candidate`` over ``splits`` ((train, test) row pairs; by
    default the nested folds of :meth:`FitData.inner_splits`)."""
    splits = data.inner_splits() if splits is None else splits

    def fit_predict(train: ArrayLike, test: ArrayLike):
        model = clone(candidate).fit(data.subset(train))
        return model.predict(data.X.iloc[test].reset_index(drop=True), data.xy[test])

    return fold_predictions(splits, len(data.y), fit_predict)


BASELINES = ("linear", "logistic", "ordinary_kriging", "regression_kriging")
# not offered for volumes: kriging of a 2-D map; the spline logistic was measured on maps only
MAP_ONLY = (
    "ordinary_kriging",
    "regression_kriging",
    "regression_kriging_all_features",
    "logistic_splines",
)
# not offered for maps: the spline logistic on every feature holds the linear one within it
# and replaced it there.  On the tuning fields of experiments/field_wide.py the linear one on
# every feature took the blend on strongly preferential drilling (90 % sand at the wells, 4 % on
# the map) and mapped 1.44 x the logistic's Brier score; without it the worst was 1.18 x
VOLUME_ONLY = ("logistic_all_features",)
# facies on maps: no LightGBM classifiers.  Trees hold the last leaf's probability beyond the
# wells' attribute range, which a CV at the wells cannot see: they took weight in the facies
# blend on 3 of the 16 tuning fields of experiments/field_wide.py, and without them the map's
# Brier score over the logistic's went from 0.896 to 0.875 (worst field 1.182 to 1.006)
FACIES_VOLUME_ONLY = ("lightgbm", "lightgbm_attributes_only")


def leaderboard_candidates(
    task: str,
    attrs: list[str],
    names: list[str],
    volume: bool = False,
    facies_mixture: bool = False,
    monotone: dict[str, int] | None = None,
) -> list[Candidate]:
    """The candidates cross-validated for one target, baselines first.

    ``attrs`` are the grid's attributes and ``names`` every feature; the candidates on the
    attributes alone stay beside those on every feature, so the CV decides whether context
    helps.  ``facies_mixture`` when the wells carry two facies or more (and the target is not
    facies); ``monotone``: per-feature directions for a constrained LightGBM beside the free one.
    """
    if task == "classification":
        out = [Logistic(attrs), LightGBM("classification", names), SplineLogistic(names)]
        if names != attrs:
            out += [
                Logistic(names, "logistic_all_features"),
                LightGBM("classification", attrs, "lightgbm_attributes_only"),
            ]
    else:
        out = [Linear(attrs), Kriging(), RegressionKriging(attrs), LightGBM("regression", names)]
        if names != attrs:
            # the context features in a linear drift: in the blend it brought the porosity map
            # from 0.93 to 0.89 x regression kriging's RMSE (tuning fields of
            # experiments/matched_cv.py) and from 0.96 to 0.91 on the held-out ones
            out += [
                LightGBM("regression", attrs, "lightgbm_attributes_only"),
                RegressionKriging(names, "regression_kriging_all_features"),
            ]
        if monotone:
            out.append(LightGBM("regression", names, "lightgbm_monotone", monotone=monotone))
        if facies_mixture:
            out.append(FaciesMixture(names, member_features=attrs))
    elsewhere = MAP_ONLY if volume else VOLUME_ONLY
    if task == "classification" and not volume:
        elsewhere += FACIES_VOLUME_ONLY
    return [c for c in out if c.name not in elsewhere]


def load_candidate(desc: dict, folder: Path) -> Candidate:
    return LOADERS[desc["type"]].load(desc, folder)
