"""Training, bundles and maps on the demo field: the documented contract and its bad inputs."""

import json
import shutil

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from conftest import DEMO

from predictor.bundle import load_bundle
from predictor.cli import main
from predictor.errors import BundleError, InputError, ModelError, PredictorWarning
from predictor.grid import read_grid
from predictor.io.tables import read_wells
from predictor.models import Blend, Linear, Logistic, RegressionKriging
from predictor.predict import predict_maps
from predictor.training import (
    TIES_MARGIN,
    TrainOptions,
    _clearly_better,
    _ties_offered,
    train,
)

WELLS, GRID = str(DEMO / "wells.csv"), str(DEMO / "seismic.csv")


@pytest.fixture(scope="module")
def bundle(tmp_path_factory):
    folder = tmp_path_factory.mktemp("b") / "bundle"
    assert (
        main(
            [
                "train",
                "--wells",
                WELLS,
                "--grid",
                GRID,
                "--target",
                "porosity",
                "--target",
                "facies",
                "--out",
                str(folder),
            ]
        )
        == 0
    )
    return folder


def test_card_has_the_documented_keys(bundle):
    card = json.loads((bundle / "model_card.json").read_text())
    assert card["schema_version"] == 1
    assert card["targets"]["porosity"]["cv"]["rmse"] > 0
    assert 0 < card["targets"]["facies"]["cv"]["balanced_accuracy"] <= 1
    assert set(card["targets"]["porosity"]["cv_random"]) == {"rmse", "mae", "r2"}
    assert card["declustered"]["porosity"]["mean"] < card["naive"]["porosity"]["mean"]
    assert (
        card["declustered"]["facies"]["proportions"]["sand"]
        < card["naive"]["facies"]["proportions"]["sand"]
    )
    assert set(card["targets"]["facies"]["classes"]) == {"sand", "shale", "silt"}
    board = {r["candidate"] for r in card["targets"]["porosity"]["leaderboard"]}
    assert {
        "linear",
        "ordinary_kriging",
        "regression_kriging",
        "regression_kriging_all_features",
        "lightgbm",
        "facies_mixture",
    } <= board
    assert (
        card["inputs"]["wells"]["sha256"]
        and card["features"]["training_ranges"]["impedance"][0] > 0
    )
    assert all(not name.endswith((".pkl", ".pickle", ".joblib")) for name in card["files"])
    # the intervals checked on wells the calibration did not see: near the nominal 80 %
    assert 0.7 <= card["targets"]["porosity"]["calibration"]["held_out_coverage"] <= 0.9
    # the expected map error is the CV's carried over by the kriging-variance ratio and the
    # training-size factor; the demo's residual semivariogram is a pure nugget (the card says
    # so), where position changes nothing
    error = card["targets"]["porosity"]["cv_design"]["map_error"]
    assert card["targets"]["porosity"]["residual_variogram"]["pure_nugget"]
    assert error["kriging_variance_ratio"] == 1.0
    factor = error["training_size"]["factor"]
    assert 0.7 <= factor <= 1.0 and error["scale"] == factor
    assert error["rmse"] == pytest.approx(card["targets"]["porosity"]["cv"]["rmse"] * factor)
    # its q10-q90 from the CV's sampling noise: the delta method on the chosen row's standard
    # error of the mean squared error, z(0.9) = 1.2816 (normal tables), on a log scale
    chosen = next(r for r in card["targets"]["porosity"]["leaderboard"] if r["chosen"])
    relative = chosen["cv_se"] / (2 * chosen["cv"]["rmse"] ** 2)
    assert error["relative_standard_error"] == pytest.approx(relative, abs=1e-4)
    assert 0.02 < relative < 0.5
    interval = error["interval"]
    assert interval["q90"] / error["rmse"] == pytest.approx(np.exp(1.2816 * relative), rel=1e-4)
    assert interval["q10"] * interval["q90"] == pytest.approx(error["rmse"] ** 2)


