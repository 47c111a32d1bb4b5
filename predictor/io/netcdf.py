"""NetCDF grids read and written with xarray (h5netcdf engine), following CF conventions on
write."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from ..errors import InputError
from .formats import file_format

X_COORDS = ("x", "easting", "east", "projection_x_coordinate")
Y_COORDS = ("y", "northing", "north", "projection_y_coordinate")


def read_netcdf_grid(path: Path, lazy: bool = False) -> xr.Dataset:
    """Open a NetCDF file (or Zarr store) of 2-D variables on x/y coordinates; the caller checks
    it as a grid (:func:`predictor.grid.check_grid`)."""
    if not path.exists():
        raise InputError(f"{path}: file not found; check the path")
    try:
        if file_format(path) == "zarr":
            ds = xr.open_zarr(path)
            ds = ds if lazy else ds.load()
        elif lazy:
            ds = xr.open_dataset(
                path, engine="h5netcdf", chunks={"y": 256, "x": 256}
            )  # read by parts
        else:
            with xr.open_dataset(path) as handle:
                ds = handle.load()
    except Exception as err:  # netCDF/HDF5 libraries raise many types on a damaged file
        raise InputError(
            f"{path}: not a readable NetCDF file ({err.__class__.__name__}: {str(err)[:120]}); "
            "the file may be truncated or of another format"
        ) from None
    rename = {}
    for target, names in (("x", X_COORDS), ("y", Y_COORDS)):
        found = [d for d in ds.dims if str(d).lower() in names]
        if not found:
            raise InputError(
                f"{path}: no {target!r} dimension (looked for {', '.join(names)}); dims are"
                f" {tuple(ds.dims)}"
            )
        if found[0] != target:
            rename[found[0]] = target
    ds = ds.rename(rename)
    ds.attrs["source"] = str(path)
    mapping = next(
        (ds[v] for v in ds.variables if "crs_wkt" in ds[v].attrs or "spatial_ref" in ds[v].attrs),
        None,
    )
    if mapping is not None:  # carry the CRS on to the maps
        ds.attrs["crs_wkt"] = mapping.attrs.get("crs_wkt") or mapping.attrs.get("spatial_ref")
        ds = (
            ds.drop_vars(mapping.name) if mapping.name in ds.data_vars and mapping.ndim == 0 else ds
        )
    return ds


def cf(ds: xr.Dataset, crs_wkt: str | None) -> xr.Dataset:
    """A copy with CF-1.8 attributes on the coordinates, a grid mapping and storable attributes."""
    out = ds.copy()
    out.attrs = {
        k: (
            np.asarray(v, float)
            if k == "affine"
            else v
            if isinstance(v, int | float | str)
            else str(v)
        )
        for k, v in out.attrs.items()
    }
    out.attrs["Conventions"] = "CF-1.8"
    for name, axis in (("x", "x"), ("cdp_x", "x"), ("y", "y"), ("cdp_y", "y")):
        if name in out.coords:
            east = axis == "x"
            out[name].attrs.update(
                standard_name=f"projection_{axis}_coordinate",
                units="m",
                long_name=("easting" if east else "northing")
                + (" of the trace" if "cdp" in name else ""),
            )
    if "z" in out.coords:
        domain = ds.attrs.get("z_domain", "unknown")
        out["z"].attrs.setdefault("units", {"depth": "m", "time": "ms"}.get(domain, "1"))
        out["z"].attrs.update(
            long_name={"depth": "depth", "time": "two-way time"}.get(domain, "sample axis"),
            positive="down",
            axis="Z",
        )
    for name in ("inline", "crossline"):
        if name in out.coords:
            out[name].attrs.update(long_name=f"{name} number of the survey", units="1")
    for name in out.coords:  # coordinates are never missing: no fill value (CF 2.5.1)
        out[name].encoding["_FillValue"] = None
    if crs_wkt:
        out["crs"] = xr.DataArray(np.int32(0), attrs=grid_mapping(crs_wkt))
        for var in ds.data_vars:
            out[var].attrs["grid_mapping"] = "crs"
    return out


def grid_mapping(crs_wkt: str) -> dict:
    """CF grid-mapping attributes of a CRS (``grid_mapping_name`` and its parameters, CF 5.6),
    with the WKT kept as ``crs_wkt``; pyproj translates the CRS into CF terms."""
    try:
        import pyproj

        attrs = {
            k: v for k, v in pyproj.CRS.from_user_input(crs_wkt).to_cf().items() if v is not None
        }
    except ImportError:
        raise InputError(
            "labelling NetCDF or Zarr maps with a CRS needs pyproj: `pip install pyproj` (a"
            " dependency of predictor: reinstall it)"
        ) from None
    except Exception as err:  # pyproj raises its own CRSError
        raise InputError(
            f"unknown coordinate reference system ({str(err)[:120]}); give e.g. EPSG:32631"
        ) from None
    attrs["crs_wkt"] = crs_wkt
    attrs["spatial_ref"] = crs_wkt  # the name GDAL reads
    return attrs


def write_netcdf(
    ds: xr.Dataset, target: str | Path, overwrite: bool = True, crs_wkt: str | None = None
) -> Path:
    """Write a grid or volume as CF-1.8 NetCDF-4, atomically (temporary name, then rename)."""
    from .atomic import atomic_file

    out = cf(ds, crs_wkt)
    with atomic_file(target, overwrite=overwrite) as tmp:
        out.to_netcdf(tmp, engine="h5netcdf")
    return Path(target)


def write_zarr(
    ds: xr.Dataset, target: str | Path, overwrite: bool = True, crs_wkt: str | None = None
) -> Path:
    """Write a grid or volume as a Zarr store with the same CF attributes, atomically."""
    from .atomic import atomic_folder

    out = cf(ds, crs_wkt)
    if "affine" in out.attrs:  # Zarr attributes are JSON: a plain list, not an array
        out.attrs["affine"] = [float(v) for v in out.attrs["affine"]]
    # chunks a tiled reader can take one at a time: whole traces of 64 x 64 for volumes, 512 x 512
    # for maps
    sizes = {"z": -1, "inline": 64, "crossline": 64} if "z" in out.dims else {"y": 512, "x": 512}
    out = out.chunk({d: c for d, c in sizes.items() if d in out.dims})
    with atomic_folder(target, overwrite=overwrite) as tmp:
        out.to_zarr(tmp, mode="w", zarr_format=2)
    return Path(target)
