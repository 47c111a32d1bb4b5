"""Synthetic fields with exhaustive truth, for the demo and for accuracy experiments.

The scenario is invented: the *Tarnwick* field, a fluvial channel sandstone reservoir in the
(equally invented) Oster Basin.  Sand bodies (sinuous channels with silty margins, or lobes)
sit in shale; porosity varies by facies with spatial correlation; acoustic impedance comes
from the Raymer-Hunt-Gardner velocity and a mass-balance density, blurred and noisy like an
inverted seismic map, with a regional trend that has nothing to do with porosity;
permeability is log-normal and follows porosity; wells are drilled preferentially in the
high-porosity rock, plus a few on a sparse regular pattern.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd
import xarray as xr
from scipy.ndimage import gaussian_filter

from .rockphysics import mass_balance_density, raymer_velocity

FACIES = ("shale", "silt", "sand")  # codes 0, 1, 2
# per facies: mean porosity, porosity sd, matrix velocity (m/s), grain density (g/cm3)
ROCK = {
    "shale": (0.07, 0.02, 4800.0, 2.70),
    "silt": (0.16, 0.025, 5300.0, 2.67),
    "sand": (0.25, 0.03, 5850.0, 2.65),
}
V_BRINE, RHO_BRINE = 1550.0, 1.03


@dataclass
class FieldSpec:
    """Geometry and drilling of a synthetic field; every random step follows ``seed``."""

    seed: int = 7
    nx: int = 120
    ny: int = 100
    spacing: float = 25.0
    x0: float = 512_000.0
    y0: float = 7_204_000.0
    geometry: Literal["channels", "lobes"] = "channels"
    n_bodies: int = 4
    body_width: float = 260.0
    azimuth: float = 20.0  # degrees from the x axis, main direction of the sand bodies
    correlation_length: float = 300.0  # porosity texture within facies (m)
    n_preferential: int = 40
    drilling_strength: float = 1.5  # 0: random drilling; larger: wells crowd the best rock
    regular_pattern: tuple[int, int] = (5, 4)
    seismic_blur: float = 1.5  # Gaussian blur of the inverted impedance, in cells
    seismic_noise: float = 0.03  # relative noise of the impedance
    trend: float = 0.06  # relative regional impedance change across the map, unrelated to porosity
    second_attribute: bool = False  # add an inverted Vp/Vs map, lower in sand, with its own noise


def _random_field(rng, shape, length_cells):
    field = gaussian_filter(
        rng.standard_normal(shape), sigma=max(length_cells / 2.0, 0.5), mode="wrap"
    )
    return (field - field.mean()) / field.std()


def _rock(codes: np.ndarray, texture: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Porosity (facies mean + sd x texture), matrix velocity and grain density at every cell."""
    porosity, v_matrix, rho_matrix = (
        np.zeros(codes.shape),
        np.zeros(codes.shape),
        np.zeros(codes.shape),
    )
    for code, name in enumerate(FACIES):
        mean, sd, vm, rm = ROCK[name]
        here = codes == code
        porosity[here] = mean + sd * texture[here]
        v_matrix[here], rho_matrix[here] = vm, rm
    return porosity, v_matrix, rho_matrix


def _facies(spec: FieldSpec, rng, xx, yy) -> np.ndarray:
    theta = np.deg2rad(spec.azimuth)
    u = (xx - xx.mean()) * np.cos(theta) + (yy - yy.mean()) * np.sin(theta)
    v = -(xx - xx.mean()) * np.sin(theta) + (yy - yy.mean()) * np.cos(theta)
    codes = np.zeros(xx.shape, dtype=np.int8)
    span = max(np.ptp(u), np.ptp(v))
    for _ in range(spec.n_bodies):
        width = spec.body_width * rng.uniform(0.7, 1.3)
        if spec.geometry == "channels":
            centre = rng.uniform(-0.45, 0.45) * np.ptp(v)
            amplitude = rng.uniform(0.05, 0.12) * span
            wavelength = rng.uniform(0.4, 0.8) * span
            phase = rng.uniform(0, 2 * np.pi)
            distance = np.abs(v - centre - amplitude * np.sin(2 * np.pi * u / wavelength + phase))
        else:
            cu, cv = rng.uniform(-0.4, 0.4) * np.ptp(u), rng.uniform(-0.4, 0.4) * np.ptp(v)
            distance = np.hypot((u - cu) / 2.5, v - cv)
        codes = np.where(distance < width, np.maximum(codes, 1), codes)
        codes = np.where(distance < width / 2, 2, codes)
    return codes


