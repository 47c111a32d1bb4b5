"""Semivariograms and kriging against hand-worked cases and scikit-learn's Gaussian process."""

import numpy as np
import pytest
from scipy.spatial.distance import cdist
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern

from predictor.kriging import OrdinaryKriging, simple_kriging
from predictor.variogram import VariogramModel, experimental, fit_variogram


def test_experimental_semivariogram_hand_computed():
    # points on a line at 0, 1, 2, 3 with values 1, 2, 4, 7:
    # lag 1: diffs 1, 2, 3 -> gamma = (1 + 4 + 9) / 3 / 2 = 2.3333; lag 2: 3, 5 -> 8.5; lag 3: 6 -> 18
    exp = experimental([0, 1, 2, 3], [0, 0, 0, 0], [1, 2, 4, 7], n_lags=3, max_lag=3.5)
    np.testing.assert_allclose(exp.lags, [1, 2, 3])
    np.testing.assert_allclose(exp.gamma, [7 / 3, 8.5, 18])
    np.testing.assert_array_equal(exp.counts, [3, 2, 1])


def test_directional_semivariogram_selects_pairs():
    # pairs along y (azimuth 0, north) and along x (azimuth 90): values change only along x
    x = np.array([0, 0, 10, 10.0])
    y = np.array([0, 10, 0, 10.0])
    v = np.array([0, 0, 5, 5.0])
    north = experimental(x, y, v, n_lags=2, max_lag=12, azimuth=0, tolerance=10)
    east = experimental(x, y, v, n_lags=2, max_lag=12, azimuth=90, tolerance=10)
    np.testing.assert_allclose(north.gamma, [0.0])
    np.testing.assert_allclose(east.gamma, [12.5])


def _simulate(cov_range, n=900, seed=0):
    rng = np.random.default_rng(seed)
    pts = rng.uniform(0, 3000, (n, 2))
    model = VariogramModel("exponential", 0.0, 1.0, cov_range)
    cov = model.covariance(cdist(pts, pts)) + 1e-8 * np.eye(n)
    values = np.linalg.cholesky(cov) @ rng.standard_normal(n)
    return pts, values


def test_fitted_range_recovers_simulated_range():
    # a field simulated with a known exponential covariance (practical range 600 m); the fit over
    # three realisations recovers it within 35 %
    ranges = []
    for seed in range(3):
        pts, values = _simulate(600.0, seed=seed)
        model = fit_variogram(experimental(pts[:, 0], pts[:, 1], values, n_lags=15, max_lag=1500),
                              kinds=("exponential",))
        ranges.append(model.range)
    assert np.mean(ranges) == pytest.approx(600.0, rel=0.35)


def test_simple_kriging_equals_gaussian_process():
    # reference library: scikit-learn GaussianProcessRegressor, same kernel, no optimiser. The
    # exponential covariance sigma2 exp(-3h/a) is a Matern kernel with nu = 0.5, length a/3.
    rng = np.random.default_rng(2)
    pts = rng.uniform(0, 1000, (40, 2))
    values = rng.normal(size=40)
    query = rng.uniform(0, 1000, (200, 2))
    sigma2, a, nugget = 1.7, 450.0, 1e-6
    model = VariogramModel("exponential", nugget, sigma2, a)
    est, var = simple_kriging(pts[:, 0], pts[:, 1], values, model, 0.0, query[:, 0], query[:, 1])
    kernel = ConstantKernel(sigma2, "fixed") * Matern(length_scale=a / 3, length_scale_bounds="fixed", nu=0.5)
    gp = GaussianProcessRegressor(kernel, alpha=nugget, optimizer=None, normalize_y=False).fit(pts, values)
    mean, sd = gp.predict(query, return_std=True)
    np.testing.assert_allclose(est, mean, atol=1e-8)
    np.testing.assert_allclose(var, sd**2 + nugget, atol=1e-8)


def test_ordinary_kriging_exact_at_wells_and_unbiased_weights():
    rng = np.random.default_rng(3)
    pts = rng.uniform(0, 1000, (30, 2))
    values = 5 + rng.normal(size=30)
    ok = OrdinaryKriging(VariogramModel("spherical", 0.0, 1.0, 400.0)).fit(pts[:, 0], pts[:, 1], values)
    est, var = ok.predict(pts[:, 0], pts[:, 1], return_variance=True)
    np.testing.assert_allclose(est, values, atol=1e-6)
    assert np.all(var < 1e-6)
    # far from every well the estimate tends to the generalised-least-squares mean, within the data
    far, far_var = ok.predict([1e6], [1e6], return_variance=True)
    assert values.min() < far[0] < values.max() and far_var[0] > 0.99
    # a constant field stays constant (weights sum to one)
    flat = OrdinaryKriging(VariogramModel("spherical", 0.0, 1.0, 400.0)).fit(pts[:, 0], pts[:, 1], np.full(30, 2.5))
    np.testing.assert_allclose(flat.predict(rng.uniform(0, 1000, 50), rng.uniform(0, 1000, 50)), 2.5)


def test_round_trip_through_dict():
    rng = np.random.default_rng(4)
    pts = rng.uniform(0, 1000, (25, 2))
    ok = OrdinaryKriging().fit(pts[:, 0], pts[:, 1], rng.normal(size=25))
    back = OrdinaryKriging.from_dict(ok.to_dict())
    q = rng.uniform(0, 1000, (10, 2))
    np.testing.assert_array_equal(ok.predict(q[:, 0], q[:, 1]), back.predict(q[:, 0], q[:, 1]))
