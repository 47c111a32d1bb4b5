"""Training: features at the wells, declustering, spatial CV of every candidate against the
baselines on the same folds, selection, well ties, interval calibration and the final fit.

:func:`train` returns a :class:`TrainedModels`; :mod:`predictor.bundle` writes it to disk.
"""

from __future__ import annotations

import warnings
from dataclasses import asdict, dataclass, field
from typing import Literal

import numpy as np
import pandas as pd
import xarray as xr
from sklearn.model_selection import KFold

from .checks import decluster, decluster_samples
from .declustering import declustered_statistics
from .errors import InputError, ModelError, PredictorWarning
from .explain import (
    KRIGING,
    Applicability,
    contributions,
    fit_applicability,
    importance,
    trust_warnings,
)
from .features import (
    FeatureSpec,
    build_features,
    features_at_samples,
    features_at_wells,
    location_features,
)
from .intervals import IntervalCalibration, SpreadModel, calibrate, effective_size
from .models import (
    Blend,
    FaciesMixture,
    FitData,
    Kriging,
    LightGBM,
    Linear,
    Logistic,
    RegressionKriging,
    WellTies,
    blend_weights,
    combine,
    type_copy,
)
from .progress import progress
from .qc import grid_findings, physical_findings
from .spatial_cv import (
    BlockKFold,
    BufferedLeaveOneOut,
    block_labels,
    classification_scores,
    regression_scores,
)
from .variogram import auto_variogram
from .volume import is_volume, wells_z_domain

Task = Literal["regression", "classification"]
BASELINES = ("linear", "logistic", "ordinary_kriging", "regression_kriging")
MAP_ONLY = ("ordinary_kriging", "regression_kriging")  # kriging of a 2-D map; not offered for volumes
LOG_TARGETS = ("permeability",)


@dataclass
class TrainOptions:
    """Everything that decides a training run (recorded in the model card)."""

    targets: list[str]
    features: FeatureSpec | None = None
    n_splits: int = 5
    block_size: float | None = None
    block_angle: float = 0.0
    cv: Literal["blocks", "buffered"] = "blocks"
    declustering: Literal["cell", "nearest_node", "none"] = "cell"
    monotone: bool = False
    well_ties: Literal["auto", "always", "never"] = "auto"
    interval_spread: Literal["none", "features", "kriging"] = "features"
    sample_method: Literal["bilinear", "nearest"] = "bilinear"
    drop_outside: bool = False
    seed: int = 0
    n_threads: int = 1
    candidates: list[str] | None = None  # restrict the leaderboard to these names (baselines included)

    def to_dict(self) -> dict:
        out = asdict(self)
        out["features"] = self.features.to_dict() if self.features else None
        return out


@dataclass
class TargetModel:
    """The chosen model for one target and everything learned about it."""

    name: str
    task: Task
    transform: str | None
    classes: list[str]
    model: object
    calibration: IntervalCalibration | None
    block_size: float
    block_size_source: str
    leaderboard: list[dict]
    chosen: str
    oof: np.ndarray
    observed: np.ndarray
    weights: np.ndarray
    variogram: dict | None = None
    data: FitData | None = None
    candidates: dict = field(default_factory=dict)
    spread: SpreadModel | str | None = None
    importance: pd.Series | None = None
    applicability: Applicability | None = None
    applicability_cv: dict = field(default_factory=dict)
    trust: dict = field(default_factory=dict)
    units: np.ndarray | None = None  # the well of each training row (volumes: several samples per well)

    def refit(self, candidate: str):
        """Fit the named leaderboard candidate (a baseline, say) on all wells, for comparison maps."""
        if candidate not in self.candidates:
            raise ModelError(f"no candidate {candidate!r} for {self.name}; the leaderboard has "
                             f"{', '.join(self.candidates)}")
        return type_copy(self.candidates[candidate]).fit(self.data)


@dataclass
class TrainedModels:
    options: TrainOptions
    feature_spec: FeatureSpec
    feature_names: list[str]
    training_ranges: dict
    wells: pd.DataFrame
    weights: np.ndarray
    declustering: dict
    statistics: dict
    targets: dict[str, TargetModel]
    warnings: list[str] = field(default_factory=list)
    well_features: pd.DataFrame | None = None  # features at the kept wells, same row order as ``wells``
    space: dict = field(default_factory=lambda: {"kind": "map"})  # map, or volume with its z domain and range


