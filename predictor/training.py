"""Training: features at the wells, declustering, spatial CV of every candidate against the
baselines on the same folds, selection, well ties, interval calibration and the final fit.

:func:`train` returns a :class:`TrainedModels`; :mod:`predictor.bundle` writes it to disk.
"""

from __future__ import annotations

import warnings
from dataclasses import MISSING, asdict, dataclass, field, replace
from typing import Literal

import numpy as np
import pandas as pd
import xarray as xr
from numpy.typing import ArrayLike
from scipy.spatial import cKDTree
from sklearn.base import clone

from .checks import decluster, decluster_samples
from .cv_design import (
    FoldDesign,
    design_folds,
    distance_summary,
    map_distances,
    representative_weights,
    sample_locations,
    unit_heads,
)
from .declustering import declustered_statistics
from .errors import InputError, ModelError, PredictorWarning, list_rows
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
    feature_matrix,
    features_at_samples,
    features_at_wells,
    location_features,
)
from .field_wide import (
    FieldWide,
    field_wide_classes,
    field_wide_values,
    rule_factors,
)
from .grid import attribute_kind, spacing
from .intervals import (
    PHYSICAL_BOUNDS,
    IntervalCalibration,
    SpreadModel,
    calibrate,
    effective_size,
    held_out_coverage,
)
from .io.tables import ROLE_NAMES
from .kriging import GLOBAL_WELLS, NEIGHBOURS
from .map_error import expected_map_error, training_size_factor
from .models import (
    BASELINES,
    Blend,
    Candidate,
    FitData,
    Kriging,
    Linear,
    RegressionKriging,
    WellTies,
    blend_weights,
    combine,
    fold_predictions,
    leaderboard_candidates,
    out_of_fold,
)
from .options import (
    Declustering,
    DesignName,
    IntervalSpread,
    MapRule,
    SampleMethod,
    WellTiesRule,
    check_choices,
    monotone_pair,
    option,
)
from .progress import progress
from .qc import grid_findings, physical_findings
from .spatial_cv import block_labels, classification_scores, regression_scores
from .variogram import VariogramModel, auto_variogram
from .volume import is_volume, lateral_spacing, trace_footprint, wells_z_domain, z_step

Task = Literal["regression", "classification"]
LOG_TARGETS = ("permeability",)


@dataclass
class TrainOptions:
    """Everything that decides a training run (recorded in the model card).

    This is the one table of training options: each field carries its command-line flag and
    help (see :mod:`predictor.options`), and ``Literal`` fields their allowed values.
    """

    targets: list[str] = option(
        MISSING,
        "--target",
        "well column to model (repeat for several: --target porosity --target facies)",
        action="append",
        required=True,
    )
    features: FeatureSpec | None = (
        None  # None: the default set; the CLI builds it from the feature flags
    )
    n_splits: int = option(5, "--folds", "number of spatial CV folds")
    block_size: float | None = option(
        None,
        "--block-size",
        "CV block side in metres (default: fitted variogram range)",
        type=float,
    )
    block_angle: float = option(0.0, "--block-angle", "rotation of the CV blocks in degrees")
    cv: DesignName = option(
        "matched",
        "--cv",
        "fold design: matched to the map's prediction distances (default, "
        "kNNDM), nndm (leave-one-out matched to the map, for small well sets), blocks (block "
        "k-fold), buffered (leave-one-out with the block size as exclusion radius) or random "
        "(contrast only)",
    )
    declustering: Declustering = option(
        "cell",
        "--declustering",
        "declustering weights used as sample weights and "
        "score weights (default cell); declustered statistics always use "
        "nearest-node weights",
    )
    monotone: dict[str, int] | None = option(
        None,
        "--monotone",
        "also try LightGBM constrained in this attribute: "
        "-1 non-increasing, 1 non-decreasing (e.g. --monotone impedance:-1; "
        "repeatable)",
        action="append",
        type=monotone_pair,
        metavar="ATTR:DIR",
    )
    well_ties: WellTiesRule = option(
        "auto",
        "--well-ties",
        "krige out-of-fold residuals onto the map: auto (the default: when the CV "
        "shows they help, for facies unless it shows they hurt; not on a model that already "
        "kriges, such as a porosity blend with regression kriging in it), always, never",
    )
    interval_spread: IntervalSpread = option(
        "features",
        "--interval-spread",
        "scale intervals by a local error "
        "spread: learnt from the attributes (default), the well-tie kriging "
        "standard deviation (narrow near wells), or none (constant width)",
    )
    sample_method: SampleMethod = option("bilinear", None, "how features are read at the wells")
    drop_outside: bool = option(
        False, "--drop-outside", "leave out wells off the grid, with a warning"
    )
    seed: int = option(0, "--seed", "random seed")
    n_threads: int | None = option(
        None,
        "--threads",
        "LightGBM threads, used above a few thousand training rows "
        "where they pay off (default: all cores; results do not depend on it)",
        type=int,
    )
    candidates: list[str] | None = option(
        None,
        "--candidate",
        "only these candidates (repeatable, e.g. --candidate "
        "lightgbm --candidate linear); the baselines are among the names",
        action="append",
    )
    facies_map: MapRule = option(
        "balanced",
        "--facies-map",
        "how the facies map draws one class per node from the "
        "probabilities: balanced (largest probability relative to the class's mean "
        "probability over the map; default, see the README), proportions (class thresholds "
        "that reproduce the field-wide proportions) or most-probable",
    )
    kriging_neighbours: int | None = option(
        None,
        "--kriging-neighbours",
        "wells each map tile is kriged from "
        f"(default: every well up to {GLOBAL_WELLS} wells, above that the "
        f"nearest {NEIGHBOURS})",
        type=int,
        metavar="N",
    )

    def __post_init__(self):
        if isinstance(
            self.monotone, list | tuple
        ):  # the command line gives (attribute, direction) pairs
            self.monotone = dict(self.monotone)

    def to_dict(self) -> dict:
        out = asdict(self)
        out["features"] = self.features.to_dict() if self.features else None
        return out

    def check(self) -> None:
        """Option values checked once, with the allowed values named."""
        check_choices(self)
        if not (isinstance(self.n_splits, int) and self.n_splits >= 2):
            raise InputError(
                "the number of CV folds (--folds, n_splits) must be an integer of 2 or more, got"
                f" {self.n_splits!r}"
            )
        k = self.kriging_neighbours
        if k is not None and not (isinstance(k, int) and k >= 3):
            raise InputError(
                f"--kriging-neighbours {k!r}: a kriging neighbourhood needs 3 wells or more"
            )


