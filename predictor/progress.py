"""Progress bars for steps that take more than a moment (candidates, tiles), via tqdm.

Quiet when standard error is not a terminal, or after :func:`set_quiet` (``--quiet``).
"""

from __future__ import annotations

import sys

from tqdm import tqdm

_quiet = False


def set_quiet(quiet: bool = True) -> None:
    global _quiet
    _quiet = quiet


def progress(iterable, desc: str, total: int | None = None):
    """Wrap an iterable in a progress bar on stderr, or return it unchanged when quiet."""
    if _quiet or not sys.stderr.isatty():
        return iterable
    return tqdm(iterable, desc=desc, total=total, leave=False, file=sys.stderr, dynamic_ncols=True)
