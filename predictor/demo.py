"""``predictor demo``: the whole job on the bundled synthetic Tarnwick field.

qc -> declustering -> train (porosity, permeability, facies) -> maps -> figures, all in one
output folder.  Because the field is synthetic its truth is known, so the demo also prints
how far the maps are from it: something no real study can do.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import xarray as xr

from .checks import check_data, write_check
from .errors import PredictorWarning
from .explanations import explain_bundle
from .grid import read_grid
from .io.atomic import atomic_folder
from .io.tables import read_wells
from .predict import predict_maps, write_maps
from .report import build_report
from .stats import weighted_mean, weighted_proportions
from .workflow import field_wide_lines, leaderboard_lines, train_files

BUNDLED = Path(__file__).resolve().parents[1] / "demo_data"
TARGETS = ["porosity", "permeability", "facies"]


def demo_inputs(folder: Path) -> dict[str, Path]:
    """The bundled demo files, or the same field regenerated from its seed into ``folder``."""
    names = ("wells.csv", "seismic.csv", "truth.nc")
    if all((BUNDLED / n).exists() for n in names):
        return {n: BUNDLED / n for n in names}
    from .synthetic import demo_files

    return {n: Path(p) for n, p in demo_files(folder).items() if n in names}


def run_demo(out: Path, overwrite: bool = False) -> list[str]:
    """Run every step on the demo field; returns the lines to print."""
    from . import plots  # matplotlib loads when a figure is drawn, not on import

    lines = []
    with atomic_folder(out, overwrite=overwrite) as tmp:
        figures = tmp / "figures"
        inputs = demo_inputs(tmp / "data")
        wells = read_wells(inputs["wells.csv"])
        grid = read_grid(inputs["seismic.csv"])
        check = check_data(wells, grid)
        write_check(check, tmp / "qc.json", figures)
        lines += check.qc.lines()

        # the plain contract command: no feature flags, the default features
        trained, bundle = train_files(inputs["wells.csv"], inputs["seismic.csv"], tmp / "bundle", TARGETS)
        lines += leaderboard_lines(trained) + field_wide_lines(trained)
        maps, notes = _predict_noting(bundle, grid)
        lines += notes
        write_maps(maps, tmp / "maps.csv")
        write_maps(maps, tmp / "maps.nc")
        plots.facies_maps(maps, "facies", wells, figures / "facies_maps.png")
        plots.property_maps(maps, "porosity", wells, figures / "porosity_maps.png")
        plots.property_maps(maps, "permeability", wells, figures / "permeability_maps.png", log=True)
        for name, tm in trained.targets.items():
            metric = "rmse" if tm.task == "regression" else "balanced_accuracy"
            plots.leaderboard_chart(tm.leaderboard, metric, name, figures / f"leaderboard_{name}.png")

        lines += explain_bundle(bundle, tmp / "explanations", grid)
        build_report(bundle, tmp / "report.html", inputs["seismic.csv"])

        with xr.open_dataset(inputs["truth.nc"]) as truth:
            truth = truth.load()
        lines += _against_truth(wells, check, maps, truth, trained)
    lines.append(f"results in {out}/: report.html, qc.json, bundle/, maps.csv, maps.nc, figures/, explanations/")
    lines.append("a predicted map is a model, not a measurement; decisions rest with qualified professionals")
    return lines


def _predict_noting(bundle, grid) -> tuple[xr.Dataset, list[str]]:
    """Predict, keeping the warnings as notes for the printed summary."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", PredictorWarning)
        maps = predict_maps(bundle, grid)
    return maps, [f"note: {w.message}" for w in caught]