@dataclass
class TargetModel:
    """The chosen model for one target and everything learned about it."""

    name: str
    task: Task
    transform: str | None
    classes: list[str]
    model: Candidate
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
    units: np.ndarray | None = (
        None  # the well of each training row (volumes: several samples per well)
    )
    design: FoldDesign | None = (
        None  # the fold design that scored, selected and calibrated this model
    )
    distances: dict = field(default_factory=dict)  # prediction distances: map vs each design (W)
    folds: np.ndarray | None = None  # the test fold of every training row
    notes: list[str] = field(default_factory=list)
    representative_weights: np.ndarray | None = (
        None  # score weights raked to the map (see cv_design)
    )
    field_wide: FieldWide | None = None  # field-wide mean or proportions, debiased with the seismic
    map_factors: np.ndarray | None = None  # classes: argmax(p * map_factors) draws the facies map
    rows: np.ndarray | None = None  # the rows of TrainedModels.wells this target was trained on

    def out_of_fold_table(self, wells: pd.DataFrame) -> pd.DataFrame:
        """Per well (per sample in a volume): position, observed value, out-of-fold prediction of
        the chosen model on the matched folds, its fold and declustering weight."""
        sub = wells.iloc[self.rows].reset_index(drop=True)
        cols = [c for c in ("well_id", "x", "y", "z") if c in sub]
        table = sub[cols].copy()
        if self.task == "classification":
            table[f"{self.name}_observed"] = np.asarray(self.classes)[self.observed]
            for k, cls in enumerate(self.classes):
                table[f"{self.name}_prob_{cls}"] = self.oof[:, k]
        else:
            back = (lambda v: 10.0**v) if self.transform == "log10" else (lambda v: v)
            table[f"{self.name}_observed"] = back(self.observed)
            table[f"{self.name}_predicted"] = back(self.calibration.clip(self.oof))
            table["error"] = table[f"{self.name}_predicted"] - table[f"{self.name}_observed"]
        table["fold"] = self.folds + 1
        table["weight"] = self.weights
        return table

    def refit(self, candidate: str):
        """Fit the named leaderboard candidate (a baseline, say) on all wells, for comparison
        maps."""
        if candidate not in self.candidates:
            raise ModelError(
                f"no candidate {candidate!r} for {self.name}; the leaderboard has "
                f"{', '.join(self.candidates)}"
            )
        return clone(self.candidates[candidate]).fit(self.data)


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
    well_features: pd.DataFrame | None = (
        None  # features at the kept wells, same row order as ``wells``
    )
    space: dict = field(
        default_factory=lambda: {"kind": "map"}
    )  # map, or volume with its z domain and range
    attribute_kinds: dict[str, str] = field(
        default_factory=dict
    )  # attribute -> impedance, amplitude, ...


def task_of(wells: pd.DataFrame, target: str) -> Task:
    if target == "facies" or not pd.api.types.is_numeric_dtype(wells[target]):
        return "classification"
    return "regression"


def _targets_by_role(wells: pd.DataFrame, options: TrainOptions) -> TrainOptions:
    """A target named by its file column (``PHIT``) trains as the role the reader gave it
    (porosity)."""
    taken = wells.attrs.get("columns_taken", {})
    renamed = {col: role for role, col in taken.items() if role in ROLE_NAMES and col != role}
    if not any(t in renamed for t in options.targets):
        return options
    return replace(options, targets=[renamed.get(t, t) for t in options.targets])


def _check_inputs(wells: pd.DataFrame, grid: xr.Dataset, options: TrainOptions) -> None:
    source = wells.attrs.get("source", "wells")
    if not options.targets:
        raise InputError(
            "no target given; name at least one well column with --target (e.g. porosity)"
        )
    for target in options.targets:
        if target not in wells:
            raise InputError(
                f"{source}: no column {target!r} to train on; columns are"
                f" {', '.join(wells.columns)}"
            )
        values = wells[target]
        if values.isna().all() or (values.astype("string").str.strip() == "").all():
            raise InputError(
                f"{source}: target column {target!r} is empty (all missing); fill it or drop the"
                " target"
            )
    spots = wells[["x", "y"]].round(3).drop_duplicates()
    if len(spots) < 2:
        raise InputError(
            f"{source}: all {len(wells)} rows sit at one position (x {spots.x.iloc[0]:g}, y"
            f" {spots.y.iloc[0]:g}); spatial CV and mapping need wells at several positions: check"
            " the coordinate columns (--x-column, --y-column)"
        )
    if not is_volume(grid) and any(task_of(wells, t) == "regression" for t in options.targets):
        _check_well_positions(
            wells, source, options
        )  # numeric targets bring kriging (baselines, well ties)
    # a property that is not trained on never blocks training (QC still reports it)
    errors = [
        f
        for f in physical_findings(wells, source) + grid_findings(grid)
        if f.severity == "error"
        and not (f.column in ("porosity", "permeability") and f.column not in options.targets)
    ]
    if errors:
        raise InputError(
            errors[0].message
            + (
                ""
                if len(errors) == 1
                else f" (and {len(errors) - 1} more problems; run `predictor qc` for the full list)"
            )
        )


def _check_well_positions(wells: pd.DataFrame, source: str, options: TrainOptions) -> None:
    """A map's wells at distinct positions (two wells at one point make kriging's system singular),
    and a kriging neighbourhood no larger than the wells."""
    same = wells[wells.duplicated(["x", "y"], keep=False)]
    if len(same):
        ids = same["well_id"].astype(str) if "well_id" in same else same.index.astype(str)
        groups = (
            same.assign(_id=ids.to_numpy()).groupby(["x", "y"])["_id"].apply(lambda s: "=".join(s))
        )
        raise InputError(
            f"{source}: wells at identical coordinates: {list_rows(list(groups))}; kriging cannot "
            "tell them apart: merge each group into one row (average its values) or remove one"
        )
    n = options.kriging_neighbours
    if n is not None and n > len(wells):
        raise InputError(
            f"--kriging-neighbours {n}: there are only {len(wells)} wells; give 3 to {len(wells)},"
            f" or leave it out (every well up to {GLOBAL_WELLS} wells, then the nearest"
            f" {NEIGHBOURS})"
        )


def _chosen(cell, nearest: np.ndarray, method: str) -> tuple[np.ndarray, dict]:
    """Model/score weights by ``method`` and the summary the card records."""
    model = {"cell": cell.weights, "nearest_node": nearest, "none": np.ones(len(nearest))}[method]
    return model, {
        "model_weights": method,
        "statistics_weights": "nearest_node",
        "cell": cell.summary(),
    }


def _weights(
    wells: pd.DataFrame, grid: xr.Dataset, method: str
) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict]:
    """Model/score weights (by ``method``), nearest-node and cell weights for statistics, and a
    summary."""
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