def task_of(wells: pd.DataFrame, target: str) -> Task:
    if target == "facies" or not pd.api.types.is_numeric_dtype(wells[target]):
        return "classification"
    return "regression"


def _check_inputs(wells: pd.DataFrame, grid: xr.Dataset, options: TrainOptions) -> None:
    source = wells.attrs.get("source", "wells")
    if not options.targets:
        raise InputError("no target given; name at least one well column with --target (e.g. porosity)")
    for target in options.targets:
        if target not in wells:
            raise InputError(f"{source}: no column {target!r} to train on; columns are {', '.join(wells.columns)}")
        values = wells[target]
        if values.isna().all() or (values.astype("string").str.strip() == "").all():
            raise InputError(f"{source}: target column {target!r} is empty (all missing); fill it or drop the target")
    errors = [f for f in physical_findings(wells, source) + grid_findings(grid) if f.severity == "error"]
    if errors:
        raise InputError(errors[0].message + ("" if len(errors) == 1 else f" (and {len(errors) - 1} more problems; "
                                              "run `predictor qc` for the full list)"))


def _chosen(cell, nearest: np.ndarray, method: str) -> tuple[np.ndarray, dict]:
    """Model/score weights by ``method`` and the summary the card records."""
    model = {"cell": cell.weights, "nearest_node": nearest, "none": np.ones(len(nearest))}[method]
    return model, {"model_weights": method, "statistics_weights": "nearest_node", "cell": cell.summary()}


def _weights(wells: pd.DataFrame, grid: xr.Dataset, method: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict]:
    """Model/score weights (by ``method``), nearest-node and cell weights for statistics, and a summary."""
    cell, nearest = decluster(wells, grid)
    model, summary = _chosen(cell, nearest, method)
    return model, nearest, cell.weights, summary


def _volume_weights(wells: pd.DataFrame, volume: xr.Dataset, method: str):
    """Per-sample weights from the lateral declustering of the wells (their mean positions):
    each sample carries its well's weight, so a well counts by the thickness it samples."""
    cell, nearest, codes = decluster_samples(wells, volume)
    model, summary = _chosen(cell, nearest, method)
    summary["per_sample"] = "each sample carries the lateral declustering weight of its well"
    head_xy = wells[["x", "y"]].groupby(codes).transform("mean").to_numpy(float)
    return model[codes], nearest[codes], cell.weights[codes], summary, codes, head_xy


def _block_size(data: FitData, options: TrainOptions, attrs: list[str], baseline_y: np.ndarray,
                cv_xy: np.ndarray, units: np.ndarray) -> tuple[float, str, dict | None]:
    """The fitted variogram range of the linear baseline's residuals, shrunk if too few blocks result.

    ``cv_xy`` are the positions the blocks are cut by and ``units`` the well of each row; with
    several samples per well (volumes) the residuals are averaged per well first.
    """
    if options.block_size:
        size, source, vario = float(options.block_size), "given by the user", None
    else:
        linear = Linear(attrs).fit(FitData(data.X, baseline_y, data.weights, data.xy, data.groups))
        resid = pd.Series(baseline_y - linear.predict(data.X)).groupby(units).mean().to_numpy()
        heads = pd.DataFrame(cv_xy).groupby(units).mean().to_numpy()
        model = auto_variogram(heads[:, 0], heads[:, 1], resid)
        size, vario = model.range, model.to_dict()
        source = f"fitted {model.kind} variogram range of the linear baseline's residuals"
    extent = max(np.ptp(cv_xy[:, 0]), np.ptp(cv_xy[:, 1]))
    shrunk = False
    while np.unique(block_labels(cv_xy[:, 0], cv_xy[:, 1], size, options.block_angle)).size < 2 * options.n_splits:
        size *= 0.8
        shrunk = True
        if size < extent / 100:
            raise ModelError("the wells cannot be split into enough spatial blocks; add wells or use fewer folds")
    if shrunk:
        source += f"; reduced to {size:.0f} m so that at least {2 * options.n_splits} blocks hold wells"
    return float(size), source, vario


