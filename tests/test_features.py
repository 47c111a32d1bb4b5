"""Features on the grid: the smoothing against scipy's reference filter."""

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter

from predictor.features import FFT_TAPS, gaussian


@pytest.mark.parametrize(
    "shape, sigma",
    [
        ((300, 200), (3.0, 4.0)),
        ((300, 200), (60.0, 80.0)),
        ((200, 300), (250.0, 10.0)),
        ((12, 50, 40), (0.0, 30.0, 2.0)),
    ],
)
def test_smoothing_equals_scipy_gaussian_filter(shape, sigma):
    # reference library: scipy.ndimage.gaussian_filter (mode "nearest", truncate 4); kernels longer
    # than FFT_TAPS run as an FFT convolution here and must agree to rounding
    values = 9000 + 300 * np.random.default_rng(1).standard_normal(shape)
    ours = gaussian(values, sigma)
    ref = gaussian_filter(values, sigma, mode="nearest")
    np.testing.assert_allclose(ours, ref, rtol=1e-13, atol=0)
    if max(sigma) * 8 + 1 <= FFT_TAPS:
        np.testing.assert_array_equal(ours, ref)  # short kernels: scipy's own code, bit for bit


def test_feature_names_read_as_words_in_titles():
    from predictor.features import describe_feature

    assert describe_feature("impedance_smooth1000m") == "impedance smoothed over 1,000 m"
    assert describe_feature("ai_contrast250m") == "ai minus its 250 m smoothing"
    assert (
        describe_feature("impedance_vsmooth12") == "impedance smoothed vertically over 12 (z units)"
    )
    assert describe_feature("ai_gradient") == "lateral gradient of ai"
    assert describe_feature("kriging_of_wells") == "kriging of the wells"
    assert describe_feature("impedance") == "impedance"  # an attribute is its own name
