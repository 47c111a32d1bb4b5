"""Model bundles on disk: LightGBM text models, JSON descriptions and ``model_card.json``.

Nothing is pickled.  The card lists the SHA-256 of every other file; loading checks each one
and refuses a bundle with a missing or altered file or an unknown schema version.
"""

from __future__ import annotations

import hashlib
import json
import platform
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from . import __version__
from .errors import BundleError
from .explain import Applicability
from .features import FeatureSpec
from .intervals import IntervalCalibration, SpreadModel
from .io.atomic import atomic_folder
from .io.jsonfile import dumps, plain
from .models import load_candidate

SCHEMA_VERSION = 1
CARD = "model_card.json"


def sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def package_versions() -> dict:
    import lightgbm
    import pandas
    import scipy
    import sklearn
    import xarray

    return {
        "predictor": __version__,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "pandas": pandas.__version__,
        "scikit-learn": sklearn.__version__,
        "lightgbm": lightgbm.__version__,
        "xarray": xarray.__version__,
    }


def model_card(trained, inputs: dict | None = None) -> dict:
    """The card's content (without the file checksums)."""
    targets = {}
    for name, tm in trained.targets.items():
        chosen = next(r for r in tm.leaderboard if r["chosen"])
        targets[name] = {
            "task": tm.task,
            "transform": tm.transform,
            "classes": tm.classes,
            "chosen": tm.chosen,
            "cv": chosen["cv"],
            "cv_random": chosen["cv_random"],
            "cv_method": tm.design.description + ", scores weighted by the declustering weights",
            "cv_design": tm.distances,
            "block_size": tm.block_size,
            "block_size_source": tm.block_size_source,
            "residual_variogram": tm.variogram,
            "leaderboard": tm.leaderboard,
            "calibration": tm.calibration.to_dict() if tm.calibration else None,
            "interval_spread": (
                tm.spread
                if isinstance(tm.spread, str) or tm.spread is None
                else "features: log|residual| linear in " + ", ".join(tm.spread.features)
            ),
            "n_wells": int(tm.observed.size if tm.units is None else np.unique(tm.units).size),
            "n_samples": int(tm.observed.size),
            "importance": {
                "measure": "declustering-weighted mean |SHAP| at the wells (raw model output)",
                "values": tm.importance.round(8).to_dict() if tm.importance is not None else {},
            },
            "trust": tm.trust,
            "applicability": {
                "threshold": tm.applicability.threshold if tm.applicability else None,
                **tm.applicability_cv,
            },
        }
        if tm.map_factors is not None:
            targets[name]["facies_map"] = {
                "rule": trained.options.facies_map,
                "rule_factors": _by_class(tm.classes, tm.map_factors),
                "what": "the class drawn at a node is the largest of probability * rule factor",
            }
    return {
        "schema_version": SCHEMA_VERSION,
        "what": "predictor model bundle: a model, not a measurement; see the README's cautions",
        "versions": package_versions(),
        "inputs": inputs or {},
        "options": trained.options.to_dict(),
        "space": trained.space,
        "features": {
            "spec": trained.feature_spec.to_dict(),
            "names": trained.feature_names,
            "training_ranges": trained.training_ranges,
            "attribute_kinds": trained.attribute_kinds,
        },
        "declustering": trained.declustering,
        "naive": trained.statistics["naive"],
        "declustered": trained.statistics["declustered"],
        "declustered_cell": trained.statistics["declustered_cell"],
        "global": {
            name: tm.field_wide.to_dict() for name, tm in trained.targets.items() if tm.field_wide
        },
        "targets": targets,
        "warnings": trained.warnings,
        "wells": {
            "count": int(trained.wells["well_id"].nunique()),
            "weights": dict(
                zip(
                    trained.wells["well_id"].astype(str),
                    np.round(trained.weights, 6).tolist(),
                    strict=True,
                )
            ),
        },
    }


def _by_class(classes, values) -> dict:
    return {str(c): float(v) for c, v in zip(classes, values, strict=True)}


