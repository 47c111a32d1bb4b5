"""Checks a careful modeller runs before any modelling.

Summary statistics per column and per facies, non-physical values, duplicated wells,
Tukey fences per facies (flagged, never dropped) and the drilling-bias test: the seismic
attribute at the wells against the attribute over the whole map.
"""

from __future__ import annotations

import warnings
from dataclasses import asdict, dataclass, field
from typing import Literal

import numpy as np
import pandas as pd
import xarray as xr
from numpy.typing import ArrayLike
from scipy import stats as sps
from scipy.spatial import cKDTree

from .errors import InputError, PredictorWarning, list_rows
from .grid import POSITIVE_KINDS, attribute_kind, sample_at
from .stats import design_effect
from .volume import is_volume, sample_volume, well_heads, wells_z_domain

Severity = Literal["error", "warning", "note"]
POSITIVE_HINTS = ("imped", "velocity", "vp", "vs", "density", "rho")


@dataclass
class Finding:
    """One QC result a user should read."""

    severity: Severity
    check: str
    column: str | None
    message: str
    wells: list[str] = field(default_factory=list)

    def line(self) -> str:
        return f"[{self.severity}] {self.check}: {self.message}"


def numeric_properties(wells: pd.DataFrame) -> list[str]:
    """Numeric well columns other than coordinates."""
    skip = {"well_id", "x", "y", "z", "facies"}
    return [c for c in wells.columns if c not in skip and pd.api.types.is_numeric_dtype(wells[c])]


def summarise(wells: pd.DataFrame, columns: list[str], facies: str | None = "facies") -> dict:
    """Count, missing, min, max, mean, std and quartiles per column, overall and per facies."""

    def one(frame: pd.DataFrame) -> dict:
        out = {}
        for col in columns:
            v = frame[col].to_numpy(dtype=float)
            ok = v[np.isfinite(v)]
            q = np.percentile(ok, [25, 50, 75]) if ok.size else [np.nan] * 3
            out[col] = {
                "count": int(ok.size),
                "missing": int(v.size - ok.size),
                "min": float(ok.min()) if ok.size else None,
                "q25": float(q[0]) if ok.size else None,
                "median": float(q[1]) if ok.size else None,
                "q75": float(q[2]) if ok.size else None,
                "max": float(ok.max()) if ok.size else None,
                "mean": float(ok.mean()) if ok.size else None,
                "std": float(ok.std(ddof=1)) if ok.size > 1 else None,
            }
        return out

    result = {"all": one(wells)}
    if facies and facies in wells:
        for label, frame in wells.groupby(wells[facies].astype(str)):
            result[f"facies={label}"] = one(frame)
    return result


