"""Field-wide estimates debiased with the seismic, prior shift, facies map rules, exceedance."""

import numpy as np
import pytest
from scipy import stats
from sklearn.metrics import balanced_accuracy_score

from predictor.field_wide import (
    debiasing_weights,
    field_wide_values,
    prior_shift_factors,
    proportion_factors,
    rule_factors,
    shift,
)
from predictor.intervals import calibrate


def test_debiasing_weights_match_a_hand_computed_example():
    # two bins of the secondary; the map is half low, half high, the wells mostly high:
    # debiased mean = 0.5 * 1 + 0.5 * 3 = 2 (worked by hand), the raw wells' mean 14/6
    secondary = np.array([0.0, 0.0, 1.0, 1.0, 1.0, 1.0])
    values = np.array([1.0, 1.0, 3.0, 3.0, 3.0, 3.0])
    on_map = np.r_[np.zeros(50), np.ones(50)]
    w = debiasing_weights(secondary, on_map, np.ones(6), n_bins=2)
    assert np.sum(w * values) == pytest.approx(2.0)
    assert values.mean() == pytest.approx(14 / 6)


def test_debiasing_removes_most_of_a_preferential_drilling_bias():
    # population: z = s + noise with s uniform on the map (mean 0.5 exactly); wells drilled with
    # probability ~ s^2, so the raw wells' mean is about 0.75 (E[s^3] / E[s^2] = 3/4)
    rng = np.random.default_rng(3)
    s_map = rng.uniform(0, 1, 20000)
    s_wells = rng.choice(s_map, size=200, p=s_map**2 / np.sum(s_map**2))
    z = s_wells + rng.normal(0, 0.1, s_wells.size)
    ones = np.ones(z.size)
    wide = field_wide_values(
        "porosity", z, s_wells, s_map, ones, ones, ones, np.arange(z.size), map_values=s_map
    )
    naive, debiased = wide.estimates["naive"]["mean"], wide.estimates["debiased_seismic"]["mean"]
    assert naive - 0.5 > 0.2  # the drilling bias is large
    assert abs(debiased - 0.5) < 0.4 * (naive - 0.5)  # bins of the secondary: measured 0.55 here
    assert wide.estimates["model_map"]["mean"] == pytest.approx(0.5, abs=0.01)
    assert wide.interval["q10"] < debiased < wide.interval["q90"]


def test_prior_shift_reproduces_the_target_shares_with_saerens_form():
    rng = np.random.default_rng(0)
    p1 = rng.uniform(0.05, 0.95, 2000)
    proba = np.column_stack([1 - p1, p1])
    target = np.array([0.7, 0.3])
    c = prior_shift_factors(proba, target)
    shifted = shift(proba, c)
    np.testing.assert_allclose(shifted.mean(axis=0), target, atol=1e-6)
    # Saerens et al. (2002), two classes: p' = p c1 / (p c1 + (1 - p) c0)
    np.testing.assert_allclose(shifted[:, 1], p1 * c[1] / (p1 * c[1] + (1 - p1) * c[0]))


def test_map_rules():
    rng = np.random.default_rng(1)
    proba = rng.dirichlet([2, 1, 0.5], size=5000)
    target = np.array([0.5, 0.3, 0.2])
    drawn = np.argmax(proba * proportion_factors(proba, target), axis=1)
    np.testing.assert_allclose(np.bincount(drawn, minlength=3) / drawn.size, target, atol=0.01)
    balanced = np.argmax(proba * rule_factors("balanced", proba, target), axis=1)
    np.testing.assert_array_equal(balanced, np.argmax(proba / proba.mean(axis=0), axis=1))
    np.testing.assert_array_equal(
        np.argmax(proba * rule_factors("most-probable", proba, target), axis=1),
        np.argmax(proba, axis=1),
    )


def test_balanced_rule_maximises_balanced_accuracy_and_ignores_a_sliver_share():
    """With calibrated probabilities (labels drawn from them), drawing the largest probability
    relative to the class's mean probability scores a higher balanced accuracy (scikit-learn's
    balanced_accuracy_score) than the plain argmax or shares the probabilities do not hold; a
    minority class whose field-wide estimate is a sliver (0.01 against 0.15) is not drawn
    across the map, as dividing by that estimate would."""
    rng = np.random.default_rng(4)
    proba = rng.dirichlet([3, 1.5, 0.6], size=20000)
    labels = np.array([rng.choice(3, p=p) for p in proba])
    sliver = np.array([0.6, 0.39, 0.01])
    scores = {
        name: balanced_accuracy_score(labels, np.argmax(proba * f, axis=1))
        for name, f in (
            ("balanced", rule_factors("balanced", proba, sliver)),
            ("most-probable", np.ones(3)),
            ("by the sliver", 1 / sliver),
        )
    }
    assert scores["balanced"] > scores["most-probable"] + 0.02
    assert scores["balanced"] > scores["by the sliver"] + 0.02
    drawn = np.argmax(proba * rule_factors("balanced", proba, sliver), axis=1)
    # the minority class (mean probability 0.12) is drawn on 0.29 of the map, against 0.80
    assert np.mean(drawn == 2) < 0.35
    assert np.mean(np.argmax(proba / sliver, axis=1) == 2) > 0.75


def test_exceedance_follows_the_residual_distribution():
    # residuals from N(0, 0.02): P(value > q50 + 0.02) = 1 - Phi(1) = 0.1587 (scipy.stats.norm)
    residuals = stats.norm.ppf(np.linspace(0.0005, 0.9995, 2000), scale=0.02)
    cal = calibrate(residuals)
    p = cal.exceedance(np.array([0.20, 0.20, 0.20]), 0.22)
    assert p[0] == pytest.approx(1 - stats.norm.cdf(1.0), abs=0.005)
    assert cal.exceedance(np.array([0.2]), 0.2)[0] == pytest.approx(0.5, abs=0.005)
    assert (
        cal.exceedance(np.array([0.2]), 0.5)[0] == 0.0
        and cal.exceedance(np.array([0.2]), -0.5)[0] == 1.0
    )


def test_narrow_attribute_range_at_the_wells_is_warned_and_unknown_rules_refused():
    import pandas as pd

    from predictor.errors import InputError
    from predictor.training import TrainOptions, _attribute_cover

    on_map = pd.DataFrame({"impedance": np.linspace(6000, 12000, 1000)})
    narrow = pd.DataFrame({"impedance": [6000.0, 7000.0, 8000.0]})  # a third of the map's range
    wide = pd.DataFrame({"impedance": [6100.0, 9000.0, 11900.0]})
    (message,) = _attribute_cover(narrow, on_map, ["impedance"])
    assert "less than half of its range over the map" in message and "add wells" in message
    assert _attribute_cover(wide, on_map, ["impedance"]) == []
    with pytest.raises(
        InputError, match="facies_map = 'argmax' is not known; choose one of most-probable"
    ):
        TrainOptions(targets=["facies"], facies_map="argmax").check()