def _block_size(
    data: FitData,
    options: TrainOptions,
    attrs: list[str],
    baseline_y: np.ndarray,
    cv_xy: np.ndarray,
    units: np.ndarray,
) -> tuple[float, str, dict]:
    """The fitted variogram range of the linear baseline's residuals (or the user's size),
    shrunk if too few blocks result; with the variogram itself.

    ``cv_xy`` are the positions the blocks are cut by and ``units`` the well of each row; with
    several samples per well (volumes) the residuals are averaged per well first.
    """
    linear = Linear(attrs).fit(FitData(data.X, baseline_y, data.weights, data.xy, data.groups))
    resid = pd.Series(baseline_y - linear.predict(data.X)).groupby(units).mean().to_numpy()
    heads = pd.DataFrame(cv_xy).groupby(units).mean().to_numpy()
    model = auto_variogram(heads[:, 0], heads[:, 1], resid)
    vario = model.to_dict()  # also weighs the CV's prediction situation against the map's
    if options.block_size:
        size, source = float(options.block_size), "given by the user"
    else:
        size = model.range
        source = f"fitted {model.kind} variogram range of the linear baseline's residuals"
        if model.pure_nugget:
            # no spatial structure: a range would be noise; blocks four well spacings wide instead
            spacing_ = float(np.median(cKDTree(heads).query(heads, k=2)[0][:, 1]))
            size = 4 * spacing_
            source = (
                f"four times the median well spacing ({spacing_:.0f} m): the linear baseline's"
                " residuals show no spatial correlation (pure nugget), so no variogram range could"
                " size the blocks"
            )
    extent = max(np.ptp(cv_xy[:, 0]), np.ptp(cv_xy[:, 1]))
    shrunk = False
    while (
        np.unique(block_labels(cv_xy[:, 0], cv_xy[:, 1], size, options.block_angle)).size
        < 2 * options.n_splits
    ):
        size *= 0.8
        shrunk = True
        if size < extent / 100:
            raise ModelError(
                "the wells cannot be split into enough spatial blocks; add wells or use fewer folds"
            )
    if shrunk:
        source += (
            f"; reduced to {size:.0f} m so that at least {2 * options.n_splits} blocks hold wells"
        )
    return float(size), source, vario


def monotone_constraints(
    given: dict[str, int], attrs: list[str], names: list[str]
) -> dict[str, int]:
    """Per-feature monotone directions from the user's ``{attribute: -1 or +1}``: the attribute and
    its smoothed versions follow the given direction; contrasts and gradients stay free."""
    unknown = [a for a in given if a not in attrs]
    if unknown:
        raise InputError(
            f"--monotone names {', '.join(unknown)}, which is not an attribute of the grid; "
            f"the attributes are {', '.join(attrs)} (e.g. --monotone {attrs[0]}:-1)"
        )
    bad = [f"{a}:{d}" for a, d in given.items() if d not in (-1, 1)]
    if bad:
        raise InputError(
            f"--monotone {', '.join(bad)}: the direction must be -1 (non-increasing) or 1 "
            "(non-decreasing)"
        )
    return {n: d for a, d in given.items() for n in names if n == a or n.startswith(f"{a}_smooth")}


def _score(task: Task, y, oof, w, classes) -> dict:
    return (
        regression_scores(y, oof, w)
        if task == "regression"
        else classification_scores(np.asarray(classes)[y], oof, classes, w)
    )


def train(wells: pd.DataFrame, grid: xr.Dataset, options: TrainOptions) -> TrainedModels:
    """Train, cross-validate and select a model per target.

    ``grid`` is a map (y, x) with one row of ``wells`` per well, or a volume (z, inline,
    crossline) with one row per well sample (a ``z`` column; ``well_id`` ties the samples of a
    well together).  With a volume, CV folds hold out whole wells (never single samples of a
    well: samples along one well are strongly alike) and the kriging candidates are not offered.

    Stages: prepare (features at the wells, weights, the map's prediction distances) -> per
    target: fold designs -> cross-validate every candidate on the chosen design -> select ->
    well ties -> calibrate intervals -> final fit and explanation.
    """
    options.check()
    options = _targets_by_role(wells, options)
    _check_inputs(wells, grid, options)
    prep = _prepare(wells, grid, options)
    results = {target: _train_target(prep, target, options) for target in options.targets}
    for tm in results.values():
        prep.notes += tm.trust.get("warnings", []) + tm.notes
    loc = location_features(prep.names)
    if loc:
        prep.notes.append(
            f"location features {', '.join(loc)} are in use: they let a model memorise where the "
            "wells are; compare with the attributes-only candidate in the leaderboard"
        )
    return TrainedModels(
        options,
        prep.spec,
        prep.names,
        prep.ranges,
        prep.wells,
        prep.weights,
        prep.declustering,
        prep.statistics,
        results,
        prep.notes,
        prep.X,
        prep.space,
        prep.attribute_kinds,
    )


@dataclass
class _Prepared:
    """Everything the targets share: features at the wells, weights, where the map predicts."""

    wells: pd.DataFrame
    X: pd.DataFrame
    names: list[str]
    spec: FeatureSpec
    xy: np.ndarray
    weights: np.ndarray
    units: np.ndarray  # the well of each row
    cv_xy: np.ndarray  # the position each row is split by (a volume's well: its mean position)
    map_xy: np.ndarray  # prediction locations (valid nodes or live traces), a seeded sample of them
    map_attrs: pd.DataFrame | None  # the attributes at those nodes (maps only)
    volume: bool
    ranges: dict
    declustering: dict
    statistics: dict
    facies_codes: np.ndarray | None
    facies_classes: list[str]
    space: dict
    notes: list[str]
    map_X: (
        pd.DataFrame
    )  # features at a seeded sample of the map's nodes (volumes: of live traces' samples)
    map_X_xy: np.ndarray  # their positions
    nearest_weights: np.ndarray  # nearest-node declustering weight of each row
    cell_weights: np.ndarray  # cell declustering weight of each row
    attribute_kinds: dict[
        str, str
    ]  # what each attribute is (impedance, amplitude, ...; see grid.attribute_kind)


