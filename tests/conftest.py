import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

os.environ.setdefault("MPLBACKEND", "Agg")
ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_data"


@pytest.fixture
def demo_paths():
    return {
        "wells": DEMO / "wells.csv",
        "grid": DEMO / "seismic.csv",
        "grid_nc": DEMO / "seismic.nc",
        "truth": DEMO / "truth.nc",
    }


@pytest.fixture(scope="session")
def porosity_bundle(tmp_path_factory):
    """The demo's porosity model from the plain command, trained once for the tests that only
    read it (copy it before altering it)."""
    from predictor.cli import main

    folder = tmp_path_factory.mktemp("porosity") / "bundle"
    assert (
        main(
            [
                "--quiet",
                "train",
                "--wells",
                str(DEMO / "wells.csv"),
                "--grid",
                str(DEMO / "seismic.csv"),
                "--target",
                "porosity",
                "--out",
                str(folder),
            ]
        )
        == 0
    )
    return folder


def write(path: Path, text: str, encoding: str = "utf-8", newline: str = "\n") -> Path:
    path.write_bytes(text.replace("\n", newline).encode(encoding))
    return path


BROWSER_FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]


def open_in_browser(report: Path, profile: Path, screenshot: Path | None = None) -> str:
    """Open an HTML report in headless Chromium and check what a reader would see: every figure
    decoded and captioned, every table headed, no script error, no temporary path; returns the
    rendered DOM. Skips when no Chromium is installed (.ci/run installs Debian's package)."""
    browser = (
        shutil.which("chromium")
        or shutil.which("chromium-browser")
        or shutil.which("google-chrome")
    )
    if browser is None:
        pytest.skip(
            "no Chromium on this machine (.ci/run installs Debian's chromium package; it could not"
            " here)"
        )
    run = subprocess.run(
        [
            browser,
            *BROWSER_FLAGS,
            f"--user-data-dir={profile}",
            "--enable-logging=stderr",
            "--v=0",
            "--virtual-time-budget=5000",
            "--dump-dom",
            report.as_uri(),
        ],
        capture_output=True,
        text=True,
        timeout=120,
    )
    dom = run.stdout
    n_images = len(re.findall(r"<img ", report.read_text(encoding="utf-8")))
    assert n_images and f'data-figures="loaded:{n_images}"' in dom, "every figure decoded"
    console = [line for line in run.stderr.splitlines() if "CONSOLE" in line or "Uncaught" in line]
    assert not console, console
    figures = re.findall(r"<figure>(.*?)</figure>", dom, flags=re.S)
    assert len(figures) == n_images, "every image sits in a figure"
    assert all(re.search(r"<figcaption>[^<]{10,}</figcaption>", f) for f in figures), (
        "every figure has a caption"
    )
    tables = re.findall(r"<table.*?</table>", dom, flags=re.S)
    assert tables and all("<th>" in t for t in tables), "every table has a header row"
    assert not re.search(r"\.part\b|/tmp/|pytest-of-", dom), "no temporary path in the report"
    if screenshot is not None:
        subprocess.run(
            [
                browser,
                *BROWSER_FLAGS,
                f"--user-data-dir={profile}",
                "--window-size=1280,2400",
                f"--screenshot={screenshot}",
                report.as_uri(),
            ],
            capture_output=True,
            timeout=120,
        )
        assert screenshot.exists() and screenshot.stat().st_size > 50_000
    return dom
