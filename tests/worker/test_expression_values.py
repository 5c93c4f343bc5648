"""Tests of expression values: the numpy evaluator's semantics, the numba source
and the interval bounds.

The numba parts compile a few large kernels once per module (compiling is
slow, about 5-50 ms per operation), and check them on seeded random
expressions, points and boxes.
"""

from __future__ import annotations

import io
import math
import tokenize

import numpy as np
import pytest
from numba import njit

from worker.expressions import Expression, evaluate, parse, scalar_source
from worker.expressions.interval_kernels import interval_globals
from worker.expressions.intervals import interval_source

PATH = "model.define.c"
NAMES = ("x", "y", "z")


def same(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Elementwise: equal including the sign of zero, or both nan."""
    return ((a == b) & (np.signbit(a) == np.signbit(b))) | (np.isnan(a) & np.isnan(b))


NAN, INF = math.nan, math.inf


@pytest.mark.parametrize(
    ("text", "k", "expected"),
    [
        ("log(k)", -1.0, NAN),
        ("log(k)", 0.0, -INF),
        ("sqrt(k)", -1.0, NAN),
        ("1 / k", 0.0, INF),
        ("-1 / k", 0.0, -INF),
        ("k / k", 0.0, NAN),
        ("k ** -1", 0.0, INF),
        ("k ** -1", -0.0, -INF),
        ("k ** (1 / 3)", -8.0, NAN),
        ("k ** 3", -2.0, -8.0),
        ("k ** 0.5", -INF, INF),
        ("1 / k ** 0.5", -0.0, INF),
        ("k ** 0", NAN, 1.0),
        ("exp(k)", 1000.0, INF),
        ("k < 1", NAN, 0.0),
        ("k == k", NAN, 0.0),
        ("k != k", NAN, 1.0),
        ("k and 1", NAN, 1.0),
        ("not k", NAN, 0.0),
        ("where(k, 1, 2)", NAN, 1.0),
        ("where(k, 1, 2)", -0.0, 2.0),
        ("min(k, 1)", NAN, NAN),
        ("max(1, k)", NAN, NAN),
        ("clip(k, 0, 1)", NAN, NAN),
        ("clip(k, 2, 1)", 0.0, 1.0),
    ],
)
def test_ieee_semantics(text: str, k: float, expected: float) -> None:
    got = evaluate(parse(text, path=PATH), {"k": k})
    assert got.dtype == np.float64
    assert same(got, np.float64(expected))


def test_pow_with_exponent_one_half_follows_pow_not_sqrt() -> None:
    k = np.array([-np.inf, -0.0, 0.0, 4.0, -4.0, np.nan])
    half = np.array([np.inf, 0.0, 0.0, 2.0, np.nan, np.nan])
    cube = np.array([-np.inf, -0.0, 0.0, 64.0, -64.0, np.nan])
    for exponent in (0.5, np.full(6, 0.5), np.array([[0.5], [3.0]])):
        got = evaluate(parse("k ** e", path=PATH), {"k": k, "e": exponent})
        assert same(got[..., :], half if got.ndim == 1 else np.stack([half, cube])).all()
    assert same(evaluate(parse("k ** 0.5", path=PATH), {"k": k}), half).all()


def test_broadcasting_and_shapes() -> None:
    expr = parse("k * z + where(k > z, 1, 2) + alpha", path=PATH)
    k = np.linspace(1.0, 3.0, 3).reshape(3, 1)
    z = np.array([0.0, 1.0, 2.0, 5.0])
    got = evaluate(expr, {"k": k, "z": z, "alpha": 0.5})
    assert got.shape == (3, 4)
    assert np.array_equal(got, k * z + np.where(k > z, 1.0, 2.0) + 0.5)
    assert evaluate(expr, {"k": 1.0, "z": 2.0, "alpha": 0.0}).shape == ()
    assert evaluate(parse("1 + 2", path=PATH), {}).shape == ()
    ints = evaluate(parse("k / 2", path=PATH), {"k": np.arange(3)})
    assert ints.dtype == np.float64 and ints.tolist() == [0.0, 0.5, 1.0]


def test_evaluation_never_touches_or_returns_the_inputs() -> None:
    k = np.linspace(-2.0, 2.0, 9)
    z = np.linspace(0.5, 1.5, 9)
    k_before, z_before = k.copy(), z.copy()
    for text in ["k", "-k", "k * z + z - k", "not k", "min(k, z, 1)", "clip(k, z, 1)", "k ** z", "k < z < 1"]:
        got = evaluate(parse(text, path=PATH), {"k": k, "z": z})
        assert got is not k and got is not z and not np.shares_memory(got, k) and not np.shares_memory(got, z)
        got[...] = 99.0
    assert np.array_equal(k, k_before) and np.array_equal(z, z_before)
    with pytest.raises(KeyError, match="no value given for name `z`"):
        evaluate(parse("k + z", path=PATH), {"k": 1.0})


def test_in_place_steps_give_the_plain_numpy_answer() -> None:
    rng = np.random.default_rng(7)
    k, z = rng.uniform(0.1, 3.0, (50, 1)), rng.uniform(-1.0, 1.0, 40)
    got = evaluate(parse("(k * z + 1) ** 2 / (k + 1) - log(k) * exp(z) + abs(z - k)", path=PATH), {"k": k, "z": z})
    with np.errstate(all="ignore"):
        expected = np.power(k * z + 1, 2.0) / (k + 1) - np.log(k) * np.exp(z) + np.abs(z - k)
    assert np.array_equal(got, expected)


SOURCE_WORDS = {"np", "log", "exp", "sqrt", "abs", "minimum", "maximum", "float64", "inf", "nan", "if", "else"}


def test_scalar_source_holds_no_user_text() -> None:
    expr = parse("__class__ * os + where(system > 0, log(__class__), -2.5e-7) + min(os, 1, 2) ** 3", path=PATH)
    source = scalar_source(expr, {"__class__": "s0", "os": "s1", "system": "p[0]"})
    assert "__class__" not in source and "os" not in source.replace("np.", "") and "system" not in source
    assert "(p[0])" in source
    for token in tokenize.generate_tokens(io.StringIO(source).readline):
        if token.type == tokenize.NAME:
            assert token.string in SOURCE_WORDS | {"s0", "s1", "p"}
        elif token.type == tokenize.NUMBER:
            assert token.string in {repr(float(token.string)), "0"}
    with pytest.raises(ValueError, match="os"):
        scalar_source(expr, {"__class__": "s0", "system": "s2"})


CONSTANTS = ("0", "1", "2", "3", "0.5", "1.5", "2.5", "0.1", "10", "1e-3", "1e3", "-1", "-2")
EXACT_EXPONENTS = ("2", "-1", "0.5", "1", "0")


def random_text(rng: np.random.Generator, depth: int, exact: bool) -> str:
    """A random expression over NAMES; ``exact`` leaves out log, exp and **
    with exponents whose results may differ in the last bits."""
    if depth == 0 or rng.random() < 0.2:
        return str(rng.choice(NAMES)) if rng.random() < 0.7 else str(rng.choice(CONSTANTS))

    def sub() -> str:
        return random_text(rng, depth - 1, exact)

    kinds = ["arith"] * 4
    kinds += ["neg", "compare", "chain", "logic", "not", "where", "minmax", "clip", "abs", "sqrt", "pow1"]
    if not exact:
        kinds += ["log", "exp", "pow", "pow"]
    kind = kinds[rng.integers(len(kinds))]
    if kind == "arith":
        return f"({sub()}) {rng.choice(['+', '-', '*', '/'])} ({sub()})"
    if kind == "neg":
        return f"-({sub()})"
    if kind == "compare":
        return f"({sub()}) {rng.choice(['<', '<=', '>', '>=', '==', '!='])} ({sub()})"
    if kind == "chain":
        return f"({sub()}) {rng.choice(['<', '<='])} ({sub()}) {rng.choice(['<', '<=', '!='])} ({sub()})"
    if kind == "logic":
        return f"({sub()}) {rng.choice(['and', 'or'])} ({sub()})"
    if kind == "not":
        return f"not ({sub()})"
    if kind == "where":
        return f"where({sub()}, {sub()}, {sub()})"
    if kind == "minmax":
        return f"{rng.choice(['min', 'max'])}({', '.join(sub() for _ in range(rng.integers(2, 5)))})"
    if kind == "clip":
        return f"clip({sub()}, {sub()}, {sub()})"
    if kind in ("abs", "sqrt", "log", "exp"):
        return f"{kind}({sub()})"
    if kind == "pow1":
        return f"({sub()}) ** {rng.choice(EXACT_EXPONENTS)}"
    return f"({sub()}) ** ({sub()})"


def random_expressions(seed: int, count: int, depth: int, exact: bool) -> list[Expression]:
    rng = np.random.default_rng(seed)
    return [parse(random_text(rng, depth, exact), path=PATH) for _ in range(count)]


def build_kernel(expressions: list[Expression], *, with_bounds: bool = True):
    """One numba kernel: bounds of every expression over each box (unless
    ``with_bounds`` is false), and its scalar value at each sample point.

    kernel(lo, hi, points, bounds, values) with lo, hi (names, boxes),
    points (names, boxes, samples), bounds (exprs, boxes, 2) and values
    (exprs, boxes, samples).
    """
    lo_of = {name: f"lo_{i}" for i, name in enumerate(NAMES)}
    hi_of = {name: f"hi_{i}" for i, name in enumerate(NAMES)}
    value_of = {name: f"v_{i}" for i, name in enumerate(NAMES)}
    body = ["def kernel(lo, hi, points, bounds, values):", "    for b in range(lo.shape[1]):"]
    for i in range(len(NAMES)):
        body += [f"        lo_{i} = lo[{i}, b]", f"        hi_{i} = hi[{i}, b]"]
    for e, expr in enumerate(expressions if with_bounds else []):
        lines, lo, hi = interval_source(expr, lo_of, hi_of, f"e{e}_")
        body += ["        " + line for line in lines]
        body += [f"        bounds[{e}, b, 0] = {lo}", f"        bounds[{e}, b, 1] = {hi}"]
    body += ["        for j in range(points.shape[2]):"]
    body += [f"            v_{i} = points[{i}, b, j]" for i in range(len(NAMES))]
    body += [f"            values[{e}, b, j] = {scalar_source(expr, value_of)}" for e, expr in enumerate(expressions)]
    namespace = interval_globals()
    exec("\n".join(body), namespace)
    compiled = njit(error_model="numpy", fastmath=False)(namespace["kernel"])

    def run(lo: np.ndarray, hi: np.ndarray, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        bounds = np.empty((len(expressions), lo.shape[1], 2))
        values = np.empty((len(expressions), *points.shape[1:]))
        compiled(lo, hi, points, bounds, values)
        return bounds, values

    return run


def python_bounds(expr: Expression):
    """The lines of `interval_source` run as a plain Python function."""
    lo_of = {name: f"lo_{i}" for i, name in enumerate(NAMES)}
    hi_of = {name: f"hi_{i}" for i, name in enumerate(NAMES)}
    lines, lo, hi = interval_source(expr, lo_of, hi_of, "b_")
    header = f"def bounds({', '.join(lo_of.values())}, {', '.join(hi_of.values())}):"
    namespace = interval_globals()
    exec("\n".join([header, *("    " + line for line in lines), f"    return {lo}, {hi}"]), namespace)
    return namespace["bounds"]


SPECIAL = np.array([0.0, -0.0, 1.0, -1.0, 2.0, -2.0, 3.0, 0.5, -0.5, 1e-300, 1e300, np.inf, -np.inf, np.nan])


def random_points(rng: np.random.Generator, count: int) -> np.ndarray:
    """(names, count) values: a third special, a third small integers, a third uniform."""
    points = rng.uniform(-4.0, 4.0, (len(NAMES), count))
    pick = rng.random(points.shape)
    points[pick < 0.33] = rng.choice(SPECIAL, size=int((pick < 0.33).sum()))
    integral = (pick >= 0.33) & (pick < 0.6)
    points[integral] = rng.integers(-3, 4, size=int(integral.sum()))
    return points


def random_boxes(rng: np.random.Generator, count: int, samples: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Boxes of many shapes, with sample points (endpoints, 0, an integer, uniform)."""
    shape = (len(NAMES), count)
    kind = rng.integers(0, 9, shape)
    width = np.exp(rng.uniform(-12.0, 2.0, shape))
    start = np.exp(rng.uniform(-6.0, 3.0, shape))
    lo = np.select(
        [kind == 0, kind == 1, kind == 2, kind == 3, kind == 4, kind == 5, kind == 6, kind == 7],
        [start, -start - width, -rng.uniform(0, 3, shape), np.zeros(shape), -width,
         rng.integers(-3, 4, shape).astype(float), -1e3 * np.ones(shape), start],
        default=-np.inf,
    )
    hi = np.select(
        [kind == 0, kind == 1, kind == 2, kind == 3, kind == 4, kind == 5, kind == 6, kind == 7],
        [start + width, -start, rng.uniform(0, 3, shape), width, np.zeros(shape), lo, 1e3 * np.ones(shape), lo],
        default=start,
    )
    unit = rng.random((*shape, samples))
    with np.errstate(invalid="ignore"):
        points = lo[..., None] + (hi - lo)[..., None] * unit
    points[~np.isfinite(points)] = 0.0
    points[..., 0], points[..., 1] = lo, hi
    points[..., 2] = 0.0
    points[..., 3] = np.round(points[..., 4])
    return lo, hi, np.clip(points, lo[..., None], hi[..., None])


@pytest.fixture(scope="module")
def exact_expressions() -> list[Expression]:
    return random_expressions(seed=1, count=40, depth=4, exact=True)


@pytest.fixture(scope="module")
def general_expressions() -> list[Expression]:
    return random_expressions(seed=2, count=24, depth=4, exact=False)


@pytest.fixture(scope="module")
def exact_kernel(exact_expressions):
    return build_kernel(exact_expressions, with_bounds=False)


@pytest.fixture(scope="module")
def general_kernel(general_expressions):
    return build_kernel(general_expressions)


def points_as_boxes(points: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return points, points, points[:, :, None]


def test_scalar_source_matches_numpy_bit_for_bit(exact_expressions, exact_kernel) -> None:
    """Without log, exp and general powers both evaluators round identically."""
    points = random_points(np.random.default_rng(11), 3000)
    _, values = exact_kernel(*points_as_boxes(points))
    env = dict(zip(NAMES, points))
    for expr, got in zip(exact_expressions, values[:, :, 0]):
        expected = evaluate(expr, env)
        assert same(got, expected).all(), (expr.text, points[:, ~same(got, expected)][:, :3])


def test_scalar_source_matches_numpy_within_rounding(general_expressions, general_kernel) -> None:
    """With log, exp and ** the two may differ in the last bits: wherever they
    are not identical, both must lie in the (tight) bounds of the point."""
    points = random_points(np.random.default_rng(12), 3000)
    bounds, values = general_kernel(*points_as_boxes(points))
    env = dict(zip(NAMES, points))
    identical = 0
    for e, expr in enumerate(general_expressions):
        got, lo, hi = values[e, :, 0], bounds[e, :, 0], bounds[e, :, 1]
        expected = evaluate(expr, env)
        exact = same(got, expected) | ((got == expected) & (got == 0))
        inside = (lo <= got) & (got <= hi) & (lo <= expected) & (expected <= hi)
        close = ~exact & inside & ((lo > -np.inf) | (hi < np.inf))
        assert (exact | close).all(), (expr.text, points[:, ~(exact | close)][:, :3])
        identical += int(exact.sum())
    assert identical > 0.9 * values[:, :, 0].size


def test_bounds_hold_at_sampled_points_in_numba(general_expressions, general_kernel) -> None:
    lo, hi, points = random_boxes(np.random.default_rng(13), 400, 12)
    bounds, values = general_kernel(lo, hi, points)
    env = dict(zip(NAMES, points))
    for e, expr in enumerate(general_expressions):
        b_lo, b_hi, got = bounds[e, :, 0], bounds[e, :, 1], values[e]
        assert not np.isnan(b_lo).any() and not np.isnan(b_hi).any() and (b_lo <= b_hi).all()
        full = (b_lo == -np.inf) & (b_hi == np.inf)
        for sampled in (got, evaluate(expr, env)):
            inside = (b_lo[:, None] <= sampled) & (sampled <= b_hi[:, None])
            assert (inside | full[:, None]).all(), expr.text


def test_bounds_hold_at_sampled_points_for_many_expressions() -> None:
    """The same lines run in plain Python, so many more expressions are cheap."""
    rng = np.random.default_rng(14)
    lo, hi, points = random_boxes(rng, 60, 10)
    env = dict(zip(NAMES, points))
    finite = 0
    expressions = random_expressions(seed=15, count=150, depth=3, exact=False)
    expressions += random_expressions(seed=16, count=100, depth=3, exact=True)
    for expr in expressions:
        bounds = python_bounds(expr)
        b_lo, b_hi = np.array([bounds(*lo[:, b], *hi[:, b]) for b in range(lo.shape[1])]).T
        full = (b_lo == -np.inf) & (b_hi == np.inf)
        sampled = evaluate(expr, env)
        inside = (b_lo[:, None] <= sampled) & (sampled <= b_hi[:, None])
        assert (inside | full[:, None]).all(), expr.text
        finite += int((~full).sum())
    assert finite > 0.5 * 250 * lo.shape[1]


def bounds_of(text: str, **box: tuple[float, float]) -> tuple[float, float]:
    expr = parse(text, path=PATH)
    lo_of = {name: f"lo_{name}" for name in box}
    hi_of = {name: f"hi_{name}" for name in box}
    lines, lo, hi = interval_source(expr, lo_of, hi_of, "t_")
    namespace = interval_globals()
    namespace.update({f"lo_{n}": float(b[0]) for n, b in box.items()})
    namespace.update({f"hi_{n}": float(b[1]) for n, b in box.items()})
    exec("\n".join(lines), namespace)
    return float(namespace[lo]), float(namespace[hi])


FULL = (-INF, INF)


def near(got: tuple[float, float], expected: tuple[float, float], tolerance: float = 1e-12) -> bool:
    """``got`` contains ``expected`` and is at most ``tolerance`` (relative) wider."""
    (lo, hi), (e_lo, e_hi) = got, expected
    slack_lo = tolerance * max(1.0, abs(e_lo))
    slack_hi = tolerance * max(1.0, abs(e_hi))
    return e_lo - slack_lo <= lo <= e_lo and e_hi <= hi <= e_hi + slack_hi


def test_bounds_are_tight_for_a_power_utility() -> None:
    reward = "c**(1 - gamma) / (1 - gamma)"
    assert near(bounds_of(reward, c=(1.0, 2.0), gamma=(2.0, 2.0)), (-1.0, -0.5))
    assert near(bounds_of(reward, c=(0.5, 12.0), gamma=(2.0, 2.0)), (-2.0, -1.0 / 12.0))
    lo, hi = bounds_of(reward, c=(0.5, 12.0), gamma=(0.5, 0.5))
    assert near((lo, hi), (2 * 0.5**0.5, 2 * 12.0**0.5), 1e-12)
    crra = "where(gamma == 1, log(c), c**(1 - gamma) / (1 - gamma))"
    assert near(bounds_of(crra, c=(1.0, 2.0), gamma=(2.0, 2.0)), (-1.0, -0.5))
    assert near(bounds_of(crra, c=(1.0, 2.0), gamma=(1.0, 1.0)), (0.0, math.log(2.0)))


@pytest.mark.parametrize(
    ("text", "box", "expected"),
    [
        ("x + y", {"x": (1, 2), "y": (-5, 3)}, (-4.0, 5.0)),
        ("x - y", {"x": (1, 2), "y": (-5, 3)}, (-2.0, 7.0)),
        ("x * y", {"x": (-1, 2), "y": (-5, 3)}, (-10.0, 6.0)),
        ("x / y", {"x": (1, 2), "y": (4, 8)}, (0.125, 0.5)),
        ("-x", {"x": (1, 2)}, (-2.0, -1.0)),
        ("x ** 2", {"x": (-2, 1)}, (0.0, 4.0)),
        ("x ** 3", {"x": (-2, 1)}, (-8.0, 1.0)),
        ("x ** n", {"x": (-2, 1), "n": (3, 3)}, (-8.0, 1.0)),
        ("x ** (n + 1)", {"x": (-2, 1), "n": (1, 1)}, (0.0, 4.0)),
        ("x ** -1", {"x": (-2, -1)}, (-1.0, -0.5)),
        ("x ** -2", {"x": (-2, 1)}, (0.25, INF)),
        ("x ** 0", {"x": (-2, 1)}, (1.0, 1.0)),
        ("x ** y", {"x": (2, 4), "y": (-1, 2)}, (0.25, 16.0)),
        ("x ** y", {"x": (0, 4), "y": (0, 2)}, (0.0, 16.0)),
        ("abs(x)", {"x": (-3, 1)}, (0.0, 3.0)),
        ("min(x, y, 0)", {"x": (-3, 1), "y": (2, 5)}, (-3.0, 0.0)),
        ("max(x, y)", {"x": (-3, 1), "y": (0, 5)}, (0.0, 5.0)),
        ("clip(x, 0, 1)", {"x": (-3, 0.5)}, (0.0, 0.5)),
        ("sqrt(x) + exp(y)", {"x": (4, 9), "y": (0, 0)}, (3.0, 4.0)),
        ("log(x)", {"x": (0, 1)}, (-INF, 0.0)),
        ("x < 3", {"x": (0, 1)}, (1.0, 1.0)),
        ("x > 3", {"x": (0, 1)}, (0.0, 0.0)),
        ("x < 0.5", {"x": (0, 1)}, (0.0, 1.0)),
        ("x == 1", {"x": (1, 1)}, (1.0, 1.0)),
        ("x != 1", {"x": (2, 3)}, (1.0, 1.0)),
        ("0 < x <= 1", {"x": (0.5, 1)}, (1.0, 1.0)),
        ("0 < x <= 1", {"x": (0, 1)}, (0.0, 1.0)),
        ("not (x > 3) and x >= 0", {"x": (0, 1)}, (1.0, 1.0)),
        ("x > 3 or x < -3", {"x": (0, 1)}, (0.0, 0.0)),
        ("where(x > 0, x, -x)", {"x": (1, 2)}, (1.0, 2.0)),
        ("where(x > 0, 1, 2)", {"x": (-1, 1)}, (1.0, 2.0)),
        ("log(x) < 100", {"x": (0.5, 1)}, (1.0, 1.0)),
    ],
)
def test_bounds_of_simple_expressions(
    text: str, box: dict[str, tuple[float, float]], expected: tuple[float, float]
) -> None:
    assert near(bounds_of(text, **box), expected)


@pytest.mark.parametrize(
    ("text", "box", "expected"),
    [
        ("1 / x", {"x": (-1, 1)}, FULL),
        ("log(x)", {"x": (-1, 1)}, FULL),
        ("sqrt(x)", {"x": (-1e-300, 1)}, FULL),
        ("x ** 0.5", {"x": (-1, 1)}, FULL),
        ("x ** y", {"x": (-1, 1), "y": (2, 3)}, FULL),
        ("x ** -1", {"x": (0, 1)}, FULL),
        ("exp(log(x))", {"x": (-1, 1)}, FULL),
        ("abs(log(x))", {"x": (-1, 1)}, FULL),
        ("min(log(x), 1)", {"x": (-1, 1)}, FULL),
        ("x * log(y)", {"x": (0, 1), "y": (0, 1)}, FULL),
        ("log(x) - log(y)", {"x": (0, 1), "y": (0, 1)}, FULL),
        ("log(x) < 100", {"x": (-1, 1)}, (0.0, 1.0)),
        ("where(log(x), 1, 2)", {"x": (-1, 1)}, (1.0, 2.0)),
        ("log(x) ** 0", {"x": (-1, 1)}, (1.0, 1.0)),
        ("1 ** log(x)", {"x": (-1, 1)}, (1.0, 1.0)),
    ],
)
def test_bounds_where_nan_is_possible(
    text: str, box: dict[str, tuple[float, float]], expected: tuple[float, float]
) -> None:
    assert bounds_of(text, **box) == expected


def test_interval_source_arguments() -> None:
    expr = parse("secret + 1", path=PATH)
    lines, lo, hi = interval_source(expr, {"secret": "a_lo"}, {"secret": "a_hi"}, "r0_")
    assert (lo, hi) == ("r0_lo", "r0_hi")
    assert not any("secret" in line for line in lines)
    with pytest.raises(ValueError, match="prefix"):
        interval_source(expr, {"secret": "a"}, {"secret": "b"}, "0bad")
    with pytest.raises(ValueError, match="secret"):
        interval_source(expr, {}, {"secret": "b"}, "r_")
