"""Matched validation against the truth: is the reported CV error the map's error, on any drilling?

    python experiments/matched_cv.py [--set tuning|held_out|all] [--quick] [--jobs 2]

Fields span dense (120-250 wells on 12.5 m grids) and sparse (30-60 wells), regular, random
and strongly preferential drilling, one and two attributes, channels and lobes.  Each is
trained with the plain contract command (``predictor train --target porosity --target facies``,
no feature flags) and mapped; per field it reports:

- the chosen model's CV RMSE under the matched, blocked and random designs / the true map RMSE
  (all with declustering weights, as reported; ``adjusted``: the card's expected map RMSE, the
  matched CV times the square root of the kriging-variance ratio of map nodes to held-out wells
  and the training-size factor; ``representative``: the matched folds scored with the weights
  raked to the map's distance and attribute quartiles);
- the share of truth cells inside [q10, q90], beside the card's held-out-wells coverage;
- porosity map RMSE / regression kriging's (refitted on the same wells in the same run);
- facies balanced accuracy on the map, chosen vs logistic regression on the attributes.

The tuning seeds (1, 2) were used while developing; the held-out seeds (11, 12) never were.
"""

from __future__ import annotations

import argparse
import time
import warnings
from concurrent.futures import ProcessPoolExecutor

import numpy as np
import pandas as pd
from scipy import stats
from sklearn.metrics import balanced_accuracy_score

from predictor.cv_design import design_folds, unit_heads
from predictor.errors import ModelError, PredictorWarning
from predictor.features import build_features, feature_matrix
from predictor.intervals import calibrate
from predictor.models import out_of_fold
from predictor.predict import local_spread
from predictor.stats import weighted_quantile
from predictor.synthetic import FACIES, FieldSpec, make_field
from predictor.training import TrainOptions, train

TUNING, HELD_OUT = (1, 2), (11, 12)

# name: (FieldSpec keywords)
LAYOUTS = {
    "dense_preferential_channels": dict(
        nx=200,
        ny=160,
        spacing=12.5,
        n_preferential=160,
        drilling_strength=2.0,
        regular_pattern=(5, 4),
        body_width=180.0,
        correlation_length=200.0,
    ),
    "dense_preferential_lobes_2attr": dict(
        nx=180,
        ny=200,
        spacing=12.5,
        n_preferential=210,
        drilling_strength=2.5,
        regular_pattern=(4, 4),
        body_width=200.0,
        geometry="lobes",
        second_attribute=True,
        correlation_length=200.0,
    ),
    "dense_random_channels": dict(
        nx=220,
        ny=140,
        spacing=12.5,
        n_preferential=130,
        drilling_strength=0.0,
        regular_pattern=(0, 0),
        body_width=180.0,
        correlation_length=200.0,
    ),
    "dense_regular_lobes": dict(
        nx=160,
        ny=160,
        spacing=12.5,
        n_preferential=0,
        regular_pattern=(13, 12),
        geometry="lobes",
        body_width=200.0,
        correlation_length=200.0,
    ),
    "sparse_preferential_channels": dict(
        n_preferential=30, drilling_strength=2.5, regular_pattern=(3, 3)
    ),
    "sparse_random_lobes_2attr": dict(
        n_preferential=40,
        drilling_strength=0.0,
        regular_pattern=(2, 2),
        geometry="lobes",
        second_attribute=True,
    ),
    "sparse_regular_channels": dict(n_preferential=0, regular_pattern=(7, 6)),
    "sparse_preferential_lobes_2attr": dict(
        n_preferential=45,
        drilling_strength=1.5,
        regular_pattern=(3, 2),
        geometry="lobes",
        second_attribute=True,
    ),
}


def map_rows(grid, spec, names):
    features = build_features(grid, spec)
    matrix, valid = feature_matrix(features, names)
    xx, yy = np.meshgrid(grid.x.to_numpy(), grid.y.to_numpy())
    return (
        pd.DataFrame(matrix, columns=names),
        np.column_stack([xx.ravel()[valid], yy.ravel()[valid]]),
        valid,
    )


