"""Map accuracy against the exhaustive truth of synthetic fields, next to same-run baselines.

    python experiments/map_accuracy.py [--quick]

For each field (seeds x geometries x drilling strengths) it trains porosity, facies and
permeability exactly as `predictor train` does, maps them, and compares with the truth:

- porosity map RMSE of the chosen model and of regression kriging (same wells, same features);
- the reported blocked-CV RMSE (and the random-CV RMSE) against the true map RMSE;
- share of truth cells inside [q10, q90] (porosity and log10 permeability);
- facies balanced accuracy on the map, chosen model vs logistic regression on impedance;
- error of the declustered mean porosity (cell, nearest-node) and of the map mean, over the
  naive well-mean error.
"""

import argparse
import time
import warnings

import numpy as np
import pandas as pd
from sklearn.metrics import balanced_accuracy_score

from predictor.errors import PredictorWarning
from predictor.features import FeatureSpec, build_features, feature_matrix
from predictor.predict import local_spread
from predictor.stats import weighted_mean
from predictor.synthetic import FACIES, FieldSpec, make_field
from predictor.training import TrainOptions, train


def map_values(model, grid, spec, names):
    features = build_features(grid, spec)
    matrix, valid = feature_matrix(features, names)
    xx, yy = np.meshgrid(grid.x.to_numpy(), grid.y.to_numpy())
    xy = np.column_stack([xx.ravel()[valid], yy.ravel()[valid]])
    X = pd.DataFrame(matrix, columns=names)
    return model.predict(X, xy), valid, xy, X


