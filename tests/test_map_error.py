"""The training-size factor of the expected map error, on a model whose learning curve is known."""

import numpy as np
import pandas as pd
import pytest

from predictor.map_error import MAX_ERROR_RATIO, THINNED, training_size_factor
from predictor.models import Candidate, FitData


class PowerLawError(Candidate):
    """Predicts c * n^-b for targets that are all zero: its RMSE after training on n wells is
    exactly c * n^-b, a power-law learning curve."""

    def __init__(self, exponent: float = 0.5):
        self.exponent = exponent

    def fit(self, data: FitData) -> "PowerLawError":
        self.n_ = np.unique(data.units).size
        return self

    def predict(self, X, xy=None) -> np.ndarray:
        return np.full(len(X), 2.0 * self.n_**-self.exponent)


def _data(n_wells: int = 100) -> FitData:
    return FitData(
        pd.DataFrame({"a": np.zeros(n_wells)}),
        np.zeros(n_wells),
        np.ones(n_wells),
        np.zeros((n_wells, 2)),
        np.zeros(n_wells, int),
        units=np.arange(n_wells),
        rows=np.arange(n_wells),
    )


def _splits(n_wells: int = 100, k: int = 5):
    folds = np.arange(n_wells) % k
    return [(np.flatnonzero(folds != f), np.flatnonzero(folds == f)) for f in range(k)]


@pytest.mark.parametrize(
    "exponent, expected",
    [
        # 80 training wells per fold, 60 when thinned: ratio (60/80)^-b, factor (80/100)^b
        (0.5, 0.8**0.5),
        # fewer wells doing better is noise: no factor
        (-0.3, 1.0),
        # a ratio beyond the cap extrapolates the cap: (80/100)^(log 1.5 / log(4/3))
        (3.0, 0.8 ** (np.log(MAX_ERROR_RATIO) / np.log(1 / THINNED))),
    ],
)
def test_training_size_factor_follows_a_power_law_learning_curve(exponent, expected):
    data, splits = _data(), _splits()
    model = PowerLawError(exponent)
    cv_rmse = 2.0 * 80.0**-exponent  # the CV: every fold trained on 80 wells
    out = training_size_factor(model, data, splits, cv_rmse, seed=0)
    assert out["training_wells_per_fold"] == 80.0 and out["wells"] == 100
    assert out["error_ratio"] == pytest.approx((60 / 80) ** -exponent, rel=1e-4)
    assert out["factor"] == pytest.approx(expected, abs=1e-4)


def test_training_size_factor_needs_enough_wells_to_thin():
    # 20 wells: 16 per fold, 12 when thinned, too few to say anything: factor 1, not computed
    out = training_size_factor(PowerLawError(), _data(20), _splits(20), 1.0, seed=0)
    assert out["factor"] == 1.0 and out["error_ratio"] is None


def test_training_size_factor_is_one_for_leave_one_out():
    # 99 of 100 wells in every fold: the CV already trains on nearly every well
    splits = [(np.delete(np.arange(100), i), np.array([i])) for i in range(100)]
    out = training_size_factor(PowerLawError(), _data(), splits, 1.0, seed=0)
    assert out["factor"] == 1.0 and out["error_ratio"] is None
