"""Maps of grids larger than memory: tile by tile, with a halo of context, into a Zarr store.

Each tile is read with enough surrounding nodes for the smoothing features (see
:func:`predictor.features.halo_cells`), predicted with exactly the in-memory code
(:func:`predictor.predict.predict_maps`; the same values, to rounding where a long smoothing
kernel runs by FFT), trimmed to its interior and written into its region
of the output store by the thread or worker that predicted it, so tile edges never show, memory
stays flat in the grid size and no map data funnels through the client.  Tiles run on local
threads (all cores by default), or on a Dask cluster: ``workers=N`` starts a local one,
``scheduler=ADDRESS`` joins an existing dask.distributed scheduler.  Each worker loads the
bundle once (LightGBM text and JSON from the bundle folder) and predicts with one thread per
task, so LightGBM and Dask never oversubscribe cores; the workers must be able to read the
bundle and the grid and write beside the output store (one shared file system).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import functools
import os
import tempfile
import warnings
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import xarray as xr

from .bundle import load_bundle
from .errors import InputError, PredictorWarning
from .features import halo_cells, wide_radii
from .grid import read_seismic, spacing
from .io.atomic import atomic_folder, check_target
from .io.formats import file_format
from .progress import progress
from .volume import is_volume, lateral_spacing, read_volume

DEFAULT_TILE = 512
SAMPLES_PER_TILE = 1_000_000
BYTES_PER_NODE = 8 * 64  # generous: features, member predictions and outputs per node, float64


def tiles(ny: int, nx: int, size: int) -> list[tuple[int, int, int, int]]:
    """(y0, y1, x0, x1) of every tile, row by row."""
    return [
        (y0, min(y0 + size, ny), x0, min(x0 + size, nx))
        for y0 in range(0, ny, size)
        for x0 in range(0, nx, size)
    ]


def lateral_axes(grid: xr.Dataset) -> tuple[str, str]:
    """The two lateral dims tiles are cut along: (y, x) for maps, (inline, crossline) for volumes;
    a volume's tiles hold whole traces."""
    return ("inline", "crossline") if is_volume(grid) else ("y", "x")


def halo(grid: xr.Dataset, spec, skip: list[float] | None = None) -> tuple[int, int]:
    """Halo (nodes along the first and second lateral axis) a tile needs for exact features;
    the context radii in ``skip`` come smoothed beforehand and need none."""
    if is_volume(grid):
        d_il, d_xl = lateral_spacing(grid)
        return halo_cells(spec, d_xl, d_il, skip)
    return halo_cells(spec, *spacing(grid), skip)


