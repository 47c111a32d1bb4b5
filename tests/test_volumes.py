"""3-D: wells as samples along their paths, features and prediction on volumes, CV by whole
wells, volumes out as NetCDF/Zarr/SEG-Y/CSV, and the 3-D bad inputs."""

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from conftest import open_in_browser
from scipy.interpolate import RegularGridInterpolator

from predictor.checks import decluster_samples, well_heads
from predictor.cli import main
from predictor.declustering import cell_declustering
from predictor.features import FeatureSpec, build_features, features_at_samples
from predictor.grid import read_seismic
from predictor.io.netcdf import write_netcdf
from predictor.predict import predict_maps, write_maps
from predictor.spatial_cv import BlockKFold, BufferedLeaveOneOut
from predictor.synthetic import VolumeSpec, make_volume_field, volume_demo_files
from predictor.volume import check_volume, fractional_index, sample_volume

SMALL = VolumeSpec(
    seed=5, n_inlines=30, n_crosslines=34, n_samples=40, n_preferential=16, regular_pattern=(3, 3)
)


@pytest.fixture(scope="module")
def field():
    seismic, truth, wells = make_volume_field(SMALL)
    return check_volume(seismic), truth, wells.rename(columns={"depth": "z"})


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    return volume_demo_files(tmp_path_factory.mktemp("volume"), SMALL)


@pytest.fixture(scope="module")
def bundle(files, tmp_path_factory):
    out = tmp_path_factory.mktemp("vbundle") / "b"
    assert (
        main(
            [
                "--quiet",
                "train",
                "--wells",
                files["well_samples.csv"],
                "--grid",
                files["impedance.sgy"],
                "--segy-name",
                "impedance",
                "--z-domain",
                "depth",
                "--target",
                "porosity",
                "--target",
                "facies",
                "--vertical-radius",
                "12",
                "--context-radius",
                "100",
                "--out",
                str(out),
            ]
        )
        == 0
    )
    return out


def test_affine_inverse_puts_every_trace_on_its_own_indices(field):
    vol = field[0]
    fi, fj = fractional_index(vol, vol.cdp_x.to_numpy().ravel(), vol.cdp_y.to_numpy().ravel())
    ii, jj = np.meshgrid(
        np.arange(vol.sizes["inline"]), np.arange(vol.sizes["crossline"]), indexing="ij"
    )
    np.testing.assert_allclose(fi, ii.ravel(), atol=1e-9)
    np.testing.assert_allclose(fj, jj.ravel(), atol=1e-9)


def test_trilinear_sampling_equals_scipy_on_a_rotated_survey(field):
    # reference: scipy.interpolate.RegularGridInterpolator (linear) on the (z, inline, crossline)
    # lattice
    vol = field[0]
    rng = np.random.default_rng(0)
    n = 200
    k = rng.uniform(0, vol.sizes["z"] - 1, n)
    i = rng.uniform(0, vol.sizes["inline"] - 1, n)
    j = rng.uniform(0, vol.sizes["crossline"] - 1, n)
    x0, dxi, dxx, y0, dyi, dyx = vol.attrs["affine"]
    il, xl = vol.inline.to_numpy()[0] + i, vol.crossline.to_numpy()[0] + j
    x, y = x0 + dxi * il + dxx * xl, y0 + dyi * il + dyx * xl
    z = float(vol.z[0]) + k * float(vol.z[1] - vol.z[0])
    ours, kept = sample_volume(vol, x, y, z)
    cube = vol.impedance.to_numpy()
    ref = RegularGridInterpolator([np.arange(s) for s in cube.shape], cube)(
        np.column_stack([k, i, j])
    )
    assert kept.all()
    np.testing.assert_allclose(
        ours["impedance"], ref, rtol=1e-10
    )  # round-off of the affine inverse


def test_features_built_around_each_well_equal_the_whole_volume(field):
    vol, _, wells = field
    assert (wells.groupby("well_id").x.nunique() > 1).any(), "the field should hold deviated wells"
    spec = FeatureSpec(
        ["impedance"],
        context_radii=[100.0],
        vertical_radii=[12.0],
        gradient=True,
        z_coordinate=True,
    )
    windowed, kept = features_at_samples(vol, spec, wells)
    whole, kept2 = sample_volume(
        build_features(vol, spec), wells.x, wells.y, wells.z, wells.well_id
    )
    assert kept.all() and kept2.all()
    pd.testing.assert_frame_equal(windowed, whole)