def cross_validate(candidate, data: FitData, splitter) -> np.ndarray:
    """Out-of-fold predictions of ``candidate`` for the folds of ``splitter``."""
    n = len(data.y)
    oof = np.zeros(n) if candidate.task == "regression" else np.zeros((n, len(data.classes)))
    for train, test in splitter.split(data.xy):
        model = type_copy(candidate).fit(data.subset(train))
        oof[test] = model.predict(data.X.iloc[test].reset_index(drop=True), data.xy[test])
    return oof


def _candidates(task: Task, target: str, attrs: list[str], names: list[str], wells: pd.DataFrame,
                options: TrainOptions, volume: bool = False) -> list:
    if volume:
        return [c for c in _candidates(task, target, attrs, names, wells, options) if c.name not in MAP_ONLY]
    if task == "classification":
        out = [Logistic(attrs), LightGBM("classification", names)]
        if names != attrs:
            out += [Logistic(names, "logistic_all_features"),
                    LightGBM("classification", attrs, "lightgbm_attributes_only")]
        return out
    out = [Linear(attrs), Kriging(), RegressionKriging(attrs), LightGBM("regression", names)]
    if names != attrs:
        out.append(LightGBM("regression", attrs, "lightgbm_attributes_only"))
    if options.monotone:
        # porosity (and permeability) non-increasing in impedance; contrasts and gradients are free
        mono = {n: -1 for n in names if "imped" in n.lower() and "contrast" not in n and "gradient" not in n}
        out.append(LightGBM("regression", names, "lightgbm_monotone", monotone=mono))
    if "facies" in wells and target != "facies" and wells["facies"].dropna().astype(str).nunique() >= 2:
        out.append(FaciesMixture(names))
    return out


def _score(task: Task, y, oof, w, classes) -> dict:
    return regression_scores(y, oof, w) if task == "regression" else classification_scores(
        np.asarray(classes)[y], oof, classes, w)


