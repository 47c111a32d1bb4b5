"""Tiled prediction of large maps: time against bare LightGBM, and peak memory against grid size.

    python experiments/scale_predict.py [--sizes 1000 2000] [--workers 0 1 2]

For each size a synthetic field is written as NetCDF, a LightGBM-only porosity bundle is trained
on its wells, and `predictor predict ... --out maps.zarr` runs in a fresh process (peak resident
memory read from the OS). The bare reference is LightGBM's own predict of the full feature matrix
in the same run, with the same threads.
"""

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

from predictor.bundle import save_bundle
from predictor.errors import PredictorWarning
from predictor.features import build_features, feature_matrix
from predictor.io.netcdf import write_netcdf
from predictor.synthetic import FieldSpec, make_field
from predictor.training import TrainOptions, train

CHILD = """
import json, sys, time, warnings
from predictor.errors import PredictorWarning
warnings.simplefilter("ignore", PredictorWarning)
from predictor.chunked import predict_to_zarr
t0 = time.perf_counter()
workers = int(sys.argv[4]) or None
predict_to_zarr(sys.argv[1], sys.argv[2], sys.argv[3], tile=512, threads=2, workers=workers)
# VmHWM: this process's own peak (ru_maxrss would carry the parent's peak across exec)
hwm = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM"))
print(json.dumps({"seconds": time.perf_counter() - t0, "peak_mb": hwm / 1024}))
"""


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--sizes", type=int, nargs="+", default=[1000, 2000])
    parser.add_argument("--workers", type=int, nargs="+", default=[0])
    args = parser.parse_args()
    warnings.simplefilter("ignore", PredictorWarning)
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        for size in args.sizes:
            spec = FieldSpec(seed=41, nx=size, ny=size, spacing=10.0, n_bodies=12, body_width=150.0,
                             n_preferential=160, regular_pattern=(8, 5))
            seismic, _, wells = make_field(spec)
            grid_path = write_netcdf(seismic, tmp / f"grid{size}.nc")
            trained = train(wells, seismic, TrainOptions(targets=["porosity"], candidates=["lightgbm"],
                                                         well_ties="never"))
            bundle = save_bundle(trained, tmp / f"bundle{size}")
            matrix, _ = feature_matrix(build_features(seismic, trained.feature_spec), trained.feature_names)
            booster = trained.targets["porosity"].model.booster_
            t0 = time.perf_counter()
            booster.predict(matrix, num_threads=2)
            bare = time.perf_counter() - t0
            del seismic, matrix
            for workers in args.workers:
                out = tmp / f"maps{size}_{workers}.zarr"
                proc = subprocess.run([sys.executable, "-c", CHILD, str(bundle), str(grid_path), str(out),
                                       str(workers)], capture_output=True, text=True, check=True)
                result = json.loads(proc.stdout.strip().splitlines()[-1])
                how = f"{workers} Dask workers" if workers else "2 local threads"
                print(f"{size} x {size} ({size * size / 1e6:.0f}M nodes), {how}: tiled predict "
                      f"{result['seconds']:.1f} s, bare LightGBM predict {bare:.1f} s, ratio "
                      f"{result['seconds'] / bare:.2f}; peak memory {result['peak_mb']:.0f} MB")
    print(f"(this process peaked at {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB building the "
          "fields and the bare reference in memory)")


if __name__ == "__main__":
    main()