def make_field(spec: FieldSpec | None = None) -> tuple[xr.Dataset, xr.Dataset, pd.DataFrame]:
    """Build one field.

    Returns
    -------
    seismic : Dataset (y, x) with the observed ``impedance`` only
    truth : Dataset (y, x) with ``facies`` (codes, CF flag meanings), ``porosity``,
        ``permeability`` (mD) and the noise-free ``impedance_true``
    wells : DataFrame with well_id, x, y, facies (labels), porosity, permeability
    """
    spec = spec or FieldSpec()
    rng = np.random.default_rng(spec.seed)
    xs = spec.x0 + spec.spacing * np.arange(spec.nx)
    ys = spec.y0 + spec.spacing * np.arange(spec.ny)
    xx, yy = np.meshgrid(xs, ys)
    codes = _facies(spec, rng, xx, yy)
    texture = _random_field(rng, xx.shape, spec.correlation_length / spec.spacing)
    porosity, v_matrix, rho_matrix = _rock(codes, texture)
    porosity = np.clip(porosity, 0.01, 0.35)
    velocity = raymer_velocity(porosity, v_matrix, V_BRINE)
    density = mass_balance_density(porosity, rho_matrix, RHO_BRINE)
    impedance_true = velocity * density
    # an inverted seismic map: band-limited, noisy, with a regional trend unrelated to the rock
    blurred = gaussian_filter(impedance_true, sigma=spec.seismic_blur, mode="nearest")
    noise = gaussian_filter(rng.standard_normal(xx.shape), sigma=1.0)
    noise = noise / noise.std() * spec.seismic_noise * impedance_true.mean()
    ramp = (
        spec.trend
        * impedance_true.mean()
        * ((xx - xs.mean()) / np.ptp(xs) + 0.5 * (yy - ys.mean()) / np.ptp(ys))
    )
    impedance = blurred + noise + ramp
    log_perm = (
        -1.3 + 13.0 * porosity - 0.4 * (codes == 0) + 0.25 * _random_field(rng, xx.shape, 2.0)
    )
    permeability = 10.0**log_perm

    wells = _drill(spec, rng, xs, ys, porosity)
    iy = np.round((wells["y"].to_numpy() - spec.y0) / spec.spacing).astype(int)
    ix = np.round((wells["x"].to_numpy() - spec.x0) / spec.spacing).astype(int)
    wells["facies"] = [FACIES[c] for c in codes[iy, ix]]
    # core-plug scale measurements scatter a little around the cell value
    wells["porosity"] = np.round(
        np.clip(porosity[iy, ix] + rng.normal(0, 0.005, iy.size), 0.005, 0.4), 4
    )
    wells["permeability"] = np.round(permeability[iy, ix] * 10 ** rng.normal(0, 0.05, iy.size), 3)

    coords = {"x": xs, "y": ys}
    attrs = {
        "field": "Tarnwick (synthetic)",
        "generator": "predictor.synthetic.make_field",
        "spec": str(asdict(spec)),
    }
    seismic = xr.Dataset(
        {"impedance": (("y", "x"), np.round(impedance, 2))}, coords=coords, attrs=attrs
    )
    seismic["impedance"].attrs.update(units="m/s*g/cm3", long_name="acoustic impedance (inverted)")
    if spec.second_attribute:
        # Vp/Vs falls from shale to sand (common practice); an independent inversion, blurred and
        # noisy
        vp_vs = 1.95 - 0.9 * (porosity - 0.07) - 0.05 * (codes == 2)
        vp_vs = gaussian_filter(vp_vs, sigma=spec.seismic_blur * 1.5, mode="nearest")
        vp_vs = vp_vs + 0.025 * gaussian_filter(rng.standard_normal(xx.shape), sigma=1.5) / 0.2
        seismic["vp_vs"] = (("y", "x"), np.round(vp_vs, 4))
        seismic["vp_vs"].attrs.update(units="1", long_name="Vp/Vs ratio (inverted)")
    truth = xr.Dataset(
        {
            "facies": (("y", "x"), codes.astype(np.int8)),
            "porosity": (("y", "x"), porosity),
            "permeability": (("y", "x"), permeability),
            "impedance_true": (("y", "x"), impedance_true),
        },
        coords=coords,
        attrs=attrs,
    )
    truth["facies"].attrs.update(
        flag_values=np.arange(len(FACIES), dtype=np.int8), flag_meanings=" ".join(FACIES)
    )
    truth["porosity"].attrs.update(units="1")
    truth["permeability"].attrs.update(units="mD")
    return seismic, truth, wells


