"""Candidate models: stacking weights, selection rule, monotone constraint, spread model, saving."""

import numpy as np
import pandas as pd
import pytest

from predictor.intervals import SpreadModel, calibrate
from predictor.models import (
    Blend,
    FaciesMixture,
    FitData,
    LightGBM,
    Linear,
    Logistic,
    SplineLogistic,
    blend_weights,
    load_candidate,
)
from predictor.training import _clearly_better, _losses


def _data(n=200, seed=0, classes=()):
    rng = np.random.default_rng(seed)
    imp = rng.uniform(6000, 12000, n)
    other = rng.normal(size=n)
    phi = 0.35 - 2.5e-5 * imp + rng.normal(0, 0.01, n)
    xy = rng.uniform(0, 2000, (n, 2))
    groups = (xy[:, 0] // 400).astype(int) * 10 + (xy[:, 1] // 400).astype(int)
    X = pd.DataFrame({"impedance": imp, "other": other})
    return FitData(X, phi, np.ones(n), xy, groups, list(classes), seed=seed)


def test_blend_weights_find_the_exact_member():
    rng = np.random.default_rng(1)
    y = rng.normal(size=100)
    P = np.column_stack([y + rng.normal(0, 1, 100), y, y + rng.normal(0, 2, 100)])
    np.testing.assert_allclose(blend_weights(P, y, np.ones(100)), [0, 1, 0], atol=1e-3)
    w = blend_weights(P[:, [0, 2]], y, np.ones(100))
    assert (
        w.sum() == pytest.approx(1) and np.all(w >= 0) and w[0] > w[1]
    )  # the less noisy member weighs more


def test_value_blend_weights_match_scipy_slsqp():
    """One fit (bags=1) is the exact constrained least-squares minimum: checked against scipy's
    SLSQP on the same objective, with correlated members as cross-validated models give."""
    from scipy.optimize import minimize

    rng = np.random.default_rng(5)
    y = rng.normal(size=120)
    common = y + rng.normal(0, 0.5, 120)
    P = np.column_stack([common + rng.normal(0, s, 120) for s in (0.1, 0.2, 0.4, 0.8)] + [y * 0])
    sw = rng.uniform(0.2, 2.0, 120)

    def loss(w):
        return float(np.sum(sw * (P @ w - y) ** 2))

    reference = minimize(
        loss,
        np.full(5, 0.2),
        method="SLSQP",
        bounds=[(0, 1)] * 5,
        constraints=[{"type": "eq", "fun": lambda w: w.sum() - 1}],
        options={"ftol": 1e-14, "maxiter": 1000},
    ).x
    w = blend_weights(P, y, sw, bags=1)
    assert w.sum() == pytest.approx(1) and np.all(w >= 0)
    assert loss(w) == pytest.approx(loss(reference), rel=1e-7)
    np.testing.assert_allclose(w, np.clip(reference, 0, None), atol=2e-3)


def test_value_blend_weights_resample_whole_wells():
    """Bagging draws wells, not rows: a well logged as three identical rows gets the weights of
    the same well logged once."""
    rng = np.random.default_rng(6)
    y = rng.normal(size=40)
    P = np.column_stack([y + rng.normal(0, s, 40) for s in (0.3, 0.5, 0.6)])
    once = blend_weights(P, y, np.ones(40))
    thrice = blend_weights(
        np.repeat(P, 3, axis=0), np.repeat(y, 3), np.ones(120), units=np.repeat(np.arange(40), 3)
    )
    np.testing.assert_allclose(thrice, once, atol=1e-9)
    single = blend_weights(P, y, np.ones(40), bags=1)
    assert np.abs(once - single).max() > 0.01  # the bags do move the weights


def test_one_standard_error_rule():
    rng = np.random.default_rng(2)
    y = rng.normal(size=300)
    good, noisy = y + rng.normal(0, 0.5, 300), y + rng.normal(0, 1.0, 300)
    w = np.ones(300)
    assert _clearly_better(_losses(y, good), _losses(y, noisy), w)
    assert not _clearly_better(_losses(y, noisy), _losses(y, good), w)
    twin = good + rng.normal(0, 0.01, 300)
    assert not _clearly_better(
        _losses(y, twin), _losses(y, good), w
    )  # a hair better is not clearly better


def test_monotone_lightgbm_never_rises_with_impedance():
    data = _data(300)
    data.y = data.y + 0.02 * np.sin(
        data.X["impedance"].to_numpy() / 300
    )  # wiggles a free model would follow
    model = LightGBM("regression", ["impedance", "other"], monotone={"impedance": -1}).fit(data)
    sweep = pd.DataFrame({"impedance": np.linspace(6000, 12000, 400), "other": 0.3})
    assert np.all(np.diff(model.predict(sweep)) <= 1e-12)
    free = LightGBM("regression", ["impedance", "other"]).fit(data)
    assert np.any(np.diff(free.predict(sweep)) > 1e-6)


def test_save_and_load_predict_identically(tmp_path):
    data = _data(150)
    codes = (data.X["impedance"] < 9000).astype(int).to_numpy()
    cls = FitData(data.X, codes, data.weights, data.xy, data.groups, ["hard", "soft"])
    mixture_data = FitData(
        data.X, data.y, data.weights, data.xy, data.groups, [], codes, ["hard", "soft"]
    )
    models = [
        Linear(["impedance"]).fit(data),
        LightGBM("regression", ["impedance", "other"]).fit(data),
        Logistic(["impedance"]).fit(cls),
        SplineLogistic(["impedance", "other"]).fit(cls),
        LightGBM("classification", ["impedance"]).fit(cls),
        FaciesMixture(["impedance"]).fit(mixture_data),
        Blend([Linear(["impedance"]), LightGBM("regression", ["impedance"])], [0.3, 0.7]).fit(data),
    ]
    # a facies mixture saved by an earlier version, whose classifier was LightGBM, still loads
    earlier = FaciesMixture(["impedance"]).fit(mixture_data)
    earlier.classifier_ = LightGBM("classification", ["impedance"], "facies_classifier").fit(cls)
    assert isinstance(models[5].classifier_, SplineLogistic)
    models.append(earlier)
    for i, model in enumerate(models):
        desc = model.save(tmp_path, f"m{i}")
        back = load_candidate(desc, tmp_path)
        np.testing.assert_array_equal(model.predict(data.X, data.xy), back.predict(data.X, data.xy))


def test_logistic_handles_classes_missing_from_a_fold():
    data = _data(80)
    codes = (data.X["impedance"] < 9000).astype(int).to_numpy()  # classes 0, 1 of three
    model = Logistic(["impedance"]).fit(
        FitData(data.X, codes, data.weights, data.xy, data.groups, ["a", "b", "c"])
    )
    proba = model.predict(data.X)
    assert proba.shape == (80, 3) and np.all(proba[:, 2] < 1e-6)
    np.testing.assert_allclose(proba.sum(axis=1), 1)


def test_spline_logistic_matches_scikit_learn_pipeline():
    """Reference library: scikit-learn's StandardScaler -> SplineTransformer (5 uniform knots
    over the training range, cubic, linear beyond it) -> LogisticRegression(C=1) on the same
    weighted wells gives the same probabilities, inside and beyond the training range."""
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import SplineTransformer, StandardScaler

    data = _data(150, seed=5)
    imp = data.X["impedance"].to_numpy()
    codes = (imp > 8000).astype(int) + (imp > 10500)
    weights = np.random.default_rng(5).uniform(0.5, 2.0, 150)
    cls = FitData(data.X, codes, weights, data.xy, data.groups, ["a", "b", "c"])
    ours = SplineLogistic(["impedance", "other"]).fit(cls)
    reference = make_pipeline(
        StandardScaler(),
        SplineTransformer(n_knots=5, degree=3, extrapolation="linear"),
        LogisticRegression(C=1.0, max_iter=2000),
    ).fit(data.X.to_numpy(), codes, logisticregression__sample_weight=weights)
    beyond = pd.DataFrame({"impedance": [4000.0, 9000.0, 14000.0], "other": [-4.0, 0.0, 4.0]})
    for X in (data.X, beyond):
        np.testing.assert_allclose(
            ours.predict(X), reference.predict_proba(X.to_numpy()), atol=1e-8
        )
        # the map's log-odds, summed from the four non-zero basis functions of each value,
        # equal the basis matrix (SplineTransformer's) times the coefficients
        np.testing.assert_allclose(
            ours.raw_output(X), ours._design(X) @ ours.coef_.T + ours.intercept_, atol=1e-12
        )


def test_facies_candidates_on_maps_and_volumes():
    """On maps the spline logistic on every feature stands in for the linear one (which took
    the blend on preferential drilling and mapped worse) and LightGBM classifiers are left out
    (their probabilities stay flat beyond the wells' range, below); volumes keep what was
    measured there."""
    from predictor.models import leaderboard_candidates

    attrs, names = ["impedance"], ["impedance", "impedance_smooth100m"]
    on_map = [c.name for c in leaderboard_candidates("classification", attrs, names)]
    in_volume = [c.name for c in leaderboard_candidates("classification", attrs, names, True)]
    assert on_map == ["logistic", "logistic_splines"]
    assert "logistic_all_features" in in_volume and "logistic_splines" not in in_volume
    assert {"lightgbm", "lightgbm_attributes_only"} <= set(in_volume)
    porosity = [c.name for c in leaderboard_candidates("regression", attrs, names)]
    assert {"lightgbm", "lightgbm_attributes_only"} <= set(porosity)


def test_tree_facies_probabilities_stay_flat_beyond_the_wells_range():
    """Why LightGBM classifiers are not offered for facies maps: sand falls off with impedance;
    wells sample impedance 8000-10000 only.  At 11000-12000, beyond the wells, the logistic's
    sand probability keeps falling (as the truth does) while the trees hold their last leaf's."""
    from predictor.models import LightGBM, Logistic

    rng = np.random.default_rng(3)
    n = 400
    imp = rng.uniform(8000, 10000, n)
    sand = (rng.uniform(size=n) < 1 / (1 + np.exp((imp - 9000) / 400))).astype(int)
    X = pd.DataFrame({"impedance": imp})
    data = FitData(
        X, sand, np.ones(n), np.column_stack([imp, imp]), np.arange(n) % 5, ["other", "sand"]
    )
    far = pd.DataFrame({"impedance": [10000.0, 11000.0, 12000.0]})
    trees = LightGBM("classification", ["impedance"]).fit(data).predict(far)[:, 1]
    linear = Logistic(["impedance"]).fit(data).predict(far)[:, 1]
    truth = 1 / (1 + np.exp((far["impedance"].to_numpy() - 9000) / 400))
    assert np.ptp(trees) < 1e-9  # one leaf for everything beyond the range
    assert linear[0] > linear[1] > linear[2] and abs(linear[2] - truth[2]) < 0.01
    assert trees[2] - truth[2] > 0.05  # the trees keep sand at 0.11 where it is 0.0006


def test_regression_candidates_on_maps_and_volumes():
    """Maps krige the residuals of a linear drift on the attributes and on every feature;
    volumes have no kriging candidates. On the attributes alone the two drifts would be one."""
    from predictor.models import leaderboard_candidates

    attrs, names = ["impedance"], ["impedance", "impedance_smooth100m"]
    on_map = {c.name: c for c in leaderboard_candidates("regression", attrs, names)}
    in_volume = [c.name for c in leaderboard_candidates("regression", attrs, names, True)]
    assert on_map["regression_kriging_all_features"].features == names
    assert on_map["regression_kriging"].features == attrs
    assert not any("kriging" in name for name in in_volume)
    alone = [c.name for c in leaderboard_candidates("regression", attrs, attrs)]
    assert "regression_kriging_all_features" not in alone


def test_spline_logistic_draws_a_class_the_linear_logistic_cannot():
    """A facies found only in a middle band of impedance (a bump in its probability): the
    additive spline model follows it; a linear logistic's log-odds cannot turn back."""
    data = _data(300, seed=6)
    band = lambda X: (np.abs(X["impedance"].to_numpy() - 9000) < 1200).astype(int)  # noqa: E731
    cls = FitData(data.X, band(data.X), data.weights, data.xy, data.groups, ["out", "in"])
    fresh = _data(2000, seed=7).X
    truth = np.eye(2)[band(fresh)]
    brier = {
        name: np.mean(np.sum((model.fit(cls).predict(fresh) - truth) ** 2, axis=1))
        for name, model in (
            ("linear", Logistic(["impedance"])),
            ("splines", SplineLogistic(["impedance"])),
        )
    }
    assert brier["splines"] < 0.5 * brier["linear"]


def test_spread_model_widens_where_errors_are_larger():
    rng = np.random.default_rng(3)
    n = 2000
    imp = rng.uniform(0, 1, n)
    resid = rng.normal(
        0, 0.2 * np.exp(2.5 * imp)
    )  # error spread grows with the attribute (log-linear)
    X = pd.DataFrame({"impedance": imp})
    model = SpreadModel(["impedance"]).fit(X[:1000], resid[:1000], np.ones(1000))
    s = model.predict(X)
    assert s[imp > 0.8].mean() > 3 * s[imp < 0.2].mean()
    cal = calibrate(resid[:1000], np.ones(1000), spread=s[:1000])
    q10, q90 = cal.apply(np.zeros(n - 1000), s[1000:])
    new = resid[1000:]
    inside = (new >= q10) & (new <= q90)
    hi, lo = imp[1000:] > 0.7, imp[1000:] < 0.3
    # locally scaled intervals cover about 80 % in both regimes (constant ones would not)
    assert inside[hi].mean() == pytest.approx(0.8, abs=0.07)
    assert inside[lo].mean() == pytest.approx(0.8, abs=0.07)


def test_candidates_follow_scikit_learn_conventions_and_clone_unfitted():
    """sklearn.base.clone (which checks that __init__ stores its parameters unchanged) copies
    every candidate with its settings and none of its fitted state; each kind loads by name."""
    from sklearn.base import clone

    from predictor.models import LOADERS, Kriging, RegressionKriging, WellTies

    data = _data(120)
    candidates = [
        Linear(["impedance"]),
        Logistic(["impedance"]),
        SplineLogistic(["impedance", "other"]),
        Kriging(),
        LightGBM("regression", ["impedance"], monotone={"impedance": -1}, max_rounds=50),
        RegressionKriging(["impedance"]),
        FaciesMixture(["impedance", "other"], member_features=["impedance"]),
        WellTies(Linear(["impedance"])),
        Blend([Linear(["impedance"]), Kriging()], [0.4, 0.6]),
    ]
    assert set(LOADERS) >= {
        "linear",
        "logistic",
        "spline_logistic",
        "kriging",
        "lightgbm",
        "regression_kriging",
        "facies_mixture",
        "well_ties",
        "blend",
    }
    for candidate in candidates:
        copy = clone(candidate)
        assert (
            type(copy) is type(candidate)
            and copy.get_params(deep=False).keys() == candidate.get_params(deep=False).keys()
        )
        assert repr(copy) == repr(candidate) and copy.name == candidate.name
    fitted = WellTies(Linear(["impedance"])).fit(data)
    assert not hasattr(clone(fitted), "kriging_") and not hasattr(clone(fitted).base, "coef_")
    assert not hasattr(fitted.base, "coef_")  # the parameter is never fitted in place: base_ is


def test_blend_refits_its_weights_on_the_rows_it_is_given():
    """Inside a fold a blend must not keep weights fitted on every well (the held-out ones too)."""
    data = _data(200)
    rng = np.random.default_rng(4)
    # member out-of-fold predictions: member 0 good on the first half, member 1 on the second
    good, bad = data.y + rng.normal(0, 0.001, 200), data.y + rng.normal(0, 0.05, 200)
    P = np.column_stack(
        [np.where(np.arange(200) < 100, good, bad), np.where(np.arange(200) < 100, bad, good)]
    )
    blend = Blend(
        [Linear(["impedance"]), Linear(["other"], "linear_other")],
        [0.5, 0.5],
        member_oof=P,
        y_all=data.y,
    )
    first = blend.fit(data.subset(np.arange(100))).weights_
    second = Blend(**blend.get_params(deep=False)).fit(data.subset(np.arange(100, 200))).weights_
    assert first[0] > 0.9 and second[1] > 0.9
    np.testing.assert_array_equal(blend.weights, [0.5, 0.5])  # the parameter is untouched


def test_a_new_candidate_is_one_class(tmp_path):
    """The contributor guide's example (DEVELOPERS.md): a subclass with a kind is cloned, cross-
    validated, explained, saved and loaded with no edit anywhere else."""
    from scipy.spatial import cKDTree
    from sklearn.base import clone

    from predictor.models import Candidate, _kriging_only, out_of_fold

    class Nearest(Candidate):
        kind = "nearest_well_example"

        def __init__(self, name: str = "nearest_well"):
            self.name = name

        features = property(lambda self: [])

        def fit(self, data):
            self.xy_, self.y_ = data.xy.copy(), data.y.copy()
            return self

        def predict(self, X, xy):
            return self.y_[cKDTree(self.xy_).query(xy)[1]]

        def contributions(self, X, xy, names, background=None, seed=0):
            return _kriging_only(self.predict(X, xy), len(names)), np.zeros(len(X))

        def save(self, folder, stem):
            return {
                "type": self.kind,
                "name": self.name,
                "xy": self.xy_.tolist(),
                "y": self.y_.tolist(),
            }

        @classmethod
        def load(cls, desc, folder):
            model = cls(desc["name"])
            model.xy_, model.y_ = np.array(desc["xy"]), np.array(desc["y"])
            return model

    data = _data(100)
    oof = out_of_fold(Nearest(), data)
    assert oof.shape == (100,) and not np.allclose(
        oof, data.y
    )  # held-out wells are never their own nearest
    fitted = clone(Nearest()).fit(data)
    values, base = fitted.contributions(data.X, data.xy, ["impedance", "other"])
    np.testing.assert_allclose(
        base + values.sum(-1), data.y
    )  # at the wells the nearest well is itself
    back = load_candidate(fitted.save(tmp_path, "m"), tmp_path)
    np.testing.assert_array_equal(
        back.predict(data.X, data.xy + 1.0), fitted.predict(data.X, data.xy + 1.0)
    )


def test_facies_well_ties_draw_the_probabilities_to_nearby_wells(tmp_path):
    """Sand in the west, shale in the east, and an attribute that says nothing: the logistic
    base predicts about the proportions everywhere; kriging its indicator residuals must give
    sand between the western wells and shale between the eastern ones, with probabilities that
    stay in [floor, 1], sum to one and survive a save and load."""
    from predictor.models import PROBABILITY_FLOOR, WellTies

    rng = np.random.default_rng(3)
    n = 120
    xy = rng.uniform(0, 2000, (n, 2))
    codes = (xy[:, 0] > 1000).astype(int)  # 0 sand (west), 1 shale (east)
    X = pd.DataFrame({"impedance": rng.normal(size=n)})
    groups = (xy[:, 0] // 400).astype(int) * 10 + (xy[:, 1] // 400).astype(int)
    data = FitData(X, codes, np.ones(n), xy, groups, ["sand", "shale"], seed=0)
    base = Logistic(["impedance"]).fit(data)
    tied = WellTies(Logistic(["impedance"])).fit(data)
    nodes = np.array([[300.0, 1000.0], [1700.0, 1000.0]])
    Xq = pd.DataFrame({"impedance": [0.0, 0.0]})
    assert np.all(np.abs(base.predict(Xq) - 0.5) < 0.15)  # the attribute says nothing
    p = tied.predict(Xq, nodes)
    assert p[0, 0] > 0.9 and p[1, 1] > 0.9
    assert np.allclose(p.sum(axis=1), 1.0) and p.min() >= PROBABILITY_FLOOR / 2
    assert tied.task == "classification" and tied.name == "logistic+well_ties"
    desc = tied.save(tmp_path, "facies")
    np.testing.assert_allclose(load_candidate(desc, tmp_path).predict(Xq, nodes), p, atol=1e-12)