def train(wells: pd.DataFrame, grid: xr.Dataset, options: TrainOptions) -> TrainedModels:
    """Train, cross-validate and select a model per target.

    ``grid`` is a map (y, x) with one row of ``wells`` per well, or a volume (z, inline,
    crossline) with one row per well sample (a ``z`` column; ``well_id`` ties the samples of a
    well together).  With a volume, CV folds hold out whole wells (never single samples of a
    well: samples along one well are strongly alike) and the kriging candidates are not offered.
    """
    _check_inputs(wells, grid, options)
    notes: list[str] = []
    volume = is_volume(grid)
    spec = options.features or FeatureSpec(attributes=[str(v) for v in grid.data_vars])
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", PredictorWarning)
        if volume:
            if "z" not in wells:
                raise InputError(f"{wells.attrs.get('source', 'wells')}: a volume needs wells as samples with z "
                                 "(depth or two-way time): add a z, depth or twt column, one row per sample")
            X_all, kept = features_at_samples(grid, spec, wells, options.drop_outside, wells_z_domain(wells))
        else:
            features = build_features(grid, spec)
            X_all, kept = features_at_wells(features, wells, options.sample_method, options.drop_outside)
    notes += [str(w.message) for w in caught]
    names = [str(c) for c in X_all.columns]
    wells = wells.loc[kept].reset_index(drop=True)
    xy = wells[["x", "y"]].to_numpy(float)
    if volume:
        weights, stat_weights, cell_weights, decl, units_all, cv_xy_all = _volume_weights(wells, grid,
                                                                                          options.declustering)
        if options.well_ties == "always":
            notes.append("well ties krige a map's residuals; they are not offered for volumes")
    else:
        weights, stat_weights, cell_weights, decl = _weights(wells, grid, options.declustering)
        units_all, cv_xy_all = np.arange(len(wells)), xy
    ranges = {n: [float(np.nanmin(X_all[n])), float(np.nanmax(X_all[n]))] for n in names}

    facies_classes: list[str] = []
    facies_codes = None
    if "facies" in wells:
        labels = wells["facies"].astype("string")
        facies_classes = sorted(labels.dropna().unique().tolist())
        facies_codes = np.array([facies_classes.index(v) if v in facies_classes else -1
                                 for v in labels.fillna("\x00")])

    numeric_targets = [t for t in options.targets if task_of(wells, t) == "regression"]
    # statistics use nearest-node weights: the closer map-wide estimate in
    # experiments/declustering_accuracy.py; the cell-weighted ones are kept beside them
    categorical = [t for t in options.targets if t not in numeric_targets]
    stats = declustered_statistics(wells, stat_weights, numeric_targets, categorical)
    stats["declustered_cell"] = declustered_statistics(wells, cell_weights, numeric_targets,
                                                       categorical)["declustered"]
    results = {}
    for target in options.targets:
        task = task_of(wells, target)
        raw = wells[target]
        has = raw.notna().to_numpy() & (raw.astype("string").str.strip() != "").fillna(False).to_numpy()
        idx = np.flatnonzero(has)
        need = 3 * options.n_splits
        units, cv_xy = units_all[idx], cv_xy_all[idx]
        n_wells = np.unique(units).size
        if n_wells < need:
            raise ModelError(
                f"block CV with {options.n_splits} folds needs at least {need} wells with {target!r}; got {n_wells}; "
                "use fewer folds (--folds) or add wells"
            )
        classes: list[str] = []
        transform = None
        if task == "classification":
            labels = raw.astype("string").to_numpy()[idx].astype(str)
            classes = sorted(set(labels))
            counts = pd.DataFrame({"c": labels, "u": units}).groupby("c")["u"].nunique()
            if len(classes) < 2:
                raise ModelError(f"target {target!r} has a single class ({classes[0]}); a classifier needs two or more")
            rare = counts[counts < 2]
            if len(rare):
                raise ModelError(
                    f"class(es) {', '.join(rare.index)} of {target!r} have a single well; merge them into a "
                    "neighbouring class or drop those wells"
                )
            few = counts[counts < options.n_splits]
            if len(few):
                notes.append(f"class(es) {', '.join(f'{k} ({v} wells)' for k, v in few.items())} of {target!r} "
                             f"have fewer wells than the {options.n_splits} folds; their scores are unreliable")
            y = np.array([classes.index(v) for v in labels])
            baseline_y = (y == np.argmax(np.bincount(y))).astype(float)
        else:
            y = raw.to_numpy(float)[idx]
            if target in LOG_TARGETS:
                y, transform = np.log10(y), "log10"
            baseline_y = y
        data = FitData(X_all.iloc[idx].reset_index(drop=True), y, weights[idx], xy[idx],
                       np.zeros(idx.size, int), classes,
                       None if facies_codes is None else facies_codes[idx], facies_classes,
                       options.seed, options.n_threads)
        attrs = list(spec.attributes)
        block, block_source, vario = _block_size(data, options, attrs, baseline_y, cv_xy, units)
        data.groups = block_labels(cv_xy[:, 0], cv_xy[:, 1], block, options.block_angle)
        if options.cv == "buffered":
            splitter = BufferedLeaveOneOut(block, coordinates=cv_xy, groups=units if volume else None)
        else:
            splitter = BlockKFold(block, options.n_splits, options.block_angle, coordinates=cv_xy)
        random_cv = _RandomSplits(options.n_splits, options.seed)
        board = []
        oofs = {}
        candidates = _candidates(task, target, attrs, names, wells, options, volume)
        if options.candidates:
            known = [c.name for c in candidates]
            candidates = [c for c in candidates if c.name in options.candidates]
            if not candidates:
                raise InputError(f"none of the candidates {', '.join(options.candidates)} applies to {target!r}; "
                                 f"choose from {', '.join(known)}")
        random_oofs = {}
        for cand in progress(candidates, f"{target}: cross-validating candidates"):
            oof = cross_validate(cand, data, splitter)
            oofs[cand.name] = (cand, oof)
            random_oofs[cand.name] = cross_validate(cand, data, random_cv)
            board.append({"candidate": cand.name, "baseline": cand.name in BASELINES,
                          "features": list(cand.features), "cv": _score(task, y, oof, data.weights, classes),
                          "cv_random": _score(task, y, random_oofs[cand.name], data.weights, classes)})
        if len(candidates) >= 2:
            blend, oof = _blend(candidates, {k: v[1] for k, v in oofs.items()}, data, splitter)
            _, random_oof = _blend(candidates, random_oofs, data, random_cv)
            oofs[blend.name] = (blend, oof)
            board.append({"candidate": blend.name, "baseline": False, "features": list(blend.features),
                          "cv": _score(task, y, oof, data.weights, classes),
                          "cv_random": _score(task, y, random_oof, data.weights, classes),
                          "members": {m.name: float(w) for m, w in zip(blend.members, blend.weights, strict=True)}})
        key = "rmse" if task == "regression" else "log_loss"
        best = min(board, key=lambda r: r["cv"][key])
        if "blend" in oofs and best["candidate"] != "blend":
            # the blend averages the candidates and is the stable default; a single one must clearly beat it
            if not _clearly_better(_losses(y, oofs[best["candidate"]][1]), _losses(y, oofs["blend"][1]),
                                   data.weights, units):
                best = next(r for r in board if r["candidate"] == "blend")
        chosen = best["candidate"]
        if task == "regression" and options.well_ties != "never" and not volume and not isinstance(
                oofs[chosen][0], Kriging | RegressionKriging):
            tied = WellTies(type_copy(oofs[chosen][0]))
            oof = cross_validate(tied, data, splitter)
            oofs[tied.name] = (tied, oof)
            row = {"candidate": tied.name, "baseline": False, "features": list(tied.features),
                   "cv": _score(task, y, oof, data.weights, classes),
                   "cv_random": _score(task, y, cross_validate(tied, data, random_cv), data.weights, classes)}
            board.append(row)
            if options.well_ties == "always" or _clearly_better(_losses(y, oof), _losses(y, oofs[chosen][1]),
                                                                data.weights, units):
                chosen = tied.name
        model, oof = oofs[chosen]
        calibration, spread_model = None, None
        if task == "regression":
            oof_spread = None
            if options.interval_spread == "kriging" and isinstance(model, WellTies):
                oof_spread, spread_model = _oof_spread(model, data, splitter), "kriging"
            elif options.interval_spread in ("features", "kriging"):
                if options.interval_spread == "kriging":
                    notes.append(f"{target}: kriging spread needs a well-tied model; intervals use the feature spread")
                oof_spread, spread_model = _feature_spread(attrs, data, y - oof, splitter)
            calibration = calibrate(y - oof, data.weights, spread=oof_spread)
        final = type_copy(model).fit(data)
        for row in board:
            row["chosen"] = row["candidate"] == chosen
        chosen_row = next(r for r in board if r["chosen"])
        folds = np.zeros(len(y), int)
        for k, (_, test) in enumerate(splitter.split(data.xy)):
            folds[test] = k
        values, _ = contributions(final, data.X, data.xy, names, background=data.X, seed=options.seed)
        imp = importance(values, data.weights, names)
        aoa, di = fit_applicability(data.X[names], imp.drop(KRIGING), folds)
        aoa_cv = _inside_outside(task, y, oof, data.weights, classes, di <= aoa.threshold)
        warned, facts = trust_warnings(target, task, imp, data.X[names], values[..., :-1] if values.ndim == 2 else
                                       values, chosen_row["cv"], chosen_row["cv_random"], len(classes),
                                       pd.Series(units).groupby(folds).nunique().tolist())
        notes += warned
        facts["warnings"] = warned
        results[target] = TargetModel(name=target, task=task, transform=transform, classes=classes, model=final,
                                      calibration=calibration, block_size=block, block_size_source=block_source,
                                      leaderboard=board, chosen=chosen, oof=oof, observed=y, weights=data.weights,
                                      variogram=vario, data=data, candidates={k: v[0] for k, v in oofs.items()},
                                      spread=spread_model, importance=imp, applicability=aoa,
                                      applicability_cv=aoa_cv, trust=facts, units=units)
    loc = location_features(names)
    if loc:
        notes.append(f"location features {', '.join(loc)} are in use: they let a model memorise where the wells are; "
                     "compare with the attributes-only candidate in the leaderboard")
    space = {"kind": "map"}
    if volume:
        space = {"kind": "volume", "z_domain": grid.attrs.get("z_domain", "unknown"),
                 "wells_z_domain": wells_z_domain(wells), "z_range": [float(wells["z"].min()), float(wells["z"].max())],
                 "samples": int(len(wells)), "wells": int(wells["well_id"].nunique())}
    return TrainedModels(options, spec, names, ranges, wells, weights, decl, stats, results, notes, X_all, space)


