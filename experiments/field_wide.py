"""Field-wide numbers against the truth: mean porosity, sand share, facies maps, exceedance.

    python experiments/field_wide.py [--set tuning|held_out|all] [--jobs 2]

On the fields of experiments/matched_cv.py (dense and sparse, regular, random and strongly
preferential drilling, one and two attributes), trained with the plain command
(``--target porosity --target facies``), per field:

- the error of each field-wide estimate (naive, cell- and nearest-node-declustered, debiased
  with the seismic, the model map's mean) divided by the raw wells' error, for mean porosity
  and the sand share;
- the facies map's sand share under each decision rule, against the truth, with and without
  the prior shift of the probabilities; balanced accuracy of each rule; the map's Brier score
  against a logistic regression on the attributes fitted to the same wells;
- how far the wells' own noise allows those goals: the chance that an unbiased estimate with the
  debiased estimate's bootstrap standard error lands within the tolerance, per field and on
  every field;
- the reliability of P(porosity > cutoff) at three cutoffs (the truth's 30th, 50th and 70th
  percentiles): observed frequency against predicted probability in ten bins, and its Brier
  score; the default (each facies' residuals mixed by the node's facies probabilities) beside
  the residuals of the wells predicted near the node's value (the default when no facies is
  trained), one pooled residual distribution and constant widths.

The tuning seeds (1, 2) were used while developing; the held-out seeds (11, 12) never were.
"""

from __future__ import annotations

import argparse
import dataclasses
import warnings
from concurrent.futures import ProcessPoolExecutor

import numpy as np
import pandas as pd
from matched_cv import HELD_OUT, LAYOUTS, TUNING, map_rows
from scipy.special import erf
from scipy.stats import norm
from sklearn.metrics import balanced_accuracy_score

from predictor.errors import ModelError, PredictorWarning
from predictor.field_wide import MAP_RULES, prior_shift_factors, rule_factors, shift
from predictor.intervals import calibrate
from predictor.predict import local_spread
from predictor.synthetic import FACIES, FieldSpec, make_field
from predictor.training import TrainOptions, train

BINS = np.linspace(0, 1, 11)
BIASED_PHI, BIASED_SAND = (
    0.02,
    0.05,
)  # raw-well errors above which drilling counts as biased (ratios shown)


def brier(labels, proba, classes) -> float:
    onehot = (np.asarray(labels)[:, None] == np.asarray(classes)[None, :]).astype(float)
    return float(np.mean(np.sum((proba - onehot) ** 2, axis=1)))


