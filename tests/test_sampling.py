import numpy as np
import xarray as xr

from predictor.sampling import interpolate, multilinear


def test_a_gap_among_the_corners_renormalises_the_weights():
    # hand-worked: at the centre of a cell every corner weighs 1/2**ndim; with one corner NaN the
    # value is the plain mean of the others (2-D: three corners, 3-D: seven)
    square = np.array([[1.0, 2.0], [4.0, np.nan]])
    assert multilinear(square, [np.array([0.5]), np.array([0.5])])[0] == (1 + 2 + 4) / 3
    cube = np.arange(8.0).reshape(2, 2, 2)
    cube[1, 1, 1] = np.nan
    half = [np.array([0.5])] * 3
    np.testing.assert_allclose(multilinear(cube, half), [np.mean(np.arange(7.0))], rtol=1e-15)
    # a quarter of the way along x in the top row of the square: 1 + (2 - 1) / 4
    assert multilinear(square, [np.array([0.0]), np.array([0.25])])[0] == 1.25


def test_interpolate_flags_a_gap_at_the_nearest_node_and_clips_to_the_nodes():
    ds = xr.Dataset({"a": (("y", "x"), np.array([[1.0, 2.0], [4.0, np.nan]]))})
    values, gap = interpolate(
        ds, ("y", "x"), [np.array([0.9, 0.1, -3.0]), np.array([0.9, 0.1, 5.0])]
    )
    assert gap.tolist() == [True, False, False]
    assert values["a"].iloc[2] == 2.0  # clipped to the node (row 0, column 1)
    nearest, _ = interpolate(ds, ("y", "x"), [np.array([0.4]), np.array([0.6])], nearest=True)
    assert nearest["a"].iloc[0] == 2.0
