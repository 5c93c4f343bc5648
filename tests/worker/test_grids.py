import numpy as np
import pytest

from worker.errors import InvalidDocument
from worker.grids import build_grid, explicit_grid, locate, log_grid, power_grid, uniform_grid


def _paths(excinfo: pytest.ExceptionInfo) -> list[str]:
    return [e["path"] for e in excinfo.value.errors]


@pytest.mark.parametrize("spacing", ["uniform", "log", "power"])
@pytest.mark.parametrize(("lo", "hi", "points"), [(0.1, 7.3, 2), (0.5, 12.0, 1000), (1e-3, 1e3, 37)])
def test_grids_are_strictly_increasing_with_exact_ends(spacing, lo, hi, points):
    grid = build_grid(spacing, lo, hi, points, path="model.states.k")
    assert grid.dtype == np.float64 and grid.shape == (points,)
    assert grid[0] == lo and grid[-1] == hi
    assert np.all(np.diff(grid) > 0)


def test_uniform_grid_matches_even_spacing():
    grid = uniform_grid(-2.0, 3.0, 11)
    np.testing.assert_allclose(grid, -2.0 + 0.5 * np.arange(11), rtol=0, atol=1e-15)


def test_log_grid_has_constant_ratio():
    grid = log_grid(0.2, 50.0, 25)
    ratios = grid[1:] / grid[:-1]
    # Geometric spacing: every ratio equals (hi/lo)**(1/(n-1)).
    np.testing.assert_allclose(ratios, (50.0 / 0.2) ** (1 / 24), rtol=1e-13)


@pytest.mark.parametrize("exponent", [0.5, 1.0, 2.0, 3.5])
def test_power_grid_follows_its_formula(exponent):
    grid = power_grid(1.0, 9.0, 17, exponent)
    u = np.arange(17) / 16
    np.testing.assert_allclose(grid, 1.0 + 8.0 * u**exponent, rtol=1e-14)


def test_power_grid_above_one_is_denser_near_min():
    steps = np.diff(power_grid(0.0, 1.0, 50, 2.5))
    assert np.all(np.diff(steps) > 0)
    steps = np.diff(power_grid(0.0, 1.0, 50, 0.4))
    assert np.all(np.diff(steps) < 0)


@pytest.mark.parametrize(
    ("call", "path", "words"),
    [
        (lambda: build_grid("uniform", 3.0, 3.0, 10, path="model.states.k"), "model.states.k.max", "greater than min"),
        (lambda: build_grid("uniform", 5.0, 1.0, 10, path="model.states.k"), "model.states.k.max", "greater than min"),
        (lambda: build_grid("uniform", 0.0, 1.0, 1, path="model.states.k"), "model.states.k.points", "at least 2"),
        (lambda: build_grid("uniform", 0.0, 1.0, 2.5, path="model.states.k"), "model.states.k.points", "whole number"),
        (lambda: build_grid("uniform", 0.0, 1.0, True, path="model.states.k"), "model.states.k.points", "whole number"),
        (lambda: build_grid("log", 0.0, 1.0, 10, path="model.states.k"), "model.states.k.min", "min > 0"),
        (lambda: build_grid("log", -1.0, 1.0, 10, path="model.states.k"), "model.states.k.min", "min > 0"),
        (lambda: build_grid("power", 0.0, 1.0, 10, 0.0, path="model.states.k"), "model.states.k.exponent", "positive"),
        (lambda: build_grid("power", 0.0, 1.0, 10, -2.0, path="model.states.k"), "model.states.k.exponent", "positive"),
        (lambda: build_grid("uniform", float("nan"), 1.0, 10, path="model.states.k"), "model.states.k.min", "finite"),
        (lambda: build_grid("uniform", 0.0, float("inf"), 10, path="model.states.k"), "model.states.k.max", "finite"),
        (lambda: build_grid("cubic", 0.0, 1.0, 10, path="model.states.k"), "model.states.k.spacing", "unknown spacing"),
        (
            lambda: build_grid("uniform", 1.0, 1 + 1e-15, 50, path="model.states.k"),
            "model.states.k.points",
            "too close",
        ),
    ],
)
def test_grid_faults_name_the_field(call, path, words):
    with pytest.raises(InvalidDocument) as excinfo:
        call()
    assert path in _paths(excinfo)
    assert words in str(excinfo.value)


