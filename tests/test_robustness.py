"""Never lose work: interrupted runs, a full disk, reproducible files, readers under fuzzing."""

import errno
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pytest
from conftest import DEMO
from hypothesis import given, settings
from hypothesis import strategies as st

from predictor.cli import main
from predictor.errors import InputError
from predictor.grid import read_grid
from predictor.io.tables import read_wells

GRID = str(DEMO / "seismic.csv")


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_interrupted_run_leaves_nothing_half_written(tmp_path, sig):
    earlier = tmp_path / "earlier.txt"
    earlier.write_text("keep")
    proc = subprocess.Popen(
        [sys.executable, "-m", "predictor.cli", "demo", "--out", str(tmp_path / "demo")],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
    )
    deadline = time.time() + 120
    while time.time() < deadline:  # wait until the run is writing into its temporary folder
        parts = [p for p in tmp_path.glob(".demo.*.part") if any(p.rglob("*.png"))]
        if parts:
            break
        time.sleep(0.2)
    assert parts, "the demo never started writing"
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert "interrupted" in err and "Traceback" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["earlier.txt"]
    assert earlier.read_text() == "keep"


def test_full_disk_keeps_the_earlier_map(tmp_path, monkeypatch, capsys, porosity_bundle):
    bundle = porosity_bundle
    maps = tmp_path / "maps.csv"
    maps.write_text("earlier maps")

    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(pd.DataFrame, "to_csv", full)
    assert (
        main(
            [
                "predict",
                str(bundle),
                "--grid",
                str(DEMO / "seismic.nc"),
                "--out",
                str(maps),
                "--overwrite",
            ]
        )
        == 2
    )
    assert "No space left on device" in capsys.readouterr().err
    assert maps.read_text() == "earlier maps"
    assert not list(tmp_path.glob(".*part"))


def _files(folder):
    return {
        str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()
    }


@pytest.mark.slow
def test_same_inputs_and_seed_give_identical_files_at_1_and_2_threads(tmp_path):
    outputs = []
    for run, threads in enumerate((1, 2, 1)):
        folder = tmp_path / f"run{run}"
        assert (
            main(
                [
                    "train",
                    "--wells",
                    str(DEMO / "wells.csv"),
                    "--grid",
                    GRID,
                    "--target",
                    "porosity",
                    "--target",
                    "facies",
                    "--context-radius",
                    "250",
                    "--threads",
                    str(threads),
                    "--seed",
                    "3",
                    "--out",
                    str(folder / "bundle"),
                ]
            )
            == 0
        )
        assert (
            main(
                [
                    "predict",
                    str(folder / "bundle"),
                    "--grid",
                    GRID,
                    "--out",
                    str(folder / "maps.csv"),
                ]
            )
            == 0
        )
        files = _files(folder)
        files.pop("bundle/model_card.json")  # records the thread count; everything else must match
        outputs.append(files)
    assert outputs[0] == outputs[1] == outputs[2]


# --- readers under property-based tests and fuzzing ---------------------------------------------


@settings(max_examples=60, deadline=None)
@given(
    rows=st.lists(
        st.tuples(st.floats(-1e6, 1e6), st.floats(-1e6, 1e6), st.floats(0, 1)),
        min_size=1,
        max_size=20,
    ),
    sep=st.sampled_from([",", ";"]),
    newline=st.sampled_from(["\n", "\r\n"]),
    bom=st.booleans(),
    xname=st.sampled_from(["x", "X", "Easting"]),
)
def test_wells_reader_round_trips(rows, sep, newline, bom, xname, tmp_path_factory):
    yname = {"x": "y", "X": "Y", "Easting": "Northing"}[xname]
    frame = pd.DataFrame(rows, columns=[xname, yname, "porosity"])
    text = frame.to_csv(index=False, sep=sep, lineterminator=newline, float_format="%.10g")
    path = tmp_path_factory.mktemp("w") / "w.csv"
    path.write_bytes((("\ufeff" if bom else "") + text).encode("utf-8"))
    wells = read_wells(path)
    np.testing.assert_allclose(wells.x, frame[xname], rtol=1e-9)
    np.testing.assert_allclose(wells.porosity, frame.porosity, rtol=1e-9, atol=1e-12)
    assert wells.attrs["columns_taken"] == {"x": xname, "y": yname}


