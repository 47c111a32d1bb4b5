"""Readers: accepted variations and clear errors on bad input."""

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from conftest import write
from scipy.interpolate import RegularGridInterpolator

from predictor.errors import InputError, PredictorWarning
from predictor.grid import grid_from_table, read_grid, sample_at
from predictor.io.netcdf import write_netcdf
from predictor.io.tables import read_table, read_wells

WELLS = (
    "well,X,Y,facies,porosity,permeability\n"
    "A,10,20,sand,0.25,100\nB,30,40,shale,0.08,0.5\nC,50,10,sand,0.22,80\n"
)


@pytest.mark.parametrize(
    "encoding,newline,delimiter",
    [
        ("utf-8", "\n", ","),
        ("utf-8-sig", "\r\n", ","),
        ("utf-8", "\n", ";"),
        ("utf-8-sig", "\n", ";"),
    ],
)
def test_wells_variations_read_alike(tmp_path, encoding, newline, delimiter):
    text = WELLS.replace(",", delimiter)
    wells = read_wells(write(tmp_path / "w.csv", text, encoding, newline))
    assert list(wells.well_id) == ["A", "B", "C"]
    assert wells.x.tolist() == [10, 30, 50]
    assert wells.porosity.tolist() == [0.25, 0.08, 0.22]
    assert wells.attrs["columns_taken"] == {"x": "X", "y": "Y"}


def test_easting_northing_and_extra_columns(tmp_path):
    text = "Easting,Northing,facies,porosity,comment\n1,2,1,0.1,ok\n3,4,2,0.2,fine\n"
    wells = read_wells(write(tmp_path / "w.csv", text))
    assert wells.attrs["columns_taken"] == {"x": "Easting", "y": "Northing"}
    assert wells.facies.tolist() == [1, 2]  # integer codes kept as given
    assert wells.comment.tolist() == ["ok", "fine"]


def test_named_columns(tmp_path):
    text = "E_utm,N_utm,porosity\n1,2,0.1\n3,4,0.2\n"
    wells = read_wells(write(tmp_path / "w.csv", text), x="e_utm", y="N_UTM")
    assert wells.y.tolist() == [2, 4]


def test_parquet(tmp_path):
    frame = pd.DataFrame({"x": [1.0, 2.0], "y": [3.0, 4.0], "porosity": [0.1, 0.2]})
    frame.to_parquet(tmp_path / "w.parquet")
    assert read_wells(tmp_path / "w.parquet").porosity.tolist() == [0.1, 0.2]


@pytest.mark.parametrize(
    "text,match",
    [
        ("", "empty"),
        ("x,y,porosity\n", "no data rows"),
        (
            "x,y,porosity\n1,2,abc\n3,4,0.2\n",
            r"'porosity' has values that are not numbers at row1 \(line 2\)",
        ),
        (
            "x,y,porosity\n1,nan,0.1\n3,4,0.2\n",
            r"coordinate column 'y' is missing, NaN or infinite at row1 \(line 2\)",
        ),
        ("x,y,porosity\ninf,1,0.1\n3,4,0.2\n", "NaN or infinite"),
        ("x,y,porosity\n1,2,12.5\n3,4,22\n", r"looks like percent.*--porosity-percent"),
        (
            "east_m,north_m,porosity\n1,2,0.1\n",
            r"no column for the x coordinate.*columns are east_m, north_m, porosity",
        ),
        (
            "x,y,porosity\n1,2,0.1,7\n3,4\n",
            r"line 2, line 3 \(2 rows\) do not have the header's 3 fields",
        ),
    ],
)
def test_bad_wells(tmp_path, text, match):
    with pytest.raises(InputError, match=match):
        read_wells(write(tmp_path / "w.csv", text))


def test_garbage_bytes(tmp_path):
    path = tmp_path / "w.csv"
    path.write_bytes(bytes(range(256)) * 4)
    with pytest.raises(InputError, match="binary"):
        read_wells(path)


def test_percent_option_converts(tmp_path):
    wells = read_wells(
        write(tmp_path / "w.csv", "x,y,porosity\n1,2,12.5\n3,4,22\n"), porosity_percent=True
    )
    assert wells.porosity.tolist() == [0.125, 0.22]


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="file not found"):
        read_table(tmp_path / "nope.csv")


