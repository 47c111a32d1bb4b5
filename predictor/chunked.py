"""Maps of grids larger than memory: tile by tile, with a halo of context, into a Zarr store.

Each tile is read with enough surrounding nodes for the smoothing features (see
:func:`predictor.features.halo_cells`), predicted with exactly the in-memory code
(:func:`predictor.predict.predict_maps`), trimmed to its interior and written into its region
of the output store, so tile edges never show and memory stays flat in the grid size.  Tiles
run on local threads by default, or on a Dask cluster: ``workers=N`` starts a local one,
``scheduler=ADDRESS`` joins an existing dask.distributed scheduler.  Each worker loads the
bundle once (LightGBM text and JSON from the bundle folder, which workers must be able to read)
and predicts with one LightGBM thread per task, so LightGBM and Dask never oversubscribe cores.
"""

from __future__ import annotations

import functools
import os
import warnings
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import xarray as xr

from .bundle import load_bundle
from .errors import InputError, PredictorWarning
from .features import halo_cells
from .grid import read_grid, spacing
from .io.atomic import atomic_folder
from .progress import progress

DEFAULT_TILE = 512
BYTES_PER_NODE = 8 * 64  # generous: features, member predictions and outputs per node, float64


def tiles(ny: int, nx: int, size: int) -> list[tuple[int, int, int, int]]:
    """(y0, y1, x0, x1) of every tile, row by row."""
    return [(y0, min(y0 + size, ny), x0, min(x0 + size, nx)) for y0 in range(0, ny, size) for x0 in range(0, nx, size)]


@functools.lru_cache(maxsize=4)
def _bundle(folder: str):
    return load_bundle(folder)  # once per process: a Dask worker keeps it between tasks


def predict_tile(folder: str, grid_path: str, tile: tuple[int, int, int, int]) -> tuple[tuple, xr.Dataset, bool]:
    """Predict one tile (with its halo): its interior, and whether some of it lies outside the
    feature range seen at the wells."""
    from .predict import predict_maps

    bundle = _bundle(folder)
    grid = read_grid(grid_path, lazy=True)
    dx, dy = spacing(grid)
    hy, hx = halo_cells(bundle.feature_spec, dx, dy)
    y0, y1, x0, x1 = tile
    ya, yb = max(0, y0 - hy), min(grid.sizes["y"], y1 + hy)
    xa, xb = max(0, x0 - hx), min(grid.sizes["x"], x1 + hx)
    part = grid.isel(y=slice(ya, yb), x=slice(xa, xb)).load()
    part.attrs = dict(grid.attrs)
    maps = predict_maps(bundle, part, warn=False)  # warnings are not thread-safe: report once, at the end
    outside = maps.attrs["extrapolated_share"] > 0
    inner = maps.isel(y=slice(y0 - ya, y0 - ya + (y1 - y0)), x=slice(x0 - xa, x0 - xa + (x1 - x0)))
    return tile, inner, outside


def predict_to_zarr(bundle_dir, grid_path, out, tile: int = DEFAULT_TILE, threads: int | None = None,
                    workers: int | None = None, scheduler: str | None = None, overwrite: bool = False,
                    memory_limit: float | None = None) -> Path:
    """Predict every target of the bundle over a (possibly larger-than-memory) grid into ``out`` (.zarr)."""
    folder, grid_path, out = str(Path(bundle_dir).resolve()), str(Path(grid_path).resolve()), Path(out)
    if out.suffix.lower() != ".zarr":
        raise InputError(f"{out}: tiled maps are written as a Zarr store; name it *.zarr")
    if tile < 8:
        raise InputError(f"tile size {tile} is too small; use 64 or more nodes a side")
    bundle = _bundle(folder)
    grid = read_grid(grid_path, lazy=True)
    dx, dy = spacing(grid)
    hy, hx = halo_cells(bundle.feature_spec, dx, dy)
    need = (tile + 2 * hy) * (tile + 2 * hx) * BYTES_PER_NODE
    limit = memory_limit or _available_memory()
    if limit and need * max(threads or 1, 1) > limit:
        raise InputError(f"tiles of {tile} nodes (plus a halo of {hy} x {hx}) need about {need / 1e9:.1f} GB each, "
                         f"more than the {limit / 1e9:.1f} GB available; use a smaller --tile")
    ny, nx = grid.sizes["y"], grid.sizes["x"]
    all_tiles = tiles(ny, nx, tile)
    with atomic_folder(out, overwrite=overwrite) as tmp:
        first = predict_tile(folder, grid_path, all_tiles[0])[1]
        _template(first, grid, tile).to_zarr(tmp, compute=False, mode="w", zarr_format=2)
        extrapolated = 0
        for (y0, y1, x0, x1), part, outside in progress(_run(folder, grid_path, all_tiles, threads, workers,
                                                             scheduler), "tiles", total=len(all_tiles)):
            extrapolated += outside
            part = part.drop_vars(["x", "y"])
            part.attrs = {}
            for var in part.data_vars:
                part[var].attrs = {}
            part.to_zarr(tmp, region={"y": slice(y0, y1), "x": slice(x0, x1)}, zarr_format=2)
    if extrapolated:
        warnings.warn(f"{extrapolated} of {len(all_tiles)} tiles hold nodes with feature values outside the range "
                      "seen at the wells; predictions there are extrapolations", PredictorWarning, stacklevel=2)
    return out


def _run(folder, grid_path, all_tiles, threads, workers, scheduler):
    """Yield (tile, interior maps, extrapolated) as tiles finish, on local threads or a Dask cluster."""
    if workers or scheduler:
        from dask.distributed import Client, LocalCluster, as_completed

        cluster = None if scheduler else LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                                      dashboard_address=None)
        client = Client(scheduler or cluster)
        try:
            futures = client.map(predict_tile, [folder] * len(all_tiles), [grid_path] * len(all_tiles), all_tiles,
                                 pure=False)
            for future in as_completed(futures):
                yield future.result()
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
        return
    n = threads or os.cpu_count() or 1
    with ThreadPoolExecutor(max_workers=n) as pool:
        # a bounded window of tiles in flight keeps memory flat however many tiles there are
        pending = deque()
        for t in all_tiles:
            pending.append(pool.submit(predict_tile, folder, grid_path, t))
            if len(pending) >= 2 * n:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


def _template(first: xr.Dataset, grid: xr.Dataset, tile: int) -> xr.Dataset:
    """A lazy dataset of the full output's shape, dtypes and attributes, for the store's layout."""
    import dask.array as da

    ny, nx = grid.sizes["y"], grid.sizes["x"]
    data = {}
    for var in first.data_vars:
        v = first[var]
        fill = v.attrs.get("_FillValue", np.nan)
        data[var] = xr.Variable(("y", "x"), da.full((ny, nx), fill, dtype=v.dtype, chunks=(tile, tile)),
                                attrs={k: a for k, a in v.attrs.items() if k != "_FillValue"})
        if "_FillValue" in v.attrs:
            data[var].encoding["_FillValue"] = v.attrs["_FillValue"]
    out = xr.Dataset(data, coords={"x": grid.x.to_numpy(), "y": grid.y.to_numpy()})
    out.attrs = {k: v for k, v in first.attrs.items() if isinstance(v, str)}
    return out


def _available_memory() -> float | None:
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024
    except OSError:
        return None
    return None
