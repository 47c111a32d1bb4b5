"""JSON files written atomically, with numpy values turned into plain numbers."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from .atomic import atomic_file


def plain(obj: Any):
    """Turn numpy scalars/arrays and NaN into JSON-safe values (NaN becomes null)."""
    if isinstance(obj, dict):
        return {str(k): plain(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [plain(v) for v in obj.tolist()]
    if isinstance(obj, np.generic):
        return plain(obj.item())
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def dumps(obj: Any) -> str:
    return json.dumps(plain(obj), indent=2, sort_keys=False) + "\n"


def write_json(obj: Any, path: str | Path, overwrite: bool = True) -> Path:
    with atomic_file(path, overwrite=overwrite) as tmp:
        tmp.write_text(dumps(obj), encoding="utf-8")
    return Path(path)