def _grid_text(rows):
    return "x,y,impedance\n" + "\n".join(f"{x},{y},{v}" for x, y, v in rows) + "\n"


def test_grid_lattice_detected_with_gaps(tmp_path):
    rows = [
        (100 + 10 * i, 200 + 5 * j, 1000 + i + 10 * j)
        for i in range(4)
        for j in range(3)
        if (i, j) != (2, 1)
    ]
    grid = read_grid(write(tmp_path / "g.csv", _grid_text(rows)))
    assert grid.impedance.dims == ("y", "x")
    assert grid.x.values.tolist() == [100, 110, 120, 130]
    assert grid.y.values.tolist() == [200, 205, 210]
    assert np.isnan(grid.impedance.sel(x=120, y=205))
    assert float(grid.impedance.sel(x=130, y=210)) == 1000 + 3 + 20


def test_grid_off_lattice(tmp_path):
    rows = [(0, 0, 1), (10, 0, 2), (20, 0, 3), (0, 10, 4), (13, 10, 5), (20, 10, 6)]
    with pytest.raises(InputError, match=r"not on a regular lattice: column 'x' at line 6"):
        read_grid(write(tmp_path / "g.csv", _grid_text(rows)))


def test_grid_needs_attribute(tmp_path):
    with pytest.raises(InputError, match="no attribute columns"):
        read_grid(write(tmp_path / "g.csv", "x,y\n0,0\n1,0\n0,1\n1,1\n"))


def test_netcdf_round_trip_and_truncated(tmp_path):
    ds = xr.Dataset(
        {"impedance": (("y", "x"), np.arange(12.0).reshape(3, 4))},
        coords={"x": [0.0, 1, 2, 3], "y": [10.0, 11, 12]},
    )
    path = write_netcdf(ds, tmp_path / "g.nc")
    back = read_grid(path)
    np.testing.assert_array_equal(back.impedance.values, ds.impedance.values)
    assert xr.open_dataset(path).attrs["Conventions"] == "CF-1.8"
    broken = tmp_path / "broken.nc"
    broken.write_bytes(path.read_bytes()[:200])
    with pytest.raises(InputError, match="not a readable NetCDF"):
        read_grid(broken)


def test_descending_netcdf_coordinates_are_flipped(tmp_path):
    ds = xr.Dataset(
        {"impedance": (("y", "x"), np.arange(6.0).reshape(2, 3))},
        coords={"x": [0.0, 1, 2], "y": [11.0, 10.0]},
    )
    back = read_grid(write_netcdf(ds, tmp_path / "g.nc"))
    assert back.y.values.tolist() == [10.0, 11.0]
    assert back.impedance.values[0].tolist() == [3.0, 4.0, 5.0]


def test_bilinear_sampling_matches_scipy():
    # reference library: scipy.interpolate.RegularGridInterpolator (linear) on a full grid
    rng = np.random.default_rng(0)
    xs, ys = np.arange(0, 100, 10.0), np.arange(0, 50, 5.0)
    values = rng.normal(size=(ys.size, xs.size))
    grid = xr.Dataset({"a": (("y", "x"), values)}, coords={"x": xs, "y": ys})
    px, py = rng.uniform(0, 90, 50), rng.uniform(0, 45, 50)
    ours, kept = sample_at(grid, px, py)
    ref = RegularGridInterpolator((ys, xs), values)(np.column_stack([py, px]))
    assert kept.all()
    np.testing.assert_allclose(ours["a"].to_numpy(), ref, atol=1e-12)
    nearest, _ = sample_at(grid, [21.0], [12.0], method="nearest")
    assert nearest["a"].iloc[0] == values[2, 2]