def test_maps_csv_columns_and_ordering(bundle, tmp_path):
    out = tmp_path / "maps.csv"
    assert main(["predict", str(bundle), "--grid", GRID, "--out", str(out)]) == 0
    maps = pd.read_csv(out)
    assert list(maps.columns) == [
        "x",
        "y",
        "porosity",
        "porosity_q10",
        "porosity_q90",
        "porosity_applicable",
        "facies",
        "facies_prob_sand",
        "facies_prob_shale",
        "facies_prob_silt",
        "facies_applicable",
    ]
    assert set(maps.porosity_applicable) == {0, 1} and maps.porosity_applicable.mean() > 0.8
    assert len(maps) == 120 * 100
    assert np.all(maps.porosity_q10 <= maps.porosity) and np.all(maps.porosity <= maps.porosity_q90)
    probs = maps[["facies_prob_sand", "facies_prob_shale", "facies_prob_silt"]].to_numpy()
    np.testing.assert_allclose(probs.sum(axis=1), 1.0, atol=1e-6)
    assert {"sand", "shale"} <= set(maps.facies) <= {"sand", "shale", "silt"}


@pytest.mark.slow
def test_saved_bundle_predicts_what_was_trained(bundle, tmp_path):
    grid = read_grid(GRID)
    wells = read_wells(WELLS)
    trained = train(wells, grid, TrainOptions(targets=["porosity", "facies"]))
    from predictor.bundle import save_bundle

    again = save_bundle(trained, tmp_path / "again")
    with pytest.warns(PredictorWarning, match="outside the range seen at the wells"):
        a, b = predict_maps(bundle, grid), predict_maps(again, grid)
    a.attrs.pop("bundle"), b.attrs.pop("bundle")
    xr.testing.assert_identical(a, b)
    # the same maps straight from memory, no folder written
    with pytest.warns(PredictorWarning, match="outside the range seen at the wells"):
        c = predict_maps(trained, grid)
    assert c.attrs.pop("bundle") == "in memory"
    xr.testing.assert_identical(a, c)
    # same inputs and seed: byte-identical model files
    for name in ("porosity/model.json", "facies/model.json"):
        assert (bundle / name).read_bytes() == (again / name).read_bytes()


def test_netcdf_maps(bundle, tmp_path):
    out = tmp_path / "maps.nc"
    assert (
        main(["predict", str(bundle), "--grid", str(DEMO / "seismic.nc"), "--out", str(out)]) == 0
    )
    ds = xr.open_dataset(out)
    assert ds.attrs["Conventions"] == "CF-1.8"
    assert ds["facies"].attrs["flag_meanings"] == "sand shale silt"
    assert ds["porosity_q10"].attrs["long_name"].endswith("(q10)")


def test_altered_or_missing_file_refused(bundle, tmp_path):
    copy = tmp_path / "copy"
    shutil.copytree(bundle, copy)
    model = copy / "porosity" / "model.json"
    model.write_text(model.read_text().replace("0", "1", 1))
    with pytest.raises(BundleError, match="porosity/model.json was altered"):
        load_bundle(copy)
    model.unlink()
    with pytest.raises(BundleError, match="missing"):
        load_bundle(copy)


def test_unknown_schema_refused(bundle, tmp_path):
    copy = tmp_path / "copy"
    shutil.copytree(bundle, copy)
    card = json.loads((copy / "model_card.json").read_text())
    card["schema_version"] = 99
    (copy / "model_card.json").write_text(json.dumps(card))
    with pytest.raises(BundleError, match="schema version 99"):
        load_bundle(copy)


def test_grid_lacking_a_feature(bundle, tmp_path):
    grid = read_grid(GRID).rename({"impedance": "amplitude"})
    with pytest.raises(InputError, match="lacks the attribute.*impedance"):
        predict_maps(bundle, grid)


def test_predict_refuses_to_overwrite(bundle, tmp_path, capsys):
    out = tmp_path / "maps.csv"
    out.write_text("keep me")
    assert main(["predict", str(bundle), "--grid", GRID, "--out", str(out)]) == 2
    assert out.read_text() == "keep me"
    assert "--overwrite" in capsys.readouterr().err


@pytest.fixture(scope="module")
def demo_inputs():
    return read_wells(WELLS), read_grid(GRID)


