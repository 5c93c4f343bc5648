import numpy as np
import pytest
from scipy.interpolate import RegularGridInterpolator

from worker.errors import InvalidDocument
from worker.interpolate import regrid


def _multilinear(k, z, h):
    # Linear in each axis separately (with cross terms), so multilinear
    # interpolation reproduces it exactly inside the old grid.
    k, z, h = np.meshgrid(k, z, h, indexing="ij")
    return 1.0 + 2.0 * k - 3.0 * z + 0.5 * h + 0.7 * k * z - 0.2 * k * z * h


def test_unchanged_axes_return_the_same_values():
    axes = {"k": [0.0, 1.0, 2.0], "z": [0.9, 1.1]}
    value = np.arange(6.0).reshape(3, 2)
    out = regrid(axes, value, axes)
    np.testing.assert_array_equal(out, value)
    assert out is not value and out.flags.c_contiguous


def test_exact_on_functions_linear_in_each_axis():
    rng = np.random.default_rng(5)
    old = {"k": np.sort(rng.uniform(0, 10, 30)).tolist(), "z": [-0.2, 0.0, 0.3, 0.4], "h": [1.0, 2.0, 5.0]}
    new = {
        "k": np.linspace(old["k"][0], old["k"][-1], 47).tolist(),
        "z": [-0.2, -0.1, 0.35, 0.4],
        "h": [1.0, 1.5, 3.0, 5.0],
    }
    out = regrid(old, _multilinear(*old.values()), new)
    assert out.shape == (47, 4, 4)
    np.testing.assert_allclose(out, _multilinear(*new.values()), rtol=1e-12, atol=1e-12)


def test_flat_outside_the_old_range():
    old = {"k": [1.0, 2.0, 4.0], "z": [0.0, 1.0]}
    new = {"k": [0.0, 1.0, 3.0, 9.0], "z": [-1.0, 0.5, 2.0]}
    out = regrid(old, _multilinear(old["k"], old["z"], [0.0])[..., 0], new)
    clipped_k = np.clip(new["k"], 1.0, 4.0)
    clipped_z = np.clip(new["z"], 0.0, 1.0)
    np.testing.assert_allclose(out, _multilinear(clipped_k, clipped_z, [0.0])[..., 0], rtol=1e-13)


def test_agrees_with_scipy_regular_grid_interpolator():
    # Independent reference: scipy.interpolate.RegularGridInterpolator
    # (method="linear" is multilinear on a rectilinear grid); points outside
    # the old grid are clipped first to express flat extrapolation.
    rng = np.random.default_rng(8)
    old_k = np.cumsum(rng.uniform(0.05, 1.0, 25))
    old_z = np.sort(rng.normal(size=6))
    value = rng.normal(size=(25, 6))
    new_k = np.sort(rng.uniform(old_k[0] - 1, old_k[-1] + 1, 40))
    new_z = np.sort(rng.normal(size=9) * 1.5)
    out = regrid({"k": old_k.tolist(), "z": old_z.tolist()}, value, {"k": new_k.tolist(), "z": new_z.tolist()})
    reference = RegularGridInterpolator((old_k, old_z), value, method="linear")
    kk, zz = np.meshgrid(np.clip(new_k, old_k[0], old_k[-1]), np.clip(new_z, old_z[0], old_z[-1]), indexing="ij")
    np.testing.assert_allclose(out, reference(np.stack([kk, zz], axis=-1)), rtol=1e-12, atol=1e-12)


def test_axes_are_matched_by_name_not_order():
    old = {"z": [0.0, 1.0], "k": [0.0, 1.0, 2.0]}
    value = np.array([[0.0, 1.0, 2.0], [10.0, 11.0, 12.0]])  # value[z, k] = 10 z + k
    out = regrid(old, value, {"k": [0.5, 2.0], "z": [0.25, 1.0]})
    np.testing.assert_allclose(out, [[3.0, 10.5], [4.5, 12.0]], rtol=1e-14)


def test_flat_value_and_unsorted_shock_values():
    # An explicit chain may list its values in any order: [1.0, 0.5] here.
    old = {"k": [0.0, 2.0], "r": [1.0, 0.5]}
    value = np.array([[1.0, 0.5], [3.0, 2.5]])  # k + r
    out = regrid(old, value.reshape(-1), {"k": [1.0], "r": [0.75, 1.0]})
    np.testing.assert_allclose(out, [[1.75, 2.0]], rtol=1e-14)


def test_label_axes_are_matched_by_label():
    old = {"state": ["idle", "busy", "worn"]}
    out = regrid(old, np.array([1.0, 2.0, 3.0]), {"state": ["worn", "idle"]})
    np.testing.assert_array_equal(out, [3.0, 1.0])
    with pytest.raises(InvalidDocument, match="no entry for"):
        regrid(old, np.array([1.0, 2.0, 3.0]), {"state": ["idle", "broken"]})


def test_single_point_axis_is_spread_flat():
    out = regrid({"k": [0.0, 1.0], "z": [1.0]}, np.array([[2.0], [4.0]]), {"k": [0.5], "z": [0.9, 1.0, 1.1]})
    np.testing.assert_allclose(out, [[3.0, 3.0, 3.0]])


@pytest.mark.parametrize(
    ("old_axes", "value", "new_axes", "words"),
    [
        ({"k": [0.0, 1.0]}, [1.0, 2.0], {"k": [0.0, 1.0], "z": [1.0]}, "lacks axes ['z']"),
        ({"k": [0.0, 1.0], "z": [1.0]}, [[1.0], [2.0]], {"k": [0.0, 1.0]}, "has axes ['z']"),
        ({"k": [0.0, 1.0]}, [1.0, 2.0, 3.0], {"k": [0.0, 1.0]}, "shape [3]"),
        ({"k": [0.0, 1.0]}, [1.0, float("nan")], {"k": [0.0, 1.0]}, "NaN"),
        ({"k": [0.0, 1.0, 1.0]}, [1.0, 2.0, 3.0], {"k": [0.5]}, "repeats a value"),
        ({"k": [0.0, 1.0], "z": [0.0, 1.0]}, [[1.0, 2.0], [3.0]], {"k": [0.5], "z": [0.5]}, "rectangular"),
    ],
)
def test_faults_are_reported_at_solver_initial(old_axes, value, new_axes, words):
    with pytest.raises(InvalidDocument) as excinfo:
        regrid(old_axes, value, new_axes)
    assert [e["path"].split("[")[0] for e in excinfo.value.errors] == ["solver.initial"]
    assert words in str(excinfo.value)