def rmse(a, b):
    return float(np.sqrt(np.mean((np.asarray(a) - np.asarray(b)) ** 2)))


def one(layout: str, seed: int, options: dict | None = None) -> dict:
    warnings.simplefilter("ignore", PredictorWarning)
    seismic, truth, wells = make_field(FieldSpec(seed=seed, **LAYOUTS[layout]))
    wells.attrs["source"] = "synthetic"
    t0 = time.perf_counter()
    try:
        trained = train(
            wells, seismic, TrainOptions(targets=["porosity", "facies"], **(options or {}))
        )
    except (
        ModelError
    ) as error:  # a facies drilled by one well only: the tool refuses it, as it should
        if "facies" not in str(error):
            raise
        trained = train(wells, seismic, TrainOptions(targets=["porosity"], **(options or {})))
    seconds = time.perf_counter() - t0
    X, xy, valid = map_rows(seismic, trained.feature_spec, trained.feature_names)
    phi = trained.targets["porosity"]
    true_phi = truth.porosity.to_numpy().ravel()[valid]
    pred = phi.calibration.clip(phi.model.predict(X, xy))
    true_rmse = rmse(pred, true_phi)
    row = {
        "layout": layout,
        "seed": seed,
        "wells": len(wells),
        "train_s": round(seconds, 1),
        "chosen": phi.chosen,
        "rmse_map": true_rmse,
    }
    rk = phi.refit("regression_kriging").predict(X, xy)
    row["rk_ratio"] = true_rmse / rmse(rk, true_phi)
    if (
        phi.chosen != "blend" and "blend" in phi.candidates
    ):  # the selection rule against always the blend
        row["rk_ratio_blend"] = rmse(phi.refit("blend").predict(X, xy), true_phi) / rmse(
            rk, true_phi
        )
    else:
        row["rk_ratio_blend"] = row["rk_ratio"]
    chosen_row = next(r for r in phi.leaderboard if r["chosen"])
    # the blend's weight on kriging members: with any, well ties are not tried on it
    members = next(r for r in phi.leaderboard if r["candidate"] == "blend")["members"]
    row["kriging_weight"] = sum(w for m, w in members.items() if "kriging" in m)
    row["cv_matched"] = chosen_row["cv"]["rmse"] / true_rmse  # as reported: declustering weights
    # the CV RMSE's own sampling noise (delta method: se(RMSE) / RMSE = se(MSE) / (2 MSE))
    row["cv_rel_se"] = chosen_row["cv_se"] / (2 * chosen_row["cv"]["rmse"] ** 2)
    # the chance that an unbiased estimate with that noise lands within +-15 % of the truth
    row["rmse_chance"] = float(2 * stats.norm.cdf(0.15 / row["cv_rel_se"]) - 1)
    row["cv_representative"] = chosen_row["cv_representative"]["rmse"] / true_rmse
    row["cv_random"] = chosen_row["cv_random"]["rmse"] / true_rmse
    map_error = phi.distances["map_error"]  # the matched CV carried over to the map's distances
    row["cv_adjusted"] = map_error["rmse"] / true_rmse
    interval = map_error["interval"]  # the card's q10-q90 of the expected map RMSE
    row["truth_in_expected_range"] = bool(interval["q10"] <= true_rmse <= interval["q90"])
    row["kv_ratio"] = map_error["kriging_variance_ratio"]
    blocks = phi.distances["designs"]["blocks"]
    design = design_folds(
        "blocks",
        *unit_heads(phi.data.xy, phi.data.units),
        phi.data.map_distances,
        phi.data.n_splits,
        phi.block_size,
    )
    oof = out_of_fold(phi.candidates[phi.chosen], phi.data, design.splits)
    row["cv_blocks"] = (
        float(np.sqrt(np.average((phi.observed - oof) ** 2, weights=phi.weights))) / true_rmse
    )
    row["w_matched"] = phi.distances["designs"]["matched"]["w"]
    row["w_blocks"], row["w_random"] = blocks["w"], phi.distances["designs"]["random"]["w"]
    spread = local_spread(phi.spread, phi.model, X, xy) if phi.calibration.scaled else None
    q10, q90 = phi.calibration.apply(pred, spread)
    row["coverage"] = float(np.mean((true_phi >= q10) & (true_phi <= q90)))
    # the calibration scales the residuals by the kriging-variance ratio; without that scaling:
    q10u, q90u = (
        phi.calibration.clip(pred + (q - pred) / np.sqrt(row["kv_ratio"])) for q in (q10, q90)
    )
    row["coverage_unscaled"] = float(np.mean((true_phi >= q10u) & (true_phi <= q90u)))
    row["coverage_held_out_wells"] = phi.calibration.held_out_coverage  # what the card reports
    row["n_effective_wells"] = phi.calibration.n_effective_wells
    row["coverage_chance"] = coverage_chance(row["n_effective_wells"])
    # alternatives, for comparison: constant widths, and quantiles without the test point's mass
    resid = phi.observed - phi.oof
    q10c, q90c = calibrate(resid, phi.weights, bounds=(0.0, 1.0)).apply(pred)
    row["coverage_constant"] = float(np.mean((true_phi >= q10c) & (true_phi <= q90c)))
    lo, hi = (weighted_quantile(resid, q, phi.weights) for q in (0.1, 0.9))
    row["coverage_no_test_mass"] = float(
        np.mean((true_phi >= np.clip(pred + lo, 0, 1)) & (true_phi <= np.clip(pred + hi, 0, 1)))
    )
    if "facies" not in trained.targets:
        row["bacc"] = row["bacc_logistic"] = np.nan
        return row
    fac = trained.targets["facies"]
    labels = np.array(FACIES)[truth.facies.to_numpy().ravel()[valid]]
    proba = fac.model.predict(X, xy)
    logistic = fac.refit("logistic").predict(X, xy)
    row["bacc"] = balanced_accuracy_score(labels, np.array(fac.classes)[proba.argmax(1)])
    row["bacc_logistic"] = balanced_accuracy_score(
        labels, np.array(fac.classes)[logistic.argmax(1)]
    )
    return row


