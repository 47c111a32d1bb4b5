"""Training time with spatial CV on 200 wells and a 300 x 300 map.

    python experiments/train_speed.py

Times `train` (every candidate, matched and random CV, blend, well ties, calibration, final
fit) for porosity and facies, on the attributes alone and with the default features, and
`predict_maps` on the same grid, next to one bare LightGBM predict of the map's feature matrix
in the same run.
Absolute seconds depend on the machine; the ratio is what carries over.
"""

import time
import warnings

import lightgbm as lgb
import numpy as np

from predictor.bundle import save_bundle
from predictor.errors import PredictorWarning
from predictor.features import FeatureSpec, build_features, feature_matrix
from predictor.predict import predict_maps
from predictor.synthetic import FieldSpec, make_field
from predictor.training import TrainOptions, train


def main() -> None:
    warnings.simplefilter("ignore", PredictorWarning)
    spec = FieldSpec(
        seed=21, nx=300, ny=300, n_preferential=160, regular_pattern=(8, 5), n_bodies=8
    )
    seismic, _, wells = make_field(spec)
    print(f"{len(wells)} wells, {spec.nx} x {spec.ny} map")
    for label, features in (
        ("attributes only", FeatureSpec(["impedance"])),
        ("default: attributes plus context chosen from the grid", None),
    ):
        t0 = time.perf_counter()
        trained = train(
            wells, seismic, TrainOptions(targets=["porosity", "facies"], features=features)
        )
        seconds = time.perf_counter() - t0
        print(
            f"train ({label}): {seconds:.1f} s; chosen "
            + ", ".join(f"{k}: {v.chosen}" for k, v in trained.targets.items())
        )
    folder = save_bundle(trained, f"/tmp/predictor_speed_bundle_{time.time_ns()}")
    t0 = time.perf_counter()
    predict_maps(folder, seismic)
    ours = time.perf_counter() - t0
    matrix, _ = feature_matrix(build_features(seismic, trained.feature_spec), trained.feature_names)
    booster = lgb.train(
        {"objective": "regression", "verbose": -1, "num_leaves": 7},
        lgb.Dataset(matrix[:2000], np.random.default_rng(0).normal(size=2000)),
        100,
    )
    t0 = time.perf_counter()
    booster.predict(matrix)
    bare = time.perf_counter() - t0
    print(
        f"predict_maps (all targets, intervals, {matrix.shape[0]} nodes): {ours:.2f} s; "
        f"one bare LightGBM predict of 100 trees: {bare:.2f} s"
    )


if __name__ == "__main__":
    main()
