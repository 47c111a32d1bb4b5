"""Interval calibration: conformal coverage and ordering."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from predictor.intervals import calibrate


@pytest.mark.parametrize("n", [60, 300])
def test_conformal_coverage_on_exchangeable_data(n):
    # Lei et al. 2018 (JASA): split-conformal intervals cover at least the nominal level on
    # exchangeable data; averaged over many calibration sets the coverage is close to 0.80
    # (expected 0.80 to 0.80 + 2/(n+1); 0.01 allows for the Monte Carlo noise of 200 repetitions)
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
@given(st.lists(st.floats(-10, 10), min_size=5, max_size=60), st.lists(st.floats(-1, 1), min_size=1, max_size=20))
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


def test_porosity_intervals_stay_inside_zero_and_one():
    from predictor.intervals import calibrate

    rng = np.random.default_rng(2)
    cal = calibrate(rng.normal(0, 0.05, 200), bounds=(0.0, 1.0))
    q10, q90 = cal.apply(np.array([0.01, 0.5, 0.99]))
    assert np.all(q10 >= 0) and np.all(q90 <= 1) and q10[1] < 0.5 < q90[1]
