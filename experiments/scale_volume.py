"""Tiled prediction of a 3-D volume: time against bare LightGBM, peak memory, Dask workers.

    python experiments/scale_volume.py [--size 400 400 300] [--workers 0 1 2] [--lightgbm-only]

A synthetic volume (inlines x crosslines x samples, 25 m traces, 4 m samples) is written as a
Zarr store, a porosity bundle is trained on its wells (samples along each well) with the plain
command's defaults (the features and candidates a user gets; ``--lightgbm-only``: LightGBM on
impedance with lateral context at 50 m and vertical context at 12 m, as measured before), and
`predict_to_zarr` runs in a fresh process (peak resident memory from the OS).  The bare
reference is what the bundle cannot avoid: each LightGBM booster inside it predicting the
whole volume's feature matrix, in memory, in the same run, on every core (two here, as the
tiled run; experiments/scale_predict.py measures maps the same way).
"""

import argparse
import json
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

from scale_predict import bare_predict

from predictor.bundle import load_bundle, save_bundle
from predictor.errors import PredictorWarning
from predictor.features import FeatureSpec
from predictor.io.netcdf import write_zarr
from predictor.synthetic import VolumeSpec, make_volume_field
from predictor.training import TrainOptions, train
from predictor.volume import check_volume

CHILD = """
import json, sys, time, warnings
from predictor.errors import PredictorWarning
warnings.simplefilter("ignore", PredictorWarning)
from predictor.chunked import predict_to_zarr
t0 = time.perf_counter()
workers = int(sys.argv[4]) or None
predict_to_zarr(sys.argv[1], sys.argv[2], sys.argv[3], threads=2, workers=workers)
# VmHWM: this process's own peak (ru_maxrss would carry the parent's peak across exec)
hwm = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM"))
print(json.dumps({"seconds": time.perf_counter() - t0, "peak_mb": hwm / 1024}))
"""


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument(
        "--size",
        type=int,
        nargs=3,
        default=[400, 400, 300],
        metavar=("INLINES", "CROSSLINES", "SAMPLES"),
    )
    parser.add_argument("--workers", type=int, nargs="+", default=[0])
    parser.add_argument(
        "--lightgbm-only", action="store_true", help="the LightGBM-only bundle measured before"
    )
    args = parser.parse_args()
    warnings.simplefilter("ignore", PredictorWarning)
    ni, nj, nk = args.size
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        t0 = time.perf_counter()
        seismic, _, wells = make_volume_field(
            VolumeSpec(
                seed=3,
                n_inlines=ni,
                n_crosslines=nj,
                n_samples=nk,
                n_preferential=40,
                regular_pattern=(4, 4),
            )
        )
        seismic = check_volume(seismic)
        wells = wells.rename(columns={"depth": "z"})
        volume_path = write_zarr(seismic, tmp / "volume.zarr")
        print(
            f"volume {ni} x {nj} x {nk} ({ni * nj * nk / 1e6:.0f}M samples),"
            f" {wells.well_id.nunique()} wells, {len(wells)} samples; made in"
            f" {time.perf_counter() - t0:.0f} s"
        )
        if args.lightgbm_only:
            spec = FeatureSpec(["impedance"], context_radii=[50.0], vertical_radii=[12.0])
            options = TrainOptions(targets=["porosity"], features=spec, candidates=["lightgbm"])
        else:
            options = TrainOptions(targets=["porosity"])
        t0 = time.perf_counter()
        trained = train(wells, seismic, options)
        bundle = save_bundle(trained, tmp / "bundle")
        names = trained.feature_names
        print(
            f"trained in {time.perf_counter() - t0:.0f} s: {trained.targets['porosity'].chosen}, "
            f"{len(names)} features"
        )
        bare, _ = bare_predict(load_bundle(bundle), seismic)
        del seismic
        print(f"bare predict of the bundle's LightGBM boosters: {bare:.1f} s")
        for workers in args.workers:
            out = tmp / f"predicted{workers}.zarr"
            proc = subprocess.run(
                [
                    sys.executable,
                    "-c",
                    CHILD,
                    str(bundle),
                    str(volume_path),
                    str(out),
                    str(workers),
                ],
                capture_output=True,
                text=True,
            )
            if proc.returncode:
                sys.exit(f"tiled predict failed:\n{proc.stderr[-3000:]}")
            result = json.loads(proc.stdout.strip().splitlines()[-1])
            how = f"{workers} Dask workers" if workers else "2 local threads"
            print(
                f"{how}: tiled predict (read, features, q10/q50/q90, applicability, write)"
                f" {result['seconds']:.1f} s, ratio to bare {result['seconds'] / bare:.2f}; peak"
                f" memory {result['peak_mb']:.0f} MB"
            )


if __name__ == "__main__":
    main()
