"""Figures (PNG) for QC, declustering, maps and cross-validation.

Every figure is written atomically and closed, so loops over many figures stay flat in memory.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib
from numpy.typing import ArrayLike

matplotlib.use("Agg")
import matplotlib.patches  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402
import matplotlib.ticker  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import xarray as xr  # noqa: E402

from .features import describe_feature  # noqa: E402
from .io.atomic import atomic_file  # noqa: E402

FACIES_COLOURS = ["#6b4f3a", "#c9a55c", "#f2e394", "#7fa7c9", "#a3c586", "#d98c8c"]


def save(fig, path: str | Path) -> Path:
    path = Path(path)
    with atomic_file(path) as tmp:
        fig.savefig(tmp, format="png", dpi=100, bbox_inches="tight", metadata={"Software": None})
    plt.close(fig)
    return path


def _extent(grid: xr.Dataset) -> list[float]:
    dx = float(grid.x[1] - grid.x[0])
    dy = float(grid.y[1] - grid.y[0])
    return [
        float(grid.x[0]) - dx / 2,
        float(grid.x[-1]) + dx / 2,
        float(grid.y[0]) - dy / 2,
        float(grid.y[-1]) + dy / 2,
    ]


def _background(ax, grid: xr.Dataset, var: str, cmap="Greys", **kw):
    im = ax.imshow(grid[var].to_numpy(), origin="lower", extent=_extent(grid), cmap=cmap, **kw)
    ax.set_aspect("equal")
    xlabel, ylabel = grid.attrs.get(
        "axis_labels", ("x (m)", "y (m)")
    )  # a volume's map view is in line numbers
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=7)
    ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(4))
    return im


KNOWN_FACIES = {
    "sand": "#f2d95c",
    "sandstone": "#f2d95c",
    "silt": "#b8a27a",
    "siltstone": "#b8a27a",
    "shale": "#5b4a3c",
    "mudstone": "#5b4a3c",
    "carbonate": "#7fa7c9",
    "limestone": "#7fa7c9",
}


def _category_colours(labels) -> dict:
    classes = sorted(set(map(str, labels)))
    return {
        c: KNOWN_FACIES.get(c.lower(), FACIES_COLOURS[i % len(FACIES_COLOURS)])
        for i, c in enumerate(classes)
    }


def location_maps(
    wells: pd.DataFrame,
    grid: xr.Dataset,
    attribute: str,
    properties: list[str],
    path: str | Path,
    background_label: str | None = None,
) -> Path:
    """One panel per well property, wells coloured by it over the attribute map (its colour bar
    named ``background_label``: the attribute with its units)."""
    n = max(len(properties), 1)
    fig, axes = plt.subplots(1, n, figsize=(5.0 * n, 4.4), squeeze=False, layout="constrained")
    for i, (ax, prop) in enumerate(zip(axes[0], properties, strict=False)):
        im = _background(ax, grid, attribute)
        if i == 0:
            fig.colorbar(
                im,
                ax=ax,
                shrink=0.7,
                label=f"{background_label or attribute}, background",
                location="left",
            )
        if prop == "facies" or not pd.api.types.is_numeric_dtype(wells[prop]):
            colours = _category_colours(wells[prop].dropna())
            for label, c in colours.items():
                sel = wells[prop].astype(str) == label
                ax.scatter(wells.x[sel], wells.y[sel], c=c, edgecolor="k", s=36, label=label)
            ax.legend(fontsize=7, loc="upper right", title=prop)
        else:
            values = wells[prop].to_numpy(dtype=float)
            if prop == "permeability":
                values = np.log10(np.where(values > 0, values, np.nan))
                prop = "log10 permeability (mD)"
            elif prop == "porosity":
                prop = "porosity (fraction)"
            sc = ax.scatter(wells.x, wells.y, c=values, cmap="viridis", edgecolor="k", s=36)
            fig.colorbar(sc, ax=ax, shrink=0.7, label=prop, location="bottom")
        ax.set_title(f"wells: {prop}", fontsize=10)
    if "well_id" in wells:
        _names_on(axes[0, 0], wells)
    return save(fig, path)


NAMES_SPACING = 0.04  # well names are written when wells lie this share of the panel's width apart


def _names_on(ax, wells: pd.DataFrame) -> None:
    """Each well's name beside it, unless the wells crowd the panel (median nearest-well
    distance below NAMES_SPACING of its width), where names would hide the map."""
    from scipy.spatial import cKDTree

    heads = wells.groupby("well_id", sort=False)[["x", "y"]].mean()
    if len(heads) < 2:
        return
    gaps = cKDTree(heads.to_numpy()).query(heads.to_numpy(), k=2)[0][:, 1]
    width = float(np.ptp(ax.get_xlim()))
    if np.median(gaps) < NAMES_SPACING * width:
        return
    for name, (x, y) in heads.iterrows():
        ax.annotate(
            str(name),
            (x, y),
            xytext=(3, 3),
            textcoords="offset points",
            fontsize=6,
            bbox={"boxstyle": "round,pad=0.1", "fc": "white", "ec": "none", "alpha": 0.6},
        )


def bias_figure(
    at_wells: ArrayLike, over_map: ArrayLike, attribute: str, verdict: str, path: str | Path
) -> Path:
    """Histograms and empirical CDFs of the attribute at the wells and over the map."""
    a = np.asarray(at_wells, float)
    b = np.asarray(over_map, float)
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    fig, (h, c) = plt.subplots(1, 2, figsize=(10, 3.8))
    bins = np.linspace(min(a.min(), b.min()), max(a.max(), b.max()), 40)
    h.hist(b, bins=bins, density=True, alpha=0.5, color="grey", label=f"map ({b.size} nodes)")
    h.hist(a, bins=bins, density=True, alpha=0.6, color="tab:red", label=f"wells ({a.size})")
    h.set_xlabel(attribute)
    h.set_ylabel("density")
    h.legend(fontsize=8)
    for ax in (
        h,
        c,
    ):  # impedance values are five digits wide: a few ticks, so the labels never touch
        ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(5))
    for values, colour, name in ((b, "grey", "map"), (a, "tab:red", "wells")):
        s = np.sort(values)
        c.step(s, np.arange(1, s.size + 1) / s.size, color=colour, label=name, where="post")
    c.set_xlabel(attribute)
    c.set_ylabel("cumulative share")
    c.legend(fontsize=8)
    fig.suptitle("\n".join(_wrap(verdict, 120)), fontsize=8)
    return save(fig, path)


def _wrap(text: str, width: int) -> list[str]:
    import textwrap

    return textwrap.wrap(text, width)


def facies_distributions(wells: pd.DataFrame, columns: list[str], path: str | Path) -> Path:
    """Box plots of each numeric property per facies."""
    classes = sorted(wells["facies"].dropna().astype(str).unique())
    fig, axes = plt.subplots(1, len(columns), figsize=(4.2 * len(columns), 3.8), squeeze=False)
    for ax, col in zip(axes[0], columns, strict=False):
        v, label = _property(wells, col)
        facies = wells["facies"].astype(str).to_numpy()
        data = [v[(facies == cl) & np.isfinite(v)] for cl in classes]
        ax.boxplot(data, tick_labels=classes, whis=1.5)
        ax.set_title(label, fontsize=10)
        ax.set_xlabel("facies")
    return save(fig, path)


def declustering_figure(decl, path: str | Path) -> Path:
    """Declustered mean against cell size, the chosen size marked, beside the naive mean."""
    fig, ax = plt.subplots(figsize=(5.5, 3.8))
    ax.plot(decl.sizes, decl.curve, "o-", ms=3, label="declustered mean")
    ax.axhline(decl.naive_mean, color="grey", ls="--", label="naive mean")
    ax.axvline(
        decl.cell_size,
        color="tab:red",
        ls=":",
        label=f"chosen {decl.cell_size:.0f} m ({decl.direction})",
    )
    ax.set_xlabel("cell size (m)")
    ax.set_ylabel(f"mean {decl.variable or ''}")
    ax.legend(fontsize=8)
    return save(fig, path)


def weighted_histograms(
    values: ArrayLike, weights: ArrayLike, name: str, path: str | Path, truth=None
) -> Path:
    """Naive and declustered histograms of a property, with the map truth when known."""
    v = np.asarray(values, float)
    ok = np.isfinite(v)
    fig, ax = plt.subplots(figsize=(5.5, 3.8))
    bins = np.linspace(np.nanmin(v), np.nanmax(v), 25)
    ax.hist(v[ok], bins=bins, density=True, alpha=0.45, label="naive (wells)")
    ax.hist(
        v[ok],
        bins=bins,
        weights=np.asarray(weights)[ok],
        density=True,
        alpha=0.45,
        label="declustered",
    )
    if truth is not None:
        ax.hist(
            np.asarray(truth).ravel(),
            bins=bins,
            density=True,
            histtype="step",
            color="k",
            label="map truth",
        )
    ax.set_xlabel(name)
    ax.legend(fontsize=8)
    return save(fig, path)


def _wells_on(
    ax,
    wells: pd.DataFrame | None,
    column: str | None = None,
    image=None,
    colours: dict | None = None,
    log: bool = False,
):
    """Wells on a map panel with a dark edge; with ``column``, filled with their own logged value
    on the panel's colour scale (``image``) or class colour (``colours``), so a misfit shows."""
    if wells is None:
        return
    fill: object = "white"
    if column and column in wells and (colours is not None or image is not None):
        fill = _fill(wells[column], image, colours, log)
    ax.scatter(wells["x"], wells["y"], s=18, c=fill, edgecolor="k", linewidths=0.8, label="wells")