def test_a_cube_on_z_y_x_reads_as_a_volume(tmp_path):
    x, y, z = 1000.0 + 10 * np.arange(6), 5000.0 + 20 * np.arange(5), 1.0 * np.arange(4)
    values = np.arange(4 * 5 * 6, dtype=float).reshape(4, 5, 6)
    write_netcdf(
        xr.Dataset({"impedance": (("z", "y", "x"), values)}, coords={"x": x, "y": y, "z": z}),
        tmp_path / "cube.nc",
    )
    vol = read_seismic(tmp_path / "cube.nc", z_domain="time")
    assert vol.impedance.dims == ("z", "inline", "crossline") and vol.attrs["z_domain"] == "time"
    np.testing.assert_allclose(vol.cdp_x.to_numpy()[0], x)
    np.testing.assert_allclose(vol.cdp_y.to_numpy()[:, 0], y)
    values_at, _ = sample_volume(vol, [x[2]], [y[3]], [z[1]])
    assert values_at["impedance"][0] == values[1, 3, 2]


def test_every_sample_carries_its_wells_lateral_declustering_weight(field):
    vol, _, wells = field
    cell, nearest, codes = decluster_samples(wells, vol)
    heads, _ = well_heads(wells)
    alone = cell_declustering(
        heads.x, heads.y, heads.porosity
    )  # the map-wise declustering of the well heads
    np.testing.assert_allclose(cell.weights, alone.weights)
    per_sample = pd.Series(cell.weights[codes]).groupby(wells.well_id.to_numpy()).nunique()
    assert (per_sample == 1).all()
    assert nearest.shape == (heads.shape[0],) and np.isclose(nearest.sum(), heads.shape[0])


def test_cv_folds_hold_out_whole_wells_never_single_samples(field):
    vol, _, wells = field
    heads_xy = wells[["x", "y"]].groupby(wells.well_id).transform("mean").to_numpy()
    units = pd.factorize(wells.well_id)[0]
    for splitter in (
        BlockKFold(300.0, 5, coordinates=heads_xy),
        BufferedLeaveOneOut(150.0, coordinates=heads_xy, groups=units),
    ):
        for train, test in splitter.split(heads_xy):
            assert not set(units[train]) & set(units[test])
    loo = BufferedLeaveOneOut(150.0, coordinates=heads_xy, groups=units)
    assert loo.get_n_splits(heads_xy) == np.unique(units).size
    for train, test in loo.split(heads_xy):
        assert np.unique(units[test]).size == 1
        gap = np.min(np.hypot(*(heads_xy[train][:, None, :] - heads_xy[test][None, :1, :]).T))
        assert gap > 150.0


def test_volume_model_maps_closer_to_the_truth_than_the_linear_baseline(bundle, files):
    from predictor.bundle import load_bundle

    vol = read_seismic(files["impedance.nc"])
    truth = xr.open_dataset(files["truth_volume.nc"]).load()
    b = load_bundle(bundle)
    with pytest.warns(Warning):
        maps = predict_maps(b, vol)
    err = maps.porosity - truth.porosity
    rmse = float(np.sqrt((err**2).mean()))
    # the declustered well mean everywhere: the do-nothing baseline
    flat = float(
        np.sqrt(((b.card["declustered"]["porosity"]["mean"] - truth.porosity) ** 2).mean())
    )
    assert rmse < 0.6 * flat
    inside = float(
        ((truth.porosity >= maps.porosity_q10) & (truth.porosity <= maps.porosity_q90)).mean()
    )
    assert 0.65 < inside < 0.95  # nominal 0.80
    board = {r["candidate"]: r["cv"]["rmse"] for r in b.card["targets"]["porosity"]["leaderboard"]}
    assert "ordinary_kriging" not in board and "linear" in board
    assert b.card["space"]["kind"] == "volume" and b.card["space"]["z_domain"] == "depth"
    assert b.card["targets"]["porosity"]["n_wells"] == 25


