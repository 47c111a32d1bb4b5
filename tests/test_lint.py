"""The linter and the formatter run with the suite, so CI enforces them (pyproject.toml)."""

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PATHS = ["predictor", "tests", "experiments"]


def _ruff(*args: str) -> subprocess.CompletedProcess:
    # ruff is a test dependency, pinned so that a new release's rules or style cannot fail CI
    return subprocess.run(
        [sys.executable, "-m", "ruff", *args, *PATHS], cwd=ROOT, capture_output=True, text=True
    )


def test_the_code_passes_the_linter_with_lines_of_at_most_100_characters():
    result = _ruff("check", "--no-cache")
    assert result.returncode == 0, result.stdout + result.stderr


def test_the_code_is_formatted():
    result = _ruff("format", "--check", "--no-cache")
    assert result.returncode == 0, (
        "run `ruff format predictor tests experiments`:\n" + result.stdout
    )
