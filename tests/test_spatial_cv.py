"""Spatial CV splitters and weighted scores."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.ndimage import gaussian_filter
from sklearn.linear_model import LinearRegression
from sklearn.model_selection import KFold, cross_val_score, cross_validate
from sklearn.neighbors import KNeighborsRegressor

from predictor.errors import ModelError
from predictor.spatial_cv import (
    BlockKFold,
    BufferedLeaveOneOut,
    block_labels,
    classification_scores,
    regression_scores,
)


def _points(n=300, seed=0):
    rng = np.random.default_rng(seed)
    return rng.uniform(0, 1000, (n, 2))


def test_block_labels_by_hand():
    # worked by hand: 100 m squares from the lowest point; points in one square share a label
    x = np.array([0.0, 99.0, 100.0, 250.0, 5.0, 180.0])
    y = np.array([0.0, 50.0, 20.0, 10.0, 130.0, 199.0])
    labels = block_labels(x, y, 100.0)
    square = [(0, 0), (0, 0), (1, 0), (2, 0), (0, 1), (1, 1)]
    for i in range(len(x)):
        for j in range(len(x)):
            assert (labels[i] == labels[j]) == (square[i] == square[j]), (i, j)
    # rotated by 90 degrees u = y and v = -x, anchored at the lowest v (-250): now x = 99 and
    # x = 100 share a square (v - v0 = 151 and 150) and x = 0 (v - v0 = 250) does not
    rotated = block_labels(x, y, 100.0, angle=90)
    assert rotated[1] == rotated[2] and rotated[0] != rotated[1]


def test_no_block_on_both_sides_and_folds_balanced_by_wells():
    xy = _points()
    cv = BlockKFold(block_size=150, n_splits=5, coordinates=xy)
    labels = block_labels(xy[:, 0], xy[:, 1], 150)
    ours = list(cv.split(xy))
    assert len(ours) == 5
    tested = np.concatenate([te for _, te in ours])
    assert np.array_equal(np.sort(tested), np.arange(len(xy)))  # every well held out exactly once
    for tr, te in ours:
        assert not set(labels[tr]) & set(labels[te])
        assert len(tr) + len(te) == len(xy)
    sizes = [len(te) for _, te in ours]
    assert max(sizes) - min(sizes) <= 0.2 * np.mean(sizes)  # balanced by well count


def test_rotated_blocks_partition():
    xy = _points()
    labels = block_labels(xy[:, 0], xy[:, 1], 200, angle=30)
    tests = np.concatenate([te for _, te in BlockKFold(200, 4, angle=30, coordinates=xy).split(xy)])
    assert sorted(tests.tolist()) == list(range(len(xy)))
    assert np.unique(labels).size > 10


@settings(max_examples=40, deadline=None)
@given(st.integers(2, 6), st.floats(20, 400), st.integers(0, 1000))
def test_blocks_are_a_partition_without_leakage(n_splits, size, seed):
    xy = _points(120, seed)
    cv = BlockKFold(size, n_splits, coordinates=xy)
    labels = cv.labels(xy)
    if np.unique(labels).size < n_splits:
        with pytest.raises(ModelError, match="fewer than the"):
            list(cv.split(xy))
        return
    seen = []
    for train, test in cv.split(xy):
        assert not set(labels[train]) & set(labels[test])
        assert len(np.intersect1d(train, test)) == 0 and len(train) + len(test) == len(xy)
        seen.extend(test)
    assert sorted(seen) == list(range(len(xy)))


def test_splitters_validate_arguments():
    with pytest.raises(ModelError, match="n_splits"):
        BlockKFold(100, n_splits=1)
    with pytest.raises(ModelError, match="block_size"):
        BlockKFold(0)
    with pytest.raises(ModelError, match="radius"):
        BufferedLeaveOneOut(-1)


def test_buffered_leave_one_out_excludes_neighbours():
    xy = _points(80)
    for train, test in BufferedLeaveOneOut(120, coordinates=xy).split(xy):
        d = np.hypot(*(xy[train] - xy[test[0]]).T)
        assert d.min() > 120 and test[0] not in train


def test_works_inside_scikit_learn_cross_validate():
    xy = _points()
    y = xy[:, 0] * 0.01 + np.random.default_rng(1).normal(size=len(xy))
    result = cross_validate(LinearRegression(), xy, y, cv=BlockKFold(200, 4))
    assert len(result["test_score"]) == 4 and np.all(result["test_score"] > 0.5)


def test_random_kfold_overstates_skill_on_spatial_noise():
    # Roberts et al. 2017 (Ecography 40); Ploton et al. 2020 (Nature Communications 11): the target
    # is a spatially correlated field with no relation to any attribute; only coordinates "explain"
    # it. Random k-fold reports skill that blocked CV (blocks wider than the correlation) does not.
    rng = np.random.default_rng(5)
    field = gaussian_filter(rng.standard_normal((200, 200)), sigma=6, mode="wrap")
    field = (field - field.mean()) / field.std()
    ij = rng.integers(0, 200, (600, 2))
    xy = ij * 5.0  # 5 m nodes, correlation ~ 60 m
    y = field[ij[:, 1], ij[:, 0]] + rng.normal(0, 0.1, len(ij))
    model = KNeighborsRegressor(5)
    random_r2 = cross_val_score(model, xy, y, cv=KFold(5, shuffle=True, random_state=0)).mean()
    blocked_r2 = cross_val_score(model, xy, y, cv=BlockKFold(250, 5)).mean()
    assert random_r2 > 0.6
    assert blocked_r2 < 0.15


def test_weighted_scores():
    y, pred, w = np.array([1.0, 2, 3]), np.array([1.5, 2, 2]), np.array([2.0, 1, 1])
    s = regression_scores(y, pred, w)
    assert s["rmse"] == pytest.approx(np.sqrt((2 * 0.25 + 0 + 1) / 4))
    assert s["mae"] == pytest.approx((2 * 0.5 + 1) / 4)
    proba = np.array([[0.8, 0.2], [0.3, 0.7], [0.6, 0.4]])
    c = classification_scores(np.array(["a", "b", "b"]), proba, ["a", "b"], w)
    # Brier (multi-class form, summed over classes): hand-computed
    brier = (2 * (0.2**2 + 0.2**2) + (0.3**2 + 0.3**2) + (0.6**2 + 0.6**2)) / 4
    assert c["brier"] == pytest.approx(brier)
    # balanced accuracy: class a 1/1 right, class b 1/2 right
    assert c["balanced_accuracy"] == pytest.approx(0.75)
    expected_ll = -(2 * np.log(0.8) + np.log(0.7) + np.log(0.4)) / 4
    assert c["log_loss"] == pytest.approx(expected_ll)