def test_sampling_outside_names_wells():
    grid = xr.Dataset(
        {"a": (("y", "x"), np.ones((3, 3)))}, coords={"x": [0.0, 1, 2], "y": [0.0, 1, 2]}
    )
    grid["a"][1, 1] = np.nan
    with pytest.raises(
        InputError, match=r"outside the grid: far \(1 row\).*no attribute value \(NaN\): gap"
    ):
        sample_at(grid, [0.5, 9.0, 1.1], [0.5, 0.0, 0.9], labels=["ok", "far", "gap"])
    with pytest.warns(PredictorWarning, match="left out wells"):
        values, kept = sample_at(
            grid, [0.5, 9.0], [0.5, 0.0], labels=["ok", "far"], drop_outside=True
        )
    assert kept.tolist() == [True, False] and values["a"].tolist() == [1.0]


def test_grid_from_table_duplicate_nodes():
    frame = pd.DataFrame({"x": [0, 1, 0, 1, 1], "y": [0, 0, 1, 1, 1], "a": [1, 2, 3, 4, 5]})
    frame.attrs["source"] = "g.csv"
    with pytest.raises(InputError, match="appear twice"):
        grid_from_table(frame)


def test_property_roles_follow_the_option_or_a_common_mnemonic(tmp_path):
    """A porosity log named PHIT in percent is porosity, and so refused as percent; named by
    --porosity-column it is read under its role, with the file column recorded."""
    path = write(
        tmp_path / "w.csv",
        "WELL,X,Y,PHIT,KLOGH,LITHO\nA,0,0,21,150,sand\nB,100,0,12,3,shale\nC,0,100,25,400,sand\n",
    )
    with pytest.raises(
        InputError, match=r"column 'PHIT' \(porosity\) looks like percent .*--porosity-percent"
    ):
        read_wells(path)
    wells = read_wells(path, porosity_percent=True, roles={"permeability": "KLOGH"})
    np.testing.assert_allclose(wells["porosity"], [0.21, 0.12, 0.25])
    assert wells["facies"].tolist() == ["sand", "shale", "sand"]  # LITHO: a common mnemonic
    assert wells.attrs["columns_taken"]["porosity"] == "PHIT" and "KLOGH" not in wells
    assert wells.attrs["columns_taken"]["permeability"] == "KLOGH"
    with pytest.raises(InputError, match=r"no column 'TOTPOR' for porosity \(--porosity-column\)"):
        read_wells(path, roles={"porosity": "TOTPOR"})
    both = write(tmp_path / "b.csv", "x,y,porosity,PHIE\n0,0,0.2,0.18\n1,1,0.1,0.09\n")
    with pytest.raises(
        InputError, match="column 'PHIE' is taken as porosity .* also has a column 'porosity'"
    ):
        read_wells(both, roles={"porosity": "PHIE"})
    assert read_wells(both)["porosity"].tolist() == [0.2, 0.1]  # the role's own name wins
    with pytest.raises(InputError, match="unknown column role saturation"):
        read_wells(both, roles={"saturation": "SW"})


def test_a_target_named_by_its_file_column_trains_as_its_role(tmp_path):
    from predictor.training import TrainOptions, _targets_by_role

    path = write(tmp_path / "w.csv", "x,y,PHIT\n0,0,0.2\n100,0,0.1\n")
    options = _targets_by_role(read_wells(path), TrainOptions(targets=["PHIT", "facies"]))
    assert options.targets == ["porosity", "facies"]


def test_attribute_kind_not_name_decides_the_positivity_check():
    """A relative (signed) impedance is refused as impedance until the user says it is signed."""
    from predictor.grid import attribute_kind, set_attribute_kinds
    from predictor.qc import grid_findings

    values = np.linspace(-500.0, 800.0, 20).reshape(4, 5)
    grid = xr.Dataset(
        {"rel_impedance": (("y", "x"), values), "vp": (("y", "x"), values + 3000)},
        coords={"y": np.arange(4.0), "x": np.arange(5.0)},
    )
    assert (
        attribute_kind(grid, "rel_impedance") == "impedance"
        and attribute_kind(grid, "vp") == "velocity"
    )
    errors = [f for f in grid_findings(grid) if f.severity == "error"]
    assert [f.column for f in errors] == [
        "rel_impedance"
    ] and "--attribute-kind rel_impedance=amplitude" in errors[0].message
    set_attribute_kinds(grid, {"rel_impedance": "amplitude"})
    assert not [f for f in grid_findings(grid) if f.severity == "error"]
    with pytest.raises(
        InputError, match="kind must be one of impedance, velocity, density, amplitude, other"
    ):
        set_attribute_kinds(grid, {"vp": "speed"})
    with pytest.raises(InputError, match="names 'ai', which is not an attribute of the grid"):
        set_attribute_kinds(grid, {"ai": "impedance"})