def test_all_grid_faults_are_reported_together():
    with pytest.raises(InvalidDocument) as excinfo:
        build_grid("log", -1.0, -2.0, 1, path="model.choices.c")
    assert set(_paths(excinfo)) == {"model.choices.c.min", "model.choices.c.max", "model.choices.c.points"}


def test_explicit_grid_checks_order_and_finiteness():
    np.testing.assert_array_equal(explicit_grid([0.0, 0.5, 2.0], path="model.states.h"), [0.0, 0.5, 2.0])
    with pytest.raises(InvalidDocument) as excinfo:
        explicit_grid([0.0, 0.5, 0.5, 2.0], path="model.states.h")
    assert _paths(excinfo) == ["model.states.h.values[2]"]
    with pytest.raises(InvalidDocument) as excinfo:
        explicit_grid([0.0, float("nan")], path="model.states.h")
    assert _paths(excinfo) == ["model.states.h.values[1]"]
    with pytest.raises(InvalidDocument) as excinfo:
        explicit_grid([1.0], path="model.states.h")
    assert "at least 2" in str(excinfo.value)


def test_locate_reconstructs_points_inside_the_grid():
    rng = np.random.default_rng(3)
    grid = np.sort(rng.uniform(-5, 5, 40))
    x = rng.uniform(grid[0], grid[-1], (300, 7))
    lower, weight, clamped = locate(grid, x)
    assert lower.shape == weight.shape == clamped.shape == x.shape
    assert lower.dtype == np.int64 and not clamped.any()
    assert lower.min() >= 0 and lower.max() <= grid.size - 2
    assert weight.min() >= 0 and weight.max() <= 1
    assert np.all(grid[lower] <= x) and np.all(x <= grid[lower + 1])
    np.testing.assert_allclose((1 - weight) * grid[lower] + weight * grid[lower + 1], x, rtol=0, atol=1e-13)


def test_locate_agrees_with_numpy_interp():
    # np.interp is an independent implementation of piecewise-linear
    # interpolation with the same clamping at the ends.
    rng = np.random.default_rng(4)
    grid = np.cumsum(rng.uniform(0.01, 1.0, 60))
    f = rng.normal(size=60)
    x = rng.uniform(grid[0] - 3, grid[-1] + 3, 5000)
    lower, weight, clamped = locate(grid, x)
    ours = (1 - weight) * f[lower] + weight * f[lower + 1]
    np.testing.assert_allclose(ours, np.interp(x, grid, f), rtol=0, atol=1e-12)
    np.testing.assert_array_equal(clamped, (x < grid[0]) | (x > grid[-1]))


def test_locate_grid_points_and_ends():
    grid = np.array([0.0, 1.0, 3.0, 4.0])
    lower, weight, clamped = locate(grid, [0.0, 1.0, 3.0, 4.0, -1.0, 9.0, 2.0])
    np.testing.assert_array_equal(lower, [0, 1, 2, 2, 0, 2, 1])
    np.testing.assert_array_equal(weight, [0.0, 0.0, 0.0, 1.0, 0.0, 1.0, 0.5])
    np.testing.assert_array_equal(clamped, [False, False, False, False, True, True, False])


def test_locate_scalar_and_bad_grids():
    lower, weight, clamped = locate(np.array([0.0, 2.0]), 0.5)
    assert lower.shape == () and int(lower) == 0 and float(weight) == 0.25 and not bool(clamped)
    with pytest.raises(ValueError):
        locate(np.array([0.0, 0.0, 1.0]), [0.5])
    with pytest.raises(ValueError):
        locate(np.array([1.0]), [0.5])