def one(layout: str, seed: int) -> tuple[dict, pd.DataFrame]:
    warnings.simplefilter("ignore", PredictorWarning)
    seismic, truth, wells = make_field(FieldSpec(seed=seed, **LAYOUTS[layout]))
    try:
        trained = train(wells, seismic, TrainOptions(targets=["porosity", "facies"]))
    except ModelError:
        trained = train(wells, seismic, TrainOptions(targets=["porosity"]))
    X, xy, valid = map_rows(seismic, trained.feature_spec, trained.feature_names)
    phi = trained.targets["porosity"]
    true_phi = truth.porosity.to_numpy().ravel()[valid]
    row = {"layout": layout, "seed": seed, "wells": len(wells)}
    est = phi.field_wide.estimates
    raw_error = abs(est["naive"]["mean"] - true_phi.mean())
    row["phi_raw_error"] = raw_error
    for method, value in est.items():
        row[f"phi_{method}"] = abs(value["mean"] - true_phi.mean()) / raw_error
    iv = phi.field_wide.interval
    row["phi_in_interval"] = iv["q10"] <= true_phi.mean() <= iv["q90"]
    row["phi_debiased_se"] = bootstrap_se(iv)
    # exceedance reliability, pooled over cutoffs
    pred = phi.calibration.clip(phi.model.predict(X, xy))
    spread = local_spread(phi.spread, phi.model, X, xy) if phi.calibration.scaled else None
    rel = []
    fac = trained.targets.get("facies")
    # the default mixes each facies' residuals by the facies probabilities at the node
    mixed = None if fac is None else dict(zip(fac.classes, fac.model.predict(X, xy).T, strict=True))
    pooled = dataclasses.replace(
        phi.calibration, local_quantiles=None
    )  # one residual distribution for all nodes
    constant = calibrate(phi.observed - phi.oof, phi.weights, bounds=(0.0, 1.0))
    for level in (0.3, 0.5, 0.7):
        cutoff = float(np.quantile(true_phi, level))
        rel.append(
            pd.DataFrame(
                {
                    "p": phi.calibration.exceedance(pred, cutoff, spread, mixed),
                    "p_local": phi.calibration.exceedance(pred, cutoff, spread),
                    "p_pooled": pooled.exceedance(pred, cutoff, spread),
                    "p_constant": constant.exceedance(pred, cutoff),
                    "hit": true_phi > cutoff,
                    "level": level,
                }
            )
        )
    row["map_bias"] = float(np.mean(pred - true_phi))
    row["oof_residual_mean"] = float(np.average(phi.observed - phi.oof, weights=phi.weights))
    rel = pd.concat(rel).assign(layout=layout, seed=seed)
    if fac is None:
        return row, rel
    classes = fac.classes
    labels = np.array(FACIES)[truth.facies.to_numpy().ravel()[valid]]
    true_share = {c: float(np.mean(labels == c)) for c in classes}
    sand = classes.index("sand")
    est = fac.field_wide.estimates
    raw_error = abs(est["naive"]["proportions"]["sand"] - true_share["sand"])
    row["sand_raw_error"] = raw_error
    row["sand_debiased_se"] = bootstrap_se(fac.field_wide.interval["sand"])
    for method, value in est.items():
        row[f"sand_{method}"] = abs(value["proportions"]["sand"] - true_share["sand"]) / raw_error
    proba = fac.model.predict(X, xy)
    logistic = fac.refit("logistic").predict(X, xy)
    target = np.array([est[fac.field_wide.recommended]["proportions"][c] for c in classes])
    shifted = shift(proba, prior_shift_factors(proba, target))
    row["brier_ratio"] = brier(labels, proba, classes) / brier(labels, logistic, classes)
    row["brier_ratio_shifted"] = brier(labels, shifted, classes) / brier(labels, logistic, classes)
    row["bacc_logistic"] = balanced_accuracy_score(labels, np.array(classes)[logistic.argmax(1)])
    row["facies_chosen"] = fac.chosen
    tied = next((r for r in fac.leaderboard if r["candidate"].endswith("+well_ties")), None)
    if tied is not None:  # the well-tied candidate, chosen or not: how it maps, how it scored
        untied = next(
            r
            for r in fac.leaderboard
            if r["candidate"] == tied["candidate"].removesuffix("+well_ties")
        )
        row["ties_cv_gain"] = untied["cv"]["log_loss"] - tied["cv"]["log_loss"]
        row["ties_cv_se"] = tied["cv_se"]
        p_tied = fac.refit(tied["candidate"]).predict(X, xy)
        row["brier_ratio_tied"] = brier(labels, p_tied, classes) / brier(labels, logistic, classes)
        row["brier_ratio_untied"] = brier(
            labels, fac.refit(untied["candidate"]).predict(X, xy), classes
        ) / brier(labels, logistic, classes)
    for name, p in (("", proba), ("shifted_", shifted)):
        factors = {rule: rule_factors(rule, p, target) for rule in MAP_RULES}
        # the last release's balanced rule: relative to the debiased shares
        factors["balanced_debiased"] = 1.0 / np.maximum(target, 1e-6)
        for rule, f in factors.items():
            drawn = np.argmax(p * f, axis=1)
            row[f"{name}{rule}_sand_error"] = float(np.mean(drawn == sand)) - true_share["sand"]
            row[f"{name}{rule}_bacc_gain"] = (
                balanced_accuracy_score(labels, np.array(classes)[drawn]) - row["bacc_logistic"]
            )
    return row, rel


