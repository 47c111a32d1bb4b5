"""Map formats: GeoTIFF coordinates, bounds and CRS; CRS carried through NetCDF."""

import numpy as np
import pytest
import xarray as xr

rasterio = pytest.importorskip("rasterio")

from predictor.io.geotiff import read_geotiff, write_geotiff  # noqa: E402
from predictor.io.netcdf import write_netcdf  # noqa: E402


def _maps():
    xs = 512000.0 + 25.0 * np.arange(6)
    ys = 7204000.0 + 50.0 * np.arange(4)
    values = np.arange(24.0).reshape(4, 6)
    codes = (values % 3).astype(np.int16)
    codes[0, 0] = -1
    ds = xr.Dataset(
        {"porosity": (("y", "x"), values / 100), "facies": (("y", "x"), codes)},
        coords={"x": xs, "y": ys},
    )
    ds["porosity"].attrs.update(units="1")
    ds["facies"].attrs.update(flag_meanings="sand shale silt", _FillValue=np.int16(-1))
    return ds


def test_geotiff_round_trips_coordinates_bounds_and_crs(tmp_path):
    maps = _maps()
    path = write_geotiff(maps, tmp_path / "m.tif", crs="EPSG:32631")
    with rasterio.open(path) as src:
        # node-centred grid: the raster's edges sit half a cell outside the outer nodes
        assert src.bounds == pytest.approx(
            (512000 - 12.5, 7204000 - 25.0, 512125 + 12.5, 7204150 + 25.0)
        )
        assert src.crs.to_epsg() == 32631
        assert list(src.descriptions) == ["porosity"] and src.dtypes == ("float32",)
        assert src.units[0] == "1"  # porosity is a fraction
    with rasterio.open(
        tmp_path / "m_classes.tif"
    ) as src:  # class codes as integers, in their own file
        assert (
            list(src.descriptions) == ["facies"] and src.dtypes == ("int16",) and src.nodata == -1
        )
        assert (
            src.tags(1)["flag_meanings"] == "sand shale silt"
            and src.tags(1)["flag_values"] == "0 1 2"
        )
        assert (
            not src.units[0] and src.read(1)[::-1][0, 0] == -1
        )  # codes have no unit; -1 where empty
    back = read_geotiff(path)
    np.testing.assert_allclose(back.x, maps.x)
    np.testing.assert_allclose(back.y, maps.y)
    np.testing.assert_allclose(back.porosity, maps.porosity, rtol=1e-6)
    assert (
        np.isnan(back.facies.values[0, 0]) and back.facies.values[1, 1] == maps.facies.values[1, 1]
    )
    assert "32631" in back.attrs["crs_wkt"] or "UTM zone 31N" in back.attrs["crs_wkt"]


def test_crs_survives_netcdf_to_geotiff(tmp_path):
    from predictor.grid import read_grid

    wkt = rasterio.crs.CRS.from_epsg(32631).to_wkt()
    maps = _maps()[["porosity"]]
    nc = write_netcdf(maps, tmp_path / "g.nc", crs_wkt=wkt)
    grid = read_grid(nc)
    assert rasterio.crs.CRS.from_wkt(grid.attrs["crs_wkt"]).to_epsg() == 32631
    tif = write_geotiff(grid, tmp_path / "g.tif")
    with rasterio.open(tif) as src:
        assert src.crs.to_epsg() == 32631


def test_predict_to_geotiff(tmp_path, porosity_bundle):
    from conftest import DEMO

    from predictor.cli import main

    assert (
        main(
            [
                "predict",
                str(porosity_bundle),
                "--grid",
                str(DEMO / "seismic.csv"),
                "--crs",
                "EPSG:32631",
                "--out",
                str(tmp_path / "m.tif"),
            ]
        )
        == 0
    )
    with rasterio.open(tmp_path / "m.tif") as src:  # values: porosity, q10, q90 as float32
        assert (
            src.count == 3 and src.crs.to_epsg() == 32631 and src.width == 120 and src.height == 100
        )
        assert set(src.dtypes) == {"float32"} and src.descriptions == (
            "porosity",
            "porosity_q10",
            "porosity_q90",
        )
    # class codes and flags as integers beside it (GDAL reads one data type per file)
    with rasterio.open(tmp_path / "m_classes.tif") as src:
        assert (
            src.count == 1
            and src.dtypes == ("int16",)
            and src.nodata == -1
            and src.crs.to_epsg() == 32631
        )
        assert (
            src.descriptions == ("porosity_applicable",)
            and src.tags(1)["flag_meanings"] == "outside inside"
        )
        assert set(np.unique(src.read(1))) <= {-1, 0, 1} and (src.read(1) == 1).mean() > 0.5
    assert (
        main(
            [
                "predict",
                str(porosity_bundle),
                "--grid",
                str(DEMO / "seismic.csv"),
                "--crs",
                "EPSG:999999",
                "--out",
                str(tmp_path / "bad.tif"),
            ]
        )
        == 2
    )
    assert not (tmp_path / "bad.tif").exists()


def test_a_format_whose_library_is_missing_is_refused_before_any_work(tmp_path, monkeypatch):
    import importlib.util

    from predictor.errors import InputError
    from predictor.predict import check_format

    real = importlib.util.find_spec
    monkeypatch.setattr(
        importlib.util, "find_spec", lambda name, *a: None if name == "rasterio" else real(name, *a)
    )
    with pytest.raises(InputError, match="needs rasterio, which is not installed"):
        check_format(tmp_path / "maps.tif", volume=False)
    assert check_format(tmp_path / "maps.nc", volume=False).suffix == ".nc"
