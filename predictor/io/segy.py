"""SEG-Y volumes through segyio: geometry from trace headers, missing traces as NaN, rotated
surveys through the affine from (inline, crossline) to CDP x/y.

A volume is an ``xarray.Dataset`` with dims ``("z", "inline", "crossline")``, 1-D coordinates
``z`` (sample time or depth), ``inline``, ``crossline``, and 2-D coordinates ``cdp_x`` and
``cdp_y`` (projected metres) for every trace position, missing ones included.  ``attrs["affine"]``
holds (x0, dx_il, dx_xl, y0, dy_il, dy_xl): x = x0 + dx_il * il + dx_xl * xl, likewise y.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from ..errors import InputError, list_rows
from .atomic import atomic_file

COORD_TOLERANCE = 0.5  # metres a trace's CDP may sit off the survey's affine lattice


def _segyio():
    try:
        import segyio
    except ImportError:
        raise InputError(
            "reading or writing SEG-Y needs segyio: `pip install segyio` (a dependency of"
            " predictor: reinstall it)"
        ) from None
    return segyio


def _scaled(values: np.ndarray, scalar: np.ndarray) -> np.ndarray:
    # SEG-Y coordinate scalar: negative divides, positive multiplies, 0 means 1
    s = scalar.astype(float)
    factor = np.where(s < 0, -1.0 / np.where(s == 0, 1, s), np.where(s == 0, 1.0, s))
    return values.astype(float) * factor


def read_segy(path: str | Path, name: str = "amplitude") -> xr.Dataset:
    """Read a 3-D post-stack SEG-Y file (inline 189, crossline 193, CDP x/y 181/185 headers)."""
    segyio = _segyio()
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: file not found; check the path")
    tf = segyio.TraceField
    try:
        with segyio.open(str(path), "r", ignore_geometry=True) as f:
            il = f.attributes(tf.INLINE_3D)[:].astype(int)
            xl = f.attributes(tf.CROSSLINE_3D)[:].astype(int)
            scalar = f.attributes(tf.SourceGroupScalar)[:]
            cx = _scaled(f.attributes(tf.CDP_X)[:], scalar)
            cy = _scaled(f.attributes(tf.CDP_Y)[:], scalar)
            samples = np.asarray(f.samples, float)
            traces = f.trace.raw[:].astype(float)
            text = bytes(f.text[0]).decode("ascii", errors="replace")
    except InputError:
        raise
    except Exception as err:  # segyio raises RuntimeError/OSError on a damaged file
        raise InputError(
            f"{path}: not a readable SEG-Y file ({err}); the file may be truncated"
        ) from None
    if il.size == 0:
        raise InputError(f"{path}: holds no traces")
    keys = il.astype(np.int64) * 1_000_003 + xl
    _, first, counts = np.unique(keys, return_index=True, return_counts=True)
    if (counts > 1).any():
        dup = [f"inline {il[i]} crossline {xl[i]}" for i in first[counts > 1]]
        raise InputError(
            f"{path}: inconsistent geometry: traces repeat at {list_rows(dup)}; keep one trace per "
            "position"
        )
    ils, xls = np.unique(il), np.unique(xl)
    step_il = int(np.min(np.diff(ils))) if ils.size > 1 else 1
    step_xl = int(np.min(np.diff(xls))) if xls.size > 1 else 1
    inlines = np.arange(ils[0], ils[-1] + 1, step_il)
    crosslines = np.arange(xls[0], xls[-1] + 1, step_xl)
    if not (np.isin(ils, inlines).all() and np.isin(xls, crosslines).all()):
        raise InputError(
            f"{path}: inconsistent geometry: inline/crossline numbers are not on a regular step"
        )
    # the survey's affine from (inline, crossline) to CDP x/y, fitted on every trace
    A = np.column_stack([np.ones(il.size), il, xl])
    (x0, dxi, dxx), *_ = np.linalg.lstsq(A, cx, rcond=None)
    (y0, dyi, dyx), *_ = np.linalg.lstsq(A, cy, rcond=None)
    misfit = np.hypot(A @ [x0, dxi, dxx] - cx, A @ [y0, dyi, dyx] - cy)
    if misfit.max() > COORD_TOLERANCE:
        bad = [
            f"inline {il[i]} crossline {xl[i]}" for i in np.flatnonzero(misfit > COORD_TOLERANCE)
        ]
        raise InputError(
            f"{path}: inconsistent geometry: CDP coordinates of {list_rows(bad)} are off the survey"
            f" lattice by up to {misfit.max():.1f} m; check the coordinate headers and scalar"
        )
    cube = np.full((samples.size, inlines.size, crosslines.size), np.nan)
    ii = (il - inlines[0]) // step_il
    jj = (xl - crosslines[0]) // step_xl
    cube[:, ii, jj] = traces.T
    gi, gj = np.meshgrid(inlines, crosslines, indexing="ij")
    ds = xr.Dataset(
        {name: (("z", "inline", "crossline"), cube)},
        coords={
            "z": samples,
            "inline": inlines,
            "crossline": crosslines,
            "cdp_x": (("inline", "crossline"), x0 + dxi * gi + dxx * gj),
            "cdp_y": (("inline", "crossline"), y0 + dyi * gi + dyx * gj),
        },
    )
    ds.attrs.update(
        source=str(path),
        affine=[float(v) for v in (x0, dxi, dxx, y0, dyi, dyx)],
        missing_traces=int(cube.shape[1] * cube.shape[2] - il.size),
    )
    line = next(
        (
            text[k : k + 80]
            for k in range(0, len(text), 80)
            if text[k : k + 80].startswith(TEXT_DOMAIN)
        ),
        "",
    )
    domain = line[len(TEXT_DOMAIN) :].strip().lower()
    if domain in ("depth", "time"):  # written by this tool: the header says which
        ds.attrs["z_domain"] = domain
    return ds


TEXT_DOMAIN = "C 4 Z DOMAIN: "  # the textual header line the reader takes the z domain from


def _ascii(text: str) -> str:
    # the textual header must survive EBCDIC conversion: printable ASCII only
    return "".join(c if 32 <= ord(c) < 127 else "?" for c in str(text))


def _crs_label(wkt: str | None) -> str:
    if not wkt:
        return "NOT GIVEN"
    try:
        from pyproj import CRS

        crs = CRS.from_user_input(wkt)
        epsg = crs.to_epsg()
        return f"EPSG:{epsg} ({crs.name})" if epsg else crs.name
    except Exception:  # pyproj absent or an unusual WKT: its name as written
        return wkt.split('"')[1] if '"' in wkt else wkt[:60]


def textual_header(ds: xr.Dataset, var: str, z: np.ndarray) -> str:
    """The 3200-byte textual header: 40 lines of 80 ASCII characters, ``C 1`` to ``C40``,
    naming the variable, its units, the z domain and units, the CRS and the header bytes used."""
    attrs = ds[var].attrs
    domain = str(ds.attrs.get("z_domain", "unknown")).upper()
    z_units = {"DEPTH": "M", "TIME": "MS"}.get(domain, "AS GIVEN")
    interval = float(z[1] - z[0]) if z.size > 1 else 1.0
    lines = [
        "PREDICTOR OUTPUT VOLUME - A PREDICTED VOLUME IS A MODEL, NOT A MEASUREMENT",
        f"VARIABLE: {var}",
        f"MEANING: {attrs.get('long_name', var)}; UNITS: {attrs.get('units') or 'NONE GIVEN'}",
        f"Z DOMAIN: {domain}",  # line C 4: read back by read_segy (TEXT_DOMAIN)
        (
            f"SAMPLES: {z.size}, FIRST {z[0]:g} {z_units}, INTERVAL {interval:g} {z_units} (HEADER"
            " X 1000)"
        ),
        f"CRS: {_crs_label(ds.attrs.get('crs_wkt'))}",
        "INLINE BYTES 189-192, CROSSLINE 193-196, CDP X 181-184, CDP Y 185-188",
        "COORDINATE SCALAR -100 (CENTIMETRES), COORDINATE UNITS 1 (LENGTH, METRES)",
        "SAMPLE FORMAT 5 (4-BYTE IEEE FLOAT); TRACES WITH NO VALUE LEFT OUT",
        "MISSING SAMPLES WRITTEN AS 0; FLAGS AND CLASS CODES AS NUMBERS (SEE NETCDF)",
        f"BUNDLE: {ds.attrs.get('bundle', '')}; GRID: {ds.attrs.get('grid', '')}",
        "DRILLING, RESERVES AND SAFETY DECISIONS REST WITH QUALIFIED PROFESSIONALS",
    ]
    bodies = lines + [""] * (38 - len(lines)) + ["SEG-Y REV 1.0", "END TEXTUAL HEADER"]
    return "".join(_ascii(f"C{k + 1:2d} {body}")[:80].ljust(80) for k, body in enumerate(bodies))


def write_segy(ds: xr.Dataset, var: str, target: str | Path, overwrite: bool = True) -> Path:
    """Write one variable of a volume as SEG-Y revision 1 (IEEE floats, metres, a textual header
    that names the variable, units, z domain and CRS); traces that are all NaN are left out."""
    segyio = _segyio()
    cube = ds[var].transpose("z", "inline", "crossline").to_numpy().astype(np.float32)
    inl, xln = np.meshgrid(ds.inline.to_numpy(), ds.crossline.to_numpy(), indexing="ij")
    keep = ~np.all(np.isnan(cube), axis=0)
    z = ds.z.to_numpy().astype(float)
    interval = float(z[1] - z[0]) if z.size > 1 else 1.0
    spec = segyio.spec()
    spec.format = 5
    spec.samples = z
    spec.tracecount = int(keep.sum())
    tf = segyio.TraceField
    with atomic_file(target, overwrite=overwrite) as tmp:
        with segyio.create(str(tmp), spec) as f:
            f.text[0] = textual_header(ds, var, z).encode("ascii")
            for n, (i, j) in enumerate(zip(*np.nonzero(keep), strict=True)):
                f.header[n] = {
                    tf.INLINE_3D: int(inl[i, j]),
                    tf.CROSSLINE_3D: int(xln[i, j]),
                    tf.TRACE_SEQUENCE_LINE: n + 1,
                    tf.TRACE_SEQUENCE_FILE: n + 1,
                    tf.CDP: int(i * inl.shape[1] + j + 1),  # a running number over the survey grid
                    tf.CDP_TRACE: 1,
                    tf.TraceIdentificationCode: 1,  # one seismic-like trace per CDP
                    tf.CoordinateUnits: 1,
                    tf.TraceValueMeasurementUnit: -1,  # metres; "other"
                    tf.SourceGroupScalar: -100,
                    tf.CDP_X: int(round(float(ds.cdp_x[i, j]) * 100)),
                    tf.CDP_Y: int(round(float(ds.cdp_y[i, j]) * 100)),
                    tf.TRACE_SAMPLE_INTERVAL: int(round(interval * 1000)),
                    tf.TRACE_SAMPLE_COUNT: z.size,
                    tf.DelayRecordingTime: int(round(z[0])),
                }
                f.trace[n] = np.nan_to_num(cube[:, i, j], nan=0.0)
            f.bin.update(hns=z.size, hdt=int(round(interval * 1000)), format=5)
            f.bin.update(
                {
                    segyio.BinField.SEGYRevision: 1,
                    segyio.BinField.SEGYRevisionMinor: 0,
                    segyio.BinField.MeasurementSystem: 1,
                    segyio.BinField.ExtendedHeaders: 0,
                }
            )
    return Path(target)


def write_segy_set(ds: xr.Dataset, target: str | Path, overwrite: bool = False) -> Path:
    """Every variable of a volume as its own SEG-Y file, ``<stem>_<variable><suffix>`` beside
    ``target``; all are committed together or none.  Returns the pattern of their names."""
    from contextlib import ExitStack

    target = Path(target)
    paths = {var: target.with_name(f"{target.stem}_{var}{target.suffix}") for var in ds.data_vars}
    if not overwrite:
        there = [str(p) for p in paths.values() if p.exists()]
        if there:
            raise InputError(f"{there[0]}: already exists; pass --overwrite to replace it")
    with ExitStack() as stack:
        for var, path in paths.items():
            tmp = stack.enter_context(atomic_file(path, overwrite=True))
            values = ds[var].astype(np.float32)
            if (
                "_FillValue" in ds[var].attrs
            ):  # flags and class codes: the fill becomes NaN, then a dead sample
                values = values.where(ds[var] != ds[var].attrs["_FillValue"])
            values.attrs = dict(ds[var].attrs)
            write_segy(ds.assign({var: values}), var, tmp, overwrite=True)
    return target.with_name(f"{target.stem}_*{target.suffix}")