def _against_truth(wells, check, maps: xr.Dataset, truth: xr.Dataset, trained) -> list[str]:
    w = check.declustering.weights
    true_phi = truth.porosity.to_numpy()
    sand_code = truth.facies.attrs["flag_meanings"].split(" ").index("sand")
    err = maps.porosity.to_numpy() - true_phi
    inside = (true_phi >= maps.porosity_q10.to_numpy()) & (true_phi <= maps.porosity_q90.to_numpy())
    classes = maps.facies.attrs["flag_meanings"].split(" ")
    predicted_sand = maps.facies.to_numpy() == classes.index("sand")
    true_sand = truth.facies.to_numpy() == sand_code
    return [
        "against the truth of this synthetic field (a real study has none):",
        f"  mean porosity: wells {wells.porosity.mean():.4f}, declustered {weighted_mean(wells.porosity, w):.4f}, "
        f"nearest-node {weighted_mean(wells.porosity, check.nearest_node):.4f}, "
        f"field-wide (recommended) {trained.targets['porosity'].field_wide.to_dict()['mean']:.4f}, "
        f"truth {true_phi.mean():.4f}",
        f"  sand fraction: wells {np.mean(wells.facies == 'sand'):.3f}, "
        f"declustered {weighted_proportions(wells.facies, w)['sand']:.3f}, "
        f"field-wide (recommended) {trained.targets['facies'].field_wide.to_dict()['proportions']['sand']:.3f}, "
        f"facies map {predicted_sand.mean():.3f}, truth {true_sand.mean():.3f}",
        f"  porosity map RMSE {np.sqrt(np.nanmean(err ** 2)):.4f}; truth inside [q10, q90] on "
        f"{np.nanmean(inside):.1%} of the map (nominal 80 %)",
    ]


VERTICAL_RADII = [12.0]  # metres along the wells: the layering around each sample
VOLUME_CONTEXT = [100.0]


def run_volume_demo(out: Path, overwrite: bool = False, spec=None) -> list[str]:
    """The whole job on the 3-D scenario (Tarnwick lower sands, in depth, on a rotated survey):
    SEG-Y volume and well samples generated into ``out/data``, then qc, train, predicted
    volumes (NetCDF and SEG-Y), explanations and the report."""
    from .synthetic import volume_demo_files
    from .volume import read_volume

    lines = []
    with atomic_folder(out, overwrite=overwrite) as tmp:
        inputs = {k: Path(v) for k, v in volume_demo_files(tmp / "data", spec).items()}
        wells = read_wells(inputs["well_samples.csv"])
        volume = read_volume(inputs["impedance.sgy"], z_domain="depth", name="impedance")
        check = check_data(wells, volume)
        write_check(check, tmp / "qc.json", tmp / "figures")
        lines += check.qc.lines()
        trained, bundle = train_files(inputs["well_samples.csv"], inputs["impedance.sgy"], tmp / "bundle", TARGETS,
                                      context_radii=VOLUME_CONTEXT, vertical_radii=VERTICAL_RADII, z_domain="depth",
                                      segy_name="impedance")
        lines += leaderboard_lines(trained) + field_wide_lines(trained)
        predicted, notes = _predict_noting(bundle, volume)
        lines += notes
        write_maps(predicted, tmp / "volume.nc")
        write_maps(predicted, tmp / "volume.sgy")
        lines += explain_bundle(bundle, tmp / "explanations", volume)
        build_report(bundle, tmp / "report.html")
        with xr.open_dataset(inputs["truth_volume.nc"]) as truth:
            true_phi = truth.porosity.to_numpy()
        err = predicted.porosity.to_numpy() - true_phi
        inside = (true_phi >= predicted.porosity_q10.to_numpy()) & (true_phi <= predicted.porosity_q90.to_numpy())
        lines += ["against the truth of this synthetic volume (a real study has none):",
                  f"  mean porosity: well samples {wells.porosity.mean():.4f}, declustered "
                  f"{weighted_mean(wells.porosity, check.declustering.weights):.4f}, volume "
                  f"{np.nanmean(predicted.porosity):.4f}, truth {true_phi.mean():.4f}",
                  f"  porosity RMSE over the volume {np.sqrt(np.nanmean(err ** 2)):.4f}; truth inside [q10, q90] on "
                  f"{np.nanmean(inside):.1%} of the samples (nominal 80 %)"]
    lines.append(f"results in {out}/: report.html, qc.json, bundle/, volume.nc, volume_<variable>.sgy, data/, "
                 "explanations/")
    lines.append("a predicted volume is a model, not a measurement; decisions rest with qualified professionals")
    return lines
