"""GeoTIFF maps through rasterio: north-up, one band per map variable, band names kept.

A GeoTIFF holds one data type for all its bands, so the values (porosity, q10, probabilities…)
go as float32 bands with NaN where empty into the named file, and the class codes and flags
(facies, applicability) as int16 bands with -1 where empty into ``<stem>_classes.tif`` beside
it; both are committed together.  ``flag_values`` and ``flag_meanings`` go into the band tags,
units into each band's unit type.
"""

from __future__ import annotations

from contextlib import ExitStack
from pathlib import Path

import numpy as np
import xarray as xr

from ..errors import InputError
from .atomic import atomic_file, check_target


def classes_path(target: str | Path) -> Path:
    """Where the class codes and flags of a GeoTIFF map go: ``<stem>_classes<suffix>`` beside it."""
    target = Path(target)
    return target.with_name(f"{target.stem}_classes{target.suffix}")


def write_geotiff(
    maps: xr.Dataset, target: str | Path, crs: str | None = None, overwrite: bool = True
) -> Path:
    """Write every (y, x) variable of ``maps`` as a band, values and class codes in two files
    (see the module), atomically and together."""
    try:
        import rasterio
        from rasterio.transform import from_origin
    except ImportError:
        raise InputError(
            "writing GeoTIFF needs rasterio: `pip install rasterio` (a dependency of predictor:"
            " reinstall it)"
        ) from None
    names = [str(v) for v in maps.data_vars if maps[v].dims == ("y", "x")]
    codes = [n for n in names if maps[n].attrs.get("flag_meanings") and maps[n].dtype.kind == "i"]
    values = [n for n in names if n not in codes]
    dx = float(maps.x[1] - maps.x[0])
    dy = float(maps.y[1] - maps.y[0])
    # node-centred grid -> pixel edges; rows run north to south in the file
    transform = from_origin(float(maps.x[0]) - dx / 2, float(maps.y[-1]) + dy / 2, dx, dy)
    crs = crs or maps.attrs.get("crs_wkt") or None
    try:
        crs_obj = rasterio.crs.CRS.from_user_input(crs) if crs else None
    except rasterio.errors.CRSError as err:
        raise InputError(
            f"unknown coordinate reference system {crs!r} ({err}); give e.g. EPSG:32631"
        ) from None
    files = [(Path(target), values, "float32", np.nan)] + (
        [(classes_path(target), codes, "int16", -1)] if codes else []
    )
    if not values:  # class codes only: they are the named file
        files = [(Path(target), codes, "int16", -1)]
    if not overwrite:
        for path, _, _, _ in files:
            check_target(path, overwrite)
    with ExitStack() as stack:
        for path, bands, dtype, nodata in files:
            tmp = stack.enter_context(atomic_file(path, overwrite=True))
            with rasterio.open(
                tmp,
                "w",
                driver="GTiff",
                height=maps.sizes["y"],
                width=maps.sizes["x"],
                count=len(bands),
                dtype=dtype,
                crs=crs_obj,
                transform=transform,
                nodata=nodata,
                compress="deflate",
            ) as dst:
                for i, name in enumerate(bands, start=1):
                    _write_band(dst, i, maps[name], dtype)
    return Path(target)


def _write_band(dst, i: int, var: xr.DataArray, dtype: str) -> None:
    data = var.to_numpy()
    fill = var.attrs.get("_FillValue")
    if dtype == "float32":
        data = data.astype("float32")
        if fill is not None:
            data = np.where(data == fill, np.nan, data)
    else:  # class codes and flags: -1 where empty, as in the NetCDF maps
        data = (
            np.where(data == fill, -1, data).astype(dtype)
            if fill is not None
            else data.astype(dtype)
        )
    dst.write(data[::-1], i)
    dst.set_band_description(i, str(var.name))
    if var.attrs.get("units"):
        dst.set_band_unit(i, str(var.attrs["units"]))
    if var.attrs.get("long_name"):
        dst.update_tags(i, long_name=str(var.attrs["long_name"]))
    meanings = var.attrs.get("flag_meanings")
    if meanings:
        flag_values = var.attrs.get("flag_values", np.arange(len(meanings.split(" "))))
        dst.update_tags(
            i,
            flag_meanings=meanings,
            flag_values=" ".join(str(int(v)) for v in np.atleast_1d(flag_values)),
        )


def crs_to_wkt(crs: str) -> str:
    """A CRS given as "EPSG:...", WKT or PROJ string, as WKT (for NetCDF's ``crs_wkt``)."""
    try:
        import rasterio

        return rasterio.crs.CRS.from_user_input(crs).to_wkt()
    except ImportError:
        return crs
    except Exception as err:  # rasterio raises its own CRSError
        raise InputError(
            f"unknown coordinate reference system {crs!r} ({err}); give e.g. EPSG:32631"
        ) from None


def read_geotiff(path: str | Path, classes: bool = True) -> xr.Dataset:
    """Read a north-up GeoTIFF into a (y, x) grid (ascending y, empty nodes as NaN): each band a
    variable named by its description, a single undescribed band by the file's stem
    (``impedance.tif`` -> ``impedance``). With ``classes`` the class bands of
    ``<stem>_classes.tif`` (as :func:`write_geotiff` writes them) join when present."""
    import rasterio
    from rasterio.errors import RasterioIOError

    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: file not found; check the path")
    data = {}
    for part in [path] + ([classes_path(path)] if classes and classes_path(path).exists() else []):
        try:
            src = rasterio.open(part)
        except RasterioIOError as err:
            raise InputError(
                f"{part}: not a readable GeoTIFF ({str(err)[:120]}); re-export it"
            ) from None
        with src:
            t = src.transform
            if t.b or t.d:
                raise InputError(
                    f"{part}: the raster is rotated (its geotransform has rotation terms); resample"
                    " it north-up, or give the grid as a NetCDF or CSV table of x, y and"
                    " attributes"
                )
            xs = t.c + t.a * (np.arange(src.width) + 0.5)
            ys = t.f + t.e * (np.arange(src.height) + 0.5)
            for i in range(src.count):
                band = src.read(i + 1)[::-1].astype(float)
                if src.nodata is not None and np.isfinite(src.nodata):
                    band[band == src.nodata] = np.nan
                name = src.descriptions[i] or (part.stem if src.count == 1 else f"band{i + 1}")
                data[name] = (("y", "x"), band)
            crs = src.crs.to_wkt() if src.crs else None
    ds = xr.Dataset(data, coords={"x": xs, "y": ys[::-1]})
    ds.attrs["source"] = str(path)
    if crs:
        ds.attrs["crs_wkt"] = crs
    return ds
