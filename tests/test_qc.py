"""QC checks against published values and hand-worked cases."""

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats as sps

from predictor.qc import (
    attribute_label,
    bias_test,
    duplicate_findings,
    outlier_findings,
    physical_findings,
    pooled_t_from_moments,
    run_qc,
    tukey_fences,
)
from predictor.stats import design_effect


def _sample_with_moments(n, mean, sd, seed):
    z = np.random.default_rng(seed).normal(size=n)
    z = (z - z.mean()) / z.std(ddof=1)
    return mean + sd * z


def test_pooled_t_nist_worked_example():
    # NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.5.3 (two-sample t-test, pooled
    # variance): n1=249, mean 20.14458, sd 6.41470; n2=79, mean 30.48101, sd 6.10771; T = -12.62059
    # (the T value as recalled from memory, confirmed here by computing it from the moments)
    t, dof, _ = pooled_t_from_moments(249, 20.14458, 6.41470, 79, 30.48101, 6.10771)
    assert t == pytest.approx(-12.62059, abs=5e-5)
    assert dof == 326
    # two samples with exactly these moments give the same T, in our test and in scipy (reference
    # library)
    a = _sample_with_moments(249, 20.14458, 6.41470, 1)
    b = _sample_with_moments(79, 30.48101, 6.10771, 2)
    result = bias_test(a, b, "mpg")
    ref = sps.ttest_ind(a, b, equal_var=True)
    assert result["t"] == pytest.approx(-12.62059, abs=5e-5)
    assert result["t"] == pytest.approx(ref.statistic, rel=1e-10)
    assert result["p_t"] == pytest.approx(ref.pvalue, rel=1e-6)
    ks = sps.ks_2samp(a, b)
    assert result["ks_d"] == pytest.approx(ks.statistic) and result["p_ks"] == pytest.approx(
        ks.pvalue
    )
    assert result["biased"] and "lower mpg than the map" in result["verdict"]


def test_bias_verdict_when_representative():
    rng = np.random.default_rng(3)
    result = bias_test(rng.normal(size=40), rng.normal(size=5000), "impedance")
    assert not result["biased"] and result["verdict"].startswith("No clear difference")


def test_design_effect_hand_worked():
    # one-way ANOVA intraclass correlation, ICC(1) of Shrout & Fleiss (1979), worked by hand:
    # groups [1, 2, 3] and [4, 5, 6]: MSB = 13.5, MSW = 1, m = 3, ICC = 12.5 / 15.5;
    # Kish's design effect 1 + (m - 1) ICC (Kish 1965, recalled from memory)
    deff, icc = design_effect([1, 2, 3, 4, 5, 6], ["a", "a", "a", "b", "b", "b"])
    assert icc == pytest.approx(12.5 / 15.5) and deff == pytest.approx(1 + 2 * 12.5 / 15.5)
    assert design_effect(np.arange(10.0), np.arange(10)) == (1.0, 0.0)  # one sample per group
    assert design_effect(np.repeat([1.0, 5.0, 2.0], 4), np.repeat([0, 1, 2], 4))[
        0
    ] == pytest.approx(4.0)


def test_bias_test_counts_samples_of_one_well_once():
    # ten identical samples per well carry the evidence of one: the test on the copies must
    # match scipy's t-test on the wells (up to the ddof of the copies' sd), not be 10x as sure
    rng = np.random.default_rng(4)
    per_well, over_map = rng.normal(0.35, 1.0, 40), rng.normal(0.0, 1.0, 20000)
    copies = bias_test(
        np.repeat(per_well, 10), over_map, "impedance", groups=np.repeat(np.arange(40), 10)
    )
    wells = bias_test(per_well, over_map, "impedance")
    assert copies["design_effect"] == pytest.approx(10.0) and copies[
        "n_effective"
    ] == pytest.approx(40.0)
    assert copies["p_t"] == pytest.approx(sps.ttest_ind(per_well, over_map).pvalue, rel=0.25)
    assert copies["p_ks"] == pytest.approx(wells["p_ks"], rel=0.25)
    naive = bias_test(np.repeat(per_well, 10), over_map, "impedance")
    assert naive["p_t"] < copies["p_t"] / 1000  # what counting every sample would have claimed
    assert "counted as 40 independent ones" in copies["verdict"]


