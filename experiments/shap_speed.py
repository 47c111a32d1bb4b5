"""Cost of a full SHAP map against predicting the same map, measured in one run.

    python experiments/shap_speed.py [--size 1000]

Trains on a synthetic field of SIZE x SIZE nodes (porosity, attributes only), then times
`predict_maps` and `contribution_maps` on the same grid, and LightGBM's own predict and
pred_contrib on the same feature matrix for a bare-library reference.
"""

import argparse
import tempfile
import time
import warnings

import lightgbm as lgb
import numpy as np

from predictor.bundle import save_bundle
from predictor.errors import PredictorWarning
from predictor.explanations import contribution_maps
from predictor.features import build_features, feature_matrix
from predictor.predict import predict_maps
from predictor.synthetic import FieldSpec, make_field
from predictor.training import TrainOptions, train


def timed(fn):
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--size", type=int, default=1000)
    args = parser.parse_args()
    warnings.simplefilter("ignore", PredictorWarning)
    spec = FieldSpec(
        seed=31, nx=args.size, ny=args.size, spacing=10.0, n_bodies=10, body_width=150.0
    )
    seismic, _, wells = make_field(spec)
    trained = train(wells, seismic, TrainOptions(targets=["porosity"]))
    with tempfile.TemporaryDirectory() as tmp:
        folder = save_bundle(trained, f"{tmp}/bundle")
        predict_s = timed(lambda: predict_maps(folder, seismic))
        from predictor.bundle import load_bundle

        bundle = load_bundle(folder)
        shap_s = timed(lambda: contribution_maps(bundle, seismic, "porosity"))
    print(f"{args.size} x {args.size} map, chosen model {trained.targets['porosity'].chosen}")
    print(
        f"predict_maps {predict_s:.1f} s; contribution_maps {shap_s:.1f} s; ratio"
        f" {shap_s / predict_s:.2f}"
    )
    matrix, _ = feature_matrix(build_features(seismic, trained.feature_spec), trained.feature_names)
    y = np.random.default_rng(0).normal(size=len(wells))
    booster = lgb.train(
        {"objective": "regression", "verbose": -1, "num_leaves": 7, "min_data_in_leaf": 5},
        lgb.Dataset(matrix[: len(wells)], y),
        200,
    )
    p = timed(lambda: booster.predict(matrix))
    c = timed(lambda: booster.predict(matrix, pred_contrib=True))
    print(
        f"bare LightGBM on the same matrix: predict {p:.2f} s, pred_contrib {c:.2f} s, ratio"
        f" {c / p:.2f}"
    )


if __name__ == "__main__":
    main()