def _prepare(wells: pd.DataFrame, grid: xr.Dataset, options: TrainOptions) -> _Prepared:
    notes: list[str] = []
    volume = is_volume(grid)
    if volume and "z" not in wells:
        raise InputError(
            f"{wells.attrs.get('source', 'wells')}: a volume needs wells as samples with z "
            "(depth or two-way time): add a z, depth or twt column, one row per sample"
        )
    spec = options.features or default_features(wells, grid, options)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", PredictorWarning)
        if volume:
            X_all, kept = features_at_samples(
                grid, spec, wells, options.drop_outside, wells_z_domain(wells)
            )
        else:
            feature_grid = build_features(grid, spec)
            X_all, kept = features_at_wells(
                feature_grid, wells, options.sample_method, options.drop_outside
            )
    notes += [str(w.message) for w in caught]
    names = [str(c) for c in X_all.columns]
    wells = wells.loc[kept].reset_index(drop=True)
    xy = wells[["x", "y"]].to_numpy(float)
    if volume:
        weights, stat_weights, cell_weights, decl, units, cv_xy = _volume_weights(
            wells, grid, options.declustering
        )
        if options.well_ties == "always":
            notes.append("well ties krige a map's residuals; they are not offered for volumes")
        xx, yy, live = trace_footprint(grid)
        map_xy = np.column_stack([xx[live], yy[live]])
    else:
        weights, stat_weights, cell_weights, decl = _weights(wells, grid, options.declustering)
        units, cv_xy = np.arange(len(wells)), xy
        xx, yy = np.meshgrid(grid.x.to_numpy(), grid.y.to_numpy())
        valid = np.all([np.isfinite(grid[v].to_numpy()) for v in grid.data_vars], axis=0)
        map_xy = np.column_stack([xx[valid], yy[valid]])
    pick = sample_locations(len(map_xy), options.seed)
    map_xy = map_xy[pick]
    map_attrs = (
        None
        if volume
        else pd.DataFrame({a: grid[a].to_numpy()[valid][pick] for a in spec.attributes})
    )
    map_X, map_X_xy = (
        _volume_sample(grid, spec, names, wells, options)
        if volume
        else _map_sample(grid, feature_grid, names, options.seed)
    )
    ranges = {n: [float(np.nanmin(X_all[n])), float(np.nanmax(X_all[n]))] for n in names}
    facies_classes: list[str] = []
    facies_codes = None
    if "facies" in wells:
        labels = wells["facies"].astype("string")
        facies_classes = sorted(labels.dropna().unique().tolist())
        facies_codes = np.array(
            [facies_classes.index(v) if v in facies_classes else -1 for v in labels.fillna("\x00")]
        )
    numeric = [t for t in options.targets if task_of(wells, t) == "regression"]
    categorical = [t for t in options.targets if t not in numeric]
    # statistics use nearest-node weights: the closer map-wide estimate in
    # experiments/declustering_accuracy.py; the cell-weighted ones are kept beside them
    stats = declustered_statistics(wells, stat_weights, numeric, categorical)
    stats["declustered_cell"] = declustered_statistics(wells, cell_weights, numeric, categorical)[
        "declustered"
    ]
    notes += _attribute_cover(X_all, map_X, spec.attributes)
    space = {"kind": "map"}
    if volume:
        space = {
            "kind": "volume",
            "z_domain": grid.attrs.get("z_domain", "unknown"),
            "wells_z_domain": wells_z_domain(wells),
            "z_range": [float(wells["z"].min()), float(wells["z"].max())],
            "samples": int(len(wells)),
            "wells": int(wells["well_id"].nunique()),
        }
    return _Prepared(
        wells,
        X_all,
        names,
        spec,
        xy,
        weights,
        units,
        cv_xy,
        map_xy,
        map_attrs,
        volume,
        ranges,
        decl,
        stats,
        facies_codes,
        facies_classes,
        space,
        notes,
        map_X,
        map_X_xy,
        stat_weights,
        cell_weights,
        {a: attribute_kind(grid, a) for a in spec.attributes},
    )


def _attribute_cover(at_wells: pd.DataFrame, on_map: pd.DataFrame, attrs: list[str]) -> list[str]:
    """A warning per attribute whose range at the wells covers less than half of the map's."""
    out = []
    for a in attrs:
        lo, hi = np.nanquantile(on_map[a], [0.005, 0.995])
        seen = max(0.0, min(hi, np.nanmax(at_wells[a])) - max(lo, np.nanmin(at_wells[a])))
        if hi > lo and seen < 0.5 * (hi - lo):
            out.append(
                f"the wells sample {a} from {np.nanmin(at_wells[a]):.4g} to"
                f" {np.nanmax(at_wells[a]):.4g}, less than half of its range over the map ({lo:.4g}"
                f" to {hi:.4g}): the models and the field-wide numbers debiased with the seismic"
                " extrapolate there; read them as uncertain, or add wells in the unsampled part of"
                " the attribute's range"
            )
    return out


def _map_sample(grid: xr.Dataset, feature_grid: xr.Dataset, names: list[str], seed: int):
    """Features and positions of a seeded sample of the map's nodes (the field-wide estimates'
    support)."""
    matrix, valid = feature_matrix(feature_grid, names)
    xx, yy = np.meshgrid(grid.x.to_numpy(), grid.y.to_numpy())
    pick = sample_locations(len(matrix), seed)
    return (
        pd.DataFrame(matrix[pick], columns=names),
        np.column_stack([xx.ravel()[valid], yy.ravel()[valid]])[pick],
    )


VOLUME_SAMPLE_TRACES = 40


def _volume_sample(
    volume: xr.Dataset,
    spec: FeatureSpec,
    names: list[str],
    wells: pd.DataFrame,
    options: TrainOptions,
):
    """Features at every sample of a seeded set of live traces, within the wells' z range."""
    xx, yy, live = trace_footprint(volume)
    rng = np.random.default_rng(options.seed)
    traces = rng.choice(
        int(live.sum()), size=min(VOLUME_SAMPLE_TRACES, int(live.sum())), replace=False
    )
    z = volume.z.to_numpy()
    z = z[(z >= wells["z"].min()) & (z <= wells["z"].max())]
    pseudo = pd.DataFrame(
        {
            "well_id": np.repeat([f"trace{t}" for t in traces], z.size),
            "x": np.repeat(xx[live][traces], z.size),
            "y": np.repeat(yy[live][traces], z.size),
            "z": np.tile(z, traces.size),
        }
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PredictorWarning)
        X, kept = features_at_samples(volume, spec, pseudo, True, wells_z_domain(wells))
    X = X[names].reset_index(drop=True)
    ok = np.all(np.isfinite(X.to_numpy(float)), axis=1)
    return X[ok].reset_index(drop=True), pseudo.loc[kept, ["x", "y"]].to_numpy(float)[ok]


def default_features(wells: pd.DataFrame, grid: xr.Dataset, options: TrainOptions) -> FeatureSpec:
    """The features used when the user gives none: every attribute, plus context at three radii
    and the gradient.  Radii follow the grid spacing and the correlation range of the linear
    baseline's residuals: 3 nodes, about one range, and four ranges.  Candidates on the
    attributes alone stay on the leaderboard, so the CV decides whether context helps."""
    attrs = [str(v) for v in grid.data_vars]
    if is_volume(grid):
        step = min(lateral_spacing(grid))
        extent = step * max(grid.sizes["inline"], grid.sizes["crossline"])
    else:
        step = min(spacing(grid))
        extent = step * max(grid.sizes["x"], grid.sizes["y"])
    corr = _residual_range(wells, grid, attrs, options)
    corr = float(np.clip(corr if corr else 10 * step, 6 * step, extent / 4))
    radii = sorted({round(3 * step), round(corr), round(min(4 * corr, extent / 2))})
    vertical: list[float] = []
    if is_volume(grid):
        dz = z_step(grid)
        vertical = [round(3 * dz, 3), round(10 * dz, 3)]
    return FeatureSpec(
        attrs,
        context_radii=[float(r) for r in radii],
        gradient=True,
        vertical_radii=vertical,
        chosen_by=(
            "default: attributes plus context at radii from the grid spacing and the "
            "residual correlation range; the CV compares them with the attributes alone"
        ),
    )