@pytest.mark.slow
def test_volume_outputs_round_trip_through_netcdf_zarr_segy_and_csv(bundle, files, tmp_path):
    vol = read_seismic(files["impedance.nc"])
    with pytest.warns(Warning):
        maps = predict_maps(bundle, vol)
    for name in ("v.nc", "v.zarr"):
        write_maps(maps, tmp_path / name)
        back = read_seismic(tmp_path / name)
        np.testing.assert_array_equal(back.porosity.to_numpy(), maps.porosity.to_numpy())
        np.testing.assert_allclose(back.attrs["affine"], maps.attrs["affine"])
    nc = xr.open_dataset(tmp_path / "v.nc")
    assert nc.attrs["Conventions"] == "CF-1.8" and nc.z.attrs["units"] == "m"
    assert nc.cdp_x.attrs["standard_name"] == "projection_x_coordinate"
    write_maps(maps, tmp_path / "v.sgy")
    for var in ("porosity", "porosity_q90", "facies"):
        back = read_seismic(tmp_path / f"v_{var}.sgy", name=var)
        np.testing.assert_allclose(
            back[var].to_numpy(), maps[var].to_numpy().astype(np.float32), rtol=1e-6
        )
        np.testing.assert_allclose(back.cdp_x.to_numpy(), maps.cdp_x.to_numpy(), atol=0.01)
    write_maps(maps, tmp_path / "v.csv")
    table = pd.read_csv(tmp_path / "v.csv")
    assert list(table.columns[:5]) == ["inline", "crossline", "z", "x", "y"]
    assert len(table) == maps.porosity.size
    row = table.iloc[1234]
    k, i, j = np.unravel_index(1234, maps.porosity.shape)
    assert row["z"] == float(maps.z[k]) and row["inline"] == int(maps.inline[i])
    assert row["facies"] == ["sand", "shale", "silt"][int(maps.facies[k, i, j])]


@pytest.mark.slow
def test_tiled_volume_equals_in_memory_locally_and_on_two_dask_workers(bundle, files, tmp_path):
    vol = read_seismic(
        files["impedance.sgy"], z_domain="depth", name="impedance"
    )  # float32 samples, as tiled
    with pytest.warns(Warning):
        maps = predict_maps(bundle, vol)
    for extra in ([], ["--workers", "2"]):
        out = tmp_path / f"tiled{len(extra)}.zarr"
        assert (
            main(
                [
                    "--quiet",
                    "predict",
                    str(bundle),
                    "--grid",
                    files["impedance.sgy"],
                    "--segy-name",
                    "impedance",
                    "--z-domain",
                    "depth",
                    "--out",
                    str(out),
                    "--tile",
                    "12",
                    *extra,
                ]
            )
            == 0
        )
        tiled = xr.open_zarr(out, mask_and_scale=False).load()
        for var in maps.data_vars:
            np.testing.assert_array_equal(tiled[var].to_numpy(), maps[var].to_numpy(), err_msg=var)
    assert not list(tmp_path.glob(".*input*")), "the temporary copy of the SEG-Y input is removed"


def test_wide_lateral_radius_of_a_volume_is_smoothed_beforehand_and_tiles_still_match(
    bundle, files, tmp_path, monkeypatch
):
    # the bundle's 100 m radius on 25 m traces needs a halo of 17 traces; with WIDE_HALO below
    # that, every z slice is smoothed once over the whole volume and tiles keep a small halo
    import predictor.features as features
    from predictor.bundle import load_bundle
    from predictor.chunked import halo, predict_to_zarr

    vol = read_seismic(files["impedance.nc"])
    with pytest.warns(Warning):
        ref = predict_maps(bundle, vol)
    spec = load_bundle(bundle).feature_spec
    monkeypatch.setattr(features, "WIDE_HALO", 10)
    assert max(halo(vol, spec, features.wide_radii(spec, 25.0, 25.0))) < 10 < max(halo(vol, spec))
    with pytest.warns(Warning):
        predict_to_zarr(bundle, files["impedance.nc"], tmp_path / "v.zarr", tile=12)
    tiled = xr.open_zarr(tmp_path / "v.zarr").load()
    for var in ref.data_vars:
        np.testing.assert_allclose(
            tiled[var].to_numpy(), ref[var].to_numpy(), rtol=1e-10, atol=1e-12, err_msg=var
        )
    assert not list(tmp_path.glob(".v.zarr.smoothed.*"))


