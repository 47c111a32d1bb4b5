"""The project's exceptions and warnings.

Every message names what was read (file, column, rows), what was expected and
how to fix it, so that the command line can print it as one line and stop.
"""

from __future__ import annotations

from collections.abc import Sequence


class PredictorError(Exception):
    """Base class of every error the tool raises on purpose."""


class InputError(PredictorError):
    """A file or an argument the user gave cannot be used as it is."""


class ModelError(PredictorError):
    """Training or prediction cannot go on with the data and options given."""


class BundleError(PredictorError):
    """A model bundle on disk is missing, altered, or of an unknown version."""


class PredictorWarning(UserWarning):
    """Something the user should know about that does not stop the run."""


def list_rows(labels: Sequence, limit: int = 5) -> str:
    """Format a few offending rows or well ids plus a count, e.g. ``'W3, W7 (2 rows)'``."""
    labels = [str(v) for v in labels]
    shown = ", ".join(labels[:limit])
    more = f" and {len(labels) - limit} more" if len(labels) > limit else ""
    noun = "row" if len(labels) == 1 else "rows"
    return f"{shown}{more} ({len(labels)} {noun})"