def test_missing_or_empty_target(demo_inputs):
    wells, grid = demo_inputs
    with pytest.raises(InputError, match="no column 'density'"):
        train(wells, grid, TrainOptions(targets=["density"]))
    with pytest.raises(InputError, match="'porosity' is empty"):
        train(wells.assign(porosity=np.nan), grid, TrainOptions(targets=["porosity"]))


def test_class_with_one_well(demo_inputs):
    wells, grid = demo_inputs
    odd = wells.copy()
    odd.loc[0, "facies"] = "coal"
    with pytest.raises(ModelError, match="coal of 'facies' have a single well"):
        train(odd, grid, TrainOptions(targets=["facies"]))


def test_too_few_wells(demo_inputs):
    wells, grid = demo_inputs
    with pytest.raises(ModelError, match="needs at least 15 wells with 'porosity'; got 10"):
        train(wells.head(10), grid, TrainOptions(targets=["porosity"]))


def test_constant_attribute(demo_inputs):
    wells, grid = demo_inputs
    flat = grid.copy()
    flat["impedance"] = flat["impedance"] * 0 + 9000.0
    with pytest.raises(InputError, match="constant"):
        train(wells, flat, TrainOptions(targets=["porosity"]))


def test_train_cli_bad_input_leaves_nothing(tmp_path, capsys):
    out = tmp_path / "b"
    assert (
        main(
            [
                "train",
                "--wells",
                WELLS,
                "--grid",
                GRID,
                "--target",
                "nonexistent",
                "--out",
                str(out),
            ]
        )
        == 2
    )
    assert "no column 'nonexistent'" in capsys.readouterr().err
    assert not out.exists() and not list(tmp_path.iterdir())


def test_a_facies_held_in_one_block_only_cannot_be_validated():
    from predictor.spatial_cv import block_labels

    wells, grid = read_wells(WELLS), read_grid(GRID)
    labels = block_labels(wells.x, wells.y, 500.0)
    crowded = np.bincount(labels).argmax()
    wells["facies"] = np.where(
        labels == crowded, "sand", np.where(wells.facies == "sand", "silt", wells.facies)
    )
    with pytest.raises(ModelError, match="has no training well of facies sand"):
        train(wells, grid, TrainOptions(targets=["facies"], cv="blocks", block_size=500.0))


def test_monotone_constraint_follows_the_named_attribute():
    wells, grid = read_wells(WELLS), read_grid(GRID)
    grid = grid.rename({"impedance": "ai"})
    trained = train(
        wells,
        grid,
        TrainOptions(
            targets=["porosity"], monotone={"ai": -1}, candidates=["linear", "lightgbm_monotone"]
        ),
    )
    model = trained.targets["porosity"].candidates["lightgbm_monotone"]
    assert all(v == -1 for v in model.monotone.values()) and any(
        k.startswith("ai_smooth") for k in model.monotone
    )
    assert "ai" in model.monotone and not any(
        "contrast" in k or "gradient" in k for k in model.monotone
    )
    # the constrained model never lets porosity rise with ai along a line through the wells' range
    X = trained.well_features.iloc[[0] * 50].reset_index(drop=True)
    X["ai"] = np.linspace(*trained.training_ranges["ai"], 50)
    fitted = type(model).fit(model, trained.targets["porosity"].data)
    assert np.all(np.diff(fitted.predict(X)) <= 1e-12)
    with pytest.raises(InputError, match="not an attribute of the grid"):
        train(wells, grid, TrainOptions(targets=["porosity"], monotone={"impedance": -1}))


def test_unknown_options_name_the_allowed_values():
    wells, grid = read_wells(WELLS), read_grid(GRID)
    with pytest.raises(InputError, match="cv = 'block' is not known; choose one of matched, nndm"):
        train(wells, grid, TrainOptions(targets=["porosity"], cv="block"))


def test_maps_csv_keeps_seven_significant_digits_in_every_column(bundle, tmp_path):
    out = tmp_path / "maps.csv"
    assert main(["predict", str(bundle), "--grid", GRID, "--out", str(out)]) == 0
    written = pd.read_csv(out)
    with pytest.warns(PredictorWarning, match="outside the range seen at the wells"):
        maps = predict_maps(bundle, read_grid(GRID))
    for name in ("porosity", "porosity_q10", "porosity_q90", "facies_prob_sand"):
        np.testing.assert_allclose(written[name], maps[name].to_numpy().ravel(), rtol=1e-6, atol=0)