def _preferential(
    rng, smooth: np.ndarray, n: int, strength: float
) -> tuple[np.ndarray, np.ndarray]:
    """Indices of ``n`` distinct cells drawn with probability growing as exp(strength x the
    standardised smoothed porosity): wells crowd the best rock."""
    score = (smooth - smooth.mean()) / smooth.std()
    prob = np.exp(strength * score).ravel()
    picks = rng.choice(prob.size, size=n, replace=False, p=prob / prob.sum())
    return np.unravel_index(picks, smooth.shape)


def _drill(spec: FieldSpec, rng, xs, ys, porosity) -> pd.DataFrame:
    """Preferential wells where (smoothed) porosity is high, plus a sparse regular pattern."""
    iy, ix = _preferential(
        rng, gaussian_filter(porosity, sigma=3), spec.n_preferential, spec.drilling_strength
    )
    px = xs[ix] + rng.uniform(-0.4, 0.4, ix.size) * spec.spacing
    py = ys[iy] + rng.uniform(-0.4, 0.4, iy.size) * spec.spacing
    nrx, nry = spec.regular_pattern
    gx = np.linspace(xs[0], xs[-1], nrx + 2)[1:-1]
    gy = np.linspace(ys[0], ys[-1], nry + 2)[1:-1]
    rx, ry = (a.ravel() for a in np.meshgrid(gx, gy))
    x = np.concatenate([px, rx])
    y = np.concatenate([py, ry])
    ids = [f"TW-{i + 1:02d}" for i in range(x.size)]
    return pd.DataFrame({"well_id": ids, "x": np.round(x, 1), "y": np.round(y, 1)})


def demo_files(folder: str | Path, spec: FieldSpec | None = None) -> dict[str, str]:
    """Write the demo files into ``folder``: wells.csv, seismic.csv, seismic.nc, truth.nc."""
    from pathlib import Path

    from .grid import node_table
    from .io.atomic import atomic_file
    from .io.netcdf import write_netcdf

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    seismic, truth, wells = make_field(spec)
    paths = {name: folder / name for name in ("wells.csv", "seismic.csv", "seismic.nc", "truth.nc")}
    with atomic_file(paths["wells.csv"]) as tmp:
        wells.to_csv(tmp, index=False, lineterminator="\n")
    with atomic_file(paths["seismic.csv"]) as tmp:
        node_table(seismic).to_csv(tmp, index=False, lineterminator="\n", float_format="%.2f")
    write_netcdf(seismic, paths["seismic.nc"])
    write_netcdf(truth, paths["truth.nc"])
    return {k: str(v) for k, v in paths.items()}


@dataclass
class VolumeSpec:
    """A synthetic 3-D field: the Tarnwick lower sands, in depth, on a rotated survey."""

    seed: int = 11
    n_inlines: int = 48
    n_crosslines: int = 56
    n_samples: int = 60
    trace_spacing: float = 25.0
    z_step: float = 4.0  # metres
    z0: float = 2100.0  # depth of the first sample (m)
    rotation: float = 30.0  # degrees from east of the crossline direction
    x0: float = 512_000.0
    y0: float = 7_204_000.0
    first_inline: int = 1001
    first_crossline: int = 2001
    sand_fraction: float = 0.3
    lateral_correlation: float = 350.0  # metres
    vertical_correlation: float = 14.0  # metres
    compaction: float = 8e-5  # porosity lost per metre of depth
    n_preferential: int = 24
    drilling_strength: float = 1.5
    regular_pattern: tuple[int, int] = (3, 3)
    deviated_share: float = 0.3  # share of wells that drift sideways with depth
    seismic_blur: tuple[float, float] = (
        1.5,
        1.0,
    )  # vertical, lateral blur of the impedance, in samples/traces
    seismic_noise: float = 0.03


