import os
from pathlib import Path

import pytest

os.environ.setdefault("MPLBACKEND", "Agg")
ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_data"


@pytest.fixture
def demo_paths():
    return {"wells": DEMO / "wells.csv", "grid": DEMO / "seismic.csv", "grid_nc": DEMO / "seismic.nc",
            "truth": DEMO / "truth.nc"}


def write(path: Path, text: str, encoding: str = "utf-8", newline: str = "\n") -> Path:
    path.write_bytes(text.replace("\n", newline).encode(encoding))
    return path