def test_card_holds_field_wide_estimates_below_the_raw_wells(bundle):
    # the demo's wells favour sand (high porosity); truth.nc holds the exhaustive truth
    card = json.loads((bundle / "model_card.json").read_text())
    truth = xr.open_dataset(DEMO / "truth.nc")
    phi = card["global"]["porosity"]
    assert (
        phi["method"] in phi["estimates"]
        and phi["interval"]["q10"] <= phi["mean"] <= phi["interval"]["q90"]
    )
    true_mean = float(truth.porosity.mean())
    raw_error = abs(card["naive"]["porosity"]["mean"] - true_mean)
    assert abs(phi["mean"] - true_mean) < 0.5 * raw_error
    sand = card["global"]["facies"]["proportions"]["sand"]
    true_sand = float(
        (truth.facies.to_numpy() == 2).mean()
    )  # synthetic codes: 0 shale, 1 silt, 2 sand
    assert abs(sand - true_sand) < 0.5 * abs(
        card["naive"]["facies"]["proportions"]["sand"] - true_sand
    )
    assert sum(card["global"]["facies"]["proportions"].values()) == pytest.approx(1.0)
    assert set(card["targets"]["facies"]["facies_map"]["rule_factors"]) == {"sand", "shale", "silt"}


def test_exceedance_maps_and_facies_shares(bundle, tmp_path):
    out = tmp_path / "maps.nc"
    assert (
        main(
            [
                "predict",
                str(bundle),
                "--grid",
                GRID,
                "--out",
                str(out),
                "--exceed",
                "porosity:0.15",
                "--exceed",
                "porosity:0.25",
            ]
        )
        == 0
    )
    maps = xr.open_dataset(out)
    low, high = (
        maps["porosity_prob_above_0p15"].to_numpy(),
        maps["porosity_prob_above_0p25"].to_numpy(),
    )
    ok = np.isfinite(low)
    assert np.all((low[ok] >= 0) & (low[ok] <= 1)) and np.all(low[ok] >= high[ok])
    # nodes whose q10 is above the cutoff are above it with probability about 0.9: the interval
    # (smoothed conformal bound, scaled by the local spread) and the exceedance (each facies'
    # residuals mixed by the facies probabilities) are two calibrations of one error, which on
    # the demo agree within 0.1 at the q10 on every node and within 0.02 on 95 % of them
    sure = maps["porosity_q10"].to_numpy() > 0.15
    assert np.nanmin(low[sure]) >= 0.8 and np.nanpercentile(low[sure], 5) >= 0.88
    # the facies probabilities mix each facies' residuals: give shale residuals far above any
    # cutoff and every node's P(porosity > 0.25) becomes at least its P(shale)
    loaded = load_bundle(bundle)
    cal = loaded.calibrations["porosity"]
    assert cal.class_target == "facies" and "shale" in cal.class_quantiles
    cal.class_quantiles["shale"] = [v + 1e6 for v in cal.residual_quantiles]
    shifted = predict_maps(loaded, read_grid(GRID), exceed={"porosity": [0.25]}, warn=False)
    p_shale = shifted["facies_prob_shale"].to_numpy()[ok]
    p_high = shifted["porosity_prob_above_0p25"].to_numpy()[ok]
    assert np.all(p_high >= p_shale - 1e-9) and np.mean(p_high - high[ok]) > 0.5 * np.mean(p_shale)
    card = json.loads((bundle / "model_card.json").read_text())
    codes = maps["facies"].to_numpy()
    classes = maps["facies"].attrs["flag_meanings"].split(" ")
    rule = card["targets"]["facies"]["facies_map"]["rule"]
    if rule == "proportions":  # the map draws the field-wide proportions
        for k, cls in enumerate(classes):
            assert np.mean(codes[codes >= 0] == k) == pytest.approx(
                card["global"]["facies"]["proportions"][cls], abs=0.03
            )