def test_radii_whose_halo_exceeds_half_a_volume_tile_are_smoothed_beforehand(files):
    # the plain command's radii on 25 m traces (halo = 4 sd + 1 traces, TRUNCATE of
    # scipy.ndimage): 75 m needs 13 traces, 405 m 66, 1621 m 260; a volume tile of 57 traces
    # keeps only the first in its halo, a map tile of 512 nodes the first two
    from predictor.chunked import _wide
    from predictor.features import FeatureSpec

    vol = read_seismic(files["impedance.nc"])
    spec = FeatureSpec(["impedance"], context_radii=[75.0, 405.0, 1621.0])
    assert _wide(vol, spec, 57) == [405.0, 1621.0]
    assert _wide(vol, spec, 512) == [1621.0]


def _samples(files, tmp_path, edit, name="w.csv"):
    frame = edit(pd.read_csv(files["well_samples.csv"]))
    path = tmp_path / name
    frame.to_csv(path, index=False)
    return str(path)


def _train(wells, grid, *extra):
    return [
        "train",
        "--wells",
        wells,
        "--grid",
        grid,
        "--target",
        "porosity",
        "--out",
        "OUT/b",
        *extra,
    ]


VOLUME_CASES = {
    "wells in time, volume in depth": (
        lambda f, t: _train(
            _samples(f, t, lambda w: w.rename(columns={"depth": "twt"})), f["impedance.nc"]
        ),
        "the wells' z is time but the volume",
    ),
    "wells z in feet against a volume in metres": (
        lambda f, t: _train(
            _samples(f, t, lambda w: w.assign(depth=w.depth * 3.2808)), f["impedance.nc"]
        ),
        "outside the volume's sample axis",
    ),
    "a well outside the survey": (
        lambda f, t: _train(
            _samples(f, t, lambda w: w.assign(x=np.where(w.well_id == "TL-03", w.x + 5000, w.x))),
            f["impedance.nc"],
        ),
        "outside the survey: TL-03",
    ),
    "wells without z against a volume": (
        lambda f, t: _train(_samples(f, t, lambda w: w.drop(columns="depth")), f["impedance.nc"]),
        "needs wells as samples with z",
    ),
    "SEG-Y with a time axis for depth wells": (
        lambda f, t: _train(
            f["well_samples.csv"],
            f["impedance.sgy"],
            "--segy-name",
            "impedance",
            "--z-domain",
            "time",
        ),
        "the wells' z is depth but the volume",
    ),
}


@pytest.mark.parametrize("case", sorted(VOLUME_CASES))
def test_bad_volume_inputs(case, files, tmp_path, capsys, monkeypatch):
    from test_bad_inputs import _check

    build, fragment = VOLUME_CASES[case]
    _check(tmp_path, capsys, monkeypatch, build(files, tmp_path), fragment)


PREDICT_CASES = {
    "a volume model on a map": (lambda f, b, t: [str(t / "map.nc")], "trained on a volume"),
    "a depth model on a time volume": (
        lambda f, b, t: [f["impedance.sgy"], "--segy-name", "impedance", "--z-domain", "time"],
        "trained in depth",
    ),
    "GeoTIFF for a volume": (lambda f, b, t: [f["impedance.nc"]], "GeoTIFF holds maps"),
    "tiles too big for memory": (lambda f, b, t: [f["impedance.nc"]], "use a smaller --tile"),
}


@pytest.mark.parametrize("case", sorted(PREDICT_CASES))
def test_bad_volume_predictions(case, files, bundle, tmp_path, capsys, monkeypatch):
    from test_bad_inputs import _check

    write_netcdf(
        xr.Dataset(
            {"impedance": (("y", "x"), np.full((3, 4), 9000.0))},
            coords={"x": np.arange(4.0), "y": np.arange(3.0)},
        ),
        tmp_path / "map.nc",
    )
    grid_args = PREDICT_CASES[case][0](files, bundle, tmp_path)
    out = {"GeoTIFF for a volume": "OUT/v.tif", "tiles too big for memory": "OUT/v.zarr"}.get(
        case, "OUT/v.nc"
    )
    argv = ["predict", str(bundle), "--grid", *grid_args, "--out", out]
    if case == "tiles too big for memory":
        import predictor.chunked

        monkeypatch.setattr(predictor.chunked, "_available_memory", lambda: 50e6)
        argv += ["--tile", "4000"]
    _check(tmp_path, capsys, monkeypatch, argv, PREDICT_CASES[case][1])


