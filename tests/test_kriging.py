"""Semivariograms and kriging against hand-worked cases and scikit-learn's Gaussian process."""

import numpy as np
import pytest
from scipy.spatial.distance import cdist
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern

from predictor.kriging import OrdinaryKriging, simple_kriging
from predictor.variogram import VariogramModel, along_wells, experimental, fit_variogram


def test_experimental_semivariogram_hand_computed():
    # points on a line at 0, 1, 2, 3 with values 1, 2, 4, 7:
    # lag 1: diffs 1, 2, 3 -> gamma = (1 + 4 + 9) / 3 / 2 = 2.3333; lag 2: 3, 5 -> 8.5; lag 3: 6 ->
    # 18
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
        model = fit_variogram(
            experimental(pts[:, 0], pts[:, 1], values, n_lags=15, max_lag=1500),
            kinds=("exponential",),
        )
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
    kernel = ConstantKernel(sigma2, "fixed") * Matern(
        length_scale=a / 3, length_scale_bounds="fixed", nu=0.5
    )
    gp = GaussianProcessRegressor(kernel, alpha=nugget, optimizer=None, normalize_y=False).fit(
        pts, values
    )
    mean, sd = gp.predict(query, return_std=True)
    np.testing.assert_allclose(est, mean, atol=1e-8)
    np.testing.assert_allclose(var, sd**2 + nugget, atol=1e-8)


def test_ordinary_kriging_exact_at_wells_and_unbiased_weights():
    rng = np.random.default_rng(3)
    pts = rng.uniform(0, 1000, (30, 2))
    values = 5 + rng.normal(size=30)
    ok = OrdinaryKriging(VariogramModel("spherical", 0.0, 1.0, 400.0)).fit(
        pts[:, 0], pts[:, 1], values
    )
    est, var = ok.predict(pts[:, 0], pts[:, 1], return_variance=True)
    np.testing.assert_allclose(est, values, atol=1e-6)
    assert np.all(var < 1e-6)
    # far from every well the estimate tends to the generalised-least-squares mean, within the data
    far, far_var = ok.predict([1e6], [1e6], return_variance=True)
    assert values.min() < far[0] < values.max() and far_var[0] > 0.99
    # a constant field stays constant (weights sum to one)
    flat = OrdinaryKriging(VariogramModel("spherical", 0.0, 1.0, 400.0)).fit(
        pts[:, 0], pts[:, 1], np.full(30, 2.5)
    )
    np.testing.assert_allclose(
        flat.predict(rng.uniform(0, 1000, 50), rng.uniform(0, 1000, 50)), 2.5
    )


def test_round_trip_through_dict():
    rng = np.random.default_rng(4)
    pts = rng.uniform(0, 1000, (25, 2))
    ok = OrdinaryKriging().fit(pts[:, 0], pts[:, 1], rng.normal(size=25))
    back = OrdinaryKriging.from_dict(ok.to_dict())
    q = rng.uniform(0, 1000, (10, 2))
    np.testing.assert_array_equal(ok.predict(q[:, 0], q[:, 1]), back.predict(q[:, 0], q[:, 1]))


def _wells(seed=8, n=60):
    rng = np.random.default_rng(seed)
    pts = rng.uniform(0, 2000, (n, 2))
    values = np.sin(pts[:, 0] / 400) + np.cos(pts[:, 1] / 300) + rng.normal(0, 0.1, n)
    return pts, values


def _pykrige(pts: np.ndarray, values: np.ndarray, model: VariogramModel):
    """Reference library: pykrige.ok.OrdinaryKriging (PyPI "pykrige") with the same spherical
    semivariogram, given by partial sill, range and nugget."""
    from pykrige.ok import OrdinaryKriging as PyKrigeOK

    return PyKrigeOK(
        pts[:, 0],
        pts[:, 1],
        values,
        variogram_model="spherical",
        variogram_parameters={"psill": model.sill, "range": model.range, "nugget": model.nugget},
    )


def test_ordinary_kriging_equals_pykrige_with_the_same_variogram():
    # reference library: pykrige (see _pykrige), points off the wells
    pts, values = _wells()
    model = VariogramModel("spherical", 0.05, 0.8, 700.0)
    ours = OrdinaryKriging(model).fit(pts[:, 0], pts[:, 1], values)
    q = np.random.default_rng(9).uniform(0, 2000, (200, 2)) + 0.37
    est, var = ours.predict(q[:, 0], q[:, 1], return_variance=True)
    ref_est, ref_var = _pykrige(pts, values, model).execute("points", q[:, 0], q[:, 1])
    np.testing.assert_allclose(est, ref_est, atol=1e-8)
    np.testing.assert_allclose(var, ref_var, atol=1e-8)