def coverage_chance(n: float, level: float = 0.8, tolerance: float = 0.05) -> float:
    """The chance that an interval calibrated on ``n`` exchangeable residuals covers a share of
    the map within ``tolerance`` of ``level``, even when the calibration is exact on average.

    The share an interval between order statistics of n exchangeable residuals covers of new
    points is Beta-distributed (Vovk 2012; Angelopoulos & Bates 2021, "A gentle introduction to
    conformal prediction", section 3.2; recalled from memory): Beta(level (n + 1),
    (1 - level) (n + 1)) for a nominal level, standard deviation about
    sqrt(level (1 - level) / (n + 2)).  With 40 wells that is 0.06, so a field lands within
    +-0.05 of 0.80 only about 6 times in 10, however good the method.  Residuals of nearby
    wells are alike, so the effective number of wells makes this an upper bound.
    """
    a, b = level * (n + 1), (1 - level) * (n + 1)
    return float(stats.beta.cdf(level + tolerance, a, b) - stats.beta.cdf(level - tolerance, a, b))


def summary(table: pd.DataFrame, label: str) -> None:
    print(f"\n{label}: {len(table)} fields")
    for design in ("matched", "adjusted", "representative", "blocks", "random"):
        ratio = table[f"cv_{design}"]
        inside = np.mean(np.abs(ratio - 1) <= 0.15)
        print(
            f"  CV RMSE / true map RMSE, {design:<8}: mean {ratio.mean():.3f}, median"
            f" {ratio.median():.3f}, range {ratio.min():.2f}-{ratio.max():.2f}, within +-15 % on"
            f" {inside:.0%} of fields"
        )
    adjusted, noise = table.cv_adjusted, table.cv_rel_se
    near = np.mean((np.abs(adjusted - 1) <= 0.15) | (np.abs(adjusted - 1) <= 2 * noise))
    print(
        f"  the CV RMSE's own sampling noise (relative standard error over the wells): median"
        f" {noise.median():.3f}, range {noise.min():.3f}-{noise.max():.3f}; expected map RMSE"
        f" within +-15 % or two of these standard errors of the truth on {near:.0%} of fields;"
        f" an unbiased estimate with this noise lands within +-15 % on"
        f" {table.rmse_chance.mean():.0%} of fields (expected share at best); the true map RMSE"
        f" inside the card's q10-q90 of the expected map RMSE on"
        f" {table.truth_in_expected_range.sum()} of {len(table)} fields"
    )
    for label, cov in (
        ("", table.coverage),
        (" (residuals not scaled by the kriging-variance ratio)", table.coverage_unscaled),
        (" (constant widths)", table.coverage_constant),
        (" (no spread model, no test-point mass)", table.coverage_no_test_mass),
    ):
        print(
            f"  [q10, q90] coverage{label}: mean {cov.mean():.3f}, range"
            f" {cov.min():.2f}-{cov.max():.2f}, within 0.80 +- 0.05 on"
            f" {np.mean(np.abs(cov - 0.8) <= 0.05):.0%} of fields"
        )
    print(
        f"  chance of 0.80 +- 0.05 for an exact calibration on each field's effective wells"
        f" (median {table.n_effective_wells.median():.0f}): mean {table.coverage_chance.mean():.0%}"
        f" (expected share of fields within 0.80 +- 0.05 at best)"
    )
    gap = table.coverage_held_out_wells - table.coverage
    print(
        f"  held-out wells' coverage (card) - map coverage: mean {gap.mean():+.3f}, mean |.|"
        f" {gap.abs().mean():.3f}, within 0.05 on {np.mean(gap.abs() <= 0.05):.0%} of fields"
    )
    print(
        f"  porosity map RMSE / regression kriging: mean {table.rk_ratio.mean():.3f}, "
        f"worst {table.rk_ratio.max():.3f}, <= 1 on {np.mean(table.rk_ratio <= 1):.0%} of fields"
    )
    gain = table.bacc - table.bacc_logistic
    print(
        f"  facies balanced accuracy on the map: {table.bacc.mean():.3f} vs logistic "
        f"{table.bacc_logistic.mean():.3f} (gain {gain.mean():+.3f}, worst {gain.min():+.3f})"
    )
    print(f"  training time: mean {table.train_s.mean():.1f} s, max {table.train_s.max():.1f} s")


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--set", choices=["tuning", "held_out", "all"], default="all")
    parser.add_argument("--quick", action="store_true", help="one seed of the chosen set")
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--layouts", nargs="*", default=list(LAYOUTS))
    parser.add_argument("--cv", help="a fold design other than the default (for comparison)")
    parser.add_argument(
        "--folds", type=int, help="a number of folds other than the default (for comparison)"
    )
    args = parser.parse_args()
    seeds = {"tuning": TUNING, "held_out": HELD_OUT, "all": TUNING + HELD_OUT}[args.set]
    seeds = seeds[:1] if args.quick else seeds
    jobs = [(layout, seed) for seed in seeds for layout in args.layouts]
    with ProcessPoolExecutor(args.jobs) as pool:
        chosen = {"cv": args.cv, "n_splits": args.folds}
        options = [{k: v for k, v in chosen.items() if v is not None}] * len(jobs)
        rows = list(pool.map(one, *zip(*jobs, strict=True), options))
    table = pd.DataFrame(rows)
    pd.set_option("display.width", 250)
    pd.set_option("display.max_columns", 30)
    print(table.round(3).to_string(index=False))
    for label, chosen in (("tuning seeds", TUNING), ("held-out seeds", HELD_OUT)):
        part = table[table.seed.isin(chosen)]
        if len(part):
            summary(part, label)


if __name__ == "__main__":
    main()