def _residual_range(
    wells: pd.DataFrame, grid: xr.Dataset, attrs: list[str], options: TrainOptions
) -> float | None:
    """Correlation range of the first numeric target's residuals from a linear fit on the attributes
    (at the wells' mean positions in a volume), or None when it cannot be fitted."""
    numeric = [t for t in options.targets if t in wells and task_of(wells, t) == "regression"]
    if not numeric:
        return None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            spec = FeatureSpec(attrs)
            if is_volume(grid):
                X, kept = features_at_samples(grid, spec, wells, True, wells_z_domain(wells))
            else:
                X, kept = features_at_wells(
                    build_features(grid, spec), wells, options.sample_method, True
                )
        sub = wells.loc[kept].reset_index(drop=True)
        y = sub[numeric[0]].to_numpy(float)
        ok = np.isfinite(y)
        if numeric[0] in LOG_TARGETS:
            ok &= y > 0
            y = np.log10(np.where(ok, y, 1.0))
        n = int(ok.sum())
        if n < 6:  # too few wells on the grid to fit anything (the clear error comes later)
            return None
        data = FitData(
            X[ok].reset_index(drop=True),
            y[ok],
            np.ones(n),
            sub[["x", "y"]].to_numpy(float)[ok],
            np.zeros(n, int),
        )
        resid = pd.Series(y[ok] - Linear(attrs).fit(data).predict(data.X))
        key = sub["well_id"][ok].to_numpy() if "well_id" in sub else np.arange(n)
        heads = (
            pd.DataFrame({"x": data.xy[:, 0], "y": data.xy[:, 1], "r": resid}).groupby(key).mean()
        )
        return float(auto_variogram(heads.x, heads.y, heads.r).range)
    except (InputError, ModelError, ValueError, np.linalg.LinAlgError):
        return None


@dataclass
class _TargetTable:
    data: FitData
    y: np.ndarray
    classes: list[str]
    transform: str | None
    units: np.ndarray
    heads: np.ndarray  # one position per well
    head_of: np.ndarray  # row -> index into heads
    baseline_y: np.ndarray
    notes: list[str]
    rows: np.ndarray  # the rows of the prepared wells that hold the target


def _target_table(prep: _Prepared, target: str, options: TrainOptions) -> _TargetTable:
    """The rows that hold ``target``, as a :class:`FitData`, with its checks."""
    task = task_of(prep.wells, target)
    raw = prep.wells[target]
    has = raw.notna().to_numpy() & (raw.astype("string").str.strip() != "").fillna(False).to_numpy()
    idx = np.flatnonzero(has)
    units = prep.units[idx]
    need = 3 * options.n_splits
    n_wells = np.unique(units).size
    if n_wells < need:
        raise ModelError(
            f"CV with {options.n_splits} folds needs at least {need} wells with {target!r}; got "
            f"{n_wells}; use fewer folds (--folds) or add wells"
        )
    notes: list[str] = []
    classes: list[str] = []
    transform = None
    if task == "classification":
        labels = raw.astype("string").to_numpy()[idx].astype(str)
        classes = sorted(set(labels))
        counts = pd.DataFrame({"c": labels, "u": units}).groupby("c")["u"].nunique()
        if len(classes) < 2:
            raise ModelError(
                f"target {target!r} has a single class ({classes[0]}); a classifier needs two or"
                " more"
            )
        rare = counts[counts < 2]
        if len(rare):
            raise ModelError(
                f"class(es) {', '.join(rare.index)} of {target!r} have a single well; merge them"
                " into a neighbouring class or drop those wells"
            )
        few = counts[counts < options.n_splits]
        if len(few):
            notes.append(
                f"class(es) {', '.join(f'{k} ({v} wells)' for k, v in few.items())} of {target!r}"
                f" have fewer wells than the {options.n_splits} folds; their scores are unreliable"
            )
        y = np.array([classes.index(v) for v in labels])
        baseline_y = (y == np.argmax(np.bincount(y))).astype(float)
    else:
        y = raw.to_numpy(float)[idx]
        if np.ptp(y) == 0:
            raise ModelError(
                f"target {target!r} is {y[0]:g} at every well: a constant has nothing to map; "
                "check the column, or drop the target"
            )
        if target in LOG_TARGETS:
            y, transform = np.log10(y), "log10"
        baseline_y = y
    heads, head_of = unit_heads(prep.cv_xy[idx], units)
    if np.ptp(heads[:, 0]) == 0 and np.ptp(heads[:, 1]) == 0:
        raise ModelError(
            f"all wells with {target!r} are at one position; spatial CV and mapping need wells at "
            "several positions"
        )
    g_map = map_distances(prep.map_xy, heads)  # prep.map_xy is already a seeded sample
    data = FitData(
        prep.X.iloc[idx].reset_index(drop=True),
        y,
        prep.weights[idx],
        prep.xy[idx],
        np.zeros(idx.size, int),
        classes,
        None if prep.facies_codes is None else prep.facies_codes[idx],
        prep.facies_classes,
        options.seed,
        options.n_threads,
        units=head_of,
        map_distances=g_map,
        n_splits=options.n_splits,
        kriging_neighbours=options.kriging_neighbours,
    )
    return _TargetTable(data, y, classes, transform, units, heads, head_of, baseline_y, notes, idx)


def _designs(
    table: _TargetTable, block: float, options: TrainOptions, task: Task, target: str
) -> dict:
    """The chosen fold design and, for the diagnostics, the matched, blocked and random ones."""
    g_map = table.data.map_distances
    names = dict.fromkeys([options.cv, "matched", "blocks", "random"])
    designs = {
        name: design_folds(
            name,
            table.heads,
            table.head_of,
            g_map,
            options.n_splits,
            block,
            options.block_angle,
            options.seed,
        )
        for name in names
    }
    chosen = designs[options.cv]
    if task == "classification":
        present = len(table.classes)
        for k, (train_rows, _) in enumerate(chosen.splits):
            missing = sorted(set(range(present)) - set(table.y[train_rows]))
            if missing:
                raise ModelError(
                    f"fold {k + 1} of the {chosen.name} CV has no training well of {target}"
                    f" {', '.join(table.classes[m] for m in missing)}: that class sits in one"
                    " cluster of wells, so it cannot be validated away from it; merge the class"
                    " into a neighbouring one, add wells, or use --cv random to see in-cluster"
                    " skill only"
                )
    return designs


def _cross_validate_all(candidates: list, data: FitData, splits) -> dict:
    """Out-of-fold predictions of every candidate and of their blend on ``splits``; name -> (model,
    oof)."""
    oofs = {c.name: (c, out_of_fold(c, data, splits)) for c in candidates}
    if len(candidates) >= 2:
        P = np.stack([oofs[c.name][1] for c in candidates], axis=1)
        blend = Blend(
            list(candidates),
            blend_weights(P, data.y, data.weights, data.units),
            member_oof=P,
            y_all=data.y,
        )
        # the blend's own score: weights fitted without the scored fold
        oof = np.zeros((len(data.y),) + P.shape[2:])
        for train_rows, test in splits:
            oof[test] = combine(
                P[test],
                blend_weights(
                    P[train_rows],
                    data.y[train_rows],
                    data.weights[train_rows],
                    data.units[train_rows],
                ),
            )
        oofs[blend.name] = (blend, oof)
    return oofs


