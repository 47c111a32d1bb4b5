"""Volume accuracy against the exhaustive truth of synthetic 3-D fields, next to same-run baselines.

    python experiments/volume_accuracy.py [--quick]

For each field (seeds x geometries) it trains porosity, facies and permeability on the well
samples as `predictor train` does on a volume (features: impedance, lateral context at 100 m,
vertical context at 12 m), predicts the whole volume and compares with the truth:

- porosity RMSE over the volume of the chosen model, of the linear baseline (same wells, same
  folds, refitted on all wells) and of the declustered well mean everywhere;
- the reported blocked-CV RMSE and the random-CV RMSE (samples shuffled, wells split) against
  the true volume RMSE;
- share of true porosity inside [q10, q90] (nominal 0.80);
- facies balanced accuracy over the volume, chosen model vs logistic regression.
"""

import argparse
import time
import warnings

import numpy as np
import pandas as pd
from sklearn.metrics import balanced_accuracy_score

from predictor.errors import PredictorWarning
from predictor.features import FeatureSpec, build_features, feature_matrix
from predictor.predict import local_spread, node_xy
from predictor.synthetic import FACIES, VolumeSpec, make_volume_field
from predictor.training import TrainOptions, train
from predictor.volume import check_volume

GEOMETRIES = {
    "layered": {"lateral_correlation": 500.0, "vertical_correlation": 10.0, "rotation": 30.0},
    "patchy": {
        "lateral_correlation": 200.0,
        "vertical_correlation": 20.0,
        "rotation": -15.0,
        "deviated_share": 0.6,
    },
}


def volume_values(model, volume, spec, names):
    matrix, valid = feature_matrix(build_features(volume, spec), names)
    xx, yy = node_xy(volume)
    X = pd.DataFrame(matrix, columns=names)
    return model.predict(X, np.column_stack([xx[valid], yy[valid]])), valid, X


def one(seed: int, geometry: str, default_features: bool = False) -> dict:
    seismic, truth, wells = make_volume_field(VolumeSpec(seed=seed, **GEOMETRIES[geometry]))
    volume = check_volume(seismic)
    wells = wells.rename(columns={"depth": "z"})
    spec = FeatureSpec(["impedance"], context_radii=[100.0], vertical_radii=[12.0])
    t0 = time.perf_counter()
    trained = train(
        wells,
        volume,
        TrainOptions(
            targets=["porosity", "facies", "permeability"],
            features=None if default_features else spec,
        ),
    )
    spec = trained.feature_spec
    row = {
        "seed": seed,
        "geometry": geometry,
        "wells": wells.well_id.nunique(),
        "samples": len(wells),
        "train_s": time.perf_counter() - t0,
    }
    names = trained.feature_names
    phi = trained.targets["porosity"]
    pred, valid, X = volume_values(phi.model, volume, spec, names)
    true_phi = truth.porosity.to_numpy().ravel()[valid]
    row["chosen"] = phi.chosen
    row["rmse"] = float(np.sqrt(np.mean((pred - true_phi) ** 2)))
    lin, *_ = volume_values(phi.refit("linear"), volume, spec, names)
    row["rmse_linear"] = float(np.sqrt(np.mean((lin - true_phi) ** 2)))
    mean = trained.statistics["declustered"]["porosity"]["mean"]
    row["rmse_declustered_mean"] = float(np.sqrt(np.mean((mean - true_phi) ** 2)))
    chosen = next(r for r in phi.leaderboard if r["chosen"])
    row["rmse_cv"], row["rmse_cv_random"] = chosen["cv"]["rmse"], chosen["cv_random"]["rmse"]
    row["rmse_expected"] = phi.distances["map_error"]["rmse"]  # the card's expected error
    spread = local_spread(phi.spread, phi.model, X, None) if phi.calibration.scaled else None
    q10, q90 = phi.calibration.apply(pred, spread)
    row["coverage"] = float(np.mean((true_phi >= q10) & (true_phi <= q90)))
    fac = trained.targets["facies"]
    truth_labels = np.array(FACIES)[truth.facies.to_numpy().ravel()[valid]]
    proba, *_ = volume_values(fac.model, volume, spec, names)
    row["facies_bacc"] = balanced_accuracy_score(
        truth_labels, np.array(fac.classes)[proba.argmax(1)]
    )
    lproba, *_ = volume_values(fac.refit("logistic"), volume, spec, names)
    row["facies_bacc_logistic"] = balanced_accuracy_score(
        truth_labels, np.array(fac.classes)[lproba.argmax(1)]
    )
    return row


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="two fields instead of eight")
    parser.add_argument(
        "--default-features",
        action="store_true",
        help="train as the plain command does (no feature flags) instead of the fixed set",
    )
    args = parser.parse_args()
    warnings.simplefilter("ignore", PredictorWarning)
    seeds = [1] if args.quick else [1, 2, 3, 4]
    rows = [one(seed, geometry, args.default_features) for seed in seeds for geometry in GEOMETRIES]
    table = pd.DataFrame(rows)
    pd.set_option("display.width", 200)
    print(table.round(4).to_string(index=False))
    cv_vs_truth = table.rmse_cv / table.rmse - 1
    print(
        f"\n{len(table)} fields: porosity RMSE over the volume / linear baseline"
        f" {np.mean(table.rmse / table.rmse_linear):.3f} (worst"
        f" {np.max(table.rmse / table.rmse_linear):.3f}); / declustered mean everywhere"
        f" {np.mean(table.rmse / table.rmse_declustered_mean):.3f}"
    )
    print(
        f"CV RMSE vs true volume RMSE: mean {cv_vs_truth.mean():+.1%} ({cv_vs_truth.min():+.1%} to"
        f" {cv_vs_truth.max():+.1%}); random CV vs truth"
        f" {np.mean(table.rmse_cv_random / table.rmse - 1):+.1%}"
    )
    expected = table.rmse_expected / table.rmse - 1
    print(
        f"expected volume RMSE (card: CV x kriging-variance ratio x training-size factor) vs"
        f" truth: mean {expected.mean():+.1%} ({expected.min():+.1%} to {expected.max():+.1%})"
    )
    print(
        f"q10-q90 coverage of the true porosity: mean {table.coverage.mean():.3f} "
        f"({table.coverage.min():.3f} to {table.coverage.max():.3f}; nominal 0.80)"
    )
    print(
        f"facies balanced accuracy over the volume: chosen {table.facies_bacc.mean():.3f}, logistic"
        f" {table.facies_bacc_logistic.mean():.3f}"
    )


if __name__ == "__main__":
    main()
