"""``predictor report``: one self-contained HTML file (figures embedded, no network, no external
scripts) that a team can read on a laptop or print."""

from __future__ import annotations

import base64
import html
import tempfile
import warnings
from importlib import resources
from pathlib import Path
from string import Template

import numpy as np
import pandas as pd

from .bundle import load_bundle
from .checks import check_data, write_check
from .errors import InputError, PredictorWarning
from .explain import KRIGING
from .explanations import contribution_maps, explain_wells, output_unit
from .field_wide import METHOD_LABELS
from .grid import read_seismic
from .io.atomic import atomic_file
from .predict import predict_maps
from .volume import (
    depths_to_show,
    is_volume,
    map_view,
    section_through_wells,
    view_depth,
    wells_in_view,
)

CAUTION = (
    "A predicted map is a model, not a measurement: it is only as good as the wells, the seismic"
    " and the assumptions behind it, and it can be confidently wrong away from the wells. Drilling,"
    " reserves and safety decisions rest with qualified professionals and must follow local"
    " regulations."
)


def _img(path: Path, caption: str) -> str:
    data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
    return (
        f'<figure><img src="data:image/png;base64,{data}" alt="{html.escape(caption)}">'
        f"<figcaption>{html.escape(caption)}</figcaption></figure>"
    )