def test_files_open_by_their_signature_whatever_their_name(tmp_path):
    # signatures from the formats' specifications (HDF5, TIFF, Parquet), see predictor.io.formats
    from conftest import DEMO

    from predictor.grid import read_seismic
    from predictor.io.formats import file_format
    from predictor.io.geotiff import write_geotiff
    from predictor.io.netcdf import write_zarr

    grid = read_grid(DEMO / "seismic.nc")
    write_netcdf(grid, tmp_path / "grid.nc")
    (tmp_path / "grid.nc").rename(tmp_path / "impedance.dat")
    write_zarr(grid, tmp_path / "store.zarr")
    (tmp_path / "store.zarr").rename(tmp_path / "store")
    write_geotiff(grid, tmp_path / "g.tif")
    (tmp_path / "g.tif").rename(tmp_path / "g.raster")
    pd.read_csv(DEMO / "seismic.csv").to_parquet(tmp_path / "table.bin")
    kinds = {
        name: file_format(tmp_path / name)
        for name in ("impedance.dat", "store", "g.raster", "table.bin")
    }
    assert kinds == {
        "impedance.dat": "netcdf",
        "store": "zarr",
        "g.raster": "geotiff",
        "table.bin": "parquet",
    }
    for name in kinds:
        again = read_seismic(tmp_path / name)
        np.testing.assert_allclose(
            again["impedance"].to_numpy(), grid["impedance"].to_numpy(), rtol=1e-6
        )
        np.testing.assert_allclose(again.x, grid.x)
    # a text table named like a NetCDF file is refused by the NetCDF reader, saying so
    write(tmp_path / "table.nc", "x,y,impedance\n0,0,1\n")
    with pytest.raises(InputError, match="not a readable NetCDF"):
        read_seismic(tmp_path / "table.nc")


def test_a_plain_single_band_geotiff_is_a_grid_named_by_its_file(tmp_path):
    # a GeoTIFF as another package writes it (rasterio here): one band, no description, north-up
    import rasterio
    from rasterio.transform import Affine, from_origin

    from predictor.grid import read_seismic

    values = np.arange(12, dtype="float32").reshape(3, 4)  # row 0 is the northernmost
    values[1, 2] = -9999
    profile = {
        "driver": "GTiff",
        "width": 4,
        "height": 3,
        "count": 1,
        "dtype": "float32",
        "nodata": -9999,
        "crs": "EPSG:32631",
        "transform": from_origin(500000, 7205000, 25, 25),
    }
    with rasterio.open(tmp_path / "acoustic_impedance.tif", "w", **profile) as dst:
        dst.write(values, 1)
    grid = read_seismic(tmp_path / "acoustic_impedance.tif")
    assert list(grid.data_vars) == ["acoustic_impedance"]
    np.testing.assert_allclose(grid.x, 500000 + 12.5 + 25 * np.arange(4))
    np.testing.assert_allclose(grid.y, 7205000 - 12.5 - 25 * np.arange(3)[::-1])  # ascending
    np.testing.assert_array_equal(grid["acoustic_impedance"].to_numpy()[::-1][0], [0, 1, 2, 3])
    assert np.isnan(grid["acoustic_impedance"].sel(x=500062.5, y=7204962.5).item())
    assert "32631" in grid.attrs["crs_wkt"] or "UTM zone 31N" in grid.attrs["crs_wkt"]
    profile["transform"] = Affine(25, 5, 500000, 5, -25, 7205000)  # rotated
    with rasterio.open(tmp_path / "rotated.tif", "w", **profile) as dst:
        dst.write(values, 1)
    with pytest.raises(InputError, match="rotated"):
        read_seismic(tmp_path / "rotated.tif")
