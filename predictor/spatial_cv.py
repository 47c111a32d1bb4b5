"""Spatial cross-validation: block labels, block k-fold and buffered leave-one-out, weighted scores.

Random k-fold overstates skill on spatially autocorrelated data (Roberts et al. 2017,
Ecography 40; Ploton et al. 2020, Nature Communications 11): nearby wells are alike, so a
held-out well usually has a twin in the training set.  Holding out whole blocks, at least a
correlation range wide, removes most of that.  Scores are weighted by the declustering
weights so they estimate the error over the map, not over the drilled spots.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
from numpy.typing import ArrayLike
from scipy.spatial import cKDTree
from sklearn import metrics
from sklearn.model_selection import BaseCrossValidator, GroupKFold

from .errors import ModelError


def block_labels(
    x: ArrayLike,
    y: ArrayLike,
    block_size: float,
    angle: float = 0.0,
    origin: tuple[float, float] | None = None,
) -> np.ndarray:
    """Integer label of the square block (side ``block_size``, rotated by ``angle`` degrees) of each
    point.

    A standalone function so the labels can also feed scikit-learn's ``GroupKFold``.
    """
    if not block_size > 0:
        raise ModelError(f"block size must be positive, got {block_size}")
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    theta = np.deg2rad(angle)
    u = x * np.cos(theta) + y * np.sin(theta)
    v = -x * np.sin(theta) + y * np.cos(theta)
    u0, v0 = (u.min(), v.min()) if origin is None else origin
    iu = np.floor((u - u0) / block_size).astype(np.int64)
    iv = np.floor((v - v0) / block_size).astype(np.int64)
    _, labels = np.unique(np.stack([iu, iv]), axis=1, return_inverse=True)
    return labels.ravel()


def _coordinates(splitter, X, n):
    coords = splitter.coordinates if splitter.coordinates is not None else np.asarray(X)[:, :2]
    coords = np.asarray(coords, dtype=float)
    if coords.shape != (n, 2):
        raise ModelError(f"coordinates must have shape ({n}, 2), got {coords.shape}")
    return coords


class BlockKFold(BaseCrossValidator):
    """K-fold over square spatial blocks; no block is ever on both sides of a split.

    Folds are balanced by well count exactly as ``GroupKFold`` balances groups (it is used
    underneath, with the block labels as groups).

    Parameters
    ----------
    block_size : side of the blocks, in coordinate units (m)
    n_splits : number of folds
    angle : rotation of the blocks, degrees counter-clockwise from the x axis
    coordinates : array of shape (n_samples, 2); when None the first two columns of X are used
    """

    def __init__(self, block_size: float, n_splits: int = 5, angle: float = 0.0, coordinates=None):
        if not (isinstance(n_splits, int | np.integer) and n_splits >= 2):
            raise ModelError(f"n_splits must be an integer >= 2, got {n_splits!r}")
        if not block_size > 0:
            raise ModelError(f"block_size must be positive, got {block_size!r}")
        self.block_size = block_size
        self.n_splits = n_splits
        self.angle = angle
        self.coordinates = coordinates

    def labels(self, X: ArrayLike) -> np.ndarray:
        coords = _coordinates(self, X, len(X))
        return block_labels(coords[:, 0], coords[:, 1], self.block_size, self.angle)

    def split(
        self, X: ArrayLike, y: ArrayLike | None = None, groups: ArrayLike | None = None
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        labels = self.labels(X)
        n_blocks = np.unique(labels).size
        if n_blocks < self.n_splits:
            raise ModelError(
                f"only {n_blocks} blocks of {self.block_size:.0f} m hold wells, fewer than the"
                f" {self.n_splits} folds; use a smaller block size or fewer folds"
            )
        yield from GroupKFold(n_splits=self.n_splits).split(np.zeros(len(labels)), None, labels)

    def get_n_splits(
        self,
        X: ArrayLike | None = None,
        y: ArrayLike | None = None,
        groups: ArrayLike | None = None,
    ) -> int:
        return self.n_splits


class BufferedLeaveOneOut(BaseCrossValidator):
    """Leave one well out, and drop from training every well within ``radius`` of it.

    With ``groups`` (the well of each row, for wells sampled along their path) all rows of a
    well are held out together and the buffer is measured from every one of them.
    """

    def __init__(self, radius: float, coordinates=None, groups=None):
        if not radius >= 0:
            raise ModelError(f"radius must be >= 0, got {radius!r}")
        self.radius = radius
        self.coordinates = coordinates
        self.groups = groups

    def _units(self, n: int, groups) -> np.ndarray:
        units = groups if groups is not None else self.groups
        return np.arange(n) if units is None else np.asarray(units)

    def split(
        self, X: ArrayLike, y: ArrayLike | None = None, groups: ArrayLike | None = None
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        coords = _coordinates(self, X, len(X))
        units = self._units(len(coords), groups)
        tree = cKDTree(coords)
        everyone = np.arange(len(coords))
        for unit in np.unique(units):
            test = np.flatnonzero(units == unit)
            near = np.unique(
                np.concatenate([tree.query_ball_point(coords[i], self.radius) for i in test])
            )
            train = np.setdiff1d(everyone, np.union1d(near, test))
            yield train, test

    def get_n_splits(
        self,
        X: ArrayLike | None = None,
        y: ArrayLike | None = None,
        groups: ArrayLike | None = None,
    ) -> int:
        return 0 if X is None else np.unique(self._units(len(X), groups)).size


def regression_scores(
    y: ArrayLike, pred: ArrayLike, weights: ArrayLike | None = None
) -> dict[str, float]:
    """RMSE, MAE and R2, weighted when weights are given."""
    y, pred = np.asarray(y, float), np.asarray(pred, float)
    return {
        "rmse": float(np.sqrt(metrics.mean_squared_error(y, pred, sample_weight=weights))),
        "mae": float(metrics.mean_absolute_error(y, pred, sample_weight=weights)),
        "r2": float(metrics.r2_score(y, pred, sample_weight=weights)),
    }


def classification_scores(
    y: ArrayLike, proba: ArrayLike, classes: list[str], weights: ArrayLike | None = None
) -> dict[str, float]:
    """Balanced accuracy, log-loss and (multi-class) Brier score, weighted when weights are
    given."""
    y = np.asarray(y).astype(str)
    classes = [str(c) for c in classes]
    proba = np.clip(np.asarray(proba, float), 1e-15, 1.0)
    proba = proba / proba.sum(axis=1, keepdims=True)
    pred = np.asarray(classes)[np.argmax(proba, axis=1)]
    onehot = (y[:, None] == np.asarray(classes)[None, :]).astype(float)
    w = np.ones(len(y)) if weights is None else np.asarray(weights, float)
    brier = float(np.sum(w * np.sum((proba - onehot) ** 2, axis=1)) / np.sum(w))
    return {
        "balanced_accuracy": float(metrics.balanced_accuracy_score(y, pred, sample_weight=weights)),
        "log_loss": float(metrics.log_loss(y, proba, labels=classes, sample_weight=weights)),
        "brier": brier,
    }
