"""Mature fields: train and predict with 200, 2 000 and 10 000 wells, and the moving kriging
neighbourhood against the global system where both can run.

    python experiments/many_wells.py [--wells 200 2000 10000] [--size 1000] [--compare 2000]

Each field is a synthetic 1000 x 1000 map (10 m nodes) drilled preferentially plus a regular
pattern; the plain command's training (porosity and facies, every default) and `predict_maps`
run in a fresh process, with its peak resident memory read from the OS.  ``--compare N``
trains the N-well field twice: with the default moving neighbourhood (the nearest
kriging.NEIGHBOURS wells per tile above kriging.GLOBAL_WELLS) and with one global system of
every well, and reports both maps' porosity RMSE against the truth and their difference.
"""

import argparse
import json
import subprocess
import sys

CHILD = """
import json, sys, time, warnings
import numpy as np
from predictor.errors import PredictorWarning
warnings.simplefilter("ignore", PredictorWarning)
import predictor.kriging as kriging
from predictor.bundle import save_bundle
from predictor.predict import predict_maps
from predictor.synthetic import FieldSpec, make_field
from predictor.training import TrainOptions, train

n_wells, size, form = int(sys.argv[1]), int(sys.argv[2]), sys.argv[3]
if form == "global":
    kriging.GLOBAL_WELLS = 10**9
regular = 10 if n_wells >= 1000 else 6
spec = FieldSpec(seed=51, nx=size, ny=size, spacing=10.0, n_bodies=12, body_width=150.0,
                 n_preferential=n_wells - regular * regular, regular_pattern=(regular, regular))
seismic, truth, wells = make_field(spec)
t0 = time.perf_counter()
trained = train(wells, seismic, TrainOptions(targets=["porosity", "facies"]))
t1 = time.perf_counter()
folder = save_bundle(trained, f"/tmp/many_wells_{n_wells}_{form}_{time.time_ns()}")
maps = predict_maps(folder, seismic, warn=False)
t2 = time.perf_counter()
hwm = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM"))
por = maps.porosity.to_numpy()
ok = np.isfinite(por)
rmse = float(np.sqrt(np.mean((por[ok] - truth.porosity.to_numpy()[ok]) ** 2)))
chosen = {t: m.chosen for t, m in trained.targets.items()}
print(json.dumps({"wells": len(wells), "train_s": t1 - t0, "predict_s": t2 - t1,
                  "peak_mb": hwm / 1024, "chosen": chosen, "rmse": rmse}))
np.save(f"/tmp/many_wells_{n_wells}_{form}.npy", por)
"""


def run(n_wells: int, size: int, form: str) -> dict:
    proc = subprocess.run(
        [sys.executable, "-c", CHILD, str(n_wells), str(size), form], capture_output=True, text=True
    )
    if proc.returncode:
        raise SystemExit(proc.stderr[-3000:])
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> None:
    import numpy as np

    parser = argparse.ArgumentParser()
    parser.add_argument("--wells", type=int, nargs="+", default=[200, 2000, 10000])
    parser.add_argument("--size", type=int, default=1000)
    parser.add_argument("--compare", type=int, nargs="*", default=[2000])
    args = parser.parse_args()
    results = {}
    for n in args.wells:
        r = results[n] = run(n, args.size, "default")
        print(
            f"{r['wells']} wells, {args.size} x {args.size} map: train {r['train_s']:.0f} s,"
            f" predict {r['predict_s']:.0f} s, total {(r['train_s'] + r['predict_s']) / 60:.1f}"
            f" min; peak memory {r['peak_mb']:.0f} MB; porosity RMSE against the truth"
            f" {r['rmse']:.4f}; chosen {r['chosen']}"
        )
        sys.stdout.flush()
    for n in args.compare or []:
        local = results.get(n) or run(n, args.size, "default")
        glob = run(n, args.size, "global")
        a, b = (
            np.load(f"/tmp/many_wells_{n}_default.npy"),
            np.load(f"/tmp/many_wells_{n}_global.npy"),
        )
        ok = np.isfinite(a) & np.isfinite(b)
        rms = float(np.sqrt(np.mean((a[ok] - b[ok]) ** 2)))
        local_rmse = local["rmse"]
        print(
            f"{n} wells, moving neighbourhood against the global system: porosity RMSE against the"
            f" truth {local_rmse:.4f} against {glob['rmse']:.4f}"
            f" ({local_rmse / glob['rmse'] - 1:+.2%}); RMS difference between the two maps"
            f" {rms:.4f} ({rms / glob['rmse']:.1%} of the global map's error); global form: train"
            f" {glob['train_s']:.0f} s, predict {glob['predict_s']:.0f} s, peak"
            f" {glob['peak_mb']:.0f} MB"
        )


if __name__ == "__main__":
    main()