def _inside_outside(task, y, oof, weights, classes, inside) -> dict:
    """Blocked-CV scores of the wells inside and outside the area of applicability."""
    out = {"threshold_rule": "upper whisker of the training wells' CV dissimilarity index",
           "wells_inside": int(inside.sum()), "wells_outside": int((~inside).sum())}
    for label, sel in (("inside", inside), ("outside", ~inside)):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # a subset may lack a class; scikit-learn says so on every call
            out[f"cv_{label}"] = _score(task, y[sel], oof[sel], weights[sel], classes) if sel.sum() >= 3 else None
    return out


def _losses(y: np.ndarray, oof: np.ndarray) -> np.ndarray:
    """Per-well loss: squared error (values) or log-loss (class probabilities, y as codes)."""
    if oof.ndim == 1:
        return (y - oof) ** 2
    return -np.log(np.clip(oof[np.arange(len(y)), y.astype(int)], 1e-15, None))


def _clearly_better(challenger: np.ndarray, incumbent: np.ndarray, weights, units=None) -> bool:
    """True when the challenger's per-well out-of-fold losses beat the incumbent's by more than
    one standard error of the (declustering-weighted) paired difference.

    ``units`` names the well of each row: samples of one well are averaged first, since they
    are not independent evidence.

    Picking the lowest CV score among many candidates rewards luck on a few dozen wells; the
    one-standard-error rule (Breiman et al. 1984; Hastie et al., Elements of Statistical
    Learning, section 7.10) keeps the more stable choice unless the data say otherwise.
    """
    diff = challenger - incumbent
    if units is not None and np.unique(units).size < len(diff):
        frame = pd.DataFrame({"d": diff * weights, "w": weights, "u": units}).groupby("u").sum()
        diff, weights = (frame["d"] / frame["w"]).to_numpy(), frame["w"].to_numpy()
    w = weights / weights.sum()
    mean = float(np.sum(w * diff))
    se = float(np.sqrt(np.sum(w * (diff - mean) ** 2) / max(effective_size(weights) - 1, 1)))
    return mean < -se


