"""SEG-Y volumes: written by segyio's writer in the tests, read back into the same cube,
including a survey with missing traces and a rotated one."""

import numpy as np
import pytest

segyio = pytest.importorskip("segyio")

from predictor.errors import InputError  # noqa: E402
from predictor.io.segy import read_segy, write_segy  # noqa: E402


def _write(
    path,
    cube,
    inlines,
    crosslines,
    angle=0.0,
    keep=None,
    samples=None,
    origin=(450000.0, 6780000.0),
    spacing=(25.0, 12.5),
    duplicate=False,
    shift=None,
):
    nz, ni, nx = cube.shape
    samples = np.arange(nz) * 4.0 if samples is None else samples
    keep = np.ones((ni, nx), bool) if keep is None else keep
    spec = segyio.spec()
    spec.format = 5
    spec.samples = samples
    positions = list(zip(*np.nonzero(keep), strict=True))
    if duplicate:
        positions.append(positions[0])
    spec.tracecount = len(positions)
    t = np.deg2rad(angle)
    tf = segyio.TraceField
    with segyio.create(str(path), spec) as f:
        for n, (i, j) in enumerate(positions):
            a, b = i * spacing[0], j * spacing[1]
            x = origin[0] + a * np.cos(t) - b * np.sin(t)
            y = origin[1] + a * np.sin(t) + b * np.cos(t)
            if shift and n == shift[0]:
                x += shift[1]
            f.header[n] = {
                tf.INLINE_3D: int(inlines[i]),
                tf.CROSSLINE_3D: int(crosslines[j]),
                tf.SourceGroupScalar: -100,
                tf.CDP_X: int(round(x * 100)),
                tf.CDP_Y: int(round(y * 100)),
                tf.TRACE_SAMPLE_INTERVAL: 4000,
                tf.TRACE_SAMPLE_COUNT: nz,
            }
            f.trace[n] = cube[:, i, j].astype(np.float32)
        f.bin.update(hns=nz, hdt=4000, format=5)
    return path


def _cube(shape=(30, 7, 9), seed=0):
    return np.random.default_rng(seed).normal(size=shape).astype(np.float32)


def test_regular_survey_reads_back_the_cube(tmp_path):
    cube = _cube()
    ds = read_segy(_write(tmp_path / "v.sgy", cube, np.arange(100, 107), np.arange(200, 218, 2)))
    np.testing.assert_array_equal(ds.amplitude.values, cube)
    assert ds.inline.values.tolist() == list(range(100, 107)) and ds.crossline.values[1] == 202
    np.testing.assert_allclose(ds.z.values, np.arange(30) * 4.0)
    assert ds.attrs["missing_traces"] == 0


def test_missing_traces_become_nan(tmp_path):
    cube = _cube()
    keep = np.ones(cube.shape[1:], bool)
    keep[2, 3] = keep[5, 0] = False
    ds = read_segy(_write(tmp_path / "v.sgy", cube, np.arange(1, 8), np.arange(1, 10), keep=keep))
    assert (
        np.isnan(ds.amplitude.values[:, 2, 3]).all()
        and np.isnan(ds.amplitude.values[:, 5, 0]).all()
    )
    np.testing.assert_array_equal(ds.amplitude.values[:, keep], cube[:, keep])
    assert ds.attrs["missing_traces"] == 2
    # the missing positions still get their CDP coordinates from the survey's affine
    assert np.isfinite(ds.cdp_x.values).all()


def test_rotated_survey_affine(tmp_path):
    cube = _cube()
    ds = read_segy(_write(tmp_path / "v.sgy", cube, np.arange(1, 8), np.arange(1, 10), angle=30.0))
    x0, dxi, dxx, y0, dyi, dyx = ds.attrs["affine"]
    assert np.degrees(np.arctan2(dyi, dxi)) == pytest.approx(30.0, abs=0.01)
    assert np.hypot(dxi, dyi) == pytest.approx(25.0, abs=0.01) and np.hypot(
        dxx, dyx
    ) == pytest.approx(12.5, abs=0.01)
    t = np.deg2rad(30)
    expected = 450000.0 + 2 * 25 * np.cos(t) - 3 * 12.5 * np.sin(t)
    assert float(ds.cdp_x.values[2, 3]) == pytest.approx(expected, abs=0.02)


