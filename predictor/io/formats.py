"""Which reader opens a file: by its first bytes (the format's signature), else by its extension.

A NetCDF grid saved as ``impedance.dat`` still opens as NetCDF, and a CSV mistakenly named
``.nc`` is refused by the NetCDF reader with a message saying so.  Signatures (from each
format's specification): HDF5 (NetCDF-4) ``\\x89HDF\\r\\n\\x1a\\n``; NetCDF classic ``CDF\\x01`` /
``CDF\\x02`` / ``CDF\\x05``; TIFF ``II*\\x00`` / ``MM\\x00*``; Parquet ``PAR1``.  SEG-Y has no
signature (a 3 200-byte textual header of any content), so it goes by extension; a Zarr store
is a folder holding ``.zgroup`` (version 2) or ``zarr.json`` (version 3).
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal

Format = Literal["netcdf", "zarr", "geotiff", "segy", "parquet", "table"]

SIGNATURES: dict[bytes, Format] = {
    b"\x89HDF\r\n\x1a\n": "netcdf",
    b"CDF\x01": "netcdf",
    b"CDF\x02": "netcdf",
    b"CDF\x05": "netcdf",
    b"II*\x00": "geotiff",
    b"MM\x00*": "geotiff",
    b"PAR1": "parquet",
}
EXTENSIONS: dict[str, Format] = {
    ".nc": "netcdf",
    ".nc4": "netcdf",
    ".netcdf": "netcdf",
    ".cdf": "netcdf",
    ".h5": "netcdf",
    ".zarr": "zarr",
    ".tif": "geotiff",
    ".tiff": "geotiff",
    ".sgy": "segy",
    ".segy": "segy",
    ".parquet": "parquet",
    ".pq": "parquet",
}


def file_format(path: str | Path) -> Format:
    """The format of ``path``: its signature when the file starts with one, else its extension;
    anything else is read as a delimited text table (CSV)."""
    path = Path(path)
    if path.is_dir():
        return (
            "zarr"
            if (path / ".zgroup").exists() or (path / "zarr.json").exists()
            else EXTENSIONS.get(path.suffix.lower(), "table")
        )
    if path.is_file():
        with open(path, "rb") as handle:
            head = handle.read(8)
        for signature, kind in SIGNATURES.items():
            if head.startswith(signature):
                return kind
    return EXTENSIONS.get(path.suffix.lower(), "table")