def test_short_spherical_range_is_kriged_from_the_wells_within_it_and_equals_pykrige():
    # a spherical range far shorter than the well spacing: the estimate sums only the wells
    # within the range, and must equal the dense form and pykrige.ok.OrdinaryKriging (PyPI
    # "pykrige") with the same variogram, off the wells and at them (nugget at distance 0)
    rng = np.random.default_rng(12)
    pts = rng.uniform(0, 20000, (200, 2))
    values = rng.normal(0, 1, 200)
    model = VariogramModel("spherical", 0.1, 1.0, 900.0)
    ours = OrdinaryKriging(model).fit(pts[:, 0], pts[:, 1], values)
    assert ours._compact_reach() is not None and ours.reach_ <= 50
    q = np.vstack([rng.uniform(0, 20000, (3000, 2)), pts[:20]])
    est = ours.predict(q[:, 0], q[:, 1])
    near = ours.predict(q[:, 0], q[:, 1], return_variance=True)[0]  # the dense form
    np.testing.assert_allclose(est, near, atol=1e-12)
    ref = _pykrige(pts, values, model)
    off = slice(0, 3000)  # pykrige returns the datum itself at a well; ours does too (below)
    np.testing.assert_allclose(est[off], ref.execute("points", q[off, 0], q[off, 1])[0], atol=1e-8)
    np.testing.assert_allclose(est[3000:3020], values[:20], atol=1e-8)


def test_experimental_semivariogram_and_fitted_range_equal_gstools():
    # reference library: gstools.vario_estimate on the same bin edges, and
    # gstools.Spherical.fit_variogram on the same lags; gstools weights residuals by w^2 (curve_fit
    # sigma = 1/w), ours by the pair counts, so w = sqrt(counts) is the same objective
    import gstools as gs

    pts, values = _simulate(600.0, n=400, seed=4)
    exp = experimental(pts[:, 0], pts[:, 1], values, n_lags=12, max_lag=1200.0)
    edges = np.linspace(0.0, 1200.0, 13)
    _, gamma, counts = gs.vario_estimate((pts[:, 0], pts[:, 1]), values, edges, return_counts=True)
    have = counts > 0
    np.testing.assert_allclose(exp.gamma, gamma[have], rtol=1e-10)
    np.testing.assert_array_equal(exp.counts, counts[have])
    ours = fit_variogram(exp, kinds=("spherical",))
    ref = gs.Spherical(dim=2)
    ref.fit_variogram(exp.lags, exp.gamma, nugget=True, weights=np.sqrt(exp.counts))
    assert ours.range == pytest.approx(ref.len_scale, rel=0.05)
    assert ours.nugget + ours.sill == pytest.approx(ref.sill, rel=0.05)


def test_fit_restarts_escape_a_local_minimum_and_flag_pure_nugget():
    from predictor.variogram import Experimental

    # a long-range structure: a single start at half the largest lag can stop short; the best
    # of several starts must fit at least as well as every single start (checked by the misfit)
    lags = np.linspace(50, 1500, 15)
    truth = VariogramModel("spherical", 0.1, 1.0, 4000.0)
    exp = Experimental(lags, truth(lags), np.full(15, 100))
    best = fit_variogram(exp, kinds=("spherical",))
    misfit = float(np.sum((best(lags) - exp.gamma) ** 2))
    assert misfit < 1e-4 and not best.pure_nugget
    flat = Experimental(lags, 1.0 + 0.01 * np.sin(lags), np.full(15, 100))
    assert fit_variogram(flat).pure_nugget


def _primal(pts, values, model, q):
    """Ordinary kriging as the textbook writes it: one system per query point's covariances
    (Isaaks & Srivastava 1989, ch. 12; here all right-hand sides at once)."""
    n = len(values)
    lhs = np.ones((n + 1, n + 1))
    lhs[:n, :n] = model.covariance(cdist(pts, pts)) + np.eye(n) * 1e-10 * (
        model.nugget + model.sill
    )
    lhs[n, n] = 0.0
    rhs = np.ones((n + 1, len(q)))
    rhs[:n] = model.covariance(cdist(pts, q))
    sol = np.linalg.solve(lhs, rhs)
    return (
        sol[:n].T @ values,
        model.nugget + model.sill - np.sum(sol[:n] * rhs[:n], axis=0) - sol[n],
    )


@pytest.mark.parametrize("kind", ["spherical", "exponential", "gaussian"])
def test_dual_form_equals_the_primal_solve(kind):
    pts, values = _wells(seed=11, n=80)
    model = VariogramModel(kind, 0.05, 0.8, 900.0)
    q = np.random.default_rng(12).uniform(0, 2000, (3000, 2))
    ok = OrdinaryKriging(model).fit(pts[:, 0], pts[:, 1], values)
    est, var = ok.predict(q[:, 0], q[:, 1], return_variance=True)
    ref_est, ref_var = _primal(pts, values, model, q)
    np.testing.assert_allclose(est, ref_est, atol=1e-8)
    np.testing.assert_allclose(var, np.maximum(ref_var, 0), atol=1e-8)
    np.testing.assert_array_equal(
        ok.predict(q[:, 0], q[:, 1]), est
    )  # the variance is optional, not a change