@pytest.mark.slow
def test_explain_and_report_show_a_volume_at_the_wells_middle_depth(
    bundle, files, tmp_path, capsys
):
    assert (
        main(
            [
                "--quiet",
                "explain",
                str(bundle),
                "--grid",
                files["impedance.nc"],
                "--out",
                str(tmp_path / "ex"),
            ]
        )
        == 0
    )
    printed = capsys.readouterr().out  # the numbers say what they are
    assert (
        "porosity, mean |contribution| at the wells in fraction (declustering-weighted" in printed
    )
    assert "facies, mean |contribution| at the wells in log-odds" in printed
    shap = xr.open_dataset(tmp_path / "ex" / "porosity_shap_maps.nc")
    wells = pd.read_csv(files["well_samples.csv"])
    z = float(np.median(wells.depth))
    assert (
        abs(shap.attrs["z_shown"] - z) <= 2.0
    )  # the sample nearest to the wells' middle depth (4 m steps)
    assert (
        shap["porosity_shap_impedance"].dims == ("y", "x")
        and np.isfinite(shap["porosity_shap_impedance"]).all()
    )
    assert main(["--quiet", "report", str(bundle), "--out", str(tmp_path / "r.html")]) == 0
    page = (tmp_path / "r.html").read_text()
    assert f"show the volume at z = {shap.attrs['z_shown']:g} (depth)" in page
    assert page.count("data:image/png;base64,") >= 8
    # counted by what a row is: samples along wells, not wells
    assert (
        "Summary statistics (all samples)" in page
        and "samples inside the area of applicability" in page
    )
    open_in_browser(
        tmp_path / "r.html", tmp_path / "profile"
    )  # decodes, captions, headers, no temporary path
    # one of each per target (porosity, facies), each named in its alt text and its caption
    assert (
        page.count("section through wells") == 4
        and page.count("the predicted volume at three z") == 4
    )


@pytest.mark.slow
def test_volume_demo_runs_end_to_end_and_its_report_follows_the_moved_folder(tmp_path):
    import warnings

    from predictor.demo import run_volume_demo
    from predictor.errors import PredictorWarning

    with (
        warnings.catch_warnings()
    ):  # the demo reports its notes itself; whether one fires depends on the field
        warnings.simplefilter("ignore", PredictorWarning)
        lines = run_volume_demo(tmp_path / "demo", spec=SMALL)
    assert any(line.startswith("  porosity RMSE over the volume") for line in lines)
    for name in (
        "report.html",
        "qc.json",
        "volume.nc",
        "volume_porosity.sgy",
        "bundle/model_card.json",
    ):
        assert (tmp_path / "demo" / name).exists(), name
    # like the map demo's, the report says its data are invented and compares with the truth
    report = (tmp_path / "demo" / "report.html").read_text()
    assert "The data of this report are invented" in report
    assert "against the truth of this synthetic volume" in report
    # the bundle recorded its input inside the temporary folder the demo was built in
    assert (
        main(
            [
                "--quiet",
                "report",
                str(tmp_path / "demo" / "bundle"),
                "--out",
                str(tmp_path / "again.html"),
            ]
        )
        == 0
    )


def test_a_section_through_wells_reads_the_traces_under_its_wells(field):
    from predictor.volume import section_through_wells

    vol, _, wells = field
    section, on = section_through_wells(vol, wells, n_wells=4)
    heads = wells.groupby("well_id")[["x", "y"]].mean().loc[section.attrs["wells"]]
    assert len(heads) == 4
    legs = np.hypot(np.diff(heads.x), np.diff(heads.y))  # the path joins the wells in order
    at = on.drop_duplicates("well_id").set_index("well_id").loc[heads.index, "distance"]
    np.testing.assert_allclose(at, np.concatenate([[0.0], np.cumsum(legs)]))
    centred = heads.to_numpy() - wells.groupby("well_id")[["x", "y"]].mean().to_numpy().mean(axis=0)
    axis = np.linalg.svd(centred, full_matrices=False)[2][0]
    assert np.all(np.diff(centred @ axis) > 0) or np.all(
        np.diff(centred @ axis) < 0
    )  # ordered along one axis
    for (
        well,
        head,
    ) in heads.iterrows():  # at a well the section is the volume's trace nearest to its head
        fi, fj = fractional_index(vol, [head.x], [head.y])
        trace = vol["impedance"].isel(inline=int(np.rint(fi[0])), crossline=int(np.rint(fj[0])))
        column = section["impedance"].sel(distance=at[well], method="nearest")
        np.testing.assert_allclose(column.to_numpy(), trace.to_numpy())
