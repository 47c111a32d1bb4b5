"""``predictor explain``: SHAP tables, figures and contribution maps for every target of a
bundle."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from .bundle import Bundle, load_bundle
from .explain import KRIGING, contributions, importance
from .features import build_features, describe_feature, feature_matrix
from .io.atomic import atomic_folder
from .io.netcdf import write_netcdf
from .volume import is_volume, map_view, view_depth, wells_in_view

CHUNK = 20_000


def _class_slices(info: dict):
    """(label, index) per explained output: one for a property, one per class (log-odds) for
    facies."""
    if info["task"] == "classification":
        return [(f"{cls} (log-odds)", i) for i, cls in enumerate(info["classes"])]
    return [("", None)]


def explain_wells(
    bundle: Bundle, target: str
) -> tuple[np.ndarray, np.ndarray, pd.DataFrame, pd.DataFrame]:
    """Contributions at the training wells: (values, base, wells table, well features)."""
    names = bundle.card["features"]["names"]
    wells, features = bundle.training_wells()
    values, base = contributions(
        bundle.models[target],
        features,
        wells[["x", "y"]].to_numpy(float),
        names,
        background=features,
    )
    return values, base, wells, features


def well_contributions(bundle: Bundle, target: str) -> pd.DataFrame:
    """Contributions at the training wells as a table: one row per well (``well_id``, ``x``,
    ``y``), a column per feature and ``kriging_of_wells``, then ``base`` and ``output`` (base
    plus the contributions: the model's raw output); facies columns are prefixed
    ``<class>:`` (log-odds)."""
    values, base, wells, _ = explain_wells(bundle, target)
    return _contribution_table(bundle, target, values, base, wells)


def _contribution_table(bundle: Bundle, target: str, values, base, wells) -> pd.DataFrame:
    names = bundle.card["features"]["names"]
    info = bundle.card["targets"][target]
    table = wells[["well_id", "x", "y"]].copy()
    for _, k in _class_slices(info):
        v = values if k is None else values[:, k, :]
        b = base if k is None else base[:, k]
        tag = "" if k is None else f"{info['classes'][k]}:"
        for j, name in enumerate(list(names) + [KRIGING]):
            table[f"{tag}{name}"] = v[:, j]
        table[f"{tag}base"] = b
        table[f"{tag}output"] = b + v.sum(axis=1)
    return table


def contribution_maps(
    bundle: Bundle, grid: xr.Dataset, target: str, chunk: int = CHUNK, z: float | None = None
) -> xr.Dataset:
    """Per-feature contribution maps (chunked), named ``<target>[_<class>]_shap_<feature>``.

    For a volume: the map view at ``z`` (default: the middle of the training wells' samples),
    from features built on whole traces.
    """
    names = bundle.card["features"]["names"]
    info = bundle.card["targets"][target]
    features = build_features(grid, bundle.feature_spec)
    if is_volume(grid):
        features = map_view(
            features, view_depth(grid, bundle.training_wells()[0]) if z is None else z
        )
        grid = features
    matrix, valid = feature_matrix(features, names)
    xx, yy = np.meshgrid(grid.x.to_numpy(), grid.y.to_numpy())
    xy = np.column_stack([xx.ravel()[valid], yy.ravel()[valid]])
    _, wells_features = bundle.training_wells()
    parts = []
    for s in range(0, len(matrix), chunk):
        X = pd.DataFrame(matrix[s : s + chunk], columns=names)
        parts.append(
            contributions(
                bundle.models[target], X, xy[s : s + chunk], names, background=wells_features
            )[0]
        )
    values = np.concatenate(parts)
    out = xr.Dataset(
        coords={"x": grid.x, "y": grid.y},
        attrs={k: grid.attrs[k] for k in ("z_shown", "axis_labels", "z_domain") if k in grid.attrs},
    )
    shape = (grid.sizes["y"], grid.sizes["x"])
    for label, k in _class_slices(info):
        v = values if k is None else values[:, k, :]
        prefix = target if k is None else f"{target}_{info['classes'][k]}"
        for j, name in enumerate(list(names) + [KRIGING]):
            if not np.any(v[:, j]):
                continue
            full = np.full(valid.size, np.nan)
            full[valid] = v[:, j]
            out[f"{prefix}_shap_{name}"] = (("y", "x"), full.reshape(shape))
            out[f"{prefix}_shap_{name}"].attrs["long_name"] = (
                f"contribution of {describe_feature(name)} to {target} {label}"
            ).strip()
    return out


def output_unit(target: str, info: dict) -> str:
    """The unit SHAP values of a target are in: the model's raw output."""
    if info["task"] == "classification":
        return "log-odds"
    if info.get("transform") == "log10":
        return "log10 mD"
    return "fraction" if target == "porosity" else "target units"


def explain_bundle(
    bundle_dir: str | Path, out: str | Path, grid: xr.Dataset | None = None, overwrite: bool = False
) -> list[str]:
    """Write importance tables, SHAP at the wells, figures and (with a grid) contribution maps."""
    from . import plots  # matplotlib loads when a figure is drawn, not on import

    bundle = load_bundle(bundle_dir)
    names = bundle.card["features"]["names"]
    lines = []
    with atomic_folder(out, overwrite=overwrite) as tmp:
        for target, info in bundle.card["targets"].items():
            values, base, wells, features = explain_wells(bundle, target)
            imp = importance(values, wells["weight"].to_numpy(float), names)
            imp.rename("mean_abs_shap").to_csv(
                tmp / f"{target}_importance.csv", index_label="feature"
            )
            plots.importance_chart(
                imp, target, tmp / f"{target}_importance.png", output_unit(target, info)
            )
            table = _contribution_table(bundle, target, values, base, wells)
            for label, k in _class_slices(info):
                v = values if k is None else values[:, k, :]
                stem = target if k is None else f"{target}_{info['classes'][k]}"
                cols = [n for n in names if np.any(v[:, names.index(n)])]
                if cols:
                    idx = [names.index(c) for c in cols]
                    plots.shap_summary(
                        v[:, idx],
                        features,
                        cols,
                        f"{target} {label}".strip(),
                        tmp / f"{stem}_summary.png",
                        unit=output_unit(target, info),
                    )
                    top = sorted(cols, key=lambda c: -imp.get(c, 0))[:2]
                    for feat in top:
                        plots.shap_dependence(
                            v[:, idx],
                            features,
                            cols,
                            feat,
                            f"{target} {label}: {describe_feature(feat)}".strip(),
                            tmp / f"{stem}_dependence_{feat}.png",
                        )
            table.to_csv(tmp / f"{target}_shap_at_wells.csv", index=False)
            lines.append(
                f"{target}, mean |contribution| at the wells in {output_unit(target, info)} "
                "(declustering-weighted; largest first): "
                + ", ".join(f"{k} {v:.3g}" for k, v in imp.head(5).items() if v > 0)
            )
            if grid is not None:
                maps = contribution_maps(bundle, grid, target)
                write_netcdf(maps, tmp / f"{target}_shap_maps.nc")
                ranked = sorted(
                    maps.data_vars, key=lambda v: -float(np.nanmean(np.abs(maps[v].to_numpy())))
                )
                shown = (
                    wells_in_view(wells, grid, maps.attrs["z_shown"]) if is_volume(grid) else wells
                )
                plots.shap_maps(
                    maps,
                    [str(v) for v in ranked[:3]],
                    shown,
                    tmp / f"{target}_shap_maps.png",
                    unit=output_unit(target, info),
                )
        for warning in bundle.card.get("warnings", []):
            lines.append(f"warning: {warning}")
    return lines
