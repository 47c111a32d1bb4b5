"""Features built once on the grid; the wells read them back from the grid with the same code.

Building features on the map and sampling them at the wells (rather than computing them from
well values) means training sees exactly what prediction sees: no train/predict skew.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd
import xarray as xr
from scipy.ndimage import gaussian_filter

from .errors import InputError
from .grid import sample_at, spacing


@dataclass
class FeatureSpec:
    """Which features to build from which grid attributes.

    Parameters
    ----------
    attributes : grid variables used as they are
    context_radii : smoothing radii (m) for multi-scale context: a smoothed attribute and its
        local contrast (attribute minus smoothed) per radius
    gradient : add the gradient magnitude of each attribute
    location : add coordinates (x, y and coordinates rotated by ``rotation`` degrees); off by
        default because coordinates let a model memorise where the wells are
    """

    attributes: list[str]
    context_radii: list[float] = field(default_factory=list)
    gradient: bool = False
    location: bool = False
    rotation: float = 45.0

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> FeatureSpec:
        return cls(**data)


def _smooth(values: np.ndarray, sigma_cells) -> np.ndarray:
    """Gaussian smoothing that ignores NaN nodes (normalised convolution)."""
    valid = np.isfinite(values)
    filled = np.where(valid, values, 0.0)
    num = gaussian_filter(filled, sigma_cells, mode="nearest")
    den = gaussian_filter(valid.astype(float), sigma_cells, mode="nearest")
    with np.errstate(invalid="ignore", divide="ignore"):
        out = num / den
    return np.where(valid, out, np.nan)


def build_features(grid: xr.Dataset, spec: FeatureSpec) -> xr.Dataset:
    """Every feature of ``spec`` as a variable on the grid (same dims and coordinates)."""
    missing = [a for a in spec.attributes if a not in grid.data_vars]
    if missing:
        raise InputError(
            f"grid {grid.attrs.get('source', '')} lacks the attribute(s) {', '.join(missing)} the model needs; "
            f"it has {', '.join(map(str, grid.data_vars))}; give a grid with the same attribute names as in training"
        )
    dx, dy = spacing(grid)
    out = {}
    for attr in spec.attributes:
        values = grid[attr].to_numpy().astype(float)
        out[attr] = values
        for radius in spec.context_radii:
            smooth = _smooth(values, (radius / dy, radius / dx))
            out[f"{attr}_smooth{radius:g}m"] = smooth
            out[f"{attr}_contrast{radius:g}m"] = values - smooth
        if spec.gradient:
            gy, gx = np.gradient(values, dy, dx)
            out[f"{attr}_gradient"] = np.hypot(gx, gy)
    if spec.location:
        xx, yy = np.meshgrid(grid.x.to_numpy(), grid.y.to_numpy())
        theta = np.deg2rad(spec.rotation)
        out["x_coord"], out["y_coord"] = xx, yy
        out["x_rotated"] = xx * np.cos(theta) + yy * np.sin(theta)
        out["y_rotated"] = -xx * np.sin(theta) + yy * np.cos(theta)
    ds = xr.Dataset({k: (("y", "x"), v) for k, v in out.items()}, coords={"x": grid.x, "y": grid.y})
    ds.attrs = dict(grid.attrs)
    return ds


TRUNCATE = 4.0  # scipy's default Gaussian truncation, in standard deviations


def halo_cells(spec: FeatureSpec, dx: float, dy: float) -> tuple[int, int]:
    """Nodes of context a tile needs on each side so its features equal those of the whole grid."""
    hy = hx = 1 if spec.gradient else 0
    for radius in spec.context_radii:
        hy = max(hy, int(TRUNCATE * radius / dy + 0.5) + 1)
        hx = max(hx, int(TRUNCATE * radius / dx + 0.5) + 1)
    return hy, hx


def location_features(names) -> list[str]:
    return [n for n in names if n in ("x_coord", "y_coord", "x_rotated", "y_rotated")]


def features_at_wells(features: xr.Dataset, wells: pd.DataFrame, method: str = "bilinear",
                      drop_outside: bool = False) -> tuple[pd.DataFrame, np.ndarray]:
    """Sample the feature grid at the wells: (table of shape (n_kept, n_features), kept mask)."""
    return sample_at(features, wells["x"], wells["y"], wells["well_id"], method=method, drop_outside=drop_outside)


def feature_matrix(features: xr.Dataset, names: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Flattened features at every node: (matrix of shape (n_valid, n_features), valid mask of the grid)."""
    stack = np.stack([features[n].to_numpy().ravel() for n in names], axis=1)
    valid = np.all(np.isfinite(stack), axis=1)
    return stack[valid], valid
