"""The bad-input suite: every malformed input gets one clear line, exit status 2, no traceback,
and leaves no output behind; common variations a user expects to work do work."""

import json
import shutil

import numpy as np
import pandas as pd
import pytest
from conftest import DEMO

from predictor.cli import main

GOOD_WELLS = (DEMO / "wells.csv").read_text()
HEADER = GOOD_WELLS.splitlines()[0]
GRID = str(DEMO / "seismic.csv")


def _wells_with(tmp, edit):
    frame = pd.read_csv(DEMO / "wells.csv")
    frame = edit(frame)
    path = tmp / "w.csv"
    frame.to_csv(path, index=False)
    return str(path)


def _text(tmp, name, text):
    path = tmp / name
    path.write_text(text)
    return str(path)


def _small_grid(tmp, edit=None):
    xs, ys = np.arange(511900, 515200, 100.0), np.arange(7203900, 7206700, 100.0)
    xx, yy = np.meshgrid(xs, ys)
    frame = pd.DataFrame(
        {"x": xx.ravel(), "y": yy.ravel(), "impedance": 9000 + 500 * np.sin(xx.ravel() / 300)}
    )
    frame = edit(frame) if edit else frame
    path = tmp / "g.csv"
    frame.to_csv(path, index=False)
    return str(path)


def qc(wells, grid=GRID):
    return ["qc", "--wells", wells, "--grid", grid]


def tr(wells, grid=GRID, *extra, target=("porosity",)):
    args = ["train", "--wells", wells, "--grid", grid, "--out", "OUT/bundle"]
    for t in target:
        args += ["--target", t]
    return args + list(extra)


WELL_CASES = {
    "empty file": (lambda t: qc(_text(t, "w.csv", "")), "empty"),
    "header only": (lambda t: qc(_text(t, "w.csv", HEADER + "\n")), "no data rows"),
    "mixed delimiters": (
        lambda t: qc(_text(t, "w.csv", "x;y;porosity\n1,2,0.1\n3;4;0.2\n")),
        "fields",
    ),
    "non-numeric porosity": (
        lambda t: qc(
            _wells_with(
                t,
                lambda f: f.astype({"porosity": object}).assign(
                    porosity=["abc"] + list(f.porosity[1:])
                ),
            )
        ),
        "not numbers",
    ),
    "NaN coordinate": (
        lambda t: qc(_wells_with(t, lambda f: f.assign(x=[np.nan] + list(f.x[1:])))),
        "NaN",
    ),
    "inf coordinate": (
        lambda t: qc(_text(t, "w.csv", "x,y,porosity\ninf,7205000,0.1\n513000,7205000,0.2\n")),
        "infinite",
    ),
    "percent porosity": (
        lambda t: qc(_wells_with(t, lambda f: f.assign(porosity=f.porosity * 100))),
        "--porosity-percent",
    ),
    "negative permeability": (
        lambda t: qc(
            _wells_with(t, lambda f: f.assign(permeability=[-4.0] + list(f.permeability[1:])))
        ),
        "QC found",
    ),
    "porosity above one": (
        lambda t: qc(_wells_with(t, lambda f: f.assign(porosity=[1.4] + list(f.porosity[1:])))),
        "QC found",
    ),
    "permeability in m2": (
        lambda t: qc(_wells_with(t, lambda f: f.assign(permeability=f.permeability * 9.869e-16))),
        "QC found",
    ),
    "unknown coordinate names": (
        lambda t: qc(_text(t, "w.csv", "lon,lat,porosity\n1,2,0.1\n")),
        "no column for",
    ),
    "wrong --x-column": (
        lambda t: qc(str(DEMO / "wells.csv")) + ["--x-column", "east"],
        "no column 'east'",
    ),
    "binary garbage": (lambda t: qc(_bytes(t, bytes(range(256)) * 8)), "binary"),
    "missing file": (lambda t: qc(str(t / "nope.csv")), "not found"),
    "folder as wells": (lambda t: qc(str(t)), "folder"),
    "wrong encoding bytes": (
        lambda t: qc(_bytes(t, b"x,y,porosity\n\xff\xfe\x81,2,0.1\n")),
        "cannot be read as text",
    ),
}