def _unit(target: str, log: bool = False) -> str:
    """The unit a target is drawn in, for axis and colour-bar labels."""
    return " (log10 mD)" if log else " (fraction)" if target == "porosity" else ""


def _factor(value: float, _position=None) -> str:
    """A ratio as a tick label: 3x, 12x, 150x."""
    return f"{value:.2g}x" if value < 10 else f"{value:.0f}x"


def _fill(values: pd.Series, image=None, colours: dict | None = None, log: bool = False) -> list:
    """Logged values as colours: a class's colour, or the value on an image's colour scale
    (log10 with ``log``); white where there is none."""
    if colours is not None:
        return [colours.get(str(v), "white") for v in values]
    v = values.to_numpy(dtype=float)
    if log:
        with np.errstate(divide="ignore", invalid="ignore"):
            v = np.where(v > 0, np.log10(v), np.nan)
    return [image.cmap(image.norm(x)) if np.isfinite(x) else (1, 1, 1, 1) for x in v]


def facies_maps(
    maps: xr.Dataset, target: str, wells: pd.DataFrame | None, path: str | Path
) -> Path:
    """Most probable class and the probability of each class, wells on top."""
    classes = maps[target].attrs["flag_meanings"].split(" ")
    colours = _category_colours(classes)
    n = len(classes) + 1
    fig, axes = plt.subplots(1, n, figsize=(4.3 * n, 4.0), squeeze=False, layout="constrained")
    codes = maps[target].to_numpy().astype(float)
    codes[codes < 0] = np.nan
    cmap = matplotlib.colors.ListedColormap([colours[c] for c in classes])
    ax = axes[0][0]
    im = _background(
        ax,
        maps.assign(_codes=(("y", "x"), codes)),
        "_codes",
        cmap=cmap,
        vmin=-0.5,
        vmax=len(classes) - 0.5,
    )
    bar = fig.colorbar(im, ax=ax, shrink=0.7, ticks=range(len(classes)), location="bottom")
    bar.ax.set_xticklabels(classes, fontsize=8)
    _wells_on(ax, wells, target, colours=colours)  # each well in the colour of its logged class
    ax.set_title(
        "\n".join(_wrap(maps[target].attrs.get("long_name", f"most probable {target}"), 40)),
        fontsize=9,
    )
    for ax, cls in zip(axes[0][1:], classes, strict=True):
        im = _background(ax, maps, f"{target}_prob_{cls}", cmap="magma", vmin=0, vmax=1)
        fig.colorbar(im, ax=ax, shrink=0.7, location="bottom", label="probability")
        _wells_on(ax, wells)
        ax.set_title(f"P({target} = {cls})", fontsize=10)
    return save(fig, path)


