"""Interval calibration: conformal coverage and ordering."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from predictor.intervals import calibrate


@pytest.mark.parametrize("n", [60, 300])
def test_conformal_coverage_on_exchangeable_data(n):
    # Lei et al. 2018 (JASA): split-conformal intervals cover at least the nominal level on
    # exchangeable data, the smoothed form (Vovk et al. 2005) the nominal level itself; averaged
    # over many calibration sets the coverage is close to 0.80 (the conservative form: up to
    # 0.80 + 2/(n+1); 0.01 allows for the Monte Carlo noise of 200 repetitions)
    rng = np.random.default_rng(n)
    cover = []
    for _ in range(200):
        cal = calibrate(rng.standard_t(5, n))
        new = rng.standard_t(5, 2000)
        q10, q90 = cal.apply(np.zeros_like(new))
        cover.append(np.mean((new >= q10) & (new <= q90)))
    assert 0.79 <= np.mean(cover) <= 0.80 + 2.0 / (n + 1) + 0.01


def test_weighted_calibration_follows_the_weights():
    # residuals from two regions; the weights say region B is four times as large on the map
    rng = np.random.default_rng(1)
    a, b = rng.normal(0, 0.5, 400), rng.normal(0, 2.0, 400)
    w = np.r_[np.full(400, 0.4), np.full(400, 1.6)]
    cal = calibrate(np.r_[a, b], w)
    new_a, new_b = rng.normal(0, 0.5, 20000), rng.normal(0, 2.0, 80000)
    new = np.r_[new_a, new_b]
    q10, q90 = cal.apply(np.zeros_like(new))
    assert np.mean((new >= q10) & (new <= q90)) == pytest.approx(0.80, abs=0.03)


@settings(max_examples=60, deadline=None)
@given(
    st.lists(st.floats(-10, 10), min_size=5, max_size=60),
    st.lists(st.floats(-1, 1), min_size=1, max_size=20),
)
def test_q10_below_q50_below_q90(residuals, q50):
    cal = calibrate(residuals)
    q10, q90 = cal.apply(np.array(q50))
    assert np.all(q10 <= np.array(q50)) and np.all(np.array(q50) <= q90)


def test_conformal_quantile_puts_the_test_points_mass_at_infinity():
    # Tibshirani, Barber, Candes & Ramdas (2019), NeurIPS: with equal weights the level-q
    # quantile of sum_i delta(R_i)/(n+1) + delta(+inf)/(n+1) is the ceil(q (n+1))-th smallest
    from predictor.intervals import conformal_quantile

    scores = np.arange(1.0, 20.0)  # n = 19
    assert conformal_quantile(scores, np.ones(19), 0.9, 1.0) == 18.0  # ceil(0.9 * 20) = 18
    assert conformal_quantile(scores[:8], np.ones(8), 0.9, 1.0) == np.inf  # ceil(0.9 * 9) = 9 > 8
    # doubling one residual's weight moves the quantile as the weighted CDF says
    weights = np.ones(19)
    weights[18] = 3.0  # the largest residual carries 3 of 22 units
    assert conformal_quantile(scores, weights, 0.8, 1.0) == 18.0  # 17/22 < 0.8 <= 18/22


@pytest.mark.parametrize("n", [10, 19, 33])
def test_smoothed_conformal_quantile_covers_exactly_the_level(n):
    # Vovk, Gammerman & Shafer (2005): with the test point's share of its own mass uniform on
    # [0, 1] the coverage is exactly the level. For exchangeable continuous scores the k-th
    # smallest of n covers a new one with probability k / (n + 1) (order statistics), so
    # averaging k / (n + 1) over the share gives the coverage without Monte Carlo noise; the
    # whole mass (share 1) covers ceil(0.9 (n + 1)) / (n + 1), above 0.9 unless 0.9 (n + 1) is whole
    from predictor.intervals import conformal_quantile

    scores = np.arange(1.0, n + 1.0)  # the k-th smallest score is k
    shares = (np.arange(10_000) + 0.5) / 10_000
    smoothed = np.mean([conformal_quantile(scores, np.ones(n), 0.9, 1.0, u) for u in shares])
    assert smoothed / (n + 1) == pytest.approx(0.9, abs=1e-3)
    conservative = conformal_quantile(scores, np.ones(n), 0.9, 1.0)
    assert conservative == np.ceil(0.9 * (n + 1))


def test_porosity_intervals_stay_inside_zero_and_one():
    from predictor.intervals import calibrate

    rng = np.random.default_rng(2)
    cal = calibrate(rng.normal(0, 0.05, 200), bounds=(0.0, 1.0))
    q10, q90 = cal.apply(np.array([0.01, 0.5, 0.99]))
    assert np.all(q10 >= 0) and np.all(q90 <= 1) and q10[1] < 0.5 < q90[1]


def test_held_out_coverage_sees_folds_that_do_not_describe_each_other():
    # two folds of 3 000 residuals, the second erring three times more. Calibrated on the other
    # fold, the first is covered 2 Phi(3 x 1.2816) - 1 of the time and the second
    # 2 Phi(1.2816 / 3) - 1 (reference values from scipy.stats.norm); calibrating on all wells
    # would read the nominal 80 %
    from scipy.stats import norm

    from predictor.intervals import held_out_coverage

    rng = np.random.default_rng(3)
    n = 3000
    folds = np.repeat([0, 1], n)
    residuals = rng.normal(0, np.where(folds == 0, 1.0, 3.0))
    splits = [(np.flatnonzero(folds != f), np.flatnonzero(folds == f)) for f in (0, 1)]
    z = norm.ppf(0.9)
    expected = ((2 * norm.cdf(3 * z) - 1) + (2 * norm.cdf(z / 3) - 1)) / 2
    predicted = rng.normal(size=2 * n)
    ours = held_out_coverage(predicted + residuals, predicted, np.ones(2 * n), splits)
    assert ours == pytest.approx(expected, abs=0.015)
    assert expected < 0.7
    # exchangeable residuals: the nominal 80 % (the smoothed conformal bound targets it exactly)
    same = held_out_coverage(predicted + rng.normal(size=2 * n), predicted, np.ones(2 * n), splits)
    assert 0.785 <= same <= 0.815


def test_exceedance_follows_the_residuals_of_wells_predicted_alike():
    # wells predicted at 0.05, 0.12 and 0.25 porosity; at 0.12 (between facies) 30 % of the
    # residuals are +0.07 and 70 % are -0.03, elsewhere they are symmetric. P(value > q50) at a
    # node predicted at 0.12 is, by hand, the Gaussian-kernel-weighted share of positive
    # residuals: (0.3 k0 + 0.5 k1 + 0.5 k2) / (k0 + k1 + k2) with k = exp(-d^2 / 2 sd^2), sd the
    # standard deviation of the predictions; one pooled distribution says (0.3 + 0.5 + 0.5) / 3
    rng = np.random.default_rng(8)
    n = 6000
    levels = np.repeat([0.12, 0.05, 0.25], n)
    residuals = np.where(
        levels == 0.12,
        np.where(rng.uniform(size=3 * n) < 0.3, 0.07, -0.03),
        rng.choice([-0.01, 0.01], 3 * n),
    )
    residuals += rng.normal(0, 1e-4, 3 * n)  # no ties at exactly the cutoff
    cal = calibrate(residuals, predicted=levels)
    sd = np.std(levels)
    k = np.exp(-0.5 * (np.array([0.0, 0.07, 0.13]) / sd) ** 2)
    expected = (0.3 * k[0] + 0.5 * k[1] + 0.5 * k[2]) / k.sum()
    assert cal.exceedance(np.array([0.12]), 0.12)[0] == pytest.approx(expected, abs=0.01)
    pooled = calibrate(residuals)
    assert pooled.exceedance(np.array([0.12]), 0.12)[0] == pytest.approx(
        (0.3 + 0.5 + 0.5) / 3, abs=0.01
    )
    # far above or below every residual: certain
    assert cal.exceedance(np.array([0.12, 0.12]), 0.5).tolist() == [0.0, 0.0]
    assert cal.exceedance(np.array([0.25]), 0.0)[0] == 1.0


def test_exceedance_mixes_each_facies_residuals_by_the_facies_probabilities():
    # sand wells err N(+0.03, 0.01), shale wells N(-0.01, 0.01); a node predicted at 0.12 with
    # P(sand) = 0.3: P(value > 0.12) = 0.3 (1 - Phi(-3)) + 0.7 (1 - Phi(1)), by hand with
    # scipy.stats.norm; a facies with fewer than CLASS_WELLS wells takes the pooled residuals
    levels = np.linspace(0.0005, 0.9995, 1000)
    sand, shale = stats.norm.ppf(levels, 0.03, 0.01), stats.norm.ppf(levels, -0.01, 0.01)
    residuals = np.concatenate([sand, shale, [0.5, 0.5, 0.5]])
    codes = np.repeat([0, 1, 2], [1000, 1000, 3])
    cal = calibrate(residuals, classes=("facies", codes, ["sand", "shale", "silt"]))
    assert cal.class_target == "facies" and set(cal.class_quantiles) == {"sand", "shale"}
    p = {"sand": np.array([0.3, 1.0]), "shale": np.array([0.7, 0.0]), "silt": np.zeros(2)}
    expected = 0.3 * stats.norm.sf(-3.0) + 0.7 * stats.norm.sf(1.0)
    mixed = cal.exceedance(np.array([0.12, 0.12]), 0.12, class_probabilities=p)
    assert mixed[0] == pytest.approx(expected, abs=0.005)
    assert mixed[1] == pytest.approx(stats.norm.sf(-3.0), abs=0.005)
    # without the probabilities: the pooled distribution (the share of residuals above zero)
    pooled = np.mean(residuals > 0.0)
    assert cal.exceedance(np.array([0.12]), 0.12)[0] == pytest.approx(pooled, abs=0.005)
    # silt (three wells, residual +0.5) falls back to the pooled distribution
    silt = cal.exceedance(
        np.array([0.12]), 0.12, class_probabilities={"silt": np.ones(1), "sand": np.zeros(1)}
    )
    assert silt[0] == pytest.approx(pooled, abs=0.005)