FUZZ_CASES = 2500  # per reader; 5000 in all, bounded to a few seconds
SEED_WELLS = (DEMO / "wells.csv").read_bytes()[:1500]
SEED_GRID = b"x,y,impedance\n" + b"".join(
    f"{x},{y},{9000 + x + y}\n".encode() for x in range(0, 50, 10) for y in range(0, 40, 10)
)


def _mutate(data: bytes, rng) -> bytes:
    data = bytearray(data)
    for _ in range(rng.integers(1, 6)):
        kind = rng.integers(0, 5)
        pos = int(rng.integers(0, max(len(data), 1)))
        if kind == 0 and data:  # flip a byte
            data[pos % len(data)] = int(rng.integers(0, 256))
        elif kind == 1:  # insert a delimiter, quote or newline
            data[pos:pos] = rng.choice([b",", b";", b'"', b"\n", b"\r", b"\t", b"nan", b"-", b"e9"])
        elif kind == 2:  # delete a run
            del data[pos : pos + int(rng.integers(1, 20))]
        elif kind == 3:  # truncate
            data = data[:pos]
        else:  # duplicate a run
            data[pos:pos] = data[pos : pos + int(rng.integers(1, 40))]
    return bytes(data)


@pytest.mark.parametrize("reader,seed_bytes", [(read_wells, SEED_WELLS), (read_grid, SEED_GRID)])
def test_fuzzed_files_give_only_clear_errors(reader, seed_bytes, tmp_path):
    rng = np.random.default_rng(2026)
    path = tmp_path / "f.csv"
    outcomes = {"read": 0, "refused": 0}
    for i in range(FUZZ_CASES):
        data = (
            _mutate(seed_bytes, rng)
            if i % 5
            else rng.integers(0, 256, int(rng.integers(0, 400))).astype(np.uint8).tobytes()
        )
        path.write_bytes(data)
        try:
            reader(path)
            outcomes["read"] += 1
        except InputError as err:
            assert str(err) and "\n" not in str(err)
            outcomes["refused"] += 1
    assert outcomes["read"] > 0 and outcomes["refused"] > 0


def test_a_stopped_command_leaves_the_process_as_it_found_it(tmp_path, monkeypatch):
    # a notebook calls main(), presses Ctrl-C, then keeps working in the same process
    import sys
    import warnings

    import predictor.cli as cli
    from predictor.io.atomic import atomic_file

    before = (
        warnings.showwarning,
        sys.unraisablehook,
        signal.getsignal(signal.SIGINT),
        list(warnings.filters),
    )

    def stopped(args):
        cli._stop(signal.SIGINT, None)

    monkeypatch.setitem(cli.COMMANDS, "qc", stopped)
    assert cli.main(["qc", "--wells", "w.csv", "--grid", "g.csv"]) == 130
    assert (
        warnings.showwarning,
        sys.unraisablehook,
        signal.getsignal(signal.SIGINT),
        list(warnings.filters),
    ) == before
    with atomic_file(tmp_path / "after.txt") as tmp:
        tmp.write_text("kept")
    assert (tmp_path / "after.txt").read_text() == "kept"


def test_import_predictor_does_not_load_matplotlib():
    # plots load when a figure is drawn: a notebook importing the API pays no plotting start-up
    import subprocess
    import sys

    code = "import sys, predictor; print('matplotlib' in sys.modules)"
    assert (
        subprocess.run(
            [sys.executable, "-c", code], capture_output=True, text=True, check=True
        ).stdout.strip()
        == "False"
    )
