"""GeoTIFF maps through rasterio: one float32 band per map variable, north-up, band names kept.

Integer flag variables (facies codes, applicability) are written as floats with NaN where
empty, like the rest (a GeoTIFF holds one data type for all bands); their ``flag_values`` and
``flag_meanings`` go into the band tags, units into each band's unit type.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from ..errors import InputError
from .atomic import atomic_file


def write_geotiff(maps: xr.Dataset, target: str | Path, crs: str | None = None, overwrite: bool = True) -> Path:
    """Write every (y, x) variable of ``maps`` as a band of one GeoTIFF, atomically."""
    try:
        import rasterio
        from rasterio.transform import from_origin
    except ImportError:
        raise InputError("writing GeoTIFF needs rasterio: `pip install rasterio` (a dependency of predictor: reinstall it)") from None
    names = [str(v) for v in maps.data_vars if maps[v].dims == ("y", "x")]
    dx = float(maps.x[1] - maps.x[0])
    dy = float(maps.y[1] - maps.y[0])
    # node-centred grid -> pixel edges; rows run north to south in the file
    transform = from_origin(float(maps.x[0]) - dx / 2, float(maps.y[-1]) + dy / 2, dx, dy)
    crs = crs or maps.attrs.get("crs_wkt") or None
    try:
        crs_obj = rasterio.crs.CRS.from_user_input(crs) if crs else None
    except rasterio.errors.CRSError as err:
        raise InputError(f"unknown coordinate reference system {crs!r} ({err}); give e.g. EPSG:32631") from None
    with atomic_file(target, overwrite=overwrite) as tmp:
        with rasterio.open(tmp, "w", driver="GTiff", height=maps.sizes["y"], width=maps.sizes["x"],
                           count=len(names), dtype="float32", crs=crs_obj, transform=transform, nodata=np.nan,
                           compress="deflate") as dst:
            for i, name in enumerate(names, start=1):
                values = maps[name].to_numpy().astype("float32")
                fill = maps[name].attrs.get("_FillValue")
                if fill is not None:
                    values = np.where(values == fill, np.nan, values)
                dst.write(values[::-1], i)
                dst.set_band_description(i, name)
                attrs = maps[name].attrs
                if attrs.get("units"):
                    dst.set_band_unit(i, str(attrs["units"]))
                if attrs.get("long_name"):
                    dst.update_tags(i, long_name=str(attrs["long_name"]))
                meanings = attrs.get("flag_meanings")
                if meanings:  # codes 0..n-1, stored as floats like every band (one dtype per file)
                    flag_values = attrs.get("flag_values", np.arange(len(meanings.split(" "))))
                    dst.update_tags(i, flag_meanings=meanings,
                                    flag_values=" ".join(str(int(v)) for v in np.atleast_1d(flag_values)))
    return Path(target)


def crs_to_wkt(crs: str) -> str:
    """A CRS given as "EPSG:...", WKT or PROJ string, as WKT (for NetCDF's ``crs_wkt``)."""
    try:
        import rasterio

        return rasterio.crs.CRS.from_user_input(crs).to_wkt()
    except ImportError:
        return crs
    except Exception as err:  # rasterio raises its own CRSError
        raise InputError(f"unknown coordinate reference system {crs!r} ({err}); give e.g. EPSG:32631") from None


def read_geotiff(path: str | Path) -> xr.Dataset:
    """Read a GeoTIFF written by :func:`write_geotiff` back into a (y, x) grid (ascending y)."""
    import rasterio

    with rasterio.open(path) as src:
        t = src.transform
        xs = t.c + t.a * (np.arange(src.width) + 0.5)
        ys = t.f + t.e * (np.arange(src.height) + 0.5)
        data = {src.descriptions[i] or f"band{i + 1}": (("y", "x"), src.read(i + 1)[::-1].astype(float))
                for i in range(src.count)}
        crs = src.crs.to_wkt() if src.crs else None
    ds = xr.Dataset(data, coords={"x": xs, "y": ys[::-1]})
    if crs:
        ds.attrs["crs_wkt"] = crs
    return ds
