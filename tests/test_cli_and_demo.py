"""The command line and the bundled demo field."""

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from conftest import DEMO, write

from predictor.cli import main
from predictor.synthetic import FieldSpec, demo_files


def test_bundled_demo_files_match_the_generator(tmp_path):
    demo_files(tmp_path, FieldSpec())
    for name in ("wells.csv", "seismic.csv"):
        assert (tmp_path / name).read_bytes() == (DEMO / name).read_bytes(), name
    for name in (
        "seismic.nc",
        "truth.nc",
    ):  # last-bit differences between numpy releases are allowed
        made, bundled = xr.load_dataset(tmp_path / name), xr.load_dataset(DEMO / name)
        xr.testing.assert_allclose(made, bundled, rtol=1e-12)
        for var in [None, *made.variables]:
            left, right = (
                (made.attrs, bundled.attrs)
                if var is None
                else (made[var].attrs, bundled[var].attrs)
            )
            assert left.keys() == right.keys() and all(
                np.array_equal(left[k], right[k]) for k in left
            ), var


def test_qc_command_prints_bias_verdict(tmp_path, capsys, demo_paths):
    code = main(
        [
            "qc",
            "--wells",
            str(demo_paths["wells"]),
            "--grid",
            str(demo_paths["grid"]),
            "--json",
            str(tmp_path / "qc.json"),
            "--figures",
            str(tmp_path / "fig"),
        ]
    )
    out = capsys.readouterr().out
    assert code == 0
    assert "The wells sample lower impedance than the map" in out
    record = json.loads((tmp_path / "qc.json").read_text())
    assert record["declustering"]["direction"] == "minimum"
    weights = np.array(list(record["declustering"]["weights"].values()))
    assert abs(weights.sum() - len(weights)) < 1e-9
    assert {p.name for p in (tmp_path / "fig").iterdir()} >= {
        "wells_on_map.png",
        "bias_impedance.png",
        "declustering_curve.png",
        "facies_distributions.png",
    }


def test_qc_with_nonphysical_values_exits_2(tmp_path, capsys, demo_paths):
    wells = pd.read_csv(demo_paths["wells"])
    wells.loc[3, "permeability"] = -5
    path = tmp_path / "w.csv"
    wells.to_csv(path, index=False)
    code = main(["qc", "--wells", str(path), "--grid", str(demo_paths["grid"])])
    captured = capsys.readouterr()
    assert code == 2
    assert "'permeability' is zero or negative" in captured.out and "TW-04" in captured.out
    assert "QC found 1 error" in captured.err


def test_bad_input_is_one_line_exit_2(tmp_path):
    bad = write(tmp_path / "w.csv", "x,y,porosity\n1,2,25\n3,4,30\n")
    proc = subprocess.run(
        [
            sys.executable,
            "-m",
            "predictor.cli",
            "qc",
            "--wells",
            str(bad),
            "--grid",
            str(DEMO / "seismic.csv"),
            "--json",
            str(tmp_path / "qc.json"),
        ],
        capture_output=True,
        text=True,
    )
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr
    assert "--porosity-percent" in proc.stderr
    assert not (tmp_path / "qc.json").exists()
    assert not list(tmp_path.glob(".*part"))


@pytest.mark.slow
def test_demo_runs_and_declusters(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path / "out")]) == 0
    out = capsys.readouterr().out
    assert "declustered" in out and (tmp_path / "out" / "qc.json").exists()
    report = (tmp_path / "out" / "report.html").read_text()
    # the report says its data are invented, carries the truth comparison the console prints, and
    # names no scratch folder the demo was built in
    assert (
        "The data of this report are invented" in report
        and "against the truth of this synthetic field" in report
    )
    assert ".part" not in report and str(tmp_path) not in report
    assert main(["demo", "--out", str(tmp_path / "out")]) == 2  # refuses to overwrite


def test_global_options_after_the_subcommand_and_help_with_an_example():
    from predictor.cli import build_parser

    parser = build_parser()
    args = parser.parse_args(
        [
            "train",
            "--wells",
            "w.csv",
            "--grid",
            "g.csv",
            "--target",
            "porosity",
            "--out",
            "b",
            "--quiet",
            "--debug",
        ]
    )
    assert args.quiet and args.debug
    assert not parser.parse_args(["predict", "b", "--grid", "g.csv", "--out", "m.nc"]).quiet
    assert parser.parse_args(["--quiet", "demo"]).quiet
    for command in ("qc", "train", "predict", "explain", "report", "demo"):
        text = parser._subparsers._group_actions[0].choices[command].format_help()
        assert "Writes:" in text and f"example:\n  predictor {command} " in text, command


def test_train_options_come_from_the_one_table():
    """Every field of TrainOptions with a flag parses into the same field, with the Literal's
    values as the only choices, and the defaults equal the dataclass defaults."""
    import dataclasses

    import pytest

    from predictor.cli import build_parser
    from predictor.errors import InputError
    from predictor.options import from_arguments
    from predictor.training import TrainOptions

    parser = build_parser()
    base = ["train", "--wells", "w.csv", "--grid", "g.csv", "--target", "porosity", "--out", "b"]
    defaults = TrainOptions(**from_arguments(parser.parse_args(base), TrainOptions))
    for f in dataclasses.fields(TrainOptions):
        if f.name not in ("targets", "features"):
            assert getattr(defaults, f.name) == getattr(TrainOptions(targets=["x"]), f.name), f.name
    given = TrainOptions(
        **from_arguments(
            parser.parse_args(
                base
                + [
                    "--cv",
                    "blocks",
                    "--folds",
                    "4",
                    "--monotone",
                    "impedance:-1",
                    "--declustering",
                    "none",
                    "--kriging-neighbours",
                    "20",
                    "--candidate",
                    "linear",
                    "--candidate",
                    "lightgbm",
                ]
            ),
            TrainOptions,
        )
    )
    assert (given.cv, given.n_splits, given.monotone, given.declustering) == (
        "blocks",
        4,
        {"impedance": -1},
        "none",
    )
    assert (given.kriging_neighbours, given.candidates) == (20, ["linear", "lightgbm"])
    with pytest.raises(SystemExit):
        parser.parse_args(base + ["--cv", "block"])  # choices from the Literal, not a hand copy
    with pytest.raises(
        InputError,
        match=(
            "--declustering / declustering = 'cells' is not known; choose one of "
            "cell, nearest_node, none"
        ),
    ):
        TrainOptions(targets=["porosity"], declustering="cells").check()