def _board_row(
    name: str, model, task: Task, table: _TargetTable, oof, random_oof, score_weights
) -> dict:
    """Scores of one candidate: ``cv`` with the declustering weights (the reported estimate of
    the map's error), ``cv_representative`` with the weights raked to the map's distance and
    attribute quartiles (shown beside it: on the held-out experiment fields its per-field spread
    was larger, see the README), ``cv_random`` for contrast."""
    row = {
        "candidate": name,
        "baseline": name in BASELINES,
        "features": list(model.features),
        "cv": _score(task, table.y, oof, table.data.weights, table.classes),
        "cv_representative": _score(task, table.y, oof, score_weights, table.classes),
        "cv_random": (
            None
            if random_oof is None
            else _score(task, table.y, random_oof, table.data.weights, table.classes)
        ),
        "cv_se": _loss_se(table.y, oof, table.data.weights, table.units),
    }
    if isinstance(model, Blend):
        row["members"] = {
            m.name: float(w) for m, w in zip(model.members, model.weights, strict=True)
        }
    return row


BLEND_MARGIN = 2.0  # standard errors by which a single facies classifier must beat the blend
# standard errors by which well ties must beat the model they tie: one for values; for facies
# they are kept unless their CV log-loss is worse by more than one standard error: held-out
# wells sit a well spacing from their training wells, map nodes closer, so the CV understates
# what ties add (on the tuning fields of experiments/field_wide.py the map's Brier score over
# the logistic's went from 0.917 with ties kept at any CV gain to 0.895)
TIES_MARGIN = {"regression": 1.0, "classification": -1.0}


def _select(board: list[dict], oofs: dict, table: _TargetTable, task: Task) -> str:
    """The blend for porosity and permeability; for facies the blend unless a single classifier
    beats it by two standard errors.

    On the tuning fields of experiments/matched_cv.py, over three releases, every single
    candidate the two-standard-error rule picked over a value blend mapped worse than the blend
    (5 of 5 fields, by 0.03-0.05 x regression kriging's RMSE): with a few dozen wells the CV's
    noise, not the model, picks the winner, while the bagged blend weights already lean on the
    members that keep winning.
    """
    if "blend" not in oofs:  # a single candidate (the user's --candidate): nothing to choose
        return board[0]["candidate"]
    if task == "regression":
        return "blend"
    best = min(board, key=lambda r: r["cv"]["log_loss"])["candidate"]
    if best != "blend" and not _clearly_better(
        _losses(table.y, oofs[best][1]),
        _losses(table.y, oofs["blend"][1]),
        table.data.weights,
        table.units,
        margin=BLEND_MARGIN,
    ):
        best = "blend"
    return best


def _ties_offered(options: TrainOptions, task: Task, volume: bool, model) -> bool:
    """Whether well ties are tried on the chosen model: never on volumes or on a model whose map
    already kriges residuals (ordinary or regression kriging, or a value blend holding one),
    unless asked for (``--well-ties always``).

    Kriging the residuals of a blend whose regression-kriging members already honour the wells
    counts the wells twice: on the tuning fields of experiments/matched_cv.py the value blend
    with ties mapped worse than without on 10 of 16 fields (up to 0.16 x regression kriging's
    RMSE; better on 5, by at most 0.03), and the CV's paired gain did not tell which (the two
    fields where it passed one standard error both mapped worse).
    """
    if options.well_ties == "never" or volume or isinstance(model, Kriging | RegressionKriging):
        return False
    return options.well_ties == "always" or not _kriges(model)


def _kriges(model) -> bool:
    """True for a kriging candidate or a blend that gives one weight."""
    if isinstance(model, Blend):
        return any(_kriges(m) for m, w in zip(model.members, model.weights, strict=True) if w > 0)
    return isinstance(model, Kriging | RegressionKriging)


@dataclass
class _Folds:
    """The fold designs of one target, what sized them and the score weights they imply."""

    block: float
    block_source: str
    variogram: dict
    designs: dict  # every design the card compares, by name
    design: FoldDesign  # the chosen one: it scores, selects, ties and calibrates
    representative: np.ndarray  # declustering weights raked to the map (cv_representative)
    unsupported: float  # share of the map in bins no held-out well falls into


def _train_target(prep: _Prepared, target: str, options: TrainOptions) -> TargetModel:
    """One target through the stages: folds -> cross-validate every candidate -> select -> well
    ties -> calibrate -> final fit and field-wide numbers -> explain."""
    task = task_of(prep.wells, target)
    table = _target_table(prep, target, options)
    folds = _fold_setup(prep, table, options, task, target)
    candidates = _candidates(prep, task, target, options)
    board, oofs = _cross_validate(candidates, table, folds, options, task, target)
    chosen = _select(board, oofs, table, task)
    if _ties_offered(options, task, prep.volume, oofs[chosen][0]):
        chosen = _with_well_ties(chosen, board, oofs, table, folds, options, task)
    for row in board:
        row["chosen"] = row["candidate"] == chosen
    chosen_row = next(r for r in board if r["chosen"])
    model, oof = oofs[chosen]
    notes = list(table.notes)
    if folds.variogram["pure_nugget"]:
        notes.append(
            f"{target}: the residuals of the linear baseline show no spatial correlation (pure"
            " nugget semivariogram): kriging and well ties are unlikely to add much, and the CV"
            " blocks are sized by the well spacing instead"
        )
    map_error, calibration, spread_model = None, None, None
    if task == "regression":
        map_error = _expected_map_error(model, chosen_row, table, folds, prep, options)
        calibration, spread_model = _calibrate(
            model,
            table.data,
            oof,
            map_error["scale"],
            folds.design,
            list(prep.spec.attributes),
            options,
            target,
            notes,
        )
    final = clone(model).fit(table.data)
    on_map = final.predict(prep.map_X, prep.map_X_xy)
    wide = _field_wide(prep, table, target, task, oof, on_map, calibration, options.seed)
    notes += _field_wide_notes(target, wide)
    map_factors = None
    if task == "classification":
        # no prior shift: drilling chose places by what the seismic sees, so p(facies | seismic)
        # holds on the map (covariate shift); shifting the priors raised the map's Brier score
        # in experiments/field_wide.py
        proportions = np.array(
            [wide.estimates[wide.recommended]["proportions"][c] for c in table.classes]
        )
        map_factors = rule_factors(options.facies_map, on_map, proportions)
    fold_of = folds.design.fold_of(len(table.y))
    imp, aoa, aoa_cv, facts = _explain(
        final, oof, chosen_row, table, fold_of, prep, task, target, options.seed
    )
    distance = distance_summary(table.data.map_distances, folds.designs, options.cv)
    if map_error is not None:
        distance["map_error"] = map_error
    distance["score_weights"] = {
        "what": (
            "declustering weights raked so the held-out wells match the map's nearest-well distance"
            " and attribute quartiles (target-weighted CV); the leaderboard's cv_representative"
            " uses them, while the reported scores, models, selection and intervals use the"
            " declustering weights"
        ),
        "unsupported_map_share": round(folds.unsupported, 3),
        "effective_wells": round(effective_size(folds.representative, table.units), 1),
    }
    facts["warnings"] += _design_warnings(folds, distance, options.cv, target)
    return TargetModel(
        name=target,
        task=task,
        transform=table.transform,
        classes=table.classes,
        model=final,
        calibration=calibration,
        block_size=folds.block,
        block_size_source=folds.block_source,
        leaderboard=board,
        chosen=chosen,
        oof=oof,
        observed=table.y,
        weights=table.data.weights,
        variogram=folds.variogram,
        data=table.data,
        candidates={k: v[0] for k, v in oofs.items()},
        spread=spread_model,
        importance=imp,
        applicability=aoa,
        applicability_cv=aoa_cv,
        trust=facts,
        units=table.units,
        design=folds.design,
        distances=distance,
        folds=fold_of,
        notes=notes,
        representative_weights=folds.representative,
        field_wide=wide,
        map_factors=map_factors,
        rows=table.rows,
    )