def _field3d(rng, shape, sigma) -> np.ndarray:
    field = gaussian_filter(rng.standard_normal(shape), sigma=sigma, mode="reflect")
    return (field - field.mean()) / field.std()


def make_volume_field(
    spec: VolumeSpec | None = None,
) -> tuple[xr.Dataset, xr.Dataset, pd.DataFrame]:
    """Build one 3-D field.

    Returns
    -------
    seismic : volume (z, inline, crossline) with the observed ``impedance``
    truth : volume with ``facies`` codes, ``porosity``, ``permeability`` (mD)
    wells : DataFrame, one row per well sample: well_id, x, y, depth, facies, porosity,
        permeability (samples every ``z_step`` along each well, like upscaled logs)
    """
    spec = spec or VolumeSpec()
    rng = np.random.default_rng(spec.seed)
    shape = (spec.n_samples, spec.n_inlines, spec.n_crosslines)
    lateral = spec.lateral_correlation / spec.trace_spacing / 2.0
    vertical = spec.vertical_correlation / spec.z_step / 2.0
    body = _field3d(rng, shape, (vertical, lateral, lateral))
    codes = np.zeros(shape, np.int8)
    codes[body > np.quantile(body, 1 - spec.sand_fraction - 0.15)] = 1
    codes[body > np.quantile(body, 1 - spec.sand_fraction)] = 2
    texture = _field3d(rng, shape, (vertical / 2, lateral / 2, lateral / 2))
    z = spec.z0 + spec.z_step * np.arange(spec.n_samples)
    porosity, v_matrix, rho_matrix = _rock(codes, texture)
    porosity = np.clip(porosity - spec.compaction * (z - spec.z0)[:, None, None], 0.01, 0.35)
    impedance_true = raymer_velocity(porosity, v_matrix, V_BRINE) * mass_balance_density(
        porosity, rho_matrix, RHO_BRINE
    )
    vb, lb = spec.seismic_blur
    blurred = gaussian_filter(impedance_true, sigma=(vb, lb, lb), mode="nearest")
    noise = gaussian_filter(rng.standard_normal(shape), sigma=(1.0, 1.0, 1.0))
    impedance = blurred + noise / noise.std() * spec.seismic_noise * impedance_true.mean()
    log_perm = (
        -1.3 + 13.0 * porosity - 0.4 * (codes == 0) + 0.25 * _field3d(rng, shape, (1.0, 1.0, 1.0))
    )
    permeability = 10.0**log_perm

    theta = np.deg2rad(spec.rotation)
    s = spec.trace_spacing
    dxx, dyx = s * np.cos(theta), s * np.sin(theta)  # one crossline step
    dxi, dyi = -s * np.sin(theta), s * np.cos(theta)  # one inline step
    il = spec.first_inline + np.arange(spec.n_inlines)
    xl = spec.first_crossline + np.arange(spec.n_crosslines)
    x0 = spec.x0 - dxi * il[0] - dxx * xl[0]
    y0 = spec.y0 - dyi * il[0] - dyx * xl[0]
    affine = [float(v) for v in (x0, dxi, dxx, y0, dyi, dyx)]
    gi, gj = np.meshgrid(il, xl, indexing="ij")
    coords = {
        "z": z,
        "inline": il,
        "crossline": xl,
        "cdp_x": (("inline", "crossline"), x0 + dxi * gi + dxx * gj),
        "cdp_y": (("inline", "crossline"), y0 + dyi * gi + dyx * gj),
    }
    attrs = {
        "field": "Tarnwick lower sands (synthetic)",
        "generator": "predictor.synthetic.make_volume_field",
        "spec": str(asdict(spec)),
        "affine": affine,
        "z_domain": "depth",
    }
    dims = ("z", "inline", "crossline")
    seismic = xr.Dataset(
        {"impedance": (dims, np.round(impedance, 2))}, coords=coords, attrs=dict(attrs)
    )
    seismic["impedance"].attrs.update(units="m/s*g/cm3", long_name="acoustic impedance (inverted)")
    seismic.z.attrs.update(units="m", long_name="depth")
    truth = xr.Dataset(
        {
            "facies": (dims, codes),
            "porosity": (dims, porosity),
            "permeability": (dims, permeability),
        },
        coords=coords,
        attrs=dict(attrs),
    )
    truth["facies"].attrs.update(
        flag_values=np.arange(len(FACIES), dtype=np.int8), flag_meanings=" ".join(FACIES)
    )
    wells = _drill_volume(spec, rng, porosity, codes, permeability, affine, il, xl, z)
    return seismic, truth, wells