def bootstrap_se(interval: dict) -> float:
    """Standard error of an estimate from its bootstrap q10-q90 (as if normal: q90 - q10 is
    2 x 1.2816 standard deviations)."""
    return (interval["q90"] - interval["q10"]) / (2.0 * norm.ppf(0.9))


def chance_within(tolerance, se) -> np.ndarray:
    """Chance that an unbiased, normally distributed estimate with standard error ``se`` lands
    within +-``tolerance`` of the truth: what the wells' own sampling noise allows."""
    return erf(np.asarray(tolerance) / (np.asarray(se) * np.sqrt(2.0)))


def probability_bin(p) -> np.ndarray:
    """The reliability diagram's bin (0-9) of each predicted probability."""
    return np.clip(np.digitize(p, BINS) - 1, 0, len(BINS) - 2)


def reliability(rel: pd.DataFrame, column: str = "p") -> pd.DataFrame:
    rel = rel.assign(bin=probability_bin(rel[column]))
    out = rel.groupby("bin").agg(
        predicted=(column, "mean"), observed=("hit", "mean"), nodes=(column, "size")
    )
    out["centre"] = (BINS[:-1] + BINS[1:])[out.index] / 2
    return out


def reliability_noise(rel: pd.DataFrame, column: str = "p", resamples: int = 400) -> tuple:
    """How much of the reliability diagram is field-to-field noise: the fields are resampled
    with replacement (nodes of one field share its wells, so the field is the unit) and the
    diagram redrawn.  Returns the median over bins of the standard error of a bin's observed
    frequency, and the q10-q90 over resamples of the worst |observed - bin centre|."""
    rel = rel.assign(
        bin=probability_bin(rel[column]),
        field=rel.layout + rel.seed.astype(str),
    )
    sums = rel.groupby(["field", "bin"]).hit.agg(["sum", "size"]).unstack(fill_value=0)
    hits, nodes = sums["sum"].to_numpy(float), sums["size"].to_numpy(float)
    centre = (BINS[:-1] + BINS[1:])[sums["sum"].columns.to_numpy()] / 2
    draws = np.random.default_rng(0).integers(0, len(hits), (resamples, len(hits)))
    observed = hits[draws].sum(axis=1) / np.maximum(nodes[draws].sum(axis=1), 1)
    worst = np.abs(observed - centre).max(axis=1)
    return float(np.median(observed.std(axis=0))), np.quantile(worst, [0.1, 0.9])


