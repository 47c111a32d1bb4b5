"""Facies candidates on the map: which classifier maps the facies best, and can the CV tell?

    python experiments/facies_candidates.py [--set tuning|held_out] [--jobs 2]

On the fields of experiments/matched_cv.py, facies trained alone with the plain command; per
field, each candidate of the leaderboard refitted on all wells and scored on the map (Brier
score divided by the logistic regression's on the attributes), and beside them:

- the spline logistic's settings (knots, penalty C) and the linear logistic on every feature,
  fitted with scikit-learn (StandardScaler, SplineTransformer, LogisticRegression: the same
  model as predictor's, tested in tests/test_models.py);
- the blend with its stacking weights fitted under the representative (raked) weights instead
  of the declustering weights;
- the best candidate picked with hindsight from the map (what no selection rule can beat).
"""

from __future__ import annotations

import argparse
import warnings
from concurrent.futures import ProcessPoolExecutor

import numpy as np
import pandas as pd
from field_wide import brier
from matched_cv import HELD_OUT, LAYOUTS, TUNING, map_rows
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import SplineTransformer, StandardScaler

from predictor.errors import ModelError, PredictorWarning
from predictor.models import Blend, blend_weights
from predictor.synthetic import FACIES, FieldSpec, make_field
from predictor.training import TrainOptions, train

VARIANTS = {  # name: (knots, C); knots None = linear logistic on every feature
    "linear_all_features": (None, 1.0),
    "splines_3_C1": (3, 1.0),
    "splines_5_C1": (5, 1.0),
    "splines_7_C1": (7, 1.0),
    "splines_5_C0.1": (5, 0.1),
    "splines_5_C10": (5, 10.0),
}


def one(layout: str, seed: int) -> dict | None:
    warnings.simplefilter("ignore", PredictorWarning)
    seismic, truth, wells = make_field(FieldSpec(seed=seed, **LAYOUTS[layout]))
    try:
        trained = train(wells, seismic, TrainOptions(targets=["facies"]))
    except ModelError:  # a facies held by a single well: nothing to compare
        return None
    X, xy, valid = map_rows(seismic, trained.feature_spec, trained.feature_names)
    fac = trained.targets["facies"]
    labels = np.array(FACIES)[truth.facies.to_numpy().ravel()[valid]]
    score = lambda p: brier(labels, p, fac.classes)  # noqa: E731
    logistic = score(fac.refit("logistic").predict(X, xy))
    row = {"layout": layout, "seed": seed, "chosen": fac.chosen}
    for r in fac.leaderboard:
        row[r["candidate"]] = score(fac.refit(r["candidate"]).predict(X, xy)) / logistic
    data, names = fac.data, trained.feature_names
    for name, (knots, C) in VARIANTS.items():
        steps = [StandardScaler()]
        if knots:
            steps.append(SplineTransformer(n_knots=knots, degree=3, extrapolation="linear"))
        model = make_pipeline(*steps, LogisticRegression(C=C, max_iter=2000))
        model.fit(
            data.X[names].to_numpy(float), data.y, logisticregression__sample_weight=data.weights
        )
        p = np.zeros((len(X), len(fac.classes)))
        p[:, model.classes_.astype(int)] = model.predict_proba(X[names].to_numpy(float))
        row[name] = score(p) / logistic
    blend = fac.candidates["blend"]
    raked = blend_weights(blend.member_oof, data.y, fac.representative_weights)
    row["blend_raked_weights"] = (
        score(Blend(list(blend.members), raked).fit(data).predict(X, xy)) / logistic
    )
    row["hindsight_best"] = min(row[r["candidate"]] for r in fac.leaderboard)
    return row


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--set", choices=["tuning", "held_out"], default="tuning")
    parser.add_argument("--jobs", type=int, default=2)
    args = parser.parse_args()
    seeds = TUNING if args.set == "tuning" else HELD_OUT
    jobs = [(layout, seed) for seed in seeds for layout in LAYOUTS]
    with ProcessPoolExecutor(args.jobs) as pool:
        rows = [r for r in pool.map(one, *zip(*jobs, strict=True)) if r is not None]
    table = pd.DataFrame(rows)
    pd.set_option("display.width", 250)
    pd.set_option("display.max_columns", 30)
    print(table.round(3).to_string(index=False))
    scores = table.drop(columns=["layout", "seed", "chosen"])
    print(f"\n{args.set} seeds, {len(table)} fields: map Brier score / logistic's")
    for name, column in scores.items():
        print(f"  {name:<28} mean {column.mean():.3f}, worst {column.max():.3f}")


if __name__ == "__main__":
    main()
