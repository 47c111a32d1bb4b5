"""Tiled prediction equals in-memory prediction exactly, on local threads and on a Dask cluster."""

import numpy as np
import pytest
import xarray as xr
from conftest import DEMO

pytest.importorskip("dask.distributed")
pytest.importorskip("zarr")

from predictor.cli import main  # noqa: E402
from predictor.errors import InputError, PredictorWarning  # noqa: E402
from predictor.grid import read_grid  # noqa: E402
from predictor.predict import predict_maps  # noqa: E402

GRID_NC = str(DEMO / "seismic.nc")


@pytest.fixture(scope="module")
def bundle(tmp_path_factory):
    folder = tmp_path_factory.mktemp("b") / "bundle"
    # context features at 250 m need a halo; permeability brings kriging (well ties, baselines) into
    # the blend
    assert (
        main(
            [
                "train",
                "--wells",
                str(DEMO / "wells.csv"),
                "--grid",
                GRID_NC,
                "--target",
                "porosity",
                "--target",
                "permeability",
                "--target",
                "facies",
                "--context-radius",
                "250",
                "--gradient",
                "--out",
                str(folder),
            ]
        )
        == 0
    )
    return folder


@pytest.fixture(scope="module")
def in_memory(bundle):
    with pytest.warns(PredictorWarning):
        return predict_maps(bundle, read_grid(GRID_NC))


def _same(store, ref):
    tiled = xr.open_zarr(store).load()
    assert set(tiled.data_vars) == set(ref.data_vars)
    for var in ref.data_vars:
        assert np.array_equal(tiled[var].to_numpy(), ref[var].to_numpy(), equal_nan=True), var
    np.testing.assert_array_equal(tiled.x, ref.x)


def test_tiles_with_threads_equal_in_memory(bundle, in_memory, tmp_path):
    out = tmp_path / "maps.zarr"
    assert (
        main(
            [
                "predict",
                str(bundle),
                "--grid",
                GRID_NC,
                "--out",
                str(out),
                "--tile",
                "24",
                "--threads",
                "2",
            ]
        )
        == 0
    )
    _same(out, in_memory)
    from predictor.chunked import predict_to_zarr

    with pytest.warns(PredictorWarning, match="tiles hold nodes with feature values outside"):
        predict_to_zarr(bundle, GRID_NC, tmp_path / "again.zarr", tile=60)


@pytest.mark.slow
def test_dask_local_cluster_with_two_workers_equals_local(bundle, in_memory, tmp_path):
    out = tmp_path / "maps.zarr"
    assert (
        main(
            [
                "predict",
                str(bundle),
                "--grid",
                GRID_NC,
                "--out",
                str(out),
                "--tile",
                "40",
                "--workers",
                "2",
            ]
        )
        == 0
    )
    _same(out, in_memory)


def test_tile_that_cannot_fit_in_memory(bundle, tmp_path):
    from predictor.chunked import predict_to_zarr

    with pytest.raises(InputError, match="use a smaller --tile"):
        predict_to_zarr(bundle, GRID_NC, tmp_path / "m.zarr", tile=4096, memory_limit=1e8)
    assert not (tmp_path / "m.zarr").exists()


def test_tiles_equal_in_memory_when_the_first_corner_holds_no_data(bundle, tmp_path):
    grid = read_grid(GRID_NC)
    grid["impedance"][:30, :30] = np.nan  # a survey whose corner was never shot
    from predictor.io.netcdf import write_netcdf

    write_netcdf(grid, tmp_path / "holed.nc")
    with pytest.warns(PredictorWarning):
        ref = predict_maps(bundle, read_grid(tmp_path / "holed.nc"))
    assert (
        main(
            [
                "--quiet",
                "predict",
                str(bundle),
                "--grid",
                str(tmp_path / "holed.nc"),
                "--out",
                str(tmp_path / "m.zarr"),
                "--tile",
                "24",
            ]
        )
        == 0
    )
    tiled = xr.open_zarr(
        tmp_path / "m.zarr", mask_and_scale=False
    ).load()  # flags keep their -1 fill
    for var in ref.data_vars:
        assert np.array_equal(tiled[var].to_numpy(), ref[var].to_numpy(), equal_nan=True), var
    assert (
        tiled["facies"].to_numpy()[:24, :24] == -1
    ).all()  # the tile in the hole was never predicted