def test_write_and_read_round_trip(tmp_path):
    cube = _cube()
    keep = np.ones(cube.shape[1:], bool)
    keep[0, 0] = False
    ds = read_segy(
        _write(tmp_path / "v.sgy", cube, np.arange(1, 8), np.arange(1, 10), angle=-15.0, keep=keep)
    )
    back = read_segy(write_segy(ds, "amplitude", tmp_path / "out.sgy"))
    np.testing.assert_array_equal(back.amplitude.values, ds.amplitude.values)
    np.testing.assert_allclose(back.cdp_x.values, ds.cdp_x.values, atol=0.01)


def test_inconsistent_geometry_is_a_clear_error(tmp_path):
    cube = _cube()
    with pytest.raises(InputError, match="traces repeat at inline 1 crossline 1"):
        read_segy(
            _write(tmp_path / "dup.sgy", cube, np.arange(1, 8), np.arange(1, 10), duplicate=True)
        )
    with pytest.raises(InputError, match="off the survey lattice"):
        read_segy(
            _write(tmp_path / "off.sgy", cube, np.arange(1, 8), np.arange(1, 10), shift=(10, 40.0))
        )
    broken = tmp_path / "broken.sgy"
    broken.write_bytes((tmp_path / "dup.sgy").read_bytes()[:3000])
    with pytest.raises(InputError, match="not a readable SEG-Y"):
        read_segy(broken)


def test_written_headers_read_by_obspy(tmp_path):
    # independent reader: ObsPy's SEG-Y module (PyPI "obspy"), headers unpacked by its own byte
    # layout of SEG-Y revision 1 (binary 3201-3600, trace 1-240)
    obspy_segy = pytest.importorskip("obspy.io.segy.segy")
    cube = _cube((25, 4, 5), seed=3)
    ds = read_segy(
        _write(
            tmp_path / "v.sgy",
            cube,
            np.arange(10, 14),
            np.arange(100, 105),
            angle=10.0,
            samples=1500.0 + 4.0 * np.arange(25),
        )
    )
    ds.attrs.update(z_domain="depth", crs_wkt="EPSG:32631")
    ds["amplitude"].attrs.update(units="1", long_name="porosity 10th percentile (q10)")
    path = write_segy(ds, "amplitude", tmp_path / "out.sgy")
    st = obspy_segy._read_segy(str(path), unpack_headers=True)
    assert st.binary_file_header.seg_y_format_revision_number == 0x0100  # rev 1.0, major byte first
    assert st.binary_file_header.measurement_system == 1  # metres
    assert st.binary_file_header.data_sample_format_code == 5
    text = st.textual_file_header.decode("ascii")
    assert (
        st.textual_header_encoding == "EBCDIC" and len(text) == 3200
    )  # segyio writes the standard's EBCDIC
    lines = [text[k : k + 80] for k in range(0, 3200, 80)]
    assert lines[0].startswith("C 1 ") and lines[39].startswith("C40 ")
    assert "VARIABLE: amplitude" in text and "UNITS: 1" in text and "Z DOMAIN: DEPTH" in text
    assert "EPSG:32631" in text and "q10" in text
    assert (
        path.read_bytes()[:3200].decode("cp500") == text
    )  # plain ASCII: the same through any EBCDIC table
    h = [tr.header for tr in st.traces]
    assert [x.trace_sequence_number_within_line for x in h] == list(range(1, 21))
    assert len({x.ensemble_number for x in h}) == 20 and min(x.ensemble_number for x in h) == 1
    assert {x.trace_identification_code for x in h} == {1} and {x.coordinate_units for x in h} == {
        1
    }
    first = h[0]
    assert first.for_3d_poststack_data_this_field_is_for_in_line_number == 10
    assert first.for_3d_poststack_data_this_field_is_for_cross_line_number == 100
    assert first.scalar_to_be_applied_to_all_coordinates == -100
    assert first.x_coordinate_of_ensemble_position_of_this_trace / 100 == pytest.approx(
        float(ds.cdp_x[0, 0]), abs=0.01
    )
    np.testing.assert_array_equal(st.traces[0].data, cube[:, 0, 0])
    # and this tool reads the depth domain back from the header it wrote
    assert read_segy(path).attrs["z_domain"] == "depth"