TRAIN_CASES = {
    "target missing": (
        lambda t: tr(str(DEMO / "wells.csv"), GRID, target=("density",)),
        "no column 'density'",
    ),
    "target all empty": (
        lambda t: tr(_wells_with(t, lambda f: f.assign(porosity=np.nan))),
        "empty",
    ),
    "one facies only": (
        lambda t: tr(_wells_with(t, lambda f: f.assign(facies="sand")), GRID, target=("facies",)),
        "single class",
    ),
    "a class with one well": (
        lambda t: tr(
            _wells_with(t, lambda f: f.assign(facies=["coal"] + list(f.facies[1:]))),
            GRID,
            target=("facies",),
        ),
        "single well",
    ),
    "too few wells": (lambda t: tr(_wells_with(t, lambda f: f.head(8))), "at least 15 wells"),
    "all wells in one spot": (
        lambda t: tr(_wells_with(t, lambda f: f.assign(x=513000.0, y=7205000.0))),
        "sit at one position",
    ),
    "constant target": (
        lambda t: tr(_wells_with(t, lambda f: f.assign(porosity=0.2))),
        "0.2 at every well",
    ),
    "fewer wells than folds need": (
        lambda t: tr(str(DEMO / "wells.csv"), GRID, "--folds", "25"),
        "25 folds needs at least 75 wells",
    ),
    "a facies in one block only": (
        lambda t: tr(
            _one_block_sand(t), GRID, "--cv", "blocks", "--block-size", "500", target=("facies",)
        ),
        "no training well of facies sand",
    ),
    "monotone on an unknown attribute": (
        lambda t: tr(str(DEMO / "wells.csv"), GRID, "--monotone", "ai:-1"),
        "not an attribute of the grid",
    ),
    "wells outside the grid": (
        lambda t: tr(_wells_with(t, lambda f: f.assign(x=f.x + 10_000))),
        "outside the grid",
    ),
    "constant attribute": (
        lambda t: tr(str(DEMO / "wells.csv"), _small_grid(t, lambda g: g.assign(impedance=9000.0))),
        "constant",
    ),
    "negative impedance": (
        lambda t: tr(
            str(DEMO / "wells.csv"),
            _small_grid(t, lambda g: g.assign(impedance=g.impedance - 20000)),
        ),
        "must be positive",
    ),
    "grid off its lattice": (
        lambda t: tr(
            str(DEMO / "wells.csv"),
            _small_grid(t, lambda g: g.assign(x=g.x + np.where(np.arange(len(g)) == 7, 13.0, 0.0))),
        ),
        "not on a regular lattice",
    ),
    "grid empty": (lambda t: tr(str(DEMO / "wells.csv"), _text(t, "g.csv", "")), "empty"),
    "grid header only": (
        lambda t: tr(str(DEMO / "wells.csv"), _text(t, "g.csv", "x,y,impedance\n")),
        "no data rows",
    ),
    "grid non-numeric": (
        lambda t: tr(
            str(DEMO / "wells.csv"),
            _small_grid(
                t,
                lambda g: g.astype({"impedance": object}).assign(
                    impedance=["abc"] + list(g.impedance[1:])
                ),
            ),
        ),
        "not numbers",
    ),
    "grid duplicated nodes": (
        lambda t: tr(str(DEMO / "wells.csv"), _small_grid(t, lambda g: pd.concat([g, g.head(3)]))),
        "appear twice",
    ),
    "truncated NetCDF": (
        lambda t: tr(
            str(DEMO / "wells.csv"), _bytes(t, (DEMO / "seismic.nc").read_bytes()[:500], "g.nc")
        ),
        "not a readable NetCDF",
    ),
    "bad fold count": (lambda t: tr(str(DEMO / "wells.csv"), GRID, "--folds", "1"), "n_splits"),
    "wells in degrees, grid in metres": (
        lambda t: tr(_wells_with(t, lambda f: f.assign(x=f.x / 1e5, y=f.y / 1e5))),
        "looks like longitude/latitude in degrees",
    ),
    "two wells at one position": (
        lambda t: tr(
            _wells_with(
                t, lambda f: f.assign(x=[f.x[1]] + list(f.x[1:]), y=[f.y[1]] + list(f.y[1:]))
            )
        ),
        "identical coordinates",
    ),
    "kriging neighbourhood below 3": (
        lambda t: tr(str(DEMO / "wells.csv"), GRID, "--kriging-neighbours", "2"),
        "3 wells or more",
    ),
    "kriging neighbourhood above the wells": (
        lambda t: tr(str(DEMO / "wells.csv"), GRID, "--kriging-neighbours", "100000"),
        "there are only",
    ),
}


def _one_block_sand(tmp):
    from predictor.spatial_cv import block_labels

    def edit(f):
        labels = block_labels(f.x, f.y, 500.0)
        crowded = np.bincount(labels).argmax()
        return f.assign(
            facies=np.where(
                labels == crowded, "sand", np.where(f.facies == "sand", "silt", f.facies)
            )
        )

    return _wells_with(tmp, edit)


