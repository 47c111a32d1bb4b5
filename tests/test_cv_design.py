"""Fold designs matched to the map's prediction distances (kNNDM, NNDM), against the truth.

Sources: kNNDM, Linnenbrink, Milà, Ludwig & Meyer (2024), Geoscientific Model Development
17:5897-5912; NNDM, Milà, Mateu, Pebesma & Meyer (2022), Methods in Ecology and Evolution
13:1304-1316; random k-fold optimistic on clustered samples, Roberts et al. (2017, Ecography
40) and Ploton et al. (2020, Nature Communications 11:4540); blocked CV pessimistic where the
map is densely sampled, Wadoux, Heuvelink, de Bruin & Brus (2021, Ecological Modelling 457).
"""

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter
from scipy.stats import wasserstein_distance

from predictor.cv_design import (
    design_folds,
    knndm_folds,
    kriging_variance_ratio,
    map_distances,
    nndm_splits,
    sample_locations,
)
from predictor.declustering import nearest_node_weights
from predictor.errors import ModelError
from predictor.kriging import OrdinaryKriging
from predictor.variogram import VariogramModel


def _clustered_case(seed, n_clusters, per, spread, n=200, step=20.0, sigma=6):
    """A location-driven signal (a smooth Gaussian random field) sampled by clustered wells."""
    rng = np.random.default_rng(seed)
    z = gaussian_filter(rng.standard_normal((n, n)), sigma, mode="wrap")
    z = ((z - z.mean()) / z.std()).ravel()
    xs = np.arange(n) * step
    gx, gy = (a.ravel() for a in np.meshgrid(xs, xs))
    centres = rng.uniform(0.05, 0.95, (n_clusters, 2)) * xs[-1]
    xy = np.vstack([c + rng.normal(0, spread, (per, 2)) for c in centres]).clip(0, xs[-1])
    idx = np.round(xy[:, 1] / step).astype(int) * n + np.round(xy[:, 0] / step).astype(int)
    return gx, gy, z, xy, z[idx], VariogramModel("gaussian", 0.02, 1.0, step * sigma * 2.5)


def _sampled(gx, gy, seed=0):
    """A seeded sample of the map's nodes, as training takes one."""
    nodes = np.column_stack([gx, gy])
    return nodes[sample_locations(len(nodes), seed)]


def _cv_over_truth(seed, n_clusters, per, spread, block=1000.0) -> dict:
    """CV RMSE (declustering-weighted) / true map RMSE of ordinary kriging, per design."""
    gx, gy, z, xy, v, vario = _clustered_case(seed, n_clusters, per, spread)
    g_map = map_distances(_sampled(gx, gy, seed), xy)
    weights = nearest_node_weights(xy[:, 0], xy[:, 1], gx, gy)
    full = OrdinaryKriging(vario).fit(xy[:, 0], xy[:, 1], v)
    true = np.sqrt(np.mean((full.predict(gx, gy) - z) ** 2))
    out = {}
    for name in ("matched", "random", "blocks"):
        design = design_folds(name, xy, np.arange(len(xy)), g_map, 5, block, seed=seed)
        oof = np.zeros(len(v))
        for train, test in design.splits:
            oof[test] = (
                OrdinaryKriging(vario)
                .fit(xy[train, 0], xy[train, 1], v[train])
                .predict(xy[test, 0], xy[test, 1])
            )
        out[name] = np.sqrt(np.average((oof - v) ** 2, weights=weights)) / true
    return out


def _median_over_fields(*case) -> dict:
    runs = [_cv_over_truth(seed, *case) for seed in range(4)]
    return {name: float(np.median([r[name] for r in runs])) for name in runs[0]}


def test_sparse_clustered_wells_random_cv_is_optimistic_matched_is_not():
    ratio = _median_over_fields(10, 5, 40.0)  # 50 wells in 10 tight clusters on a 4 km map
    assert ratio["random"] < 0.6  # a held-out well has a twin in its cluster
    assert abs(ratio["matched"] - 1) <= 0.2


def test_dense_clustered_wells_blocked_cv_is_pessimistic_matched_is_not():
    ratio = _median_over_fields(40, 6, 150.0)  # 240 wells covering the map
    assert ratio["blocks"] > 1.2  # 1 km blocks hold wells out farther than any node is from a well
    assert abs(ratio["matched"] - 1) <= 0.2


def test_knndm_brings_cv_distances_to_the_maps_and_keeps_whole_folds():
    rng = np.random.default_rng(3)
    gx, gy = (a.ravel() for a in np.meshgrid(np.arange(0, 3000, 25.0), np.arange(0, 2500, 25.0)))
    centres = rng.uniform(0, [3000, 2500], (6, 2))
    xy = np.vstack([c + rng.normal(0, 120, (30, 2)) for c in centres])
    g_map = map_distances(_sampled(gx, gy), xy)
    matched = design_folds("matched", xy, np.arange(len(xy)), g_map, 5, 400.0)
    random = design_folds("random", xy, np.arange(len(xy)), g_map, 5, 400.0)
    assert matched.w < 0.5 * random.w
    # W is the Wasserstein-1 distance of the two nearest-neighbour distance samples (scipy)
    assert matched.w == pytest.approx(wasserstein_distance(matched.distances, g_map))
    tested = np.concatenate([test for _, test in matched.splits])
    assert np.array_equal(np.sort(tested), np.arange(len(xy)))  # every well tested exactly once
    for train, test in matched.splits:
        assert not np.intersect1d(train, test).size and len(test) <= len(xy) / 2


