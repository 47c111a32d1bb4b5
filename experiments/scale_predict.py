"""Maps from the default bundle: end-to-end predict time against the bundle's own LightGBM
boosters, and peak memory, as the map grows.

    python experiments/scale_predict.py [--sizes 1000 2000 3000] [--outputs nc zarr]

For each size a synthetic field (about 200 wells) is written as NetCDF and the plain command's
bundle is trained on it (porosity and facies, every default: the blend with its kriging
members, well ties when the CV picks them, intervals, area of applicability).  Then
`predictor predict bundle --grid grid.nc --out maps.<nc|zarr>` runs in a fresh process, with its
peak resident memory read from the OS.  The bare reference is what the bundle cannot avoid: each
LightGBM booster inside it (blend members, facies classifier, well-tie bases) predicting the
full feature matrix, timed in the same run with the same number of threads (all cores).
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

from predictor.bundle import load_bundle, save_bundle
from predictor.errors import PredictorWarning
from predictor.features import build_features, feature_matrix
from predictor.io.netcdf import write_netcdf
from predictor.models import Blend, FaciesMixture, LightGBM, WellTies
from predictor.synthetic import FieldSpec, make_field
from predictor.training import TrainOptions, train

CHILD = """
import json, sys, time, warnings
from predictor.errors import PredictorWarning
warnings.simplefilter("ignore", PredictorWarning)
from predictor.cli import main
t0 = time.perf_counter()
assert main(["--quiet", "predict", sys.argv[1], "--grid", sys.argv[2], "--out", sys.argv[3]]) == 0
# VmHWM: this process's own peak (ru_maxrss would carry the parent's peak across exec)
hwm = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM"))
print(json.dumps({"seconds": time.perf_counter() - t0, "peak_mb": hwm / 1024}))
"""


def boosters(model) -> list:
    """Every LightGBM booster a bundle's model predicts with (with the features it reads)."""
    if isinstance(model, LightGBM):
        return [(model.booster_, model.features)]
    if isinstance(model, WellTies):
        return boosters(model.base_)
    if isinstance(model, FaciesMixture):
        return boosters(model.classifier_)
    if isinstance(model, Blend):
        return [
            b
            for m, w in zip(model.members_, model.weights_, strict=True)
            if w > 0
            for b in boosters(m)
        ]
    return []


def bare_predict(bundle, grid) -> tuple[float, int]:
    """Seconds for the bundle's boosters to predict every valid node, and the number of nodes."""
    matrix, valid = feature_matrix(
        build_features(grid, bundle.feature_spec), bundle.card["features"]["names"]
    )
    names = bundle.card["features"]["names"]
    total = 0.0
    for model in bundle.models.values():
        for booster, features in boosters(model):
            X = np.ascontiguousarray(matrix[:, [names.index(f) for f in features]])
            t0 = time.perf_counter()
            booster.predict(X, num_threads=os.cpu_count())
            total += time.perf_counter() - t0
    return total, int(valid.sum())


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--sizes", type=int, nargs="+", default=[1000, 2000, 3000])
    parser.add_argument("--outputs", nargs="+", default=["nc", "zarr"])
    args = parser.parse_args()
    warnings.simplefilter("ignore", PredictorWarning)
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        for size in args.sizes:
            spec = FieldSpec(
                seed=41,
                nx=size,
                ny=size,
                spacing=10.0,
                n_bodies=12,
                body_width=150.0,
                n_preferential=160,
                regular_pattern=(8, 5),
            )
            seismic, _, wells = make_field(spec)
            grid_path = write_netcdf(seismic, tmp / f"grid{size}.nc")
            t0 = time.perf_counter()
            trained = train(wells, seismic, TrainOptions(targets=["porosity", "facies"]))
            train_s = time.perf_counter() - t0
            folder = save_bundle(trained, tmp / f"bundle{size}")
            chosen = ", ".join(f"{t}: {m.chosen}" for t, m in trained.targets.items())
            bare, nodes = bare_predict(load_bundle(folder), seismic)
            del seismic, trained
            print(
                f"{size} x {size} ({nodes / 1e6:.1f}M nodes), {len(wells)} wells; trained in"
                f" {train_s:.0f} s ({chosen}); bare predict of the bundle's LightGBM boosters"
                f" {bare:.1f} s"
            )
            for fmt in args.outputs:
                out = tmp / f"maps{size}.{fmt}"
                proc = subprocess.run(
                    [sys.executable, "-c", CHILD, str(folder), str(grid_path), str(out)],
                    capture_output=True,
                    text=True,
                )
                if proc.returncode:
                    print(proc.stderr[-2000:])
                    continue
                result = json.loads(proc.stdout.strip().splitlines()[-1])
                print(
                    f"  predict --out maps.{fmt}: {result['seconds']:.1f} s end to end (read,"
                    " features, every target with intervals and applicability, write), ratio to"
                    f" bare {result['seconds'] / bare:.2f}; peak memory {result['peak_mb']:.0f} MB"
                )
            sys.stdout.flush()


if __name__ == "__main__":
    main()