def _bytes(tmp, data, name="w.csv"):
    path = tmp / name
    path.write_bytes(data)
    return str(path)


def _altered(tmp, bundle):
    copy = tmp / "copy"
    shutil.copytree(bundle, copy)
    f = copy / "porosity" / "calibration.json"
    f.write_text(f.read_text().replace("0.", "1.", 1))
    return str(copy)


def _newer(tmp, bundle):
    copy = tmp / "copy"
    shutil.copytree(bundle, copy)
    card = json.loads((copy / "model_card.json").read_text())
    card["schema_version"] = 2
    (copy / "model_card.json").write_text(json.dumps(card))
    return str(copy)


def _existing(tmp):
    (tmp / "OUT").mkdir(exist_ok=True)
    (tmp / "OUT" / "maps.csv").write_text("earlier output")
    return "OUT/maps.csv"


BUNDLE_CASES = {
    "bundle with an altered file": (
        lambda t, b: ["predict", _altered(t, b), "--grid", GRID, "--out", "OUT/m.csv"],
        "altered",
    ),
    "bundle from a newer schema": (
        lambda t, b: ["predict", _newer(t, b), "--grid", GRID, "--out", "OUT/m.csv"],
        "schema version 2",
    ),
    "not a bundle": (
        lambda t, b: ["predict", str(t), "--grid", GRID, "--out", "OUT/m.csv"],
        "not a predictor model",
    ),
    "grid lacking a feature": (
        lambda t, b: [
            "predict",
            str(b),
            "--grid",
            _small_grid(t, lambda g: g.rename(columns={"impedance": "amplitude"})),
            "--out",
            "OUT/m.csv",
        ],
        "lacks the attribute",
    ),
    "unknown map format": (
        lambda t, b: ["predict", str(b), "--grid", GRID, "--out", "OUT/m.xlsx"],
        "unknown map format",
    ),
    "existing map without --overwrite": (
        lambda t, b: ["predict", str(b), "--grid", GRID, "--out", _existing(t)],
        "already exists",
    ),
}


def _check(tmp_path, capsys, monkeypatch, argv, fragment):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "OUT").mkdir(exist_ok=True)
    before = {p for p in (tmp_path / "OUT").rglob("*")}
    code = main(argv)
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) >= 1 and err[-1].startswith("predictor: ")
    assert all("Traceback" not in line for line in err)
    assert fragment in err[-1] or any(fragment in line for line in err)
    after = {p for p in (tmp_path / "OUT").rglob("*")}
    assert after == before, f"left behind: {after - before}"
    assert not list(tmp_path.rglob("*.part"))


@pytest.mark.parametrize("case", sorted(WELL_CASES) + sorted(TRAIN_CASES))
def test_bad_well_and_grid_inputs(case, tmp_path, capsys, monkeypatch):
    build, fragment = {**WELL_CASES, **TRAIN_CASES}[case]
    _check(tmp_path, capsys, monkeypatch, build(tmp_path), fragment)


@pytest.mark.parametrize("case", sorted(BUNDLE_CASES))
def test_bad_bundle_inputs(case, porosity_bundle, tmp_path, capsys, monkeypatch):
    build, fragment = BUNDLE_CASES[case]
    argv = build(tmp_path, porosity_bundle)
    _check(tmp_path, capsys, monkeypatch, argv, fragment)
    if case.startswith("existing"):
        assert (tmp_path / "OUT" / "maps.csv").read_text() == "earlier output"


@pytest.mark.slow
def test_common_variations_work(tmp_path):
    # BOM, CRLF, upper-case X/Y, semicolons with decimal commas, an extra unused column, and 0 mD
    # (below detection) in permeability, which is not a target here and so must not block training
    frame = (
        pd.read_csv(DEMO / "wells.csv").rename(columns={"x": "X", "y": "Y"}).assign(comment="ok")
    )
    frame.loc[:2, "permeability"] = 0.0
    text = frame.to_csv(index=False, sep=";").replace(".", ",")
    (tmp_path / "w.csv").write_bytes(("\ufeff" + text).replace("\n", "\r\n").encode("utf-8"))
    assert (
        main(
            [
                "train",
                "--wells",
                str(tmp_path / "w.csv"),
                "--grid",
                GRID,
                "--target",
                "porosity",
                "--out",
                str(tmp_path / "b"),
            ]
        )
        == 0
    )
    card = json.loads((tmp_path / "b" / "model_card.json").read_text())
    assert card["inputs"]["wells"]["columns_taken"] == {"x": "X", "y": "Y"}
    assert card["naive"]["porosity"]["mean"] == pytest.approx(
        pd.read_csv(DEMO / "wells.csv").porosity.mean()
    )