def tukey_fences(values: ArrayLike, k: float = 1.5) -> tuple[float, float]:
    """Lower and upper Tukey fences Q1 - k IQR and Q3 + k IQR (quartiles by linear
    interpolation)."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    q1, q3 = np.percentile(v, [25, 75])
    iqr = q3 - q1
    return float(q1 - k * iqr), float(q3 + k * iqr)


def physical_findings(wells: pd.DataFrame, source: str = "wells") -> list[Finding]:
    """Values that cannot be physical, named with their wells."""
    found = []
    ids = wells["well_id"].astype(str).to_numpy()

    def flag(mask: ArrayLike, column: str, message: str, severity: Severity = "error"):
        if np.any(mask):
            found.append(
                Finding(
                    severity,
                    "non-physical",
                    column,
                    f"{source}: column {column!r} {message} at {list_rows(ids[mask])}",
                    list(ids[mask]),
                )
            )

    if "porosity" in wells:
        phi = wells["porosity"].to_numpy(dtype=float)
        flag(phi < 0, "porosity", "is negative (porosity is a fraction in [0, 1])")
        flag(phi > 1, "porosity", "is above 1 (porosity is a fraction in [0, 1])")
        flag(np.isinf(phi), "porosity", "is infinite")
    if "permeability" in wells:
        k = wells["permeability"].to_numpy(dtype=float)
        flag(
            k <= 0,
            "permeability",
            "is zero or negative (permeability in mD must be > 0: log10 of it is "
            "modelled; a value below detection is best given as the detection limit, e.g. 0.001)",
        )
        flag(np.isinf(k), "permeability", "is infinite")
        finite = k[np.isfinite(k) & (k > 0)]
        if finite.size and np.median(finite) < 1e-9:
            found.append(
                Finding(
                    "error",
                    "units",
                    "permeability",
                    f"{source}: permeability median {np.median(finite):.3g} looks like m2, "
                    "not mD; convert (1 mD = 9.869e-16 m2)",
                )
            )
    for col in numeric_properties(wells):
        if col in ("porosity", "permeability"):
            continue
        v = wells[col].to_numpy(dtype=float)
        if any(h in col.lower() for h in POSITIVE_HINTS):
            flag(v <= 0, col, "is zero or negative where it must be positive")
    return found


def _impedance_units(median: float) -> str | None:
    """The units an impedance's typical magnitude suggests (common practice: about 2e6-2e7 in SI,
    2e3-2e4 in m/s x g/cm3), or None when neither fits."""
    if 1e6 <= median <= 3e7:
        return "kg/(m2 s) (SI)"
    if 1e3 <= median <= 3e4:
        return "m/s x g/cm3 (or ft/s x g/cm3)"
    return None


def attribute_label(grid: xr.Dataset, var: str) -> str:
    """An attribute's name with its units for figure axes: the file's ``units`` when it gives
    them; for impedance without them, the units its values suggest (said to be guessed)."""
    units = grid[var].attrs.get("units")
    if units:
        return f"{var} ({units})"
    if attribute_kind(grid, var) == "impedance":
        values = grid[var].to_numpy()
        guess = _impedance_units(float(np.nanmedian(values))) if np.isfinite(values).any() else None
        if guess:
            return f"{var} ({guess.split(' (')[0]}, by its values)"
    return var


def grid_findings(grid: xr.Dataset) -> list[Finding]:
    """Attributes that must be positive but are not; units hints for impedance."""
    found = []
    for var in grid.data_vars:
        v = grid[var].to_numpy()
        finite = v[np.isfinite(v)]
        source = grid.attrs.get("source", "grid")
        if finite.size == 0:
            found.append(
                Finding(
                    "error", "empty attribute", var, f"{source}: attribute {var!r} has no values"
                )
            )
            continue
        kind = attribute_kind(grid, var)
        if kind in POSITIVE_KINDS and (finite <= 0).any():
            found.append(
                Finding(
                    "error",
                    "non-physical",
                    var,
                    f"{source}: attribute {var!r} ({kind}) has {(finite <= 0).sum()} nodes <= 0"
                    " where it must be positive; if it is a signed attribute (relative impedance,"
                    f" say), tell so with --attribute-kind {var}=amplitude",
                )
            )
        if kind == "impedance":
            med = float(np.median(finite))
            unit = _impedance_units(med)
            msg = (
                f"attribute {var!r} median {med:.4g} suggests units of {unit}"
                if unit
                else f"attribute {var!r} median {med:.4g} is unusual for impedance; check the units"
            )
            found.append(Finding("note" if unit else "warning", "units", var, msg))
        if np.nanstd(finite) == 0:
            found.append(
                Finding(
                    "error",
                    "constant attribute",
                    var,
                    f"{source}: attribute {var!r} is constant; it cannot inform a model",
                )
            )
    return found


def duplicate_findings(wells: pd.DataFrame, tolerance: float = 1.0) -> list[Finding]:
    """Wells with the same id, or closer than ``tolerance`` metres to another well."""
    found = []
    ids = wells["well_id"].astype(str)
    dup = ids[ids.duplicated(keep=False)]
    if len(dup):
        found.append(
            Finding(
                "warning",
                "duplicates",
                "well_id",
                f"well ids used more than once: {list_rows(sorted(set(dup)))}",
                sorted(set(dup)),
            )
        )
    pts = wells[["x", "y"]].to_numpy(dtype=float)
    pairs = sorted(cKDTree(pts).query_pairs(r=tolerance)) if len(pts) > 1 else []
    if pairs:
        names = [f"{ids.iloc[i]}={ids.iloc[j]}" for i, j in pairs]
        found.append(
            Finding(
                "warning",
                "duplicates",
                "x,y",
                f"wells within {tolerance:g} m of each other: {list_rows(names)}; "
                "merge them or check the coordinates",
                names,
            )
        )
    return found


def sample_duplicate_findings(wells: pd.DataFrame, tolerance: float = 1.0) -> list[Finding]:
    """Wells sampled along their paths: a sample given twice (same well and z), or two wells
    whose mean positions are closer than ``tolerance`` metres."""
    found = []
    twice = wells[wells.duplicated(["well_id", "z"], keep=False)]
    if len(twice):
        names = [
            f"{w} at z {z:g}"
            for w, z in twice[["well_id", "z"]].drop_duplicates().itertuples(index=False)
        ]
        found.append(
            Finding(
                "warning",
                "duplicates",
                "well_id,z",
                f"samples given twice: {list_rows(names)}; keep one row per well and z",
                names,
            )
        )
    return found + [
        f for f in duplicate_findings(well_heads(wells)[0], tolerance) if f.column == "x,y"
    ]


def outlier_findings(
    wells: pd.DataFrame, columns: list[str], facies: str | None = "facies", k: float = 1.5
) -> list[Finding]:
    """Values outside the Tukey fences of their own facies (flagged, not removed)."""
    found = []
    groups = (
        wells.groupby(wells[facies].astype(str)) if facies and facies in wells else [("all", wells)]
    )
    for label, frame in groups:
        for col in columns:
            v = frame[col].to_numpy(dtype=float)
            if np.isfinite(v).sum() < 4:
                continue
            if col == "permeability":  # log-normal-like: fence the logarithm (common practice)
                v = np.log10(np.where(v > 0, v, np.nan))
            lo, hi = tukey_fences(v, k)
            out = (v < lo) | (v > hi)
            if out.any():
                names = list(frame["well_id"].astype(str).to_numpy()[out])
                if "z" in frame:  # samples along wells: say where along the well
                    names = [
                        f"{n} at z {z:g}"
                        for n, z in zip(names, frame["z"].to_numpy()[out], strict=True)
                    ]
                scale = " (log10)" if col == "permeability" else ""
                found.append(
                    Finding(
                        "warning",
                        "outliers",
                        col,
                        f"{col}{scale} outside the Tukey fences [{lo:.4g}, {hi:.4g}] of facies "
                        f"{label}: {list_rows(names)}; review, they are kept",
                        names,
                    )
                )
    return found


def pooled_t_from_moments(
    n1: int, mean1: float, sd1: float, n2: int, mean2: float, sd2: float
) -> tuple[float, float, float]:
    """Two-sample t statistic with pooled variance, its degrees of freedom and two-sided p-value."""
    dof = n1 + n2 - 2
    sp2 = ((n1 - 1) * sd1**2 + (n2 - 1) * sd2**2) / dof
    t = (mean1 - mean2) / np.sqrt(sp2 * (1.0 / n1 + 1.0 / n2))
    p = 2.0 * sps.t.sf(abs(t), dof)
    return float(t), float(dof), float(p)


def bias_test(
    at_wells: ArrayLike,
    over_map: ArrayLike,
    attribute: str = "attribute",
    alpha: float = 0.05,
    groups: ArrayLike | None = None,
) -> dict:
    """Compare an attribute at the wells with its values over the whole map.

    Pooled-variance two-sample t-test, two-sample Kolmogorov-Smirnov test (scipy), effect
    size (Cohen's d with the pooled sd) and a verdict in plain words.

    ``groups`` names the well of each value when there are several per well (samples along
    wells in a volume): they are not independent, so both tests count the wells' samples as
    ``n / design effect`` (Kish's design effect from the within-well correlation), not ``n``.
    """
    a = np.asarray(at_wells, dtype=float)
    b = np.asarray(over_map, dtype=float)
    ok = np.isfinite(a)
    a, b = a[ok], b[np.isfinite(b)]
    if a.size < 3:
        raise InputError(
            f"the bias test needs at least 3 wells with a value of {attribute!r}; got {a.size}"
        )
    deff, icc = design_effect(a, np.asarray(groups)[ok]) if groups is not None else (1.0, 0.0)
    n = a.size / deff  # effective number of independent samples at the wells
    t, dof, p_t = pooled_t_from_moments(n, a.mean(), a.std(ddof=1), b.size, b.mean(), b.std(ddof=1))
    ks = sps.ks_2samp(a, b)
    # the asymptotic two-sample KS p-value, as scipy's ks_2samp(method="asymp") computes it, with n
    # effective
    p_ks = (
        float(sps.kstwo.sf(ks.statistic, np.round(n * b.size / (n + b.size))))
        if deff > 1
        else float(ks.pvalue)
    )
    sp = np.sqrt(
        ((a.size - 1) * a.var(ddof=1) + (b.size - 1) * b.var(ddof=1)) / (a.size + b.size - 2)
    )
    d = float((a.mean() - b.mean()) / sp) if sp > 0 else 0.0
    biased = (p_t < alpha or p_ks < alpha) and abs(d) >= 0.2
    side = "lower" if d < 0 else "higher"
    counted = (
        f"; {a.size} samples of {np.unique(np.asarray(groups)[ok]).size} wells counted as {n:.0f} "
        f"independent ones (design effect {deff:.2g} from the within-well correlation {icc:.2f})"
        if deff > 1
        else ""
    )
    if biased:
        verdict = (
            f"The wells sample {side} {attribute} than the map (well mean {a.mean():.4g} vs map"
            f" mean {b.mean():.4g}; effect size d = {d:+.2f}; t-test p = {p_t:.2g}; KS p ="
            f" {p_ks:.2g}{counted}): drilling was preferential, so raw well statistics are biased;"
            " use declustering weights."
        )
    else:
        verdict = (
            f"No clear difference between {attribute} at the wells and over the map (d = {d:+.2f};"
            f" t-test p = {p_t:.2g}; KS p = {p_ks:.2g}{counted}); the wells look representative of"
            " this attribute."
        )
    return {
        "attribute": attribute,
        "n_wells": int(a.size),
        "n_map": int(b.size),
        "n_effective": float(n),
        "design_effect": float(deff),
        "within_well_correlation": icc,
        "mean_wells": float(a.mean()),
        "mean_map": float(b.mean()),
        "sd_wells": float(a.std(ddof=1)),
        "sd_map": float(b.std(ddof=1)),
        "t": t,
        "dof": dof,
        "p_t": p_t,
        "ks_d": float(ks.statistic),
        "p_ks": p_ks,
        "effect_size_d": d,
        "biased": bool(biased),
        "verdict": verdict,
    }


@dataclass
class QCReport:
    findings: list[Finding]
    summary: dict
    bias: dict
    columns_taken: dict

    @property
    def errors(self) -> list[Finding]:
        return [f for f in self.findings if f.severity == "error"]

    def to_dict(self) -> dict:
        return {
            "findings": [asdict(f) for f in self.findings],
            "summary": self.summary,
            "bias": self.bias,
            "columns_taken": self.columns_taken,
        }

    def lines(self) -> list[str]:
        out = [f"columns taken: {self.columns_taken}"]
        out += [f.line() for f in self.findings]
        out += [f"drilling bias ({name}): {b['verdict']}" for name, b in self.bias.items()]
        return out


def run_qc(wells: pd.DataFrame, grid: xr.Dataset, tolerance: float = 1.0) -> QCReport:
    """All checks on a wells table and its seismic grid."""
    source = wells.attrs.get("source", "wells")
    columns = numeric_properties(wells)
    volume = is_volume(grid)
    duplicates = (
        sample_duplicate_findings(wells, tolerance)
        if volume
        else duplicate_findings(wells, tolerance)
    )
    findings = physical_findings(wells, source) + grid_findings(grid) + duplicates
    findings += outlier_findings(wells, columns)
    if "facies" in wells:
        counts = wells["facies"].dropna().astype(str).value_counts()
        if len(counts) == 1:
            findings.append(
                Finding(
                    "warning",
                    "facies",
                    "facies",
                    f"only one facies ({counts.index[0]}) in {source}; a facies model needs two or"
                    " more",
                )
            )
        if volume:  # samples along one well are one piece of evidence: count wells per facies
            counts = (
                wells.dropna(subset=["facies"])
                .astype({"facies": str})
                .groupby("facies")["well_id"]
                .nunique()
            )
        rare = counts[counts < 3]
        if len(rare) and len(counts) > 1:
            findings.append(
                Finding(
                    "warning",
                    "facies",
                    "facies",
                    "facies with fewer than 3 wells:"
                    f" {', '.join(f'{k} ({v})' for k, v in rare.items())}; spatial CV cannot score"
                    " them reliably",
                )
            )
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", PredictorWarning)
        if volume:
            sampled, kept = sample_volume(
                grid,
                wells["x"],
                wells["y"],
                wells["z"],
                wells["well_id"],
                drop_outside=True,
                wells_domain=wells_z_domain(wells),
            )
        else:
            sampled, _ = sample_at(
                grid, wells["x"], wells["y"], wells["well_id"], drop_outside=True
            )
    findings += [Finding("warning", "wells vs grid", None, str(w.message)) for w in caught]
    groups = wells["well_id"].to_numpy()[kept] if volume else None  # samples of one well are alike
    bias = {
        var: bias_test(sampled[var], grid[var].to_numpy().ravel(), var, groups=groups)
        for var in grid.data_vars
    }
    return QCReport(findings, summarise(wells, columns), bias, wells.attrs.get("columns_taken", {}))