def one(spec: FieldSpec, options: dict) -> dict:
    seismic, truth, wells = make_field(spec)
    wells.attrs["source"] = "synthetic"
    t0 = time.perf_counter()
    trained = train(
        wells, seismic, TrainOptions(targets=["porosity", "facies", "permeability"], **options)
    )
    seconds = time.perf_counter() - t0
    row = {
        "seed": spec.seed,
        "geometry": spec.geometry,
        "strength": spec.drilling_strength,
        "wells": len(wells),
        "train_s": seconds,
    }
    names = trained.feature_names

    phi = trained.targets["porosity"]
    pred, valid, xy, X = map_values(phi.model, seismic, trained.feature_spec, names)
    true_phi = truth.porosity.to_numpy().ravel()[valid]
    row["chosen"] = phi.chosen
    row["rmse_map"] = float(np.sqrt(np.mean((pred - true_phi) ** 2)))
    rk, *_ = map_values(phi.refit("regression_kriging"), seismic, trained.feature_spec, names)
    row["rmse_map_rk"] = float(np.sqrt(np.mean((rk - true_phi) ** 2)))
    chosen_row = next(r for r in phi.leaderboard if r["chosen"])
    row["rmse_cv"] = chosen_row["cv"]["rmse"]
    row["rmse_cv_random"] = chosen_row["cv_random"]["rmse"]
    cal = phi.calibration
    spread = local_spread(phi.spread, phi.model, X, xy) if cal.scaled else None
    q10, q90 = cal.apply(pred, spread)
    row["coverage_phi"] = float(np.mean((true_phi >= q10) & (true_phi <= q90)))

    perm = trained.targets["permeability"]
    lpred, *_ = map_values(perm.model, seismic, trained.feature_spec, names)
    true_lk = np.log10(truth.permeability.to_numpy().ravel()[valid])
    spread = local_spread(perm.spread, perm.model, X, xy) if perm.calibration.scaled else None
    l10, l90 = perm.calibration.apply(lpred, spread)
    row["coverage_perm"] = float(np.mean((true_lk >= l10) & (true_lk <= l90)))

    fac = trained.targets["facies"]
    true_codes = truth.facies.to_numpy().ravel()[valid]
    true_labels = np.array(FACIES)[true_codes]
    proba, *_ = map_values(fac.model, seismic, trained.feature_spec, names)
    row["facies_bacc_map"] = balanced_accuracy_score(
        true_labels, np.array(fac.classes)[proba.argmax(1)]
    )
    lproba, *_ = map_values(fac.refit("logistic"), seismic, trained.feature_spec, names)
    row["facies_bacc_map_logistic"] = balanced_accuracy_score(
        true_labels, np.array(fac.classes)[lproba.argmax(1)]
    )
    row["facies_chosen"] = fac.chosen

    truth_mean = float(truth.porosity.mean())
    naive_err = abs(wells.porosity.mean() - truth_mean)
    row["decl_ratio"] = (
        abs(trained.statistics["declustered"]["porosity"]["mean"] - truth_mean) / naive_err
    )
    row["decl_ratio_cell"] = (
        abs(weighted_mean(wells.porosity, trained.weights) - truth_mean) / naive_err
    )
    row["map_mean_ratio"] = abs(float(np.mean(pred)) - truth_mean) / naive_err
    return row


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="two fields only")
    parser.add_argument("--declustering", default="cell")
    parser.add_argument("--interval-spread", default="features")
    parser.add_argument(
        "--context",
        action="store_true",
        help="add context features: smoothing at 75, 250 and 1000 m, local contrast, gradient",
    )
    parser.add_argument("--seeds", type=int, default=3)
    args = parser.parse_args()
    warnings.simplefilter("ignore", PredictorWarning)
    specs = [
        FieldSpec(seed=s, geometry=g, drilling_strength=d)
        for s in range(1, args.seeds + 1)
        for g in ("channels", "lobes")
        for d in (1.0, 2.0)
    ]
    if args.quick:
        specs = specs[:2]
    options = {"declustering": args.declustering, "interval_spread": args.interval_spread}
    if args.context:
        options["features"] = FeatureSpec(
            ["impedance"], context_radii=[75.0, 250.0, 1000.0], gradient=True
        )
    table = pd.DataFrame([one(s, options) for s in specs])
    pd.set_option("display.width", 250)
    pd.set_option("display.max_columns", 30)
    print(table.round(4).to_string(index=False))
    ratio = table.rmse_map / table.rmse_map_rk
    cv_err = table.rmse_cv / table.rmse_map - 1
    print("\nsummary over", len(table), "fields")
    print(
        f"  porosity map RMSE / regression kriging: mean {ratio.mean():.3f}, worst"
        f" {ratio.max():.3f}"
    )
    print(
        f"  blocked CV RMSE vs true map RMSE: mean {cv_err.mean():+.1%}, range {cv_err.min():+.1%}"
        f" to {cv_err.max():+.1%}"
    )
    print(
        "  random CV RMSE vs true map RMSE: mean"
        f" {(table.rmse_cv_random / table.rmse_map - 1).mean():+.1%}"
    )
    print(
        f"  [q10, q90] coverage: porosity {table.coverage_phi.mean():.3f} "
        f"(range {table.coverage_phi.min():.3f}-{table.coverage_phi.max():.3f}), "
        f"permeability {table.coverage_perm.mean():.3f}"
    )
    gain = table.facies_bacc_map - table.facies_bacc_map_logistic
    print(
        f"  facies balanced accuracy on the map: {table.facies_bacc_map.mean():.3f} vs logistic"
        f" {table.facies_bacc_map_logistic.mean():.3f} (gain {gain.mean():+.3f}, worst"
        f" {gain.min():+.3f})"
    )
    print(
        "  declustered mean porosity error / naive error: card (nearest-node)"
        f" {table.decl_ratio.mean():.2f}, cell weights {table.decl_ratio_cell.mean():.2f}, mean of"
        f" the porosity map {table.map_mean_ratio.mean():.2f}"
    )
    print(
        f"  training time per field (3 targets, {table.wells.iloc[0]} wells):"
        f" {table.train_s.mean():.1f} s"
    )


if __name__ == "__main__":
    main()
