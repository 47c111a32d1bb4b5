"""Declustering weights: hand-worked layouts, a synthetic field, and properties."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from predictor.declustering import cell_declustering, cell_weights, nearest_node_weights
from predictor.stats import weighted_mean
from predictor.synthetic import FieldSpec, make_field


def _regular(n=5, step=100.0):
    g = (np.arange(n) + 0.5) * step
    xx, yy = np.meshgrid(g, g)
    return xx.ravel(), yy.ravel()


def test_regular_layout_gives_uniform_weights():
    # Journel (1983): on a regular pattern every well represents the same area
    x, y = _regular()
    np.testing.assert_allclose(cell_weights(x, y, 100.0), 1.0, atol=1e-12)
    xx, yy = np.meshgrid(
        np.arange(500.0) + 0.5, np.arange(500.0) + 0.5
    )  # no node equidistant to two wells
    np.testing.assert_allclose(nearest_node_weights(x, y, xx, yy), 1.0, atol=1e-12)


@pytest.mark.parametrize("k", [3, 5, 8])
def test_cluster_of_k_wells_gets_one_kth(k):
    # hand-worked: a 5 x 5 regular pattern whose centre well is replaced by a tight cluster of k
    # wells; with the cell at the pattern spacing each cluster well weighs about 1/k of a regular
    # well
    x, y = _regular()
    centre = 12
    rng = np.random.default_rng(k)
    cx = np.concatenate([np.delete(x, centre), 235 + rng.uniform(-2, 2, k)])
    cy = np.concatenate([np.delete(y, centre), 235 + rng.uniform(-2, 2, k)])
    w = cell_weights(cx, cy, 100.0)
    regular, cluster = w[:24].mean(), w[24:]
    np.testing.assert_allclose(cluster / regular, 1.0 / k, rtol=0.2)
    assert w.sum() == pytest.approx(cx.size)


def test_declustered_mean_closer_to_exhaustive_mean():
    # Deutsch (1989): on a preferentially sampled field the declustered mean is nearer the truth
    for seed in (1, 2, 3):
        _, truth, wells = make_field(FieldSpec(seed=seed))
        true_mean = float(truth.porosity.mean())
        result = cell_declustering(wells.x, wells.y, wells.porosity)
        assert result.direction == "minimum"  # high porosity was over-sampled
        naive = wells.porosity.mean()
        assert abs(result.declustered_mean - true_mean) < 0.8 * abs(naive - true_mean)
        assert result.declustered_mean == pytest.approx(
            weighted_mean(wells.porosity, result.weights)
        )


def test_direction_maximum_when_lows_oversampled():
    x, y = _regular()
    values = np.full(x.size, 10.0)
    # clustered low values in one corner
    cx = np.concatenate([x, 30 + np.arange(6.0)])
    cy = np.concatenate([y, 30 + np.arange(6.0)])
    cv = np.concatenate([values, np.full(6, 1.0)])
    result = cell_declustering(cx, cy, cv)
    assert result.direction == "maximum"
    assert result.declustered_mean > cv.mean()


coords = st.lists(st.tuples(st.floats(0, 1000), st.floats(0, 1000)), min_size=3, max_size=30)


@settings(max_examples=60, deadline=None)
@given(coords, st.floats(10, 500), st.floats(-1e5, 1e5), st.floats(-1e5, 1e5))
def test_cell_weight_properties(points, size, sx, sy):
    # dyadic values (multiples of 1/1024) keep every coordinate difference exact in floating point,
    # so a well exactly on a cell edge stays on it after the shift
    x, y = (np.round(np.array(a) * 1024) / 1024 for a in zip(*points, strict=True))
    sx, sy = round(sx * 1024) / 1024, round(sy * 1024) / 1024
    w = cell_weights(x, y, size)
    assert np.all(w > 0)
    assert w.sum() == pytest.approx(x.size)
    # the lattice origin follows the wells, so a shift of all coordinates changes nothing
    np.testing.assert_allclose(cell_weights(x + sx, y + sy, size), w, rtol=1e-6)
    order = np.random.default_rng(0).permutation(x.size)
    np.testing.assert_allclose(cell_weights(x[order], y[order], size), w[order], rtol=1e-12)