def _fold_setup(
    prep: _Prepared, table: _TargetTable, options: TrainOptions, task: Task, target: str
) -> _Folds:
    """Blocks sized by the linear baseline's residual variogram, the fold designs, and the score
    weights that make the held-out wells stand for the map."""
    data, attrs = table.data, list(prep.spec.attributes)
    block, block_source, vario = _block_size(
        data, options, attrs, table.baseline_y, table.heads[table.head_of], table.units
    )
    data.groups = block_labels(
        table.heads[table.head_of, 0], table.heads[table.head_of, 1], block, options.block_angle
    )
    designs = _designs(table, block, options, task, target)
    design = designs[options.cv]
    margins = [(design.distances, data.map_distances)]
    if prep.map_attrs is not None:
        margins += [(data.X[a].to_numpy(float), prep.map_attrs[a].to_numpy(float)) for a in attrs]
    representative, unsupported = representative_weights(data.weights, margins)
    return _Folds(block, block_source, vario, designs, design, representative, unsupported)


def _candidates(prep: _Prepared, task: Task, target: str, options: TrainOptions) -> list:
    """The leaderboard's candidates for ``target``, narrowed to the user's ``--candidate``s."""
    attrs = list(prep.spec.attributes)
    facies = (
        prep.wells["facies"].dropna().astype(str)
        if "facies" in prep.wells
        else pd.Series([], dtype=str)
    )
    candidates = leaderboard_candidates(
        task,
        attrs,
        prep.names,
        volume=prep.volume,
        facies_mixture=target != "facies" and facies.nunique() >= 2,
        monotone=(
            monotone_constraints(options.monotone, attrs, prep.names) if options.monotone else None
        ),
    )
    if options.candidates:
        known = [c.name for c in candidates]
        candidates = [c for c in candidates if c.name in options.candidates]
        if not candidates:
            why = (
                " (LightGBM classifiers are offered for facies in volumes only: on maps their"
                " probabilities stay flat beyond the wells' attribute range, see the README)"
                if task == "classification" and not prep.volume
                else ""
            )
            raise InputError(
                f"none of the candidates {', '.join(options.candidates)} applies to {target!r}; "
                f"choose from {', '.join(known)}{why}"
            )
    return candidates


def _cross_validate(
    candidates: list,
    table: _TargetTable,
    folds: _Folds,
    options: TrainOptions,
    task: Task,
    target: str,
) -> tuple[list[dict], dict]:
    """Every candidate and their blend on the chosen design (and on random folds, for contrast):
    the leaderboard's rows and name -> (model, out-of-fold prediction) on the chosen design."""
    runs = {}
    for name in progress(
        [options.cv, "random"], f"{target}: cross-validating {len(candidates)} candidates"
    ):
        runs[name] = _cross_validate_all(candidates, table.data, folds.designs[name].splits)
    oofs, random_oofs = runs[options.cv], runs["random"]
    board = [
        _board_row(name, model, task, table, oof, random_oofs[name][1], folds.representative)
        for name, (model, oof) in oofs.items()
    ]
    return board, oofs


def _with_well_ties(
    chosen: str,
    board: list[dict],
    oofs: dict,
    table: _TargetTable,
    folds: _Folds,
    options: TrainOptions,
    task: Task,
) -> str:
    """Cross-validate the chosen model with well ties, add them to the leaderboard and return the
    name kept: the tied model unless the CV finds them clearly worse (or ``--well-ties
    always``)."""
    data = table.data
    tied = WellTies(clone(oofs[chosen][0]))
    oofs[tied.name] = (tied, out_of_fold(tied, data, folds.design.splits))
    keep = options.well_ties == "always" or _clearly_better(
        _losses(table.y, oofs[tied.name][1]),
        _losses(table.y, oofs[chosen][1]),
        data.weights,
        table.units,
        margin=TIES_MARGIN[task],
    )
    # the random-CV contrast costs another nested CV: only for ties that are kept
    random_oof = out_of_fold(tied, data, folds.designs["random"].splits) if keep else None
    board.append(
        _board_row(
            tied.name, tied, task, table, oofs[tied.name][1], random_oof, folds.representative
        )
    )
    return tied.name if keep else chosen


def _expected_map_error(
    model, chosen_row: dict, table: _TargetTable, folds: _Folds, prep: _Prepared, options
) -> dict:
    """The chosen model's CV error carried over to the map's prediction distances and to
    training on every well (see :mod:`predictor.map_error`)."""
    rmse = chosen_row["cv"]["rmse"]
    return expected_map_error(
        rmse,
        VariogramModel(**folds.variogram),
        table.heads,
        table.head_of,
        folds.design.splits,
        prep.map_xy,
        table.data.weights,
        training_size_factor(model, table.data, folds.design.splits, rmse, options.seed),
        chosen_row["cv_se"],
    )


def _explain(
    final,
    oof: np.ndarray,
    chosen_row: dict,
    table: _TargetTable,
    fold_of: np.ndarray,
    prep: _Prepared,
    task: Task,
    target: str,
    seed: int,
):
    """Feature importance, the area of applicability and the trust checks (``facts``, with
    their ``warnings``) of the final model."""
    data = table.data
    values, _ = contributions(final, data.X, data.xy, prep.names, background=data.X, seed=seed)
    imp = importance(values, data.weights, prep.names)
    aoa, di = fit_applicability(data.X[prep.names], imp.drop(KRIGING), fold_of)
    aoa_cv = _inside_outside(task, table.y, oof, data.weights, table.classes, di <= aoa.threshold)
    warned, facts = trust_warnings(
        target,
        task,
        imp,
        data.X[prep.names],
        values[..., :-1] if values.ndim == 2 else values,
        chosen_row["cv"],
        chosen_row["cv_random"],
        len(table.classes),
        pd.Series(table.units).groupby(fold_of).nunique().tolist(),
        impedance=[a for a, kind in prep.attribute_kinds.items() if kind == "impedance"],
    )
    facts["warnings"] = warned
    return imp, aoa, aoa_cv, facts