def test_tukey_fences_hand_worked():
    # Tukey (1977); common practice. Data 1..9 and 100: Q1 = 3.25, Q3 = 7.75 (linear interpolation),
    # IQR = 4.5, fences 3.25 - 6.75 = -3.5 and 7.75 + 6.75 = 14.5
    assert tukey_fences([1, 2, 3, 4, 5, 6, 7, 8, 9, 100]) == pytest.approx((-3.5, 14.5))


def test_outliers_are_judged_within_their_facies():
    # 0.14 is ordinary in the pooled data but far outside the tight sand values
    wells = pd.DataFrame(
        {
            "well_id": [f"W{i}" for i in range(12)],
            "facies": ["sand"] * 6 + ["shale"] * 6,
            "porosity": [0.25, 0.26, 0.24, 0.25, 0.255, 0.14, 0.06, 0.07, 0.08, 0.05, 0.07, 0.065],
        }
    )
    found = outlier_findings(wells, ["porosity"])
    assert len(found) == 1 and found[0].wells == ["W5"] and "facies sand" in found[0].message
    pooled = outlier_findings(wells.assign(facies="all"), ["porosity"])
    assert not pooled


def test_non_physical_values_named():
    wells = pd.DataFrame(
        {
            "well_id": ["A", "B", "C"],
            "porosity": [0.2, -0.01, 1.2],
            "permeability": [10.0, 0.0, -3.0],
        }
    )
    found = physical_findings(wells, "w.csv")
    text = " | ".join(f.message for f in found)
    assert "'porosity' is negative" in text and "B (1 row)" in text
    assert "'porosity' is above 1" in text and "C (1 row)" in text
    assert "'permeability' is zero or negative" in text and "B, C (2 rows)" in text
    assert all(f.severity == "error" for f in found)


def test_duplicates_by_id_and_location():
    wells = pd.DataFrame(
        {"well_id": ["A", "B", "A", "D"], "x": [0.0, 100, 200, 100.4], "y": [0.0, 0, 0, 0.3]}
    )
    found = duplicate_findings(wells, tolerance=1.0)
    assert found[0].wells == ["A"]
    assert found[1].wells == ["B=D"]


def test_run_qc_on_demo(demo_paths):
    from predictor.grid import read_grid
    from predictor.io.tables import read_wells

    report = run_qc(read_wells(demo_paths["wells"]), read_grid(demo_paths["grid"]))
    assert not report.errors
    bias = report.bias["impedance"]
    # the demo drills preferentially into porous, low-impedance sand
    assert bias["biased"] and bias["mean_wells"] < bias["mean_map"]
    assert set(report.summary) == {"all", "facies=sand", "facies=shale", "facies=silt"}


def test_constant_attribute_is_an_error():
    from predictor.qc import grid_findings

    grid = xr.Dataset(
        {"impedance": (("y", "x"), np.full((3, 3), 5000.0))},
        coords={"x": [0.0, 1, 2], "y": [0.0, 1, 2]},
    )
    assert any(f.check == "constant attribute" for f in grid_findings(grid))


def test_attribute_labels_carry_units():
    # the file's own units win; an impedance without units is labelled with the units its values
    # suggest (common practice: ~2e6-2e7 kg/(m2 s) in SI, ~2e3-2e4 in m/s x g/cm3), said so
    coords = {"y": [0.0, 1.0], "x": [0.0, 1.0]}
    values = np.full((2, 2), 9000.0)
    grid = xr.Dataset(
        {
            "impedance": (("y", "x"), values),
            "ai": (("y", "x"), values * 1000, {"units": "kg m-2 s-1"}),
            "coherence": (("y", "x"), values / 1e4),
        },
        coords=coords,
    )
    assert attribute_label(grid, "ai") == "ai (kg m-2 s-1)"
    assert attribute_label(grid, "impedance") == "impedance (m/s x g/cm3, by its values)"
    assert attribute_label(grid.assign(impedance=grid.impedance * 1000), "impedance") == (
        "impedance (kg/(m2 s), by its values)"
    )
    assert attribute_label(grid, "coherence") == "coherence"
