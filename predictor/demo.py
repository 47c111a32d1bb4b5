"""``predictor demo``: the whole job on the bundled synthetic Tarnwick field."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .checks import check_data, write_check
from .grid import read_grid
from .io.atomic import atomic_folder
from .io.tables import read_wells
from .stats import weighted_mean, weighted_proportions

BUNDLED = Path(__file__).resolve().parents[1] / "demo_data"


def demo_inputs(folder: Path) -> dict[str, Path]:
    """The bundled demo files, or the same field regenerated from its seed into ``folder``."""
    names = ("wells.csv", "seismic.csv", "truth.nc")
    if all((BUNDLED / n).exists() for n in names):
        return {n: BUNDLED / n for n in names}
    from .synthetic import demo_files

    return {n: Path(p) for n, p in demo_files(folder).items() if n in names}


def run_demo(out: Path, overwrite: bool = False) -> list[str]:
    """Run every step on the demo field; returns the lines to print."""
    import xarray as xr

    lines = []
    with atomic_folder(out, overwrite=overwrite) as tmp:
        inputs = demo_inputs(tmp / "data")
        wells = read_wells(inputs["wells.csv"])
        grid = read_grid(inputs["seismic.csv"])
        check = check_data(wells, grid)
        write_check(check, tmp / "qc.json", tmp / "figures")
        lines += check.qc.lines()
        with xr.open_dataset(inputs["truth.nc"]) as truth:
            true_phi = float(truth.porosity.mean())
            sand = float((truth.facies == 2).mean())
        w = check.declustering.weights
        lines.append(
            f"mean porosity: naive {wells.porosity.mean():.4f}, declustered {weighted_mean(wells.porosity, w):.4f}, "
            f"nearest-node {weighted_mean(wells.porosity, check.nearest_node):.4f}, truth {true_phi:.4f}"
        )
        lines.append(
            f"sand fraction: naive {np.mean(wells.facies == 'sand'):.3f}, "
            f"declustered {weighted_proportions(wells.facies, w)['sand']:.3f}, truth {sand:.3f}"
        )
    lines.append(f"results in {out}/ (qc.json, figures/)")
    return lines