@pytest.mark.parametrize(
    ("spec", "message"),
    [
        ("porosity:1.5", "between 0 and 1"),
        ("density:3", "no target 'density'"),
        ("facies:gravel", "no class 'gravel'"),
        ("porosity", "give TARGET:CUTOFF"),
    ],
)
def test_bad_exceedance_cutoffs_exit_2_and_write_nothing(bundle, tmp_path, capsys, spec, message):
    out = tmp_path / "maps.nc"
    assert main(["predict", str(bundle), "--grid", GRID, "--out", str(out), "--exceed", spec]) == 2
    assert message in capsys.readouterr().err and not out.exists()


def test_facies_ties_are_kept_unless_clearly_worse():
    # paired per-well loss differences with mean +0.5 or +2 standard errors (hand-made: 50 wells,
    # differences +-1 around the mean, so the standard error is 1 / 7): facies ties that are
    # slightly worse in the CV stay (the CV understates what they add near wells), clearly worse
    # ones go; value ties must win by one standard error
    se = 1.0 / 7.0
    spread = np.tile([1.0, -1.0], 25)
    for worse_by, kept in ((0.5, True), (2.0, False)):
        tied = 1.0 + spread + worse_by * se
        untied = np.ones(50)
        keep = _clearly_better(tied, untied, np.ones(50), margin=TIES_MARGIN["classification"])
        assert keep is kept
    assert not _clearly_better(
        1.0 + spread - 0.5 * se, np.ones(50), np.ones(50), margin=TIES_MARGIN["regression"]
    )


def test_ties_are_not_tried_on_a_model_that_already_kriges(bundle):
    # the demo's porosity blend holds regression kriging: the blend is chosen and no well ties are
    # tried; its facies blend holds none, so facies ties are tried
    card = json.loads((bundle / "model_card.json").read_text())
    porosity = card["targets"]["porosity"]
    assert porosity["chosen"] == "blend"
    kriging = ("ordinary_kriging", "regression_kriging", "regression_kriging_all_features")
    blend_row = next(r for r in porosity["leaderboard"] if r["candidate"] == "blend")
    assert sum(blend_row["members"].get(k, 0) for k in kriging) > 0
    assert not any(r["candidate"].endswith("+well_ties") for r in porosity["leaderboard"])
    facies = {r["candidate"] for r in card["targets"]["facies"]["leaderboard"]}
    assert any(name.endswith("+well_ties") for name in facies)
    attrs = ["impedance"]
    with_kriging = Blend([Linear(attrs), RegressionKriging(attrs)], np.array([0.6, 0.4]))
    kriging_unweighted = Blend([Linear(attrs), RegressionKriging(attrs)], np.array([1.0, 0.0]))
    for rule, task, volume, model, offered in (
        ("auto", "regression", False, with_kriging, False),
        ("auto", "regression", False, kriging_unweighted, True),
        ("always", "regression", False, with_kriging, True),
        ("auto", "classification", False, Logistic(attrs), True),
        ("never", "classification", False, Logistic(attrs), False),
        ("always", "regression", True, kriging_unweighted, False),
        ("always", "regression", False, RegressionKriging(attrs), False),
    ):
        options = TrainOptions(["porosity"], well_ties=rule)
        assert _ties_offered(options, task, volume, model) is offered


def test_facies_on_a_map_refuse_lightgbm_alone_and_say_why():
    wells, grid = read_wells(WELLS), read_grid(GRID)
    with pytest.raises(InputError, match="LightGBM classifiers are offered for facies in volumes"):
        train(wells, grid, TrainOptions(["facies"], candidates=["lightgbm"]))


def test_kriging_spread_needs_well_ties_and_says_so():
    # porosity blends take no ties by default, so the kriging spread falls back with a note
    # naming the fix; with --well-ties always the intervals use the ties' kriging spread
    wells, grid = read_wells(WELLS), read_grid(GRID)
    plain = train(wells, grid, TrainOptions(["porosity"], interval_spread="kriging"))
    assert plain.targets["porosity"].spread != "kriging"
    assert any("--well-ties always" in n for n in plain.targets["porosity"].notes)
    tied = train(
        wells, grid, TrainOptions(["porosity"], interval_spread="kriging", well_ties="always")
    )
    assert tied.targets["porosity"].chosen.endswith("+well_ties")
    assert tied.targets["porosity"].spread == "kriging"
