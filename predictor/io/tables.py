"""Well tables and long-format grid tables: CSV (and Parquet when pyarrow is installed).

Readers find coordinate columns case-insensitively, detect comma or semicolon
delimiters, accept a UTF-8 byte-order mark and CRLF line ends, and report which
columns they took.  Values are checked for being numbers here; whether they are
physically sensible is the business of :mod:`predictor.qc`.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError, list_rows
from .formats import file_format

X_NAMES = ("x", "easting", "east", "x_m", "xcoord", "x_coord", "utm_x")
Y_NAMES = ("y", "northing", "north", "y_m", "ycoord", "y_coord", "utm_y")
Z_NAMES = ("z", "depth", "tvd", "tvdss", "twt", "time")
# the column that plays each property role when no option names it (common log mnemonics)
ROLE_NAMES = {
    "porosity": ("porosity", "phit", "phie", "phi", "por", "poro"),
    "permeability": ("permeability", "perm", "kh", "perm_md", "k_md"),
    "facies": ("facies", "lithofacies", "litho", "facies_code"),
}
ROLE_OPTIONS = {
    "porosity": "--porosity-column",
    "permeability": "--permeability-column",
    "facies": "--facies-column",
}
WELL_NAMES = ("well_id", "well", "wellid", "well_name", "wellname", "name", "id", "uwi")


def _read_text(path: Path) -> str:
    if not path.exists():
        raise InputError(f"{path}: file not found; check the path")
    if path.is_dir():
        raise InputError(f"{path}: is a folder, expected a table file (CSV or Parquet)")
    raw = path.read_bytes()
    if not raw.strip():
        raise InputError(
            f"{path}: the file is empty; expected a header line and one row per record"
        )
    if b"\x00" in raw[:4096]:
        raise InputError(f"{path}: looks like a binary file, not a text table; export it as CSV")
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        try:
            return raw.decode("cp1252")
        except UnicodeDecodeError:
            raise InputError(
                f"{path}: cannot be read as text (bad byte at position {err.start}); save it as"
                " UTF-8 CSV"
            ) from None


def _delimiter(header: str) -> str:
    counts = {d: header.count(d) for d in (",", ";", "\t")}
    best = max(counts, key=counts.get)
    return best if counts[best] > 0 else ","


def _check_field_counts(text: str, sep: str, path: Path) -> None:
    """Name the lines whose number of fields differs from the header's (pandas would shift them)."""
    try:
        rows = csv.reader(io.StringIO(text), delimiter=sep)
        header = next(rows, [])
        bad = [i + 2 for i, row in enumerate(rows) if row and len(row) != len(header)]
    except csv.Error as err:
        raise InputError(
            f"{path}: not a readable table ({err}); check for unbalanced quotes"
        ) from None
    if bad:
        raise InputError(
            f"{path}: {list_rows([f'line {n}' for n in bad])} do not have the header's"
            f" {len(header)} fields (delimiter {sep!r}); check for stray delimiters, decimal commas"
            " in a comma-separated file, or a mix of comma and semicolon"
        )


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a CSV (delimiter detected) or Parquet file into a DataFrame, with a clear error on
    failure."""
    path = Path(path)
    if file_format(path) == "parquet":
        if not path.exists():
            raise InputError(f"{path}: file not found; check the path")
        try:
            frame = pd.read_parquet(path)
        except ImportError:
            raise InputError(
                f"{path}: reading Parquet needs pyarrow; run `pip install pyarrow` or give a CSV"
            ) from None
        except Exception as err:  # pyarrow raises many types for a broken file
            raise InputError(
                f"{path}: not a readable Parquet file ({err.__class__.__name__}); re-export it"
            ) from None
    else:
        text = (
            _read_text(path).replace("\r\n", "\n").replace("\r", "\n")
        )  # CRLF and old CR-only ends
        first_line = text.splitlines()[0] if text.splitlines() else ""
        sep = _delimiter(first_line)
        _check_field_counts(text, sep, path)
        try:
            frame = pd.read_csv(io.StringIO(text), sep=sep, skipinitialspace=True)
        except (pd.errors.ParserError, csv.Error) as err:
            raise InputError(
                f"{path}: rows do not all have the header's number of fields ({err}); "
                "check for stray delimiters or a mixed comma/semicolon file"
            ) from None
        except pd.errors.EmptyDataError:
            raise InputError(f"{path}: no columns found; expected a header line") from None
    frame.columns = [str(c).strip() for c in frame.columns]
    if frame.empty:
        raise InputError(f"{path}: has a header but no data rows; add one row per record")
    frame.attrs["source"] = str(path)
    return frame


def find_column(
    frame: pd.DataFrame,
    wanted: str | None,
    aliases: tuple[str, ...],
    what: str,
    required: bool = True,
) -> str | None:
    """Return the column named ``wanted`` (case-insensitive) or the first alias present."""
    lower = {c.lower(): c for c in frame.columns}
    source = frame.attrs.get("source", "table")
    if wanted is not None:
        if wanted.lower() in lower:
            return lower[wanted.lower()]
        raise InputError(
            f"{source}: no column {wanted!r} for {what}; columns are {', '.join(frame.columns)}"
        )
    for name in aliases:
        if name in lower:
            return lower[name]
    if required:
        raise InputError(
            f"{source}: no column for {what}; expected one of {', '.join(aliases)} (any case) "
            f"or name it with an option; columns are {', '.join(frame.columns)}"
        )
    return None


def numeric_column(
    frame: pd.DataFrame, column: str, labels: pd.Series | None = None, allow_missing: bool = True
) -> np.ndarray:
    """Convert a column to float; name the rows that are not numbers."""
    source = frame.attrs.get("source", "table")
    raw = frame[column]
    if pd.api.types.is_numeric_dtype(raw):
        values = raw.to_numpy(dtype=float)
    else:
        text = raw.astype("string").str.strip().str.replace(",", ".", regex=False)
        values = pd.to_numeric(text, errors="coerce").to_numpy(dtype=float)
        bad = np.flatnonzero(
            np.isnan(values) & raw.notna().to_numpy() & (text.fillna("") != "").to_numpy()
        )
        if bad.size:
            where = _row_labels(bad, labels)
            examples = ", ".join(repr(str(raw.iloc[i])) for i in bad[:3])
            raise InputError(
                f"{source}: column {column!r} has values that are not numbers at {where}, e.g."
                f" {examples}; fix or blank them"
            )
    if not allow_missing and np.isnan(values).any():
        where = _row_labels(np.flatnonzero(np.isnan(values)), labels)
        raise InputError(
            f"{source}: column {column!r} is empty at {where}; fill or remove those rows"
        )
    return values


def _row_labels(index: np.ndarray, labels: pd.Series | None) -> str:
    # data row i sits on line i + 2 of the file (line 1 is the header)
    if labels is None:
        return list_rows([f"line {i + 2}" for i in index])
    return list_rows([f"{labels.iloc[i]} (line {i + 2})" for i in index])


def read_wells(
    path: str | Path,
    x: str | None = None,
    y: str | None = None,
    z: str | None = None,
    well_id: str | None = None,
    porosity_percent: bool = False,
    roles: dict[str, str] | None = None,
) -> pd.DataFrame:
    """Read a wells table.

    Returns a DataFrame with columns ``well_id``, ``x``, ``y`` (``z`` when present), the
    property roles ``porosity``, ``permeability`` and ``facies`` where the file has them, and
    every other column of the file under its own name.  ``roles`` names the file column of a
    role (``{"porosity": "PHIT"}``); without it a column of the role's name or a common
    mnemonic (:data:`ROLE_NAMES`) plays it.  Physical checks, units and transforms follow the
    role, never the file's name.  ``attrs["columns_taken"]`` says which file columns became the
    coordinates and the roles taken from other names.  Porosity given in percent is refused
    unless ``porosity_percent`` asks for the conversion.
    """
    frame = read_table(path)
    source = frame.attrs["source"]
    xc = find_column(frame, x, X_NAMES, "the x coordinate (easting)")
    yc = find_column(frame, y, Y_NAMES, "the y coordinate (northing)")
    zc = find_column(frame, z, Z_NAMES, "depth or time", required=z is not None)
    wc = find_column(frame, well_id, WELL_NAMES, "the well id", required=well_id is not None)
    ids = (
        frame[wc].astype("string").str.strip()
        if wc
        else pd.Series([f"row{i + 1}" for i in range(len(frame))], dtype="string")
    )
    out = pd.DataFrame({"well_id": ids.to_numpy(dtype=object)})
    taken = {"x": xc, "y": yc}
    for key, col in (("x", xc), ("y", yc), ("z", zc)):
        if col is None:
            continue
        values = numeric_column(frame, col, ids)
        bad = np.flatnonzero(~np.isfinite(values))
        if bad.size:
            raise InputError(
                f"{source}: coordinate column {col!r} is missing, NaN or infinite at"
                f" {_row_labels(bad, ids)}; every well needs finite coordinates in projected metres"
            )
        out[key] = values
        taken[key] = col
    role_of = _role_columns(frame, roles or {}, {c for c in (xc, yc, zc, wc) if c})
    taken.update({role: col for col, role in role_of.items() if col != role})  # the renamed ones
    used = {c for c in (xc, yc, zc, wc) if c}
    for col in frame.columns:
        if col in used:
            continue
        name = role_of.get(col, col)
        if name == "facies" or (
            name not in ("porosity", "permeability") and not _looks_numeric(frame[col])
        ):
            out[name] = frame[col].to_numpy(dtype=object)
            out[name] = out[name].where(pd.notna(out[name]), None)
        else:
            out[name] = numeric_column(frame, col, ids)
    if "porosity" in out:
        out["porosity"] = _porosity_fraction(
            out["porosity"].to_numpy(dtype=float),
            source,
            porosity_percent,
            taken.get("porosity", "porosity"),
        )
    out.attrs.update(source=source, columns_taken=taken)
    return out


def _role_columns(frame: pd.DataFrame, roles: dict[str, str], used: set[str]) -> dict[str, str]:
    """File column -> role for the property roles the table holds."""
    source = frame.attrs.get("source", "table")
    unknown = sorted(set(roles) - set(ROLE_NAMES))
    if unknown:
        raise InputError(
            f"unknown column role {', '.join(unknown)}; the roles are {', '.join(ROLE_NAMES)}"
        )
    role_of = {}
    for role, aliases in ROLE_NAMES.items():
        col = find_column(
            frame, roles.get(role), aliases, f"{role} ({ROLE_OPTIONS[role]})", required=False
        )
        if col is None or col in used:
            continue
        if col in role_of:
            raise InputError(
                f"{source}: column {col!r} is given two roles, {role_of[col]} and {role}; give each"
                f" role its own column ({ROLE_OPTIONS[role_of[col]]}, {ROLE_OPTIONS[role]})"
            )
        clash = [c for c in frame.columns if c.lower() == role and c != col]
        if clash:
            raise InputError(
                f"{source}: column {col!r} is taken as {role} ({ROLE_OPTIONS[role]}), but the table"
                f" also has a column {clash[0]!r}; rename or drop one of them"
            )
        role_of[col] = role
    return role_of


def _looks_numeric(col: pd.Series) -> bool:
    if pd.api.types.is_numeric_dtype(col):
        return True
    text = col.dropna().astype("string").str.strip().str.replace(",", ".", regex=False)
    text = text[text != ""]
    if text.empty:
        return True
    return pd.to_numeric(text, errors="coerce").notna().mean() >= 0.5


def _porosity_fraction(
    values: np.ndarray, source: str, percent: bool, column: str = "porosity"
) -> np.ndarray:
    finite = values[np.isfinite(values)]
    if percent:
        return values / 100.0
    if finite.size and finite.max() > 1.0 and finite.max() <= 100.0 and np.median(finite) > 1.0:
        raise InputError(
            f"{source}: column {column!r} (porosity) looks like percent (values {finite.min():g} to"
            f" {finite.max():g}); porosity must be a fraction: pass --porosity-percent"
            " (porosity_percent=True) to divide by 100"
        )
    return values
