"""Weighted statistics against numpy; rock physics against handbook values."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from predictor.rockphysics import (
    gardner_density,
    mass_balance_density,
    raymer_velocity,
    wyllie_velocity,
)
from predictor.stats import weighted_proportions, weighted_quantile
from predictor.synthetic import FieldSpec, make_field


@settings(max_examples=80, deadline=None)
@given(st.lists(st.floats(-1e3, 1e3), min_size=1, max_size=40), st.data())
def test_weighted_quantile_matches_numpy(values, data):
    # reference library: numpy.quantile(..., weights=..., method="inverted_cdf")
    w = data.draw(st.lists(st.floats(0.01, 10), min_size=len(values), max_size=len(values)))
    q = data.draw(st.floats(0.0, 1.0))
    ref = np.quantile(np.array(values), q, weights=np.array(w), method="inverted_cdf")
    assert weighted_quantile(values, q, w) == pytest.approx(ref)


def test_weighted_proportions():
    assert weighted_proportions(["a", "b", "b"], [2.0, 1.0, 1.0]) == {"a": 0.5, "b": 0.5}


def test_wyllie_worked_values():
    # SEG wiki worked problem: quartz 5850 m/s, water 1550 m/s -> about 4580, 3760, 3190 m/s
    v = wyllie_velocity([0.1, 0.2, 0.3], 5850.0, 1550.0)
    np.testing.assert_allclose(v, [4580, 3760, 3190], atol=5)


def test_raymer_and_density_plausible():
    # Raymer-Hunt-Gardner at zero porosity is the matrix velocity; at phi = 1 the fluid's (by
    # formula)
    assert raymer_velocity(0.0) == pytest.approx(5850.0)
    assert raymer_velocity(0.2) == pytest.approx(0.64 * 5850 + 0.2 * 1550)
    # handbook: quartz 2.65 g/cm3 at zero porosity
    assert mass_balance_density(0.0) == pytest.approx(2.65)
    # Gardner et al. (1974) as a plausibility band (+-10 %) for brine sandstone of 10-30 % porosity
    phi = np.array([0.1, 0.2, 0.3])
    ratio = mass_balance_density(phi) / gardner_density(raymer_velocity(phi))
    assert np.all(np.abs(ratio - 1) < 0.10)


def test_synthetic_field_follows_common_practice():
    seismic, truth, wells = make_field(FieldSpec(seed=11))
    phi = truth.porosity.values.ravel()
    # common practice: impedance falls as porosity rises; porosity a fraction; permeability skewed
    assert np.corrcoef(phi, truth.impedance_true.values.ravel())[0, 1] < -0.8
    assert np.corrcoef(phi, seismic.impedance.values.ravel())[0, 1] < -0.5
    assert 0 < phi.min() and phi.max() < 1
    k = truth.permeability.values.ravel()
    assert np.mean(k) > 2 * np.median(k)
    assert np.all(wells.permeability > 0)