def test_netcdf_and_zarr_carry_cf_units_crs_and_flags_read_by_independent_readers(bundle, tmp_path):
    # netCDF4 (Unidata's library, not xarray) and plain zarr read what predictor wrote
    netCDF4 = pytest.importorskip("netCDF4")
    zarr = pytest.importorskip("zarr")
    nc_path, zarr_path = tmp_path / "maps.nc", tmp_path / "maps.zarr"
    for path in (nc_path, zarr_path):
        assert (
            main(
                [
                    "predict",
                    str(bundle),
                    "--grid",
                    GRID_NC,
                    "--out",
                    str(path),
                    "--crs",
                    "EPSG:32631",
                ]
            )
            == 0
        )
    with netCDF4.Dataset(nc_path) as nc:
        assert nc.Conventions == "CF-1.8"
        assert nc["permeability"].units == "millidarcy" and "mD" in nc["permeability"].long_name
        assert nc["crs"].grid_mapping_name == "transverse_mercator"  # UTM 31N (EPSG registry)
        assert nc["crs"].longitude_of_central_meridian == pytest.approx(3.0)
        assert nc["porosity"].grid_mapping == "crs"
        assert "_FillValue" not in nc["x"].ncattrs() and "_FillValue" not in nc["y"].ncattrs()
        assert nc["porosity_applicable"].flag_meanings == "outside inside"
        assert (
            "/" not in nc.bundle and "/" not in nc.grid
        )  # file names, not the folders they sit in
    store = zarr.open_group(str(zarr_path), mode="r")
    assert store.attrs["Conventions"] == "CF-1.8"
    assert store["crs"].attrs["grid_mapping_name"] == "transverse_mercator"
    assert store["permeability"].attrs["units"] == "millidarcy"
    assert (
        store["x"].attrs["standard_name"] == "projection_x_coordinate"
        and store["x"].attrs["units"] == "m"
    )


def _wider_grid(path, times):
    """The demo map mirrored ``times`` x ``times`` on the same spacing: a larger map of the same
    kind."""
    from predictor.io.netcdf import write_netcdf

    grid = read_grid(GRID_NC)
    values = grid.impedance.to_numpy()
    for axis in (0, 1):
        values = np.concatenate(
            [values, np.flip(values, axis)] * (times // 2) or [values], axis=axis
        )
    ny, nx = values.shape
    x, y = grid.x.to_numpy(), grid.y.to_numpy()
    wide = xr.Dataset(
        {"impedance": (("y", "x"), values)},
        coords={
            "x": x[0] + (x[1] - x[0]) * np.arange(nx),
            "y": y[0] + (y[1] - y[0]) * np.arange(ny),
        },
    )
    return write_netcdf(wide, path)


@pytest.mark.slow
def test_dask_workers_write_their_own_tiles_and_the_client_stays_flat(bundle, tmp_path):
    import tracemalloc

    TILE = 240  # noqa: N806
    from dask.distributed import LocalCluster

    from predictor.chunked import predict_to_zarr

    small, large = _wider_grid(tmp_path / "small.nc", 1), _wider_grid(tmp_path / "large.nc", 4)
    peaks = {}
    with LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None
    ) as cluster:
        for name, grid in (("small", small), ("large", large)):
            tracemalloc.start()
            with pytest.warns(PredictorWarning):
                predict_to_zarr(
                    bundle,
                    grid,
                    tmp_path / f"{name}.zarr",
                    tile=TILE,
                    scheduler=cluster.scheduler_address,
                )
            peaks[name] = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
    maps = xr.open_zarr(tmp_path / "large.zarr")
    tile_bytes = (
        sum(maps[v].nbytes for v in maps.data_vars) * TILE**2 / (maps.sizes["x"] * maps.sizes["y"])
    )
    assert maps.sizes["x"] == 4 * read_grid(GRID_NC).sizes["x"]
    assert np.isfinite(maps.porosity.to_numpy()).mean() > 0.9  # the workers filled the store
    # 16 times the nodes: the client's peak Python memory stays about the same, and below what one
    # tile's maps would take if they came back to it (they did before workers wrote their own)
    assert peaks["large"] < 1.5 * peaks["small"] + 1e6, peaks
    assert peaks["large"] < 0.5 * tile_bytes, (peaks, tile_bytes)


def test_wide_context_radius_is_smoothed_beforehand_and_tiles_still_match(tmp_path, monkeypatch):
    # a 1 500 m radius on 25 m nodes needs a halo of 241 nodes at full width; with WIDE_HALO set
    # below it, tiles read the radius smoothed once over the whole map and keep a small halo
    import predictor.features as features
    from predictor.chunked import halo, predict_to_zarr

    folder = tmp_path / "bundle"
    assert (
        main(
            [
                "--quiet",
                "train",
                "--wells",
                str(DEMO / "wells.csv"),
                "--grid",
                GRID_NC,
                "--target",
                "porosity",
                "--context-radius",
                "100",
                "--context-radius",
                "1500",
                "--out",
                str(folder),
            ]
        )
        == 0
    )
    grid = read_grid(GRID_NC)
    with pytest.warns(PredictorWarning):
        ref = predict_maps(folder, grid)
    spec = load_bundle_spec(folder)
    monkeypatch.setattr(features, "WIDE_HALO", 50)
    assert features.wide_radii(spec, 25.0, 25.0) == [1500.0]
    assert max(halo(grid, spec, [1500.0])) < 50 < max(halo(grid, spec))
    with pytest.warns(PredictorWarning):
        predict_to_zarr(folder, GRID_NC, tmp_path / "maps.zarr", tile=32)
    tiled = xr.open_zarr(tmp_path / "maps.zarr").load()
    for var in ref.data_vars:
        np.testing.assert_allclose(
            tiled[var].to_numpy(), ref[var].to_numpy(), rtol=1e-10, atol=1e-12, err_msg=var
        )
    assert not list(tmp_path.glob(".maps.zarr.smoothed.*"))  # the scratch store is gone


def load_bundle_spec(folder):
    from predictor.bundle import load_bundle

    return load_bundle(folder).feature_spec