def test_moving_neighbourhood_holding_every_well_is_the_global_estimate():
    pts, values = _wells(seed=13, n=70)
    model = VariogramModel("spherical", 0.05, 0.8, 700.0)
    q = np.random.default_rng(14).uniform(-200, 2200, (5000, 2))
    glob = OrdinaryKriging(model).fit(pts[:, 0], pts[:, 1], values)
    every = OrdinaryKriging(model, neighbours=70).fit(pts[:, 0], pts[:, 1], values)
    assert every.local_ and len(every.predict(q[:, 0], q[:, 1])) == 5000 and len(every._tiles) > 4
    for a, b in zip(
        glob.predict(q[:, 0], q[:, 1], True), every.predict(q[:, 0], q[:, 1], True), strict=True
    ):
        np.testing.assert_allclose(b, a, atol=1e-8)
    # a smaller neighbourhood still honours the wells (each well is in its own tile's neighbourhood)
    near = OrdinaryKriging(VariogramModel("spherical", 0.0, 0.8, 700.0), neighbours=25).fit(
        pts[:, 0], pts[:, 1], values
    )
    np.testing.assert_allclose(near.predict(pts[:, 0], pts[:, 1]), values, atol=1e-6)
    back = OrdinaryKriging.from_dict(near.to_dict())
    np.testing.assert_array_equal(back.predict(q[:, 0], q[:, 1]), near.predict(q[:, 0], q[:, 1]))
    # a bundle written before the dual form stored no neighbourhood: it loads as the global system
    older = glob.to_dict()
    older.pop("neighbours")
    np.testing.assert_array_equal(
        OrdinaryKriging.from_dict(older).predict(q[:, 0], q[:, 1]), glob.predict(q[:, 0], q[:, 1])
    )


def test_many_wells_switch_to_a_moving_neighbourhood(monkeypatch):
    import predictor.kriging as kriging

    monkeypatch.setattr(kriging, "GLOBAL_WELLS", 50)
    pts, values = _wells(seed=15, n=60)
    ok = OrdinaryKriging().fit(pts[:, 0], pts[:, 1], values)
    assert ok.local_ and ok.neighbours_ == min(kriging.NEIGHBOURS, 60)
    assert not OrdinaryKriging().fit(pts[:50, 0], pts[:50, 1], values[:50]).local_


def test_wells_at_one_point_are_named_not_solved():
    from predictor.errors import ModelError

    pts, values = _wells(seed=16, n=20)
    pts[7] = pts[3]
    with pytest.raises(ModelError, match="wells 3 and 7"):
        OrdinaryKriging().fit(pts[:, 0], pts[:, 1], values)
    with pytest.raises(ModelError, match="3 or more"):
        OrdinaryKriging(neighbours=2).fit(pts[:3, 0], pts[:3, 1], values[:3])


def test_volume_semivariograms_pair_samples_within_a_well_or_at_one_z():
    # worked by hand: well A at z 0, 1, 2 with 0, 1, 3; well B at z 0, 1 with 10, 10.
    # Lag 1 pairs: A (0,1) 0.5, A (1,2) 2.0, B 0.0 -> mean 0.8333; lag 2: A (0,2) 4.5.
    # Pairs across wells (A 0 with B 10 at lag 0 or 1) would add 50 and more: they must not count.
    z = np.array([0.0, 1.0, 2.0, 0.0, 1.0])
    v = np.array([0.0, 1.0, 3.0, 10.0, 10.0])
    exp = along_wells(z, v, np.array(["A", "A", "A", "B", "B"]), n_lags=2, max_lag=2.5)
    np.testing.assert_allclose(exp.lags, [1.0, 2.0])
    np.testing.assert_allclose(exp.gamma, [2.5 / 3, 4.5])
    np.testing.assert_array_equal(exp.counts, [3, 1])
    # lateral pairs at the same z only: of (0 m, z 0, 0), (10 m, z 0, 2) and (20 m, z 5, 10) the one
    # pair at z 0 remains (lag 10, half squared difference 2); all pairs give lags 10, 10, 20
    lateral = experimental(
        [0.0, 10.0, 20.0],
        [0.0, 0.0, 0.0],
        [0.0, 2.0, 10.0],
        n_lags=2,
        max_lag=25,
        z=[0.0, 0.0, 5.0],
        z_tolerance=1.0,
    )
    np.testing.assert_allclose(lateral.gamma, [2.0])
    every = experimental([0.0, 10.0, 20.0], [0.0, 0.0, 0.0], [0.0, 2.0, 10.0], n_lags=2, max_lag=25)
    np.testing.assert_allclose(every.gamma, [(2.0 + 32.0) / 2, 50.0])