def _blend(candidates, oofs, data: FitData, splitter):
    """Stacked blend of all candidates; its CV score uses weights fitted without the scored fold."""
    names = [c.name for c in candidates]
    P = np.stack([oofs[n] for n in names], axis=1)
    oof = np.zeros((len(data.y),) + P.shape[2:])
    for train, test in splitter.split(data.xy):
        w = blend_weights(P[train], data.y[train], data.weights[train])
        oof[test] = combine(P[test], w)
    weights = blend_weights(P, data.y, data.weights)
    return Blend(list(candidates), weights), oof


def _feature_spread(attrs, data: FitData, residuals, splitter):
    """Cross-fitted spread at each well (for calibration) and the spread model fitted on all wells."""
    spread = np.zeros(len(residuals))
    for train, test in splitter.split(data.xy):
        model = SpreadModel(attrs).fit(data.X.iloc[train], residuals[train], data.weights[train])
        spread[test] = model.predict(data.X.iloc[test])
    return spread, SpreadModel(attrs).fit(data.X, residuals, data.weights)


def _oof_spread(model: WellTies, data: FitData, splitter) -> np.ndarray:
    """Kriging standard deviation of the residual field at each held-out well, from its fold's model."""
    spread = np.zeros(len(data.y))
    for train, test in splitter.split(data.xy):
        fold = type_copy(model).fit(data.subset(train))
        spread[test] = np.sqrt(fold.residual_variance(data.xy[test]))
    return spread


class _RandomSplits:
    """Plain shuffled k-fold, for contrast with the blocked scores."""

    def __init__(self, n_splits: int, seed: int):
        self.kfold = KFold(n_splits=n_splits, shuffle=True, random_state=seed)

    def split(self, xy):
        return self.kfold.split(xy)