def _wide(grid: xr.Dataset, spec, tile: int) -> list[float]:
    """Context radii to smooth once over the whole grid or volume before the tiles: those whose
    halo would exceed half the tile side (at most ``features.WIDE_HALO``), where a tile would be
    mostly halo. A volume's tiles of 57 traces would otherwise build features on ten times the
    traces they predict (the 405 m radius of the plain command on 25 m traces: a halo of 65)."""
    max_halo = max(1, tile // 2)
    if is_volume(grid):
        d_il, d_xl = lateral_spacing(grid)
        return wide_radii(spec, d_xl, d_il, max_halo)
    return wide_radii(spec, *spacing(grid), max_halo)


@functools.lru_cache(maxsize=4)
def _presmoothed(path: str) -> xr.Dataset:
    return xr.open_zarr(
        path, consolidated=False, zarr_format=2
    )  # once per process, read tile by tile


@functools.lru_cache(maxsize=4)
def _bundle(folder: str):
    return load_bundle(folder)  # once per process: a Dask worker keeps it between tasks


def predict_tile(
    folder: str,
    grid_path: str,
    tile: tuple[int, int, int, int],
    z_domain: str | None = None,
    exceed: dict | None = None,
    smoothed: str | None = None,
) -> tuple[tuple, xr.Dataset, bool]:
    """Predict one tile (with its halo): its interior, and whether some of it lies outside the
    feature range seen at the wells.  ``smoothed``: a store of the map's wide context radii,
    smoothed beforehand over the whole map (:func:`predictor.features.smooth_store`)."""
    from .predict import NoValidNodes, predict_maps

    bundle = _bundle(folder)
    grid = _open(grid_path, z_domain)
    ay, ax = lateral_axes(grid)
    skip = _presmoothed(smoothed).attrs["radii"] if smoothed else None
    hy, hx = halo(grid, bundle.feature_spec, skip)
    y0, y1, x0, x1 = tile
    ya, yb = max(0, y0 - hy), min(grid.sizes[ay], y1 + hy)
    xa, xb = max(0, x0 - hx), min(grid.sizes[ax], x1 + hx)
    part = grid.isel({ay: slice(ya, yb), ax: slice(xa, xb)}).load()
    part.attrs = dict(grid.attrs)
    wide = (
        _presmoothed(smoothed).isel({ay: slice(ya, yb), ax: slice(xa, xb)}).load()
        if smoothed
        else None
    )
    interior = {ay: slice(y0 - ya, y0 - ya + (y1 - y0)), ax: slice(x0 - xa, x0 - xa + (x1 - x0))}
    # no warnings from threads (not thread-safe); one thread per tile: tiles already run side by
    # side
    try:
        inner = predict_maps(
            bundle, part, warn=False, interior=interior, exceed=exceed, threads=1, smoothed=wide
        )
    except NoValidNodes:  # a tile in a hole of the survey: its region keeps the store's fill values
        return tile, None, False
    return tile, inner, inner.attrs["extrapolated_share"] > 0  # reported once, at the end


def write_tile(
    folder: str,
    grid_path: str,
    tile: tuple[int, int, int, int],
    store: str,
    z_domain: str | None = None,
    exceed: dict | None = None,
    smoothed: str | None = None,
) -> tuple[tuple, bool, bool]:
    """Predict one tile and write its interior into its own region of the Zarr ``store``, on the
    thread or Dask worker that predicted it; only (tile, written, extrapolated) travels back, so
    the client never holds map data.  Tiles match the store's chunks: writers never overlap."""
    tile, part, outside = predict_tile(folder, grid_path, tile, z_domain, exceed, smoothed)
    if part is None:
        _release_freed_memory()
        return tile, False, False
    grid = _open(grid_path, z_domain)
    ay, ax = lateral_axes(grid)
    part = part.drop_vars(list(part.coords))
    part.attrs = {}
    for var in part.data_vars:
        part[var].attrs = {}
    y0, y1, x0, x1 = tile
    region = {ay: slice(y0, y1), ax: slice(x0, x1)}
    if "z" in grid.dims:
        region["z"] = slice(0, grid.sizes["z"])
    part.to_zarr(store, region=region, zarr_format=2)
    del part
    _release_freed_memory()
    return tile, True, outside


def _release_freed_memory() -> None:
    """Give the memory a finished tile freed back to the OS.  glibc keeps freed blocks for reuse,
    and with tiles on several threads they fragment: on the 48 M-sample volume the resident size
    crept up by 0.25 GB over the first ten tiles."""
    if _LIBC is not None:
        _LIBC.malloc_trim(0)


def _glibc():
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        return libc if hasattr(libc, "malloc_trim") else None
    except OSError:  # not glibc (macOS, Windows, musl): nothing to trim
        return None


_LIBC = _glibc()


def _open(grid_path: str, z_domain: str | None):
    stat = os.stat(grid_path)  # a file replaced under the same name is opened afresh
    return _opened(grid_path, z_domain, stat.st_mtime_ns, stat.st_ino)


@functools.lru_cache(maxsize=4)
def _opened(grid_path: str, z_domain: str | None, mtime: int, inode: int):
    # opened lazily once per process; tiles read their parts through xarray's locked file access
    return read_seismic(grid_path, lazy=True, z_domain=z_domain)


def default_tile(grid: xr.Dataset) -> int:
    """Tile side: 512 nodes for maps; for volumes about a million samples per tile (whole
    traces)."""
    depth = grid.sizes.get("z", 1)
    return DEFAULT_TILE if depth == 1 else max(16, int(np.sqrt(SAMPLES_PER_TILE / depth)))


def predict_to_zarr(
    bundle_dir: str | Path,
    grid_path: str | Path,
    out: str | Path,
    tile: int | None = None,
    threads: int | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
    overwrite: bool = False,
    memory_limit: float | None = None,
    z_domain: str | None = None,
    segy_name: str | None = None,
    exceed: dict | None = None,
    crs: str | None = None,
) -> Path:
    """Predict every target of the bundle over a (possibly larger-than-memory) grid or volume
    into ``out`` (.zarr).  Volume tiles are ``tile`` x ``tile`` traces, each with all its samples.

    A SEG-Y input is first copied into a temporary Zarr store beside ``out`` (SEG-Y has no
    tiles to read by), so it must fit in memory once; give NetCDF or Zarr for larger volumes.
    The store carries the same CF attributes as NetCDF output, with ``crs`` (default: the grid's).
    """
    out = Path(out)
    if out.suffix.lower() != ".zarr":
        raise InputError(f"{out}: tiled maps are written as a Zarr store; name it *.zarr")
    if tile is not None and tile < 8:
        raise InputError(f"tile size {tile} is too small; use 64 or more nodes a side")
    if file_format(grid_path) == "segy":
        from .io.netcdf import write_zarr

        check_target(out, overwrite)
        volume = read_volume(grid_path, z_domain=z_domain, name=segy_name or "amplitude")
        with tempfile.TemporaryDirectory(prefix=f".{out.name}.input.", dir=out.parent) as scratch:
            copy = write_zarr(volume, Path(scratch) / "input.zarr")
            del volume
            return predict_to_zarr(
                bundle_dir,
                copy,
                out,
                tile,
                threads,
                workers,
                scheduler,
                overwrite,
                memory_limit,
                z_domain,
                exceed=exceed,
                crs=crs,
            )
    folder, grid_path = str(Path(bundle_dir).resolve()), str(Path(grid_path).resolve())
    bundle = _bundle(folder)
    grid = _open(grid_path, z_domain)
    from .io.geotiff import crs_to_wkt
    from .io.netcdf import cf
    from .predict import check_exceedance, check_space

    check_space(bundle.card, grid)
    check_exceedance(bundle.card, exceed)
    ay, ax = lateral_axes(grid)
    tile = tile or default_tile(grid)
    wide = _wide(grid, bundle.feature_spec, tile)
    hy, hx = halo(grid, bundle.feature_spec, wide)
    depth = grid.sizes.get("z", 1)
    need = (tile + 2 * hy) * (tile + 2 * hx) * depth * BYTES_PER_NODE
    # tiles in flight at once on this machine: one per thread, or one per local Dask worker (a
    # worker runs one task at a time); a remote cluster's workers are checked one tile each
    in_flight = 1 if scheduler else (workers or threads or os.cpu_count() or 1)
    limit = memory_limit or _available_memory()
    if limit and need * in_flight > limit:
        what = f"{tile} x {tile} traces of {depth} samples" if depth > 1 else f"{tile} nodes"
        raise InputError(
            f"{in_flight} tiles of {what} (plus a halo of {hy} x {hx}) in flight need about "
            f"{need * in_flight / 1e9:.1f} GB, more than the {limit / 1e9:.1f} GB available; use a "
            "smaller --tile" + (" or fewer --threads/--workers" if in_flight > 1 else "")
        )
    ny, nx = grid.sizes[ay], grid.sizes[ax]
    all_tiles = tiles(ny, nx, tile)
    with (
        atomic_folder(out, overwrite=overwrite) as tmp,
        tempfile.TemporaryDirectory(prefix=f".{out.name}.smoothed.", dir=out.parent) as scratch,
    ):
        smoothed = None
        if wide:  # wide context radii: smoothed once over the whole grid, tiles read their part
            from .features import smooth_store

            smooth_store(grid, bundle.feature_spec, wide, Path(scratch) / "smoothed.zarr")
            smoothed = str(Path(scratch) / "smoothed.zarr")
        layout = _template(
            _layout(folder, grid_path, all_tiles, ny, nx, z_domain, exceed, smoothed), grid, tile
        )
        crs = crs or grid.attrs.get("crs_wkt")
        layout = cf(layout, crs_to_wkt(crs) if crs else None)
        if "affine" in layout.attrs:  # Zarr attributes are JSON: a plain list
            layout.attrs["affine"] = [float(v) for v in layout.attrs["affine"]]
        layout.to_zarr(tmp, compute=False, mode="w", zarr_format=2)
        extrapolated = 0
        done = _run(
            folder,
            grid_path,
            all_tiles,
            str(tmp),
            threads,
            workers,
            scheduler,
            z_domain,
            exceed,
            smoothed,
        )
        for _, _, outside in progress(done, "tiles", total=len(all_tiles)):
            extrapolated += outside
    if extrapolated:
        warnings.warn(
            f"{extrapolated} of {len(all_tiles)} tiles hold nodes with feature values outside the"
            " range seen at the wells; predictions there are extrapolations",
            PredictorWarning,
            stacklevel=2,
        )
    return out


def _layout(
    folder, grid_path, all_tiles, ny, nx, z_domain, exceed=None, smoothed=None
) -> xr.Dataset:
    """A predicted part that shows the store's layout (variables, dtypes, attributes): a corner
    of a few nodes when it holds data (cheap), else the first tile that does."""
    for part in [(0, min(8, ny), 0, min(8, nx)), *all_tiles]:
        predicted = predict_tile(folder, grid_path, part, z_domain, exceed, smoothed)[1]
        if predicted is not None:
            return predicted
    raise InputError(f"{grid_path}: no node has every feature the model needs")


def _run(
    folder,
    grid_path,
    all_tiles,
    store,
    threads,
    workers,
    scheduler,
    z_domain=None,
    exceed=None,
    smoothed=None,
):
    """Predict and write every tile into ``store`` on local threads or a Dask cluster; yield
    each tile's (tile, written, extrapolated) as it finishes."""
    if workers or scheduler:
        from dask.distributed import Client, LocalCluster, as_completed

        cluster = (
            None
            if scheduler
            else LocalCluster(
                n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None
            )
        )
        client = Client(scheduler or cluster)
        try:
            n = len(all_tiles)
            futures = client.map(
                write_tile,
                [folder] * n,
                [grid_path] * n,
                all_tiles,
                [store] * n,
                [z_domain] * n,
                [exceed] * n,
                [smoothed] * n,
                pure=False,
            )
            for future in as_completed(futures):
                yield future.result()
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
        return
    n = threads or os.cpu_count() or 1
    with ThreadPoolExecutor(max_workers=n) as pool:
        # a bounded queue of tiles keeps the bookkeeping small however many tiles there are
        pending = deque()
        for t in all_tiles:
            pending.append(
                pool.submit(write_tile, folder, grid_path, t, store, z_domain, exceed, smoothed)
            )
            if len(pending) >= 2 * n:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


def _template(first: xr.Dataset, grid: xr.Dataset, tile: int) -> xr.Dataset:
    """A lazy dataset of the full output's shape, dtypes and attributes, for the store's layout."""
    import dask.array as da

    dims = first[next(iter(first.data_vars))].dims
    shape = tuple(grid.sizes[d] for d in dims)
    chunks = tuple(tile if d in lateral_axes(grid) else grid.sizes[d] for d in dims)
    data = {}
    for var in first.data_vars:
        v = first[var]
        fill = v.attrs.get("_FillValue", np.nan)
        data[var] = xr.Variable(
            dims,
            da.full(shape, fill, dtype=v.dtype, chunks=chunks),
            attrs={k: a for k, a in v.attrs.items() if k != "_FillValue"},
        )
        if "_FillValue" in v.attrs:
            data[var].encoding["_FillValue"] = v.attrs["_FillValue"]
    coords = {
        c: (grid.coords[c].dims, grid.coords[c].to_numpy())
        for c in grid.coords
        if set(grid.coords[c].dims) <= set(dims)
    }
    out = xr.Dataset(data, coords=coords)
    out.attrs = {k: v for k, v in first.attrs.items() if isinstance(v, str)}
    if "affine" in first.attrs:
        out.attrs["affine"] = [float(a) for a in first.attrs["affine"]]
    return out


def _available_memory() -> float | None:
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024
    except OSError:
        pass
    try:  # off Linux: psutil, which dask.distributed brings
        import psutil

        return float(psutil.virtual_memory().available)
    except ImportError:
        return None