def _drill_volume(
    spec: VolumeSpec, rng, porosity, codes, permeability, affine, il, xl, z
) -> pd.DataFrame:
    """Wells preferentially where the column's porosity is high, plus a regular pattern; a share
    of them deviated; one sample per ``z_step`` along each well with a little measurement noise."""
    column = gaussian_filter(porosity.mean(axis=0), sigma=2)
    ii, jj = (
        a.astype(float)
        for a in _preferential(rng, column, spec.n_preferential, spec.drilling_strength)
    )
    ri, rj = spec.regular_pattern
    gi, gj = (
        a.ravel()
        for a in np.meshgrid(
            np.linspace(0, il.size - 1, ri + 2)[1:-1],
            np.linspace(0, xl.size - 1, rj + 2)[1:-1],
            indexing="ij",
        )
    )
    ii, jj = np.concatenate([ii, gi]), np.concatenate([jj, gj])
    x0, dxi, dxx, y0, dyi, dyx = affine
    rows = []
    n = z.size
    for w, (i, j) in enumerate(zip(ii, jj, strict=True)):
        # the head, and a drift (in traces over the whole interval) for the deviated ones
        drift = rng.uniform(-6, 6, 2) if rng.uniform() < spec.deviated_share else np.zeros(2)
        t = np.linspace(0, 1, n)
        fi = np.clip(i + rng.uniform(-0.4, 0.4) + drift[0] * t, 0, il.size - 1)
        fj = np.clip(j + rng.uniform(-0.4, 0.4) + drift[1] * t, 0, xl.size - 1)
        lines_i, lines_j = il[0] + fi, xl[0] + fj
        ni, nj = np.round(fi).astype(int), np.round(fj).astype(int)
        k = np.arange(n)
        rows.append(
            pd.DataFrame(
                {
                    "well_id": f"TL-{w + 1:02d}",
                    "x": np.round(x0 + dxi * lines_i + dxx * lines_j, 1),
                    "y": np.round(y0 + dyi * lines_i + dyx * lines_j, 1),
                    "depth": z,
                    "facies": [FACIES[c] for c in codes[k, ni, nj]],
                    "porosity": np.round(
                        np.clip(porosity[k, ni, nj] + rng.normal(0, 0.005, n), 0.005, 0.4), 4
                    ),
                    "permeability": np.round(
                        permeability[k, ni, nj] * 10 ** rng.normal(0, 0.05, n), 3
                    ),
                }
            )
        )
    return pd.concat(rows, ignore_index=True)


def volume_demo_files(folder: str | Path, spec: VolumeSpec | None = None) -> dict[str, str]:
    """Write a 3-D scenario into ``folder``: well_samples.csv (one row per sample, a ``depth``
    column), impedance.sgy (SEG-Y on the rotated survey), impedance.nc and truth_volume.nc."""
    from pathlib import Path

    from .io.atomic import atomic_file
    from .io.netcdf import write_netcdf
    from .io.segy import write_segy

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    seismic, truth, wells = make_volume_field(spec)
    paths = {
        name: folder / name
        for name in ("well_samples.csv", "impedance.sgy", "impedance.nc", "truth_volume.nc")
    }
    with atomic_file(paths["well_samples.csv"]) as tmp:
        wells.to_csv(tmp, index=False, lineterminator="\n")
    write_segy(seismic, "impedance", paths["impedance.sgy"])
    write_netcdf(seismic, paths["impedance.nc"])
    write_netcdf(truth, paths["truth_volume.nc"])
    return {k: str(v) for k, v in paths.items()}
