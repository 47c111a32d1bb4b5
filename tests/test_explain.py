"""Explanations: SHAP local accuracy, TreeSHAP against brute-force Shapley values, importance,
trust warnings and the area of applicability."""

import itertools
import math

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest
import shap

from predictor.explain import (
    KRIGING,
    Applicability,
    contributions,
    fit_applicability,
    importance,
    permutation_shap,
)
from predictor.models import (
    Blend,
    FaciesMixture,
    FitData,
    Kriging,
    LightGBM,
    Linear,
    Logistic,
    RegressionKriging,
    SplineLogistic,
    WellTies,
)


def _data(n=150, seed=0):
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0, 2000, (n, 2))
    X = pd.DataFrame({"impedance": rng.uniform(6000, 12000, n), "noise": rng.normal(size=n)})
    y = (
        0.35
        - 2.5e-5 * X["impedance"].to_numpy()
        + 0.01 * np.sin(xy[:, 0] / 300)
        + rng.normal(0, 0.005, n)
    )
    groups = (xy[:, 0] // 500).astype(int) * 10 + (xy[:, 1] // 500).astype(int)
    codes = (X["impedance"].to_numpy() > 9000).astype(int) + (X["impedance"].to_numpy() > 10500)
    return X, y, xy, groups, codes


@pytest.fixture(scope="module")
def fitted():
    X, y, xy, groups, codes = _data()
    reg = FitData(X, y, np.ones(len(y)), xy, groups, [], codes, ["a", "b", "c"])
    cls = FitData(X, codes, np.ones(len(y)), xy, groups, ["a", "b", "c"])
    names = ["impedance", "noise"]
    models = {
        "lightgbm": LightGBM("regression", names).fit(reg),
        "linear": Linear(names).fit(reg),
        "kriging": Kriging().fit(reg),
        "regression_kriging": RegressionKriging(names).fit(reg),
        "facies_mixture": FaciesMixture(names).fit(reg),
        "blend": (
            Blend(
                [Linear(names), LightGBM("regression", names), FaciesMixture(names)],
                [0.2, 0.5, 0.3],
            ).fit(reg)
        ),
        "well_ties": WellTies(LightGBM("regression", names)).fit(reg),
        "lightgbm_classifier": LightGBM("classification", names).fit(cls),
        "logistic": Logistic(names).fit(cls),
        "spline_logistic": SplineLogistic(names).fit(cls),
        "classifier_blend": (
            Blend([Logistic(names), LightGBM("classification", names)], [0.4, 0.6]).fit(cls)
        ),
        "facies_well_ties": WellTies(Logistic(names)).fit(cls),
    }
    return models, X, xy, names


@pytest.mark.parametrize(
    "name",
    [
        "lightgbm",
        "linear",
        "kriging",
        "regression_kriging",
        "facies_mixture",
        "blend",
        "well_ties",
        "lightgbm_classifier",
        "logistic",
        "spline_logistic",
        "classifier_blend",
        "facies_well_ties",
    ],
)
def test_local_accuracy_at_every_well(fitted, name):
    # Lundberg & Lee 2017 (NeurIPS): contributions plus the expected value equal the model output
    models, X, xy, names = fitted
    values, base = contributions(models[name], X, xy, names, background=X)
    np.testing.assert_allclose(
        base + values.sum(axis=-1), models[name].raw_output(X, xy), atol=1e-6
    )


def _path_value(tree, x, coalition):
    """E[f(x) | x_S] by the tree's own recursion: follow x on features in S, else average the
    children by their training counts (the value function TreeSHAP uses)."""
    if "leaf_value" in tree:
        return tree["leaf_value"]
    left, right = tree["left_child"], tree["right_child"]
    j = tree["split_feature"]
    if j in coalition:
        return _path_value(left if x[j] <= tree["threshold"] else right, x, coalition)
    nl, nr = (c.get("internal_count", c.get("leaf_count")) for c in (left, right))
    return (nl * _path_value(left, x, coalition) + nr * _path_value(right, x, coalition)) / (
        nl + nr
    )


def test_lightgbm_contributions_equal_brute_force_shapley_values():
    # Shapley (1953): phi_j = sum over coalitions S without j of |S|!(p-|S|-1)!/p! (v(S+j) - v(S)),
    # with the tree's own value function; checks our candidate's contributions (each value placed
    # under its feature's name, the expected value split off), whatever order the names come in
    rng = np.random.default_rng(4)
    X = pd.DataFrame(rng.normal(size=(400, 3)), columns=["a", "b", "c"])
    y = X["a"] * 2 + (X["b"] > 0) * X["c"] + rng.normal(0, 0.1, 400)
    model = LightGBM("regression", ["c", "a", "b"])  # the model's own feature order
    model.booster_ = lgb.train(
        {
            "objective": "regression",
            "num_leaves": 6,
            "max_depth": 3,
            "learning_rate": 1.0,
            "min_data_in_leaf": 10,
            "verbose": -1,
        },
        lgb.Dataset(X[model.features].to_numpy(), y),
        num_boost_round=1,
    )
    tree = model.booster_.dump_model()["tree_info"][0]["tree_structure"]
    names = [
        "b",
        "noise",
        "a",
        "c",
    ]  # the explanation's order, with a feature the model does not use
    values, base = contributions(model, X.assign(noise=0.0).iloc[:20], np.zeros((20, 2)), names)
    p = len(model.features)
    for i, x in enumerate(X[model.features].to_numpy()[:20]):
        for j, name in enumerate(model.features):
            others = [k for k in range(p) if k != j]
            brute = 0.0
            for r in range(p):
                for S in itertools.combinations(others, r):
                    w = math.factorial(len(S)) * math.factorial(p - len(S) - 1) / math.factorial(p)
                    brute += w * (_path_value(tree, x, set(S) | {j}) - _path_value(tree, x, set(S)))
            assert values[i, names.index(name)] == pytest.approx(brute, abs=1e-9)
        assert values[i, names.index("noise")] == 0
        assert base[i] == pytest.approx(_path_value(tree, x, set()))


@pytest.mark.slow
def test_permutation_values_equal_shap_exact_explainer_for_two_features():
    # reference library: shap's exact explainer with the same independent background
    rng = np.random.default_rng(5)
    bg = rng.normal(size=(6, 2))
    X = rng.normal(size=(30, 2))

    def f(v):
        return np.tanh(v[:, 0]) * v[:, 1] + v[:, 0] ** 2

    ours, base = permutation_shap(f, X, bg)
    ref = shap.explainers.Exact(f, shap.maskers.Independent(bg, max_samples=len(bg)))(X)
    np.testing.assert_allclose(ours, ref.values, atol=1e-10)
    np.testing.assert_allclose(base, ref.base_values, atol=1e-10)


def test_pure_noise_feature_gets_near_zero_importance(fitted):
    models, X, xy, names = fitted
    values, _ = contributions(models["lightgbm"], X, xy, names)
    imp = importance(values, np.ones(len(X)), names)
    assert imp["noise"] < 0.1 * imp["impedance"]
    assert imp[KRIGING] == 0


def test_location_only_signal_triggers_the_location_warning():
    import xarray as xr

    from predictor.training import TrainOptions, train

    rng = np.random.default_rng(6)
    xs, ys = np.arange(0, 3000, 50.0), np.arange(0, 3000, 50.0)
    grid = xr.Dataset(
        {"impedance": (("y", "x"), rng.uniform(7000, 11000, (ys.size, xs.size)))},
        coords={"x": xs, "y": ys},
    )
    wx, wy = rng.uniform(100, 2900, 120), rng.uniform(100, 2900, 120)
    wells = pd.DataFrame(
        {
            "well_id": [f"W{i}" for i in range(120)],
            "x": wx,
            "y": wy,
            "porosity": 0.15 + 0.08 * np.sin(wx / 700) * np.cos(wy / 900),
        }
    )
    from predictor.features import FeatureSpec

    trained = train(
        wells,
        grid,
        TrainOptions(targets=["porosity"], features=FeatureSpec(["impedance"], location=True)),
    )
    assert any("location features and kriging of the wells carry" in w for w in trained.warnings)
    assert trained.targets["porosity"].trust["location_share"] > 0.3


def test_applicability_flags_far_nodes_not_the_wells():
    X, *_ = _data(100)
    imp = pd.Series({"impedance": 1.0, "noise": 0.2})
    folds = np.arange(len(X)) % 5
    aoa, di = fit_applicability(X, imp, folds)
    assert np.mean(di <= aoa.threshold) > 0.9
    assert np.all(aoa.index(X) <= aoa.threshold)  # the wells themselves
    far = pd.DataFrame({"impedance": [30000.0, 9000.0], "noise": [0.0, 40.0]})
    assert np.all(aoa.index(far) > aoa.threshold)
    back = Applicability.from_dict(aoa.to_dict())
    np.testing.assert_array_equal(back.index(X), aoa.index(X))


@pytest.mark.parametrize("n_features", [1, 3])
def test_applicability_index_and_flags_equal_a_plain_nearest_neighbour_search(n_features):
    # reference: scipy.spatial.cKDTree nearest-neighbour distances (the 1-feature case uses a sorted
    # search)
    from scipy.spatial import cKDTree

    rng = np.random.default_rng(n_features)
    names = [f"f{i}" for i in range(n_features)]
    points = rng.normal(size=(60, n_features))
    threshold = 0.4 if n_features == 1 else 2.0  # some nodes on each side of it
    aoa = Applicability(
        names,
        np.zeros(n_features),
        np.ones(n_features),
        np.ones(n_features),
        points,
        0.5,
        threshold,
    )
    X = pd.DataFrame(rng.normal(size=(5000, n_features)) * 2.5, columns=names)
    reference = cKDTree(points).query(X.to_numpy())[0] / 0.5
    np.testing.assert_allclose(aoa.index(X), reference, rtol=1e-12)
    np.testing.assert_array_equal(aoa.inside(X), reference <= threshold)
    assert 0.05 < aoa.inside(X).mean() < 0.95


def test_well_contributions_in_memory_match_the_written_table_and_the_model(
    porosity_bundle, tmp_path
):
    """The public in-memory table is the one ``explain`` writes, and each well's base plus its
    contributions is the porosity the bundle's model predicts there (local accuracy)."""
    from predictor import explain_bundle, load_bundle, well_contributions

    bundle = load_bundle(porosity_bundle)
    table = well_contributions(bundle, "porosity")
    wells, features = bundle.training_wells()
    names = bundle.card["features"]["names"]
    assert list(table.columns) == ["well_id", "x", "y", *names, KRIGING, "base", "output"]
    predicted = bundle.models["porosity"].predict(features, wells[["x", "y"]].to_numpy(float))
    np.testing.assert_allclose(table["output"], predicted, atol=1e-9)
    np.testing.assert_allclose(table[[*names, KRIGING]].sum(axis=1) + table["base"], predicted)
    explain_bundle(porosity_bundle, tmp_path / "explained")
    written = pd.read_csv(
        tmp_path / "explained" / "porosity_shap_at_wells.csv", dtype={"well_id": str}
    )
    pd.testing.assert_frame_equal(written, table.astype({"well_id": str}), check_exact=False)