def summary(table: pd.DataFrame, rel: pd.DataFrame, label: str) -> None:
    print(f"\n{label}: {len(table)} fields")
    for what, floor in (("phi", BIASED_PHI), ("sand", BIASED_SAND)):
        biased = table[table[f"{what}_raw_error"] > floor]
        print(
            f"  {what}: {len(biased)} fields where the raw wells' error exceeds {floor} (ratios);"
            " all fields (absolute errors)"
        )
        for method in (
            "declustered_cell",
            "declustered_nearest_node",
            "debiased_seismic",
            "model_map",
        ):
            r = biased[f"{what}_{method}"].dropna()
            a = (table[f"{what}_{method}"] * table[f"{what}_raw_error"]).dropna()
            print(
                f"    {method:<25}: error / raw-well error mean {r.mean():.3f}, worst"
                f" {r.max():.3f}, <= 0.20 on {np.mean(r <= 0.2):.0%}; absolute error mean"
                f" {a.mean():.4f}, worst {a.max():.4f}"
            )
    for what, floor in (("phi", BIASED_PHI), ("sand", BIASED_SAND)):
        biased = table[table[f"{what}_raw_error"] > floor].dropna(subset=[f"{what}_debiased_se"])
        chance = chance_within(0.2 * biased[f"{what}_raw_error"], biased[f"{what}_debiased_se"])
        z = biased[f"{what}_debiased_seismic"] * biased[f"{what}_raw_error"]
        z = z / biased[f"{what}_debiased_se"]
        print(
            f"  {what} debiased, the best an unbiased estimate with its bootstrap spread can"
            " expect: chance of error / raw <= 0.20, mean over the biased fields"
            f" {chance.mean():.0%}, on every one of them {chance.prod():.0%};"
            f" error / bootstrap standard error: median {z.median():.2f}, worst {z.max():.2f}"
        )
    sand_se = table.sand_debiased_se.dropna()
    print(
        "  the wells' own uncertainty about the sand share (debiased estimate's bootstrap standard"
        f" error): median {sand_se.median():.3f}, worst {sand_se.max():.3f}; chance of an unbiased"
        f" estimate that noisy landing within 0.04: mean {chance_within(0.04, sand_se).mean():.0%},"
        f" on every field {chance_within(0.04, sand_se).prod():.0%}"
    )
    print(
        f"  true mean porosity inside the bootstrap [q10, q90]: {table.phi_in_interval.mean():.0%}"
    )
    for name in ("", "shifted_"):
        for rule in (*MAP_RULES, "balanced_debiased"):
            e = table[f"{name}{rule}_sand_error"].dropna()
            g = table[f"{name}{rule}_bacc_gain"].dropna()
            print(
                f"  facies map {name}{rule:<14}: sand share error mean {e.abs().mean():.3f}, worst"
                f" {e.abs().max():.3f} (within 0.04 on {np.mean(e.abs() <= 0.04):.0%}); balanced"
                f" accuracy - logistic: mean {g.mean():+.3f}, worst {g.min():+.3f}"
            )
    for col in ("brier_ratio", "brier_ratio_shifted"):
        b = table[col].dropna()
        print(
            f"  map Brier / logistic ({col}): mean {b.mean():.3f}, worst {b.max():.3f}, <= 0.90 on "
            f"{np.mean(b <= 0.9):.0%}"
        )
    print(
        f"  porosity map bias (mean prediction - truth): mean {table.map_bias.mean():+.4f};"
        f" weighted mean out-of-fold residual {table.oof_residual_mean.mean():+.4f}"
    )
    for column in ("p", "p_local", "p_pooled", "p_constant"):
        r = reliability(rel, column)
        dev = (r.observed - r.centre).abs()
        scores = rel[column] - rel.hit
        print(
            f"  P(porosity > cutoff) reliability ({column}): Brier {np.mean(scores**2):.4f}, "
            f"worst |observed - bin centre| {dev.max():.3f}, "
            f"worst |observed - mean predicted| {(r.observed - r.predicted).abs().max():.3f}"
        )
        print("    " + r.round(3).to_string().replace("\n", "\n    "))
    se, (low, high) = reliability_noise(rel)
    print(
        f"  field-to-field noise of the default (p), resampling the {len(table)} fields: standard"
        f" error of a bin's observed frequency, median {se:.3f}; worst |observed - bin centre|"
        f" q10-q90 {low:.3f}-{high:.3f}"
    )


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--set", choices=["tuning", "held_out", "all"], default="all")
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--layouts", nargs="*", default=list(LAYOUTS))
    args = parser.parse_args()
    seeds = {"tuning": TUNING, "held_out": HELD_OUT, "all": TUNING + HELD_OUT}[args.set]
    jobs = [(layout, seed) for seed in seeds for layout in args.layouts]
    with ProcessPoolExecutor(args.jobs) as pool:
        results = list(pool.map(one, *zip(*jobs, strict=True)))
    table = pd.DataFrame([r for r, _ in results])
    rel = pd.concat([r for _, r in results])
    pd.set_option("display.width", 250)
    pd.set_option("display.max_columns", 40)
    print(table.round(3).to_string(index=False))
    for label, chosen in (("tuning seeds", TUNING), ("held-out seeds", HELD_OUT)):
        if table.seed.isin(chosen).any():
            summary(table[table.seed.isin(chosen)], rel[rel.seed.isin(chosen)], label)


if __name__ == "__main__":
    main()