def save_bundle(
    trained, folder: str | Path, inputs: dict | None = None, overwrite: bool = False
) -> Path:
    """Write the bundle folder atomically; returns its path."""
    folder = Path(folder)
    card = model_card(trained, inputs)
    with atomic_folder(folder, overwrite=overwrite) as tmp:
        for name, tm in trained.targets.items():
            sub = tmp / name
            sub.mkdir()
            desc = tm.model.save(sub, "model")
            (sub / "model.json").write_text(dumps(desc), encoding="utf-8")
            if tm.calibration:
                spread = tm.spread.to_dict() if hasattr(tm.spread, "to_dict") else tm.spread
                (sub / "calibration.json").write_text(
                    dumps({**tm.calibration.to_dict(), "spread": spread}), encoding="utf-8"
                )
            card["targets"][name]["model_file"] = f"{name}/model.json"
            tm.out_of_fold_table(trained.wells).to_csv(
                sub / "out_of_fold.csv", index=False, lineterminator="\n"
            )
            if tm.applicability is not None:
                (sub / "applicability.json").write_text(
                    dumps(tm.applicability.to_dict()), encoding="utf-8"
                )
        table = trained.wells.assign(weight=trained.weights)
        features = trained.well_features.add_prefix("feature:")
        pd.concat([table, features], axis=1).to_csv(
            tmp / "training_wells.csv", index=False, lineterminator="\n"
        )
        card["files"] = {
            str(p.relative_to(tmp)): sha256(p) for p in sorted(tmp.rglob("*")) if p.is_file()
        }
        (tmp / CARD).write_text(dumps(card), encoding="utf-8")
    return folder


@dataclass
class Bundle:
    folder: Path | None  # None: held in memory (see in_memory)
    card: dict
    models: dict
    calibrations: dict
    spreads: dict
    applicability: dict

    def training_wells(self) -> tuple[pd.DataFrame, pd.DataFrame]:
        """The training wells (id, coordinates, targets, weight) and their features, row for row."""
        table = pd.read_csv(self.folder / "training_wells.csv")
        cols = [c for c in table.columns if c.startswith("feature:")]
        return table.drop(columns=cols), table[cols].rename(columns=lambda c: c[len("feature:") :])

    def out_of_fold(self, target: str) -> pd.DataFrame:
        """The chosen model's out-of-fold predictions at the training wells (matched folds)."""
        return pd.read_csv(self.folder / target / "out_of_fold.csv", dtype={"well_id": str})

    @property
    def feature_spec(self) -> FeatureSpec:
        return FeatureSpec.from_dict(self.card["features"]["spec"])


def in_memory(trained) -> Bundle:
    """The bundle of a training run without writing it: ``predict_maps(train(...), grid)`` in a
    notebook maps the same values as saving the bundle and predicting from the folder."""
    targets = trained.targets
    return Bundle(
        None,
        plain(model_card(trained)),
        {n: tm.model for n, tm in targets.items()},
        {n: tm.calibration for n, tm in targets.items()},
        {n: tm.spread for n, tm in targets.items()},
        {n: tm.applicability for n, tm in targets.items()},
    )


def load_bundle(folder: str | Path) -> Bundle:
    """Read a bundle, verifying the schema version and every file's checksum."""
    folder = Path(folder)
    card_path = folder / CARD
    if not card_path.exists():
        raise BundleError(
            f"{folder}: no {CARD}; this is not a predictor model bundle (train one with `predictor"
            " train`)"
        )
    try:
        card = json.loads(card_path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        raise BundleError(
            f"{card_path}: not valid JSON ({err}); the bundle is damaged, retrain it"
        ) from None
    version = card.get("schema_version")
    if version != SCHEMA_VERSION:
        raise BundleError(
            f"{card_path}: schema version {version!r}, this predictor reads version"
            f" {SCHEMA_VERSION}; use the predictor version that wrote it or retrain"
        )
    for rel, digest in card.get("files", {}).items():
        path = folder / rel
        if not path.exists():
            raise BundleError(
                f"{folder}: file {rel} listed in the card is missing; the bundle is incomplete,"
                " retrain it"
            )
        if sha256(path) != digest:
            raise BundleError(
                f"{folder}: file {rel} was altered since training (SHA-256 differs); "
                "load bundles only from trusted sources, or retrain"
            )
    models, calibrations, spreads, applicability = {}, {}, {}, {}
    for name, info in card["targets"].items():
        rel = info["model_file"]
        if rel not in card.get("files", {}):
            raise BundleError(
                f"{folder}: model file {rel} has no checksum in the card; retrain the bundle"
            )
        desc = json.loads((folder / rel).read_text(encoding="utf-8"))
        models[name] = load_candidate(desc, (folder / rel).parent)
        calibrations[name], spreads[name] = None, None
        aoa_path = folder / name / "applicability.json"
        applicability[name] = (
            Applicability.from_dict(json.loads(aoa_path.read_text(encoding="utf-8")))
            if aoa_path.exists()
            else None
        )
        if info.get("calibration"):
            stored = json.loads((folder / name / "calibration.json").read_text(encoding="utf-8"))
            spread = stored.pop("spread", None)
            calibrations[name] = IntervalCalibration(**stored)
            spreads[name] = SpreadModel.from_dict(spread) if isinstance(spread, dict) else spread
    return Bundle(folder, plain(card), models, calibrations, spreads, applicability)