def _quiet_log10(values: np.ndarray) -> np.ndarray:
    """log10 for an axis transform: matplotlib also maps 0 through it while laying out the
    figure, which is -inf there, not an error worth a warning on the user's screen."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.log10(values)


def property_maps(
    maps: xr.Dataset, target: str, wells: pd.DataFrame | None, path: str | Path, log: bool = False
) -> Path:
    """Median (q50) map and interval width (q90 - q10), wells on top."""
    fig, axes = plt.subplots(1, 2, figsize=(10.5, 4.3), layout="constrained")
    q50 = maps[target]
    width = maps[f"{target}_q90"] - maps[f"{target}_q10"]
    if log:
        q50 = np.log10(q50)
        width = np.log10(maps[f"{target}_q90"]) - np.log10(maps[f"{target}_q10"])
    shown = maps.assign(_q50=q50, _width=width)
    unit = _unit(target, log)
    im = _background(axes[0], shown, "_q50", cmap="viridis")
    fig.colorbar(im, ax=axes[0], shrink=0.7, location="bottom", label=f"{target} q50{unit}")
    _wells_on(
        axes[0], wells, target, image=im, log=log
    )  # the wells' logged values on the map's scale
    im = _background(axes[1], shown, "_width", cmap="cividis")
    bar = fig.colorbar(im, ax=axes[1], shrink=0.7, location="bottom", label=f"q90 - q10{unit}")
    if log:  # a width in log10 mD reads as a factor: 1.7 means q90 is about 50 times q10
        factors = bar.ax.secondary_xaxis("top", functions=(lambda w: 10**w, _quiet_log10))
        factors.set_xlabel("q90 / q10 (factor)", fontsize=8)
        factors.xaxis.set_major_formatter(matplotlib.ticker.FuncFormatter(_factor))
        factors.tick_params(labelsize=7)
    _wells_on(axes[1], wells)
    for ax, title in zip(
        axes,
        (
            f"{target}: median (q50), wells filled with their logged value",
            f"{target}: 80 % interval width",
        ),
        strict=True,
    ):
        ax.set_title(title, fontsize=10)
    return save(fig, path)


def distance_cdfs(design: dict, target: str, path: str | Path) -> Path:
    """Empirical CDFs of prediction distances: map node to nearest well, and held-out well to
    nearest training well for each fold design (from the card's quantiles)."""
    cdf = design["cdf"]
    levels = np.asarray(cdf["levels"])
    fig, ax = plt.subplots(figsize=(6.5, 3.8), layout="constrained")
    ax.plot(cdf["map"], levels, color="black", lw=2.5, label="map nodes to nearest well (target)")
    styles = {
        "matched": "tab:blue",
        "nndm": "tab:cyan",
        "blocks": "tab:orange",
        "buffered": "tab:purple",
        "random": "tab:gray",
    }
    for name, info in design["designs"].items():
        chosen = " (used)" if name == design["chosen"] else ""
        ax.plot(
            cdf[name],
            levels,
            color=styles.get(name, "tab:green"),
            lw=2 if chosen else 1.2,
            ls="-" if chosen else "--",
            label=f"{name} CV: held-out well to training, W = {info['w']:.0f} m{chosen}",
        )
    ax.set_xlabel("distance to the nearest well (m)")
    ax.set_ylabel("share of locations (cumulative)")
    ax.set_ylim(0, 1)
    ax.set_xlim(left=0)
    ax.set_title(f"{target}: prediction distances, map vs cross-validation", fontsize=10)
    ax.legend(fontsize=7.5, loc="lower right")
    return save(fig, path)


def leaderboard_chart(leaderboard: list[dict], metric: str, target: str, path: str | Path) -> Path:
    """Matched vs random CV score of every candidate; baselines hatched, the chosen one marked."""
    rows = [r for r in leaderboard if r.get("cv_random")]
    names = [r["candidate"] + (" *" if r["chosen"] else "") for r in rows]
    blocked = [r["cv"][metric] for r in rows]
    random = [r["cv_random"][metric] for r in rows]
    pos = np.arange(len(rows))
    fig, ax = plt.subplots(figsize=(7, 0.45 * len(rows) + 1.4), layout="constrained")
    bars = ax.barh(pos - 0.2, blocked, 0.4, label="matched spatial CV (reported)", color="tab:blue")
    ax.barh(pos + 0.2, random, 0.4, label="random k-fold (optimistic)", color="tab:gray", alpha=0.6)
    for bar, row in zip(bars, rows, strict=True):
        if row["baseline"]:
            bar.set_hatch("//")
    ax.set_yticks(pos, names, fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel(f"{metric} (declustering-weighted)")
    ax.set_title(
        f"{target}: cross-validation leaderboard (* chosen, hatched = baseline)", fontsize=10
    )
    ax.legend(fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.18), ncol=2)
    return save(fig, path)


def importance_chart(imp: pd.Series, target: str, path: str | Path, unit: str = "") -> Path:
    """Horizontal bars of declustering-weighted mean |SHAP|, each feature named in words."""
    imp = imp[imp > 0].sort_values()
    fig, ax = plt.subplots(figsize=(6.5, 0.35 * len(imp) + 1.5), layout="constrained")
    ax.barh([describe_feature(n) for n in imp.index], imp.to_numpy(), color="tab:blue")
    ax.set_xlabel(
        "mean |contribution| at the wells"
        + (f", in {unit}" if unit else "")
        + " (declustering-weighted)"
    )
    ax.set_title(f"{target}: what the model leans on", fontsize=10)
    return save(fig, path)


def shap_summary(
    values: np.ndarray,
    X: pd.DataFrame,
    names: list[str],
    title: str,
    path: str | Path,
    max_display: int = 8,
    unit: str = "",
) -> Path:
    """Beeswarm summary drawn by the shap package, features named in words, contributions in
    ``unit`` (the model's raw output)."""
    import shap

    explanation = shap.Explanation(
        values=values,
        data=X[names].to_numpy(float),
        feature_names=[describe_feature(n) for n in names],
    )
    shap.plots.beeswarm(
        explanation,
        max_display=max_display,
        show=False,
        plot_size=(8, 0.4 * min(len(names), max_display) + 2),
    )
    fig = plt.gcf()
    fig.axes[0].set_xlabel(
        "contribution at each well" + (f" ({unit})" if unit else ""), fontsize=10
    )
    fig.axes[0].tick_params(axis="y", labelsize=9)
    fig.suptitle(title, fontsize=10)
    return save(fig, path)


def shap_dependence(
    values: np.ndarray,
    X: pd.DataFrame,
    names: list[str],
    feature: str,
    title: str,
    path: str | Path,
) -> Path:
    """Dependence (scatter) plot of one feature's contribution, drawn by the shap package."""
    import shap

    explanation = shap.Explanation(
        values=values, data=X[names].to_numpy(float), feature_names=names
    )
    fig, ax = plt.subplots(figsize=(5.5, 4))
    shap.plots.scatter(explanation[:, names.index(feature)], ax=ax, show=False)
    ax.set_title(title, fontsize=10)
    return save(fig, path)


def shap_maps(
    maps: xr.Dataset,
    variables: list[str],
    wells: pd.DataFrame | None,
    path: str | Path,
    unit: str = "",
) -> Path:
    """Contribution maps of the top features (diverging colours around zero), in ``unit`` (the
    model's raw output: a fraction, log10 mD or log-odds)."""
    n = len(variables)
    fig, axes = plt.subplots(1, n, figsize=(4.6 * n, 4.2), squeeze=False, layout="constrained")
    for ax, var in zip(axes[0], variables, strict=True):
        limit = float(np.nanmax(np.abs(maps[var].to_numpy()))) or 1.0
        im = _background(ax, maps, var, cmap="RdBu_r", vmin=-limit, vmax=limit)
        fig.colorbar(
            im,
            ax=ax,
            shrink=0.7,
            location="bottom",
            label=f"contribution ({unit})" if unit else "contribution",
        )
        _wells_on(ax, wells)
        ax.set_title("\n".join(_wrap(maps[var].attrs.get("long_name", var), 42)), fontsize=9)
    return save(fig, path)


def applicability_map(
    maps: xr.Dataset, target: str, wells: pd.DataFrame | None, path: str | Path, log: bool = False
) -> Path:
    """The target's map with the nodes outside the area of applicability shaded (facies: the
    probability of the most probable class; permeability with ``log``: log10 mD)."""
    fig, ax = plt.subplots(figsize=(5.8, 4.6), layout="constrained")
    if "flag_meanings" in maps[target].attrs:  # classes: how sure the model is, not which class
        probs = [f"{target}_prob_{c}" for c in maps[target].attrs["flag_meanings"].split(" ")]
        shown = maps.assign(
            _top=(("y", "x"), np.nanmax(np.stack([maps[p].to_numpy() for p in probs]), axis=0))
        )
        im = _background(ax, shown, "_top", cmap="magma", vmin=0, vmax=1)
        label = f"{target}: probability of the most probable class"
    else:
        values, style, label, _ = _shown(maps, target, log)
        im = _background(ax, maps.assign(_v=values), "_v", **style)
    fig.colorbar(im, ax=ax, shrink=0.7, location="bottom", label=label)
    outside = (maps[f"{target}_applicable"].to_numpy() == 0).astype(float)
    ax.imshow(
        np.where(outside > 0, 1.0, np.nan),
        origin="lower",
        extent=_extent(maps),
        cmap="Greys",
        vmin=0,
        vmax=1.2,
        alpha=0.65,
    )
    ax.legend(
        handles=[matplotlib.patches.Patch(color="0.35", label="outside the area of applicability")],
        loc="upper right",
        fontsize=7,
        framealpha=0.85,
    )
    if "flag_meanings" in maps[target].attrs:
        _wells_on(ax, wells)
    else:
        _wells_on(ax, wells, target, image=im, log=log)
    ax.set_title(
        f"{target}: outside the area of applicability shaded ({outside.mean():.1%} of nodes)",
        fontsize=9,
    )
    return save(fig, path)


def field_wide_cdfs(summary: dict, target: str, path: str | Path, log: bool = False) -> Path:
    """Distribution of a target over the field: raw wells, declustered, debiased with the seismic
    (weighted quantiles from the card), with the field-wide means marked."""
    dist = summary["distribution"]
    levels = np.asarray(dist["levels"])
    fig, ax = plt.subplots(figsize=(6.5, 3.8), layout="constrained")
    styles = {
        "naive": ("tab:gray", "raw wells"),
        "declustered_nearest_node": ("tab:orange", "declustered"),
        "debiased_seismic": ("tab:blue", "debiased with the seismic"),
    }
    for key, (colour, label) in styles.items():
        if key in dist:
            ax.plot(
                dist[key],
                levels,
                color=colour,
                lw=2 if key == "debiased_seismic" else 1.3,
                marker=".",
                label=label,
            )
    for key, est in summary["estimates"].items():
        colour = styles.get(key, ("tab:green", ""))[0]
        ax.axvline(est["mean"], color=colour, lw=0.8, ls=":" if key != summary["method"] else "-")
    ax.axvspan(
        summary["interval"]["q10"],
        summary["interval"]["q90"],
        color="tab:green",
        alpha=0.15,
        label="recommended field-wide mean: q10-q90 (bootstrap)",
    )
    if log:
        ax.set_xscale("log")
    ax.set_xlabel(f"{target} (mD, log scale)" if log else target)
    ax.set_ylabel("share of the field (cumulative)")
    ax.set_ylim(0, 1)
    ax.set_title(f"{target}: field-wide distribution, wells vs whole map", fontsize=10)
    ax.legend(fontsize=7.5, loc="lower right")
    return save(fig, path)


def observed_vs_predicted(
    oof: pd.DataFrame, target: str, path: str | Path, log: bool = False
) -> Path:
    """Each well's out-of-fold prediction against its logged value (permeability in log10 mD),
    coloured by fold, with the 1:1 line and the declustering-weighted RMSE."""
    observed = oof[f"{target}_observed"].to_numpy(float)
    predicted = oof[f"{target}_predicted"].to_numpy(float)
    if log:
        with np.errstate(divide="ignore", invalid="ignore"):
            observed = np.where(observed > 0, np.log10(observed), np.nan)
            predicted = np.where(predicted > 0, np.log10(predicted), np.nan)
    ok = np.isfinite(observed) & np.isfinite(predicted)
    unit = _unit(target, log)
    rmse = np.sqrt(np.average((predicted - observed)[ok] ** 2, weights=oof["weight"][ok]))
    fig, ax = plt.subplots(figsize=(4.8, 4.4), layout="constrained")
    lo, hi = np.nanmin([observed[ok], predicted[ok]]), np.nanmax([observed[ok], predicted[ok]])
    ax.plot([lo, hi], [lo, hi], color="black", lw=0.8, ls="--", label="1:1")
    folds = oof["fold"].to_numpy()
    for k, fold in enumerate(np.unique(folds)):
        sel = ok & (folds == fold)
        ax.scatter(
            observed[sel],
            predicted[sel],
            s=20,
            color=matplotlib.colormaps["tab10"](k % 10),
            edgecolor="k",
            linewidths=0.4,
            label=f"fold {fold}",
        )
    ax.set_xlabel(f"logged {target}{unit}")
    ax.set_ylabel(f"predicted out of fold{unit}")
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_title(f"{target}: wells held out, rmse {rmse:.3g} (declustered)", fontsize=10)
    ax.legend(fontsize=7, loc="upper left")
    return save(fig, path)


def reliability_diagram(
    observed: np.ndarray,
    proba: np.ndarray,
    weights: np.ndarray,
    classes: list[str],
    target: str,
    path: str | Path,
    n_bins: int = 5,
) -> Path:
    """Out-of-fold predicted probability of each class against the (declustering-weighted)
    observed frequency in bins of the prediction: on the diagonal when the probabilities are
    calibrated."""
    colours = _category_colours(classes)
    edges = np.linspace(0, 1, n_bins + 1)
    fig, ax = plt.subplots(figsize=(4.8, 4.4), layout="constrained")
    ax.plot([0, 1], [0, 1], color="black", lw=0.8, ls="--", label="calibrated")
    for k, cls in enumerate(classes):
        b = np.clip(np.digitize(proba[:, k], edges) - 1, 0, n_bins - 1)
        hit = (np.asarray(observed) == cls).astype(float)
        shown = [
            (
                np.average(proba[b == i, k], weights=weights[b == i]),
                np.average(hit[b == i], weights=weights[b == i]),
                int(np.sum(b == i)),
            )
            for i in range(n_bins)
            if np.sum(b == i) >= 3
        ]
        if shown:
            px, fy, n = map(np.asarray, zip(*shown, strict=True))
            ax.plot(px, fy, color=colours[cls], marker="o", lw=1.5, label=cls, markeredgecolor="k")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.set_xlabel("predicted probability (out of fold)")
    ax.set_ylabel("observed frequency at the wells (declustered)")
    ax.set_title(f"{target}: reliability of the class probabilities", fontsize=10)
    ax.legend(fontsize=8, loc="upper left")
    return save(fig, path)


def exceedance_map(
    maps: xr.Dataset, variable: str, wells: pd.DataFrame | None, path: str | Path
) -> Path:
    """P(target > cutoff) over the map, wells on top."""
    fig, ax = plt.subplots(figsize=(5.5, 4.6), layout="constrained")
    im = _background(ax, maps, variable, cmap="RdYlBu_r", vmin=0, vmax=1)
    fig.colorbar(im, ax=ax, shrink=0.7, location="bottom", label="probability")
    _wells_on(ax, wells)
    ax.set_title(maps[variable].attrs.get("long_name", variable), fontsize=10)
    return save(fig, path)


def _property(wells: pd.DataFrame, col: str) -> tuple[np.ndarray, str]:
    """A well property as plotted: permeability as log10 (mD), porosity as a fraction."""
    v = wells[col].to_numpy(dtype=float)
    if col == "permeability":
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(v > 0, np.log10(v), np.nan), "log10 permeability (mD)"
    return v, "porosity (fraction)" if col == "porosity" else col


def crossplot(
    wells: pd.DataFrame,
    attribute: str,
    at_wells: np.ndarray,
    properties: list[str],
    path: str | Path,
) -> Path:
    """The attribute at the wells against each property, wells coloured by facies, with the
    least-squares line of each facies (3 wells or more) and of all wells (dashed)."""
    fig, axes = plt.subplots(
        1, len(properties), figsize=(5.2 * len(properties), 4.0), squeeze=False
    )
    a = np.asarray(at_wells, float)
    facies = (
        wells["facies"].astype(str).to_numpy()
        if "facies" in wells
        else np.full(len(wells), "all wells")
    )
    colours = _category_colours(facies)
    for ax, col in zip(axes[0], properties, strict=True):
        v, label = _property(wells, col)
        ok = np.isfinite(a) & np.isfinite(v)
        groups = [(c, ok & (facies == c)) for c in colours] + [("all wells", ok)]
        for name, sel in groups:
            whole = name == "all wells"
            if not whole:
                ax.scatter(
                    a[sel], v[sel], s=22, c=colours[name], edgecolor="k", linewidths=0.5, label=name
                )
            if sel.sum() >= 3 and np.ptp(a[sel]) > 0:
                slope, icept = np.polyfit(a[sel], v[sel], 1)
                xs = np.array([a[sel].min(), a[sel].max()])
                ax.plot(
                    xs,
                    icept + slope * xs,
                    linestyle="--" if whole else "-",
                    color="k" if whole else colours[name],
                    linewidth=1.2,
                    label=f"{name}: fit" if whole else None,
                )
        ax.set_xlabel(f"{attribute} at the wells")
        ax.set_ylabel(label)
        ax.legend(fontsize=7)
    return save(fig, path)


def semivariograms(wells: pd.DataFrame, properties: list[str], path: str | Path) -> Path:
    """Experimental omnidirectional semivariogram of each property at the wells (points sized by
    pair count) and the fitted model (line), as kriging and the CV block size use it; for
    samples along wells a second row: the vertical semivariogram from pairs within each well."""
    from .variogram import along_wells, auto_variogram, experimental, fit_variogram

    vertical = "z" in wells and wells["well_id"].duplicated().any()
    fig, axes = plt.subplots(
        1 + vertical,
        len(properties),
        figsize=(5.0 * len(properties), 3.8 * (1 + vertical)),
        squeeze=False,
        layout="constrained",
    )
    x, y = wells["x"].to_numpy(float), wells["y"].to_numpy(float)
    if (
        vertical
    ):  # lateral pairs at about the same z: within half the median sample step along the wells
        step = float(
            np.median(np.abs(np.diff(wells.sort_values(["well_id", "z"])["z"].to_numpy())))
        )
    for k, col in enumerate(properties):
        v, label = _property(wells, col)
        ok = np.isfinite(v)
        if vertical:
            exp = experimental(
                x[ok],
                y[ok],
                v[ok],
                n_lags=12,
                z=wells["z"].to_numpy(float)[ok],
                z_tolerance=step / 2,
            )
            model = fit_variogram(exp)
        else:
            exp = experimental(x[ok], y[ok], v[ok], n_lags=12)
            model = auto_variogram(x[ok], y[ok], v[ok])
        _semivariogram_panel(
            axes[0, k],
            exp,
            model,
            label,
            "lag distance (m)" + (", pairs at the same z" if vertical else ""),
            " m",
        )
        if vertical:
            exp = along_wells(wells["z"].to_numpy(float), v, wells["well_id"].to_numpy())
            _semivariogram_panel(
                axes[1, k],
                exp,
                fit_variogram(exp),
                label,
                "lag along the wells (z units), pairs within one well",
                "",
            )
    return save(fig, path)


def _semivariogram_panel(ax, exp, model, label: str, xlabel: str, unit: str) -> None:
    ax.scatter(
        exp.lags,
        exp.gamma,
        s=10 + 40 * exp.counts / exp.counts.max(),
        c="tab:blue",
        label="experimental",
    )
    h = np.linspace(0, exp.lags.max() * 1.05, 200)
    reach = f"{model.range:.0f}{unit}" if unit else f"{model.range:.3g}"
    ax.plot(
        h,
        model(h),
        "k-",
        label=(
            f"{model.kind}: nugget {model.nugget:.3g}, sill {model.nugget + model.sill:.3g}, "
            f"range {reach}"
        ),
    )
    ax.set_xlabel(xlabel)
    ax.set_ylabel(f"semivariance of {label}")
    ax.set_ylim(bottom=0)
    ax.legend(fontsize=7)


def _shown(maps: xr.Dataset, target: str, log: bool) -> tuple[xr.DataArray, dict, str, dict | None]:
    """What a volume figure draws for a target: (values, imshow keywords, colour-bar label, class
    colours or None) -- facies as class colours, permeability as log10 mD."""
    values = maps[target]
    if "flag_meanings" in values.attrs:
        classes = values.attrs["flag_meanings"].split(" ")
        colours = _category_colours(classes)
        codes = values.where(values >= 0)
        cmap = matplotlib.colors.ListedColormap([colours[c] for c in classes])
        return codes, {"cmap": cmap, "vmin": -0.5, "vmax": len(classes) - 0.5}, target, colours
    if log:
        values = np.log10(values)
    unit = _unit(target, log)
    lo, hi = np.nanquantile(values.to_numpy(), [0.01, 0.99])
    return values, {"cmap": "viridis", "vmin": lo, "vmax": hi}, f"{target} q50{unit}", None


def _class_ticks(bar, colours: dict | None, horizontal: bool = True) -> None:
    if colours is not None:
        bar.set_ticks(range(len(colours)))
        (bar.ax.set_xticklabels if horizontal else bar.ax.set_yticklabels)(
            list(colours), fontsize=8
        )


def depth_slices(
    slices: list[xr.Dataset],
    wells: list[pd.DataFrame],
    target: str,
    path: str | Path,
    log: bool = False,
) -> Path:
    """Map views of a predicted volume at several z on one colour scale, each well filled with its
    logged value (or class) at its sample nearest to that z."""
    fig, axes = plt.subplots(
        1, len(slices), figsize=(4.3 * len(slices), 4.3), squeeze=False, layout="constrained"
    )
    for ax, part, near in zip(axes[0], slices, wells, strict=True):
        values, style, label, colours = _shown(part, target, log)
        im = _background(ax, part.assign(_v=values), "_v", **style)
        _wells_on(ax, near, target, image=None if colours else im, colours=colours, log=log)
        ax.set_title(
            f"z = {part.attrs['z_shown']:g} ({part.attrs.get('z_domain', 'unknown')})", fontsize=10
        )
    bar = fig.colorbar(im, ax=list(axes[0]), shrink=0.6, location="bottom", label=label)
    _class_ticks(bar, colours)
    return save(fig, path)


def well_section(
    section: xr.Dataset, on_section: pd.DataFrame, target: str, path: str | Path, log: bool = False
) -> Path:
    """The predicted volume along a path through wells (z down), with each well's logged values
    as a column of squares on the same colour scale, so a misfit along the well shows."""
    values, style, label, colours = _shown(section, target, log)
    distance, z = section.distance.to_numpy(), section.z.to_numpy()
    step = float(distance[1] - distance[0]) if distance.size > 1 else 1.0
    fig, ax = plt.subplots(figsize=(10.5, 4.2), layout="constrained")
    im = ax.imshow(
        values.transpose("z", "distance").to_numpy(),
        aspect="auto",
        interpolation="nearest",
        extent=[distance[0] - step / 2, distance[-1] + step / 2, z[-1], z[0]],
        **style,
    )
    width = max(step * 1.5, (distance[-1] - distance[0]) / 120)
    for well, rows in on_section.groupby("well_id", sort=False):
        d = float(rows["distance"].iloc[0])
        fill = _fill(rows[target], im, colours, log)
        column = np.full(len(rows), d)
        ax.scatter(
            column, rows["z"], c="white", marker="s", s=34, linewidths=0
        )  # sets the well apart
        ax.scatter(column, rows["z"], c=fill, marker="s", s=14, edgecolor="k", linewidths=0.3)
        ax.plot([d - width / 2, d + width / 2], [z[0], z[0]], color="k", linewidth=2)
        ax.text(d, z[0], str(well), ha="center", va="bottom", fontsize=8)
    ax.set_xlim(distance[0] - step / 2 - width, distance[-1] + step / 2 + width)
    ax.set_xlabel("distance along the section (m)")
    ax.set_ylabel(f"z ({section.attrs.get('z_domain', 'unknown')})")
    ax.tick_params(labelsize=8)
    bar = fig.colorbar(im, ax=ax, shrink=0.8, location="right", label=label)
    _class_ticks(bar, colours, horizontal=False)
    return save(fig, path)