def _table(frame: pd.DataFrame, chosen: int | None = None, digits: int = 4) -> str:
    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in frame.columns)
    rows = []
    for i, row in enumerate(frame.itertuples(index=False)):
        cells = "".join(
            (
                f'<td class="num">{_fmt(v, digits)}</td>'
                if isinstance(v, int | float | np.number)
                else f"<td>{_fmt(v, digits)}</td>"
            )
            for v in row
        )
        rows.append(f'<tr class="chosen">{cells}</tr>' if i == chosen else f"<tr>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>"


def _fmt(v, digits) -> str:
    if isinstance(v, float | np.floating):
        return "" if not np.isfinite(v) else f"{v:.{digits}g}"
    return html.escape(str(v))


def _rows(card: dict) -> str:
    """What one training row is: a well on a map, a sample along a well in a volume."""
    return "samples" if card.get("space", {}).get("kind") == "volume" else "wells"


def _section(key: str, title: str, body: str, css: str = "") -> tuple[str, str]:
    return key, f'<section id="{key}" class="{css}"><h2>{html.escape(title)}</h2>{body}</section>'


def build_report(
    bundle_dir: str | Path,
    out: str | Path,
    grid_path: str | Path | None = None,
    overwrite: bool = False,
    z_domain: str | None = None,
    segy_name: str | None = None,
    scenario: list[str] | None = None,
) -> Path:
    """Write the HTML report of a bundle; the grid defaults to the one the bundle was trained on.

    ``scenario`` (lines of text) opens the report, e.g. the demo's statement that its data are
    invented and its comparison with the known truth.

    A volume is shown as its map view at the middle z of the training samples (axes in survey
    line numbers); every statistic and score covers the whole volume.
    """
    bundle = load_bundle(bundle_dir)
    card = bundle.card
    recorded = card.get("inputs", {}).get("grid", {})
    if not grid_path:
        z_domain, segy_name = (
            z_domain or recorded.get("z_domain"),
            segy_name or recorded.get("segy_name"),
        )
    grid_path = grid_path or recorded.get("path")
    moved = bundle.folder / recorded.get("from_bundle", "")
    if grid_path == recorded.get("path") and not Path(grid_path).exists() and moved.exists():
        grid_path = str(moved)  # the bundle and its inputs moved together
    if not grid_path:
        raise InputError(
            f"{bundle_dir}: the bundle does not record its training grid; give one with --grid"
        )
    if not Path(grid_path).exists():
        raise InputError(
            f"{bundle_dir}: the training grid {grid_path} is not there any more; give it with"
            " --grid"
        )
    grid = read_seismic(grid_path, z_domain=z_domain, name=segy_name or "amplitude")
    wells, _ = bundle.training_wells()
    wells = wells.drop(columns=["weight"])
    wells["well_id"] = wells["well_id"].astype(str)
    wells.attrs["source"] = "training wells of the bundle"
    with tempfile.TemporaryDirectory() as tmpdir, warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", PredictorWarning)
        fig = Path(tmpdir)
        check = check_data(wells, grid)
        write_check(check, None, fig)
        maps = predict_maps(bundle, grid, exceed=_report_cutoffs(card))
        shown_wells, volume = wells, None
        if is_volume(grid):  # the figures show the map view at the middle of the wells' samples
            z = view_depth(grid, wells)
            volume = (maps, wells)  # slices at several z and a section through wells come from it
            maps, shown_wells = map_view(maps, z), wells_in_view(wells, grid, z)
        sections = [
            _summary(card, check, scenario),
            _data(check, card, fig),
            _bias(check, card, fig),
            _leaderboard(bundle, fig),
            _maps(maps, shown_wells, card, fig, volume),
            _field_wide(card, maps, shown_wells, fig),
            _intervals(card, maps),
            _why(bundle, grid, shown_wells, fig),
            _warnings(card, [str(w.message) for w in caught]),
            _provenance(card),
        ]
    nav = " ".join(f'<a href="#{k}">{html.escape(t)}</a>' for k, t in NAV)
    template = Template(
        resources.files("predictor").joinpath("templates/report.html").read_text(encoding="utf-8")
    )
    page = template.substitute(
        title="predictor report: " + html.escape(", ".join(card["targets"])),
        subtitle=html.escape(
            f"bundle {Path(bundle.folder).name} · grid {Path(grid_path).name} · "
            f"predictor {card['versions']['predictor']}"
        ),
        nav=nav,
        sections="\n".join(s for _, s in sections),
    )
    with atomic_file(out, overwrite=overwrite) as tmp:
        tmp.write_text(page, encoding="utf-8")
    return Path(out)


NAV = [
    ("glance", "At a glance"),
    ("data", "Data and checks"),
    ("bias", "Drilling bias"),
    ("scores", "Model scores"),
    ("maps", "Maps"),
    ("field", "Field-wide numbers"),
    ("intervals", "Uncertainty"),
    ("why", "Why"),
    ("warnings", "Warnings"),
    ("provenance", "Provenance"),
]


def _summary(card, check, scenario=None):
    rows = []
    for t, info in card["targets"].items():
        key = "rmse" if info["task"] == "regression" else "balanced_accuracy"
        unit = " (log10 mD)" if info.get("transform") == "log10" else ""
        random = (info.get("cv_random") or {}).get(key)
        map_error = (info.get("cv_design") or {}).get("map_error", {})
        noise = map_error.get("interval")
        rows.append(
            {
                "target": t,
                "chosen model": info["chosen"],
                "matched CV": info["cv"][key],
                "random CV (optimistic)": random if random is not None else np.nan,
                "expected on the map": map_error.get("rmse", np.nan),
                "its q10-q90 (the CV's own noise)": (
                    f"{noise['q10']:#.4g}-{noise['q90']:#.4g}" if noise else ""
                ),
                "metric": key + unit,
                "against the best baseline": against_baseline(info),
                "wells": info["n_wells"],
            }
        )
    lines = [html.escape(line.strip()) for line in scenario or []]
    intro = (
        (
            f'<div class="scenario"><p>{lines[0]}</p>'
            + (f"<p>{'<br>'.join(lines[1:])}</p>" if lines[1:] else "")
            + "</div>"
        )
        if lines
        else ""
    )
    body = (
        intro + f'<p class="caution">{html.escape(CAUTION)}</p>'
        f"<p>{html.escape(check.qc.bias[next(iter(check.qc.bias))]['verdict'])}</p>"
        + _table(pd.DataFrame(rows))
        + '<p class="small">The matched CV holds wells out as far from their training wells as the'
        " map's nodes are from their nearest well, and weights every well by its declustering"
        " weight, so it estimates the error over the map. Where no fold design can hold wells out"
        " as close as the map's nodes lie to a well (dense drilling), the expected error on the"
        " map scales the CV's by the ratio of kriging variances, map nodes to held-out wells;"
        " and since each fold trains on fewer wells than the map, by how much the CV's error"
        " shrank from folds thinned to three quarters of their wells to the full folds, carried"
        " on to all wells. That expectation is itself measured on a few dozen wells: its q10-q90"
        " is the CV's own sampling noise over the wells (on synthetic fields the true map error"
        " fell inside it on three fields in four)."
        " Random k-fold is shown for contrast only: nearby wells are alike, so on clustered wells"
        " it flatters the model.</p>"
    )
    return _section("glance", "At a glance", body)


def against_baseline(info: dict) -> str:
    """How the chosen model compares with the best baseline on the matched CV, in words: the
    relative change of the metric, and whether the loss difference is within one standard error."""
    board = info["leaderboard"]
    chosen = next(r for r in board if r["chosen"])
    regression = info["task"] == "regression"
    key, loss = (
        ("rmse", lambda r: r["cv"]["rmse"] ** 2)
        if regression
        else ("balanced_accuracy", lambda r: r["cv"]["log_loss"])
    )
    baselines = [r for r in board if r["baseline"] and r is not chosen]
    if chosen["baseline"] or not baselines:
        return "the chosen model is a baseline"
    best = (
        min(baselines, key=lambda r: r["cv"][key])
        if regression
        else max(baselines, key=lambda r: r["cv"][key])
    )
    a, b = chosen["cv"][key], best["cv"][key]
    change = (b - a) / b if regression else (a - b) / b  # positive: the chosen model is better
    noise = abs(loss(chosen) - loss(best)) <= (chosen.get("cv_se") or 0.0)
    word = "lower" if regression else "higher"
    if change <= 0:
        return f"no better than {best['candidate']} ({a:.4g} vs {b:.4g})"
    return f"{change:.1%} {word} {key} than {best['candidate']} ({a:.4g} vs {b:.4g})" + (
        "; within one standard error" if noise else ""
    )


def _data(check, card, fig):
    findings = (
        pd.DataFrame(
            [
                {"severity": f.severity, "check": f.check, "message": f.message}
                for f in check.qc.findings
            ]
        )
        if check.qc.findings
        else None
    )
    stats = pd.DataFrame({col: s for col, s in check.qc.summary["all"].items()}).T.reset_index(
        names="column"
    )
    body = (
        "<h3>Findings</h3>"
        + (_table(findings) if findings is not None else '<p class="ok">no findings</p>')
        + f"<h3>Summary statistics (all {_rows(card)})</h3>"
        + _table(stats)
        + _img(fig / "wells_on_map.png", "wells over the attribute map")
        + (
            _img(fig / "facies_distributions.png", "distributions per facies")
            if (fig / "facies_distributions.png").exists()
            else ""
        )
        + _facies_table(check, _rows(card))
        + (
            _img(
                fig / "crossplot.png",
                "attribute at the wells against porosity and permeability, coloured by "
                "facies, with a least-squares line per facies and for all wells (dashed)",
            )
            if (fig / "crossplot.png").exists()
            else ""
        )
        + (
            _img(
                fig / "semivariograms.png",
                "experimental semivariograms at the wells (points sized by pair "
                "count) and the fitted models"
                + (
                    "; below, the vertical ones from pairs of samples within one well"
                    if _rows(card) == "samples"
                    else ""
                ),
            )
            if (fig / "semivariograms.png").exists()
            else ""
        )
    )
    return _section("data", "The data and its checks", body)


def _facies_table(check, counted: str = "wells") -> str:
    """Per-facies statistics of porosity and permeability at the wells (raw, not declustered)."""
    rows = []
    for key, columns in check.qc.summary.items():
        if not key.startswith("facies="):
            continue
        for col, s in columns.items():
            label = {"porosity": "porosity (fraction)", "permeability": "permeability (mD)"}.get(
                col, col
            )
            rows.append(
                {
                    "facies": key.split("=", 1)[1],
                    "property": label,
                    counted: s["count"],
                    "mean": s["mean"],
                    "q25": s["q25"],
                    "median": s["median"],
                    "q75": s["q75"],
                }
            )
    if not rows:
        return ""
    where = "samples along the wells" if counted == "samples" else "wells"
    return f"<h3>Per facies ({where}, not declustered)</h3>" + _table(
        pd.DataFrame(rows).sort_values(["property", "facies"], kind="stable")
    )


def _bias(check, card, fig):
    stats = []
    for target, naive in card["naive"].items():
        dec, cell = card["declustered"][target], card.get("declustered_cell", {}).get(target, {})
        if "mean" in naive:
            stats.append(
                {
                    "statistic": f"mean {target}",
                    "raw wells": naive["mean"],
                    "declustered (nearest-node)": dec["mean"],
                    "declustered (cell)": cell.get("mean", np.nan),
                }
            )
        for cls, share in naive.get("proportions", {}).items():
            stats.append(
                {
                    "statistic": f"share of {target} {cls}",
                    "raw wells": share,
                    "declustered (nearest-node)": dec["proportions"][cls],
                    "declustered (cell)": cell.get("proportions", {}).get(cls, np.nan),
                }
            )
    body = "".join(f"<p>{html.escape(b['verdict'])}</p>" for b in check.qc.bias.values())
    body += "".join(_img(p, p.stem.replace("_", " ")) for p in sorted(fig.glob("bias_*.png")))
    body += "<h3>Naive and declustered statistics</h3>" + _table(pd.DataFrame(stats))
    body += _img(fig / "declustering_curve.png", "declustered mean against cell size")
    return _section("bias", "Drilling bias and declustering", body)


SELECTION = {  # the rules of training._select and training._ties_offered, in words
    "regression": "the blend of the candidates (on the experiment fields every single candidate"
    " that beat it in the CV mapped worse, see the README); well ties are tried only on a model"
    " that does not already krige residuals, and kept when they beat it by one standard error of"
    " the paired per-well difference.",
    "classification": "the blend is kept unless a single classifier's mean per-well log-loss is"
    " lower by more than two standard errors of the paired difference; well ties are kept unless"
    " their log-loss is worse by more than one.",
}


def _leaderboard(bundle, fig):
    from . import plots  # matplotlib loads when a figure is drawn, not on import

    card = bundle.card
    body = ""
    for t, info in card["targets"].items():
        key = "rmse" if info["task"] == "regression" else "balanced_accuracy"
        other = "r2" if info["task"] == "regression" else "log_loss"
        rows, chosen = [], None
        for i, r in enumerate(info["leaderboard"]):
            rows.append(
                {
                    "candidate": r["candidate"],
                    "kind": "baseline" if r["baseline"] else "candidate",
                    f"{key} matched": r["cv"][key],
                    f"{other} matched": r["cv"][other],
                    **({"Brier matched": r["cv"]["brier"]} if "brier" in r["cv"] else {}),
                    "loss standard error": r.get("cv_se", np.nan),
                    f"{key} random": (r.get("cv_random") or {}).get(key, np.nan),
                }
            )
            chosen = i if r["chosen"] else chosen
        plots.leaderboard_chart(info["leaderboard"], key, t, fig / f"board_{t}.png")
        if info["task"] == "regression" and (bundle.folder / t / "out_of_fold.csv").exists():
            plots.observed_vs_predicted(
                bundle.out_of_fold(t),
                t,
                fig / f"observed_{t}.png",
                log=info.get("transform") == "log10",
            )
        if info["task"] == "classification" and (bundle.folder / t / "out_of_fold.csv").exists():
            oof = bundle.out_of_fold(t)
            proba = oof[[f"{t}_prob_{c}" for c in info["classes"]]].to_numpy()
            plots.reliability_diagram(
                oof[f"{t}_observed"].astype(str).to_numpy(),
                proba,
                oof["weight"].to_numpy(),
                info["classes"],
                t,
                fig / f"reliability_{t}.png",
            )
        body += (
            f"<h3>{html.escape(t)}</h3><p class='small'>{html.escape(info['cv_method'])}."
            f" Selection: {SELECTION[info['task']]} The standard error column is that of each"
            " candidate's mean per-well loss.</p>"
            + _table(pd.DataFrame(rows), chosen)
            + _img(fig / f"board_{t}.png", f"{t}: matched vs random CV")
        )
        if (fig / f"observed_{t}.png").exists():
            body += _img(
                fig / f"observed_{t}.png",
                f"{t}: logged against predicted at each well, held out in the chosen model's"
                f" matched CV (the table per well: {bundle.folder.name}/{t}/out_of_fold.csv)",
            )
        if (fig / f"reliability_{t}.png").exists():
            body += _img(
                fig / f"reliability_{t}.png",
                f"{t}: out-of-fold probability vs observed frequency of "
                f"the chosen model (points: bins of at least 3 {_rows(card)})",
            )
        design = info.get("cv_design")
        if design and "cdf" in design:
            plots.distance_cdfs(design, t, fig / f"distances_{t}.png")
            body += (
                _img(
                    fig / f"distances_{t}.png",
                    f"{t}: prediction distances of the map and of each CV design",
                )
                + f"<p>{html.escape(_design_sentences(design))}</p>"
            )
    return _section("scores", "How good is each model: spatial cross-validation", body)


def _design_sentences(design: dict) -> str:
    """Two sentences on why the used fold design fits this map."""
    used = design["designs"][design["chosen"]]
    others = {k: v["w"] for k, v in design["designs"].items() if k != design["chosen"]}
    closest = min(others, key=others.get) if others else None
    text = (
        f"Map nodes lie a median {design['map_median_distance']:.0f} m from their nearest well; in"
        f" the {design['chosen']} design a held-out well lies a median"
        f" {used['median_cv_distance']:.0f} m from its nearest training well (W = {used['w']:.0f} m"
        " between the two distance distributions)."
    )
    if str(used.get("configuration", "")).startswith("random k-fold"):
        text += (
            " Here the matched design is random k-fold: the wells are not closer to each other than"
            " the map's nodes are to them, so holding out a random fifth already reproduces the"
            " map's situation."
        )
    elif closest is not None:
        text += (
            f" The closest other design, {closest}, is W = {others[closest]:.0f} m away: the"
            " smaller W, the more the CV's prediction situation resembles the map's, so the more"
            " its error estimates the map's error."
        )
    return text


def _maps(maps, wells, card, fig, volume=None):
    from . import plots  # matplotlib loads when a figure is drawn, not on import

    body = ""
    if volume is not None:
        domain = maps.attrs.get("z_domain", "unknown")
        body = (
            f"<p>Map views show the volume at z = {maps.attrs['z_shown']:g}"
            f" ({html.escape(domain)}), the middle of the training samples, then at three z across"
            " the samples; axes are survey line numbers and each well is drawn at its sample"
            " nearest to the z shown. The section follows a path through wells spread along the"
            " field's long axis, with each well's logged samples on the same colour scale. The"
            " predicted volume itself comes from <code>predictor predict</code>.</p>"
        )
    views = _volume_views(*volume) if volume is not None else None  # shared by every target
    for t, info in card["targets"].items():
        if views is not None:
            body += _volume_figures(views, t, info, fig)
        if info["task"] == "classification":
            plots.facies_maps(maps, t, wells, fig / f"map_{t}.png")
            body += _img(
                fig / f"map_{t}.png",
                f"{t}: the facies map (its rule in the title) and the class probabilities",
            )
        else:
            plots.property_maps(
                maps, t, wells, fig / f"map_{t}.png", log=info.get("transform") == "log10"
            )
            body += _img(fig / f"map_{t}.png", f"{t}: median and 80 % interval width, wells on top")
        if f"{t}_applicable" in maps:
            plots.applicability_map(
                maps, t, wells, fig / f"aoa_{t}.png", log=info.get("transform") == "log10"
            )
            a = info.get("applicability", {})
            body += _img(fig / f"aoa_{t}.png", f"{t}: area of applicability")
            inside, outside = a.get("cv_inside"), a.get("cv_outside")
            key = "rmse" if info["task"] == "regression" else "balanced_accuracy"
            n = _rows(card)
            body += (
                f"<p class='small'>Matched-CV {key} of {n} inside the area of applicability:"
                f" {_fmt(inside[key], 4) if inside else 'n/a'} ({a.get('wells_inside')} {n});"
                f" outside: {_fmt(outside[key], 4) if outside else 'n/a'} ({a.get('wells_outside')}"
                f" {n}).</p>"
            )
    return _section("maps", "Maps between the wells", body)


def _volume_views(vol, wells) -> dict:
    """The slices at three z (with the wells there) and the section through wells of a predicted
    volume, cut once for all targets."""
    depths = depths_to_show(wells)
    section, on_section = section_through_wells(vol, wells)
    return {
        "slices": [map_view(vol, z) for z in depths],
        "wells": [wells_in_view(wells, vol, z) for z in depths],
        "section": section,
        "on_section": on_section,
    }


def _volume_figures(views: dict, target, info, fig) -> str:
    """Depth slices and a section through wells of one target of a predicted volume."""
    from . import plots

    log = info.get("transform") == "log10"
    section = views["section"]
    plots.depth_slices(
        views["slices"], views["wells"], target, fig / f"slices_{target}.png", log=log
    )
    plots.well_section(section, views["on_section"], target, fig / f"section_{target}.png", log=log)
    return _img(
        fig / f"slices_{target}.png",
        f"{target}: the predicted volume at three z, wells filled with their "
        "logged value at the nearest sample",
    ) + _img(
        fig / f"section_{target}.png",
        f"{target}: section through wells {', '.join(section.attrs['wells'])} "
        "(squares: logged samples)",
    )


def _report_cutoffs(card) -> dict:
    """One exceedance map per numeric target: P(value > its recommended field-wide mean)."""
    return {
        t: [float(f"{g['mean']:.3g}")] for t, g in card.get("global", {}).items() if "mean" in g
    }


def _field_wide(card, maps, wells, fig):
    from . import plots  # matplotlib loads when a figure is drawn, not on import
    from .predict import exceedance_name

    body = (
        "<p>Wells drilled in the good rock over-state the field. Declustering re-weights them by"
        " the area each stands for, but cannot bring back rock no well reached; the exhaustive"
        " seismic can, through the calibration of each property on the model's prediction at the"
        " wells (out of fold), applied to the prediction's distribution over the whole map"
        " (debiasing with secondary data, Deutsch 2002). The interval is the 10th-90th percentile"
        " of the estimate over 200 bootstrap resamples of the wells. Neither method undoes drilling"
        " that chose on what the seismic does not see: then the map and these estimates still lean"
        " towards the drilled rock, most far from the wells and in the facies the wells avoided"
        " (on the project's synthetic test fields drilled into good rock the porosity map read"
        " 0.002-0.003 high on average and up to 0.03 high far from the wells, and no statistic of"
        " the wells showed it), so read the exceedance probabilities as a ranking first and as odds"
        " second. These are estimates from a model, not measurements.</p>"
    )
    for t, g in card.get("global", {}).items():
        body += f"<h3>{html.escape(t)}</h3>"
        order = list(METHOD_LABELS)
        recommended = order.index(g["method"])
        if "mean" in g:
            rows = [
                {"estimate": METHOD_LABELS[m], f"mean {t}": g["estimates"][m]["mean"]}
                for m in order
            ]
            body += _table(pd.DataFrame(rows), recommended)
            body += (
                f"<p>Recommended: <b>{_fmt(g['mean'], 4)}</b> (q10 {_fmt(g['interval']['q10'], 4)},"
                f" q90 {_fmt(g['interval']['q90'], 4)}), {html.escape(g['why'])}.</p>"
            )
            if g.get("distribution"):
                plots.field_wide_cdfs(
                    g, t, fig / f"field_{t}.png", log=card["targets"][t].get("transform") == "log10"
                )
                body += _img(fig / f"field_{t}.png", f"{t}: field-wide distribution")
            name = exceedance_name(t, float(f"{g['mean']:.3g}"))
            if name in maps and maps[name].ndim == 2:
                plots.exceedance_map(maps, name, wells, fig / f"exceed_{t}.png")
                body += _img(
                    fig / f"exceed_{t}.png",
                    f"{t}: probability of exceeding the field-wide mean "
                    "(predictor predict --exceed writes such maps for any cutoff)",
                )
            continue
        classes = list(g["proportions"])
        rows = [
            {
                "estimate": METHOD_LABELS[m],
                **{c: g["estimates"][m]["proportions"][c] for c in classes},
            }
            for m in order
        ]
        if t in maps:
            codes = maps[t].to_numpy()
            codes = codes[codes >= 0]
            rule = card["targets"][t].get("facies_map", {}).get("rule", "most-probable")
            rows.append(
                {
                    "estimate": f"the facies map ({rule} rule)",
                    **{c: float(np.mean(codes == k)) for k, c in enumerate(classes)},
                }
            )
        body += _table(pd.DataFrame(rows), recommended)
        iv = g["interval"]
        body += (
            "<p>Recommended proportions: "
            + ", ".join(
                f"{html.escape(c)} <b>{g['proportions'][c]:.1%}</b>"
                f" ({iv[c]['q10']:.1%}-{iv[c]['q90']:.1%})"
                for c in classes
            )
            + f", {html.escape(g['why'])}. The last row is what the facies map draws: its class "
            "shares should sit close to the recommended proportions.</p>"
        )
    return _section("field", "Field-wide numbers", body)


def _share(value) -> str:
    return "not recorded (older bundle)" if value is None else f"{value:.0%} (nominal 80 %)"


def _intervals(card, maps):
    rows = []
    for t, info in card["targets"].items():
        c = info.get("calibration")
        if c and f"{t}_q10" in maps:
            q10, q90 = (maps[f"{t}_{q}"].to_numpy().ravel() for q in ("q10", "q90"))
            ok = np.isfinite(q10) & np.isfinite(q90)
            if info.get("transform") == "log10":  # permeability: a factor between q10 and q90
                ratio = q90[ok] / q10[ok]
                width = (
                    f"q90/q10 = {np.median(ratio):.3g} x (10-90 % of nodes:"
                    f" {np.quantile(ratio, 0.1):.3g} to {np.quantile(ratio, 0.9):.3g} x)"
                )
            else:
                w = q90[ok] - q10[ok]
                unit = " (fraction)" if t == "porosity" else ""
                width = (
                    f"{np.median(w):.3g}{unit} (10-90 % of nodes: {np.quantile(w, 0.1):.3g} to"
                    f" {np.quantile(w, 0.9):.3g})"
                )
            rows.append(
                {
                    "target": t,
                    "median width of [q10, q90] on the map": width,
                    "width varies with the local spread": "yes" if c["scaled"] else "no (constant)",
                    "wells inside [q10, q90], calibrated without their fold": _share(
                        c.get("held_out_coverage")
                    ),
                    "effective wells": c.get("n_effective_wells") or c["n_effective"],
                    "spread model": info.get("interval_spread") or "none",
                }
            )
    body = (
        "<p>q10 and q90 are non-exceedance percentiles: the property has a 10 % chance of being"
        " below q10 and a 10 % chance of being above q90. The trade often reads P10/P90 the other"
        " way round (exceedance). Its width comes from the matched-CV out-of-fold errors, weighted"
        " by the declustering weights, so about 80 % of map cells should fall inside [q10, q90]."
        " The check beside it recalibrates the interval without each fold in turn and counts the"
        " fold's wells that fall inside: near 80 % means the calibration carries over to wells it"
        " did not see.</p>" + (_table(pd.DataFrame(rows)) if rows else "")
    )
    return _section("intervals", "Uncertainty: the q10-q90 interval", body)


def _why(bundle, grid, wells, fig):
    from . import plots  # matplotlib loads when a figure is drawn, not on import

    names = bundle.card["features"]["names"]
    body = (
        "<p class='small'>Contributions (SHAP values) add up to the model output at every node."
        " LightGBM parts use TreeSHAP (path-dependent); linear parts are exact; kriging parts form"
        f" one column, <code>{KRIGING}</code>; the facies mixture uses permutation sampling against"
        " a small background. Facies are explained per class in log-odds.</p>"
    )
    for t, info in bundle.card["targets"].items():
        imp = pd.Series(info["importance"]["values"]).sort_values(ascending=False)
        plots.importance_chart(imp, t, fig / f"imp_{t}.png", output_unit(t, info))
        body += f"<h3>{html.escape(t)}</h3>" + _img(fig / f"imp_{t}.png", f"{t}: importance")
        values, _, _, features = explain_wells(bundle, t)
        v = values if values.ndim == 2 else values[:, 0, :]
        cols = [n for n in names if np.any(v[:, names.index(n)])]
        if cols:
            idx = [names.index(c) for c in cols]
            label = t if values.ndim == 2 else f"{t}: class {info['classes'][0]} (log-odds)"
            plots.shap_summary(
                v[:, idx], features, cols, label, fig / f"bee_{t}.png", unit=output_unit(t, info)
            )
            body += _img(fig / f"bee_{t}.png", f"{label}: contributions at the wells")
        maps = contribution_maps(bundle, grid, t)
        ranked = sorted(
            maps.data_vars, key=lambda var: -float(np.nanmean(np.abs(maps[var].to_numpy())))
        )[:3]
        if ranked:
            plots.shap_maps(
                maps,
                [str(r) for r in ranked],
                wells,
                fig / f"shapmap_{t}.png",
                unit=output_unit(t, info),
            )
            body += _img(
                fig / f"shapmap_{t}.png", f"{t}: contribution maps of the leading features"
            )
    return _section("why", "Why the model predicts what it does", body)


def _warnings(card, extra):
    items = list(card.get("warnings", [])) + extra
    body = (
        "<ul class='warnings'>" + "".join(f"<li>{html.escape(w)}</li>" for w in items) + "</ul>"
        if items
        else "<p class='ok'>No trust warnings were raised. That does not make the map right.</p>"
    )
    return _section("warnings", "Warnings", body, "caution" if items else "")


def _provenance(card):
    inputs = card.get("inputs", {})
    # file names, not the folders training ran in (a demo or a batch job may have used a scratch
    # folder)
    rows = [
        {
            "item": f"input {k}",
            "value": f"{Path(str(v.get('path'))).name} (SHA-256 {(v.get('sha256') or '')[:16]}…)",
        }
        for k, v in inputs.items()
    ]
    rows += [{"item": f"version {k}", "value": v} for k, v in card["versions"].items()]
    rows += [{"item": f"option {k}", "value": str(v)} for k, v in card["options"].items()]
    return _section("provenance", "Where this came from", _table(pd.DataFrame(rows)))