def _design_warnings(folds: _Folds, distance: dict, cv: str, target: str) -> list[str]:
    """Where the CV cannot stand for the map: map bins no held-out well represents, and a map
    that no fold design's prediction distances reproduce."""
    warned = []
    if folds.unsupported > 0:
        warned.append(
            f"{target}: {folds.unsupported:.0%} of the map lies in nearest-well-distance or"
            " attribute quartiles that no held-out well falls into, so the CV scores cannot stand"
            " for that part of the map"
        )
    w, map_median = folds.design.w, distance["map_median_distance"]
    if w > 0.5 * map_median and w > 0:
        cv_median = distance["designs"][cv]["median_cv_distance"]
        farther = cv_median > map_median
        warned.append(
            f"{target}: no CV design reproduces the map's prediction distances (W = {w:.0f}"
            f" m; held-out wells a median {cv_median:.0f} m from training wells, map nodes"
            f" {map_median:.0f} m from a well): "
            + (
                "the held-out wells are farther from their training wells than the map is from its "
                "wells (regular or sparse drilling), so the CV error is likely pessimistic"
                if farther
                else (
                    "the map reaches farther from the wells than any held-out well does, so "
                    "its error there is likely larger than the CV says"
                )
            )
        )
    return warned


def _field_wide(
    prep: _Prepared,
    table: _TargetTable,
    target: str,
    task: Task,
    oof,
    on_map,
    calibration,
    seed: int,
) -> FieldWide:
    """Naive, declustered and seismic-debiased field-wide estimates of one target."""
    rows = table.rows
    common = dict(
        weights=table.data.weights,
        cell_weights=prep.cell_weights[rows],
        nearest_weights=prep.nearest_weights[rows],
        units=table.units,
        seed=seed,
    )
    if task == "classification":
        return field_wide_classes(
            target, np.asarray(table.classes)[table.y], table.classes, oof, on_map, **common
        )
    values = 10.0**table.y if table.transform == "log10" else table.y
    point = calibration.clip(on_map)
    if table.transform == "log10":
        # the map holds 10^(mean of log10), about the median: the mean adds the residuals back (Duan
        # 1983 smearing)
        point = 10.0**point * float(np.average(10.0 ** (table.y - oof), weights=table.data.weights))
    return field_wide_values(target, values, oof, on_map, map_values=point, **common)


OUTSIDE_WARN = 0.2  # share of the map beyond the wells' range of the model's prediction


def _field_wide_notes(target: str, wide: FieldWide) -> list[str]:
    if wide.outside_share <= OUTSIDE_WARN:
        return []
    return [
        f"{target}: {wide.outside_share:.0%} of the map has a predicted value beyond those the"
        " wells were predicted at, so the field-wide estimate debiased with the seismic"
        " extrapolates its calibration there; its interval understates the uncertainty"
    ]


def _calibrate(
    model,
    data: FitData,
    oof: np.ndarray,
    scale: float,
    design,
    attrs: list[str],
    options: TrainOptions,
    target: str,
    notes: list[str],
):
    """q10/q90 offsets from the design's out-of-fold residuals, scaled by a local spread.

    The residuals are first multiplied by the expected map error's ``scale`` (the square root of
    the kriging-variance ratio of map nodes to held-out wells times the training-size factor,
    see :mod:`predictor.map_error`), so the intervals are as wide as the map's expected error,
    not the held-out wells'.
    """
    residuals = (data.y - oof) * scale
    oof_spread, spread_model = None, None
    if options.interval_spread == "kriging" and isinstance(model, WellTies):
        oof_spread, spread_model = _oof_spread(model, data, design.splits), "kriging"
    elif options.interval_spread in ("features", "kriging"):
        if options.interval_spread == "kriging":
            notes.append(
                f"{target}: kriging spread needs a well-tied model (add --well-ties always);"
                " intervals use the feature spread"
            )
        oof_spread, spread_model = _feature_spread(attrs, data, residuals, design.splits)
    bounds = PHYSICAL_BOUNDS.get(target)
    # the facies map's probabilities mix each facies' residuals for exceedance
    classes = (
        ("facies", data.facies, data.facies_classes)
        if "facies" in options.targets and data.facies is not None
        else None
    )
    calibration = calibrate(
        residuals,
        data.weights,
        spread=oof_spread,
        units=data.units,
        bounds=bounds,
        predicted=oof,
        classes=classes,
    )
    # checked on the residuals the calibration used (scaled to the map's expected error)
    calibration.held_out_coverage = held_out_coverage(
        oof + residuals, oof, data.weights, design.splits, oof_spread, data.units, bounds
    )
    return calibration, spread_model


def _inside_outside(task, y, oof, weights, classes, inside) -> dict:
    """CV scores of the wells inside and outside the area of applicability."""
    out = {
        "threshold_rule": "upper whisker of the training wells' CV dissimilarity index",
        "wells_inside": int(inside.sum()),
        "wells_outside": int((~inside).sum()),
    }
    for label, sel in (("inside", inside), ("outside", ~inside)):
        with warnings.catch_warnings():
            warnings.simplefilter(
                "ignore"
            )  # a subset may lack a class; scikit-learn says so on every call
            out[f"cv_{label}"] = (
                _score(task, y[sel], oof[sel], weights[sel], classes) if sel.sum() >= 3 else None
            )
    return out


def _losses(y: np.ndarray, oof: np.ndarray) -> np.ndarray:
    """Per-well loss: squared error (values) or log-loss (class probabilities, y as codes)."""
    if oof.ndim == 1:
        return (y - oof) ** 2
    return -np.log(np.clip(oof[np.arange(len(y)), y.astype(int)], 1e-15, None))


def _clearly_better(
    challenger: np.ndarray, incumbent: np.ndarray, weights, units=None, margin: float = 1.0
) -> bool:
    """True when the challenger's per-well out-of-fold losses beat the incumbent's by more than
    ``margin`` standard errors of the (declustering-weighted) paired difference.

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
    return mean < -margin * se


def _feature_spread(attrs, data: FitData, residuals, splits):
    """Cross-fitted spread at each well (for calibration) and the spread model fitted on all
    wells."""

    def fit_predict(train_rows: ArrayLike, test: ArrayLike):
        model = SpreadModel(attrs).fit(
            data.X.iloc[train_rows], residuals[train_rows], data.weights[train_rows]
        )
        return model.predict(data.X.iloc[test])

    return fold_predictions(splits, len(residuals), fit_predict), SpreadModel(attrs).fit(
        data.X, residuals, data.weights
    )


def _oof_spread(model: WellTies, data: FitData, splits) -> np.ndarray:
    """Kriging standard deviation of the residual field at each held-out well, from its fold's
    model."""

    def fit_predict(train_rows: ArrayLike, test: ArrayLike):
        return np.sqrt(clone(model).fit(data.subset(train_rows)).residual_variance(data.xy[test]))

    return fold_predictions(splits, len(data.y), fit_predict)


def _loss_se(y: np.ndarray, oof: np.ndarray, weights: np.ndarray, units: np.ndarray) -> float:
    """Standard error of the weighted mean per-well loss (squared error or log-loss), wells averaged
    first."""
    frame = (
        pd.DataFrame({"l": _losses(y, oof) * weights, "w": weights, "u": units}).groupby("u").sum()
    )
    loss, w = (frame["l"] / frame["w"]).to_numpy(), frame["w"].to_numpy()
    mean = float(np.sum(w * loss) / w.sum())
    return float(np.sqrt(np.sum(w / w.sum() * (loss - mean) ** 2) / max(effective_size(w) - 1, 1)))