def test_knndm_keeps_random_folds_when_wells_are_not_clustered():
    rng = np.random.default_rng(4)
    gx, gy = (a.ravel() for a in np.meshgrid(np.arange(0, 3000, 25.0), np.arange(0, 2500, 25.0)))
    xy = rng.uniform(0, [3000, 2500], (60, 2))
    _, info = knndm_folds(xy, map_distances(_sampled(gx, gy), xy), 5)
    assert (
        info["configuration"].startswith("random k-fold")
        and info["ks_p_value_wells_closer"] >= 0.05
    )


def test_volume_rows_of_one_well_stay_in_one_fold():
    rng = np.random.default_rng(5)
    heads = rng.uniform(0, 2000, (30, 2))
    units = np.repeat(np.arange(30), 7)  # 7 samples per well
    g_map = map_distances(rng.uniform(0, 2000, (4000, 2)), heads)
    for name in ("matched", "random", "blocks", "nndm"):
        design = design_folds(name, heads, units, g_map, 5, 300.0)
        for train, test in design.splits:
            assert not np.intersect1d(units[train], units[test]).size


def test_nndm_matches_the_map_closer_than_leave_one_out_and_keeps_half_the_wells():
    rng = np.random.default_rng(6)
    centres = rng.uniform(0, 3000, (8, 2))
    xy = np.vstack([c + rng.normal(0, 60, (6, 2)) for c in centres])
    g_map = map_distances(rng.uniform(0, 3000, (5000, 2)), xy)
    splits = nndm_splits(xy, g_map)
    loo = np.array([np.sort(np.hypot(*(xy - p).T))[1] for p in xy])  # plain leave-one-out distances
    nndm = np.array([np.min(np.hypot(*(xy[train] - xy[test[0]]).T)) for train, test in splits])
    assert wasserstein_distance(nndm, g_map) < 0.5 * wasserstein_distance(loo, g_map)
    assert min(len(train) for train, _ in splits) > len(xy) / 2


def test_too_few_wells_for_the_folds_is_a_clear_error():
    xy = np.array([[0.0, 0.0], [100.0, 0.0], [0.0, 100.0]])
    with pytest.raises(ModelError, match="3 wells cannot fill 5 CV folds"):
        design_folds("matched", xy, np.arange(3), np.array([50.0, 60.0]), 5, 100.0)


def test_no_valid_node_is_a_clear_error():
    with pytest.raises(ModelError, match="no valid node"):
        map_distances(np.empty((0, 2)), np.zeros((3, 2)))


def test_kriging_variance_ratio_hand_worked_without_spatial_correlation():
    # Hand-worked: with no correlation between distinct points (covariance s at distance 0,
    # 0 beyond), ordinary kriging weighs n wells 1/n with Lagrange multiplier -s/n, so the
    # variance off the wells is s (1 + 1/n). Ten wells in five folds: held-out wells are
    # kriged from 8, map nodes off the wells from 10, ratio (1 + 1/10) / (1 + 1/8).
    heads = np.column_stack([np.arange(10) * 100.0, np.zeros(10)])
    folds = np.arange(10) % 5
    splits = [(np.flatnonzero(folds != k), np.flatnonzero(folds == k)) for k in range(5)]
    vario = VariogramModel("spherical", 0.0, 2.0, 1e-3)
    off_wells = np.column_stack([np.arange(10) * 100.0 + 50.0, np.full(10, 30.0)])
    ratio = kriging_variance_ratio(vario, heads, np.arange(10), splits, off_wells, np.ones(10))
    assert ratio == pytest.approx(1.1 / 1.125, rel=1e-9)
    # map nodes on the wells themselves are known exactly: half of them on wells halves it
    half = np.vstack([off_wells[:5], heads[:5]])
    ratio = kriging_variance_ratio(vario, heads, np.arange(10), splits, half, np.ones(10))
    assert ratio == pytest.approx(0.5 * 1.1 / 1.125, rel=1e-9)


def test_kriging_variance_ratio_below_one_when_the_map_hugs_dense_wells():
    # a regular 10 x 10 pattern at 100 m with a 400 m spherical range: random folds hold each
    # well out a spacing from its training wells while map nodes lie within 71 m of a well
    gx, gy = np.meshgrid(np.arange(10) * 100.0, np.arange(10) * 100.0)
    heads = np.column_stack([gx.ravel(), gy.ravel()])
    folds = np.random.default_rng(0).permutation(100) % 5
    splits = [(np.flatnonzero(folds != k), np.flatnonzero(folds == k)) for k in range(5)]
    nodes = np.random.default_rng(1).uniform(0, 900, (2000, 2))
    vario = VariogramModel("spherical", 0.1, 0.9, 400.0)
    ratio = kriging_variance_ratio(vario, heads, np.arange(100), splits, nodes, np.ones(100))
    assert 0.5 < ratio < 0.95
