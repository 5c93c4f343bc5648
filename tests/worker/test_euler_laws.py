"""Euler-equation errors when another state's law of motion moves with the chosen state (worker.euler_laws).

Invented growth: capital ``k`` chosen, a productivity level ``a`` whose law ``a' = a**RHO · (k / K_BAR)**THETA``
rises with the capital installed (learning by doing), a Markov shock ``e``, output ``e · a · k**ALPHA``, log
utility and full depreciation.  The exact policy, by the guess and verify of Brock, W. A. and L. J. Mirman
(1972), "Optimal economic growth and uncertainty: the discounted case", Journal of Economic Theory 4(3),
479–513, extended here to the law: with ``V = A(e) + B log k + D log a``, the first-order condition
``1/c = β B / k'`` and the budget give ``k' = s y``, ``s = β B / (1 + β B)``; the coefficients of ``log a``
and ``log k`` in the Bellman equation give ``D = (1 + β B) + β ρ D`` and ``B = (1 + β B) α + β θ D``, so
``D = (1 + β B) / (1 − β ρ)``, ``B = α̃ / (1 − β α̃)`` with ``α̃ = α + β θ / (1 − β ρ)``, and ``s = β α̃``;
``∂V/∂a = D / a`` with ``D = 1 / ((1 − β α̃)(1 − β ρ))``.  The calibration and the chain are invented.
"""

from __future__ import annotations

import copy
import math
from types import SimpleNamespace
from typing import Any

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator, RegularGridInterpolator

from tests._documents import log_growth, with_horizon, with_period_slot
from worker import euler, euler_points, euler_states
from worker.continuous import mixed_euler
from worker.document import parse_document
from worker.euler_laws import solve_slope, value_slope
from worker.feasibility import model_data
from worker.solve import compile_document, solve

ALPHA, BETA, RHO, THETA, K_BAR = 0.3, 0.95, 0.6, 0.05, 0.2
E_VALUES = np.array([0.9, 1.1])
E_CHAIN = np.array([[0.8, 0.2], [0.3, 0.7]])
ALPHA_TILDE = ALPHA + BETA * THETA / (1 - BETA * RHO)
D = 1 / ((1 - BETA * ALPHA_TILDE) * (1 - BETA * RHO))

GROWTH: dict[str, Any] = log_growth(
    alpha=ALPHA, k_min=0.05, k_max=0.45, points=30,
    shocks={"e": {"markov": {"values": E_VALUES.tolist(), "matrix": E_CHAIN.tolist()}, "transform": "none"}},
    params={"alpha": ALPHA, "rho": RHO, "theta": THETA, "k_bar": K_BAR},
    define={"c": "e * a * k**alpha - k_next"},
    next={"a": "a**rho * (k / k_bar)**theta"},
)
"""Invented: capital chosen, productivity learning from the capital installed (listed first), a shock ``e``."""
GROWTH["states"] = {"a": {"min": 0.8, "max": 1.25, "points": 5}, **GROWTH["states"]}


def _document(k_points: int = 30, a_points: int = 5, **model: Any) -> dict[str, Any]:
    spec = copy.deepcopy(GROWTH)
    spec["states"]["k"]["points"] = k_points
    spec["states"]["a"]["points"] = a_points
    spec.update(model)
    # The slot where a horizon puts ``period``: the finite-horizon tests below (with_horizon) share the kernels of
    # the infinite-horizon ones.
    return with_period_slot({"version": 1, "discount": BETA, "model": spec,
                             "solver": {"method": "howard", "tolerance": 1e-10}, "report": {"euler_errors": True}})


def _saving(share: float) -> Any:
    """Save ``share`` of output at every point (a, k) and shock point e: (m, 2) points -> (m, shocks)."""
    return lambda points: share * E_VALUES[None, :] * (points[:, 0] * points[:, 1] ** ALPHA)[:, None]


def _exact_slope(points: np.ndarray, rows: np.ndarray, axis: int) -> np.ndarray:
    """∂EV/∂a = D / a of the exact value, whatever today's shock point."""
    assert axis == 0 and rows.shape == (points.shape[0],)
    return D / points[:, 0]


def test_the_setup_keeps_the_law_and_its_slope_in_the_state() -> None:
    found = euler.setup(model_data(parse_document(_document())))
    assert isinstance(found, euler.EulerSetup) and found.state == "k"
    assert len(found.laws) == 1 and found.laws[0].position == 0
    assert found.laws[0].in_state is not None and found.laws[0].in_choice is None


def test_the_exact_policy_with_the_exact_value_slope_has_errors_at_rounding_level() -> None:
    data = model_data(parse_document(_document()))
    found = euler.setup(data)
    errors = euler_states.states_errors(data, found, BETA, _saving(BETA * ALPHA_TILDE),
                                        slopes=(_exact_slope, _exact_slope, BETA))
    assert errors["max_log10"] < -10 and errors["constrained"] == 0 and errors["undefined"] == 0
    # Along k between grid points, at every grid point of a, every shock point.
    assert errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * 30 * 5 * 2
    # The law's term needs the value's slopes: never measured without them.
    with pytest.raises(ValueError, match="slopes"):
        euler_states.states_errors(data, found, BETA, _saving(BETA * ALPHA_TILDE))


@pytest.mark.parametrize("ratio", [1.025, 0.8, 1.3])
def test_a_policy_off_by_a_known_factor_has_the_derived_error(ratio: float) -> None:
    # Saving s = ratio · β α̃: c = (1 − s) y; tomorrow ∂r/∂k' = α / (k' (1 − s)) and the law's term
    # β ∂V/∂a'' · ∂a''/∂k' = β (D / a'') θ a'' / k' = β D θ / k', whatever a', e', e''; so
    # 1/c̃ = β (α / (1 − s) + β D θ) / k' and c̃ / c = s / (β (α + (1 − s) β D θ)).
    data = model_data(parse_document(_document()))
    found = euler.setup(data)
    s = ratio * BETA * ALPHA_TILDE
    expected = math.log10(abs(1 - s / (BETA * (ALPHA + (1 - s) * BETA * D * THETA))))
    errors = euler_states.states_errors(data, found, BETA, _saving(s), slopes=(_exact_slope, _exact_slope, BETA))
    assert errors["points"] > 0 and errors["undefined"] == 0
    assert errors["max_log10"] == pytest.approx(expected, abs=1e-9)
    assert errors["mean_log10"] == pytest.approx(expected, abs=1e-9)


def test_the_value_slope_is_the_multilinear_interpolant_s() -> None:
    # Along a: the slope of the grid interval; along k: linear between grid points (scipy's interpolator
    # differentiated by a central difference well inside an interval, where it is linear in a), of the
    # continuation EV(·, z) = Σ_z' P[z, z'] V(·, z') at today's shock point z.
    data = model_data(parse_document(_document(12, 4)))
    rng = np.random.default_rng(3)
    value = rng.normal(size=data.n_grid * data.n_shocks)
    a_grid, k_grid = data.state_grids
    table = value.reshape(a_grid.size, k_grid.size, 2)
    points = np.column_stack([rng.uniform(a_grid[0], a_grid[-1], 50), rng.uniform(k_grid[0], k_grid[-1], 50)])
    left = np.clip(np.searchsorted(a_grid, points[:, 0], side="right") - 1, 0, a_grid.size - 2)
    points[:, 0] = np.clip(points[:, 0], a_grid[left] + 1e-3, a_grid[left + 1] - 1e-3)
    read = value_slope(data, value)
    for z in range(2):
        found = read(points, np.full(50, z), 0)
        central = np.zeros(50)
        for j in range(2):
            scipy_read = RegularGridInterpolator((a_grid, k_grid), table[:, :, j])
            h = 1e-4
            central += E_CHAIN[z, j] * (scipy_read(points + [h, 0]) - scipy_read(points - [h, 0])) / (2 * h)
        assert found == pytest.approx(central, abs=1e-7)


def _numpy_errors(policy: np.ndarray, value: np.ndarray, a_grid: np.ndarray, k_grid: np.ndarray,
                  policy_next: np.ndarray | None = None) -> np.ndarray:
    """Independent: the Euler errors of the grid ``policy`` (a, k, e) with the law's term, ∂V/∂a'' the slope
    along a of the multilinear interpolant of ``value`` (a, k, e), the day after's; ``policy_next`` tomorrow's
    policy (default: the same): (a, k test values, e)."""
    read_today = [RegularGridInterpolator((a_grid, k_grid), policy[:, :, j], bounds_error=False, fill_value=None)
                  for j in range(E_VALUES.size)]
    policy_next = policy if policy_next is None else policy_next
    read = [RegularGridInterpolator((a_grid, k_grid), policy_next[:, :, j], bounds_error=False, fill_value=None)
            for j in range(E_VALUES.size)]
    slope_table = np.diff(value, axis=0) / np.diff(a_grid)[:, None, None]  # (a intervals, k, e)

    def value_slope_at(a: np.ndarray, k: np.ndarray, j: int) -> np.ndarray:
        i = np.clip(np.searchsorted(a_grid, a, side="right") - 1, 0, a_grid.size - 2)
        return np.array([np.interp(kk, k_grid, slope_table[ii, :, j]) for ii, kk in zip(i.ravel(), k.ravel())
                         ]).reshape(a.shape)

    parts = math.ceil(10 * k_grid.size / (k_grid.size - 1))
    k_test = (k_grid[:-1, None] + ((np.arange(parts) + 0.5) / parts)[None, :] * np.diff(k_grid)[:, None]).ravel()
    a, k = np.meshgrid(a_grid, k_test, indexing="ij")
    out = np.empty((*a.shape, E_VALUES.size))
    for j, e in enumerate(E_VALUES):
        x = read_today[j]((a, k))
        c = e * a * k**ALPHA - x
        a_next = np.clip(a**RHO * (k / K_BAR) ** THETA, a_grid[0], a_grid[-1])
        expected = np.zeros_like(c)
        for jj, e_next in enumerate(E_VALUES):
            x_next = read[jj]((a_next, x))
            c_next = e_next * a_next * x**ALPHA - x_next
            raw = a_next**RHO * (x / K_BAR) ** THETA
            a_after = np.clip(raw, a_grid[0], a_grid[-1])
            moves = np.where(raw == a_after, THETA * raw / x, 0.0)  # moved to a grid end: it does not move
            law = sum(E_CHAIN[jj, jjj] * value_slope_at(a_after, x_next, jjj) for jjj in range(E_VALUES.size))
            expected += E_CHAIN[j, jj] * (ALPHA * e_next * a_next * x ** (ALPHA - 1) / c_next + BETA * law * moves)
        out[:, :, j] = np.log10(np.maximum(np.abs(1 - 1.0 / (BETA * expected) / c), 2.0**-56))
    return out


def test_a_solved_grid_choice_against_an_independent_numpy_computation() -> None:
    result = solve(_document(30, 5))
    assert result["status"] == "converged"
    errors = result["diagnostics"]["euler_errors"]
    k_grid, a_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["a"])
    policy = np.asarray(result["policy"]["k_next"], dtype=float)
    value = np.asarray(result["value"], dtype=float)
    reference = _numpy_errors(policy, value, a_grid, k_grid)
    assert errors["constrained"] == 0 and errors["undefined"] == 0 and errors["points"] == reference.size
    assert errors["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
    assert errors["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)


def test_a_finite_horizon_against_the_independent_computation() -> None:
    # Terminal value B log k + D log a (the exact coefficients, B = α̃ / (1 − β α̃)): every period's exact policy is
    # the infinite horizon's; period t links its grid policy today with period t + 1's tomorrow, and ∂V/∂a'' is
    # the slope of V_{t+2} (the terminal value, read on its grid, for the last period measured).
    b_coefficient = ALPHA_TILDE / (1 - BETA * ALPHA_TILDE)
    document = with_horizon(_document(24, 4), {"periods": 4,
                                               "terminal_value": f"{b_coefficient} * log(k) + {D} * log(a)"})
    result = solve(document)
    errors = result["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == [0, 1, 2]
    k_grid, a_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["a"])
    policy = np.asarray(result["policy"]["k_next"], dtype=float)  # (period, a, k, e)
    terminal = b_coefficient * np.log(k_grid)[None, :, None] + D * np.log(a_grid)[:, None, None] + np.zeros(2)
    values = [*np.asarray(result["value"], dtype=float), terminal]  # V_0 .. V_3, V_4
    for t in errors["by_period"]["period"]:
        reference = _numpy_errors(policy[t], values[t + 2], a_grid, k_grid, policy[t + 1])
        assert errors["by_period"]["max_log10"][t] == pytest.approx(reference.max(), abs=1e-9)
        assert errors["by_period"]["mean_log10"][t] == pytest.approx(reference.mean(), abs=1e-9)
    assert errors["constrained"] == 0 and errors["points"] == 3 * reference.size


CHOSEN_LAW = {"a": "a**rho * (k_next / k_bar)**theta"}
"""Learning from the capital chosen for tomorrow: the law moves with the choice, not with today's k."""
ALPHA_HAT = ALPHA + THETA / (1 - BETA * RHO)
"""With it: ``V_a = D̂ / a``, ``D̂ = 1 / ((1 − β α̂)(1 − β ρ))``, and the exact saving ``s = β α̂`` (the guess and
verify above: the first-order condition ``1/c = β (B + D̂ θ) / k'``, ``B = α M``, ``D̂ = M / (1 − β ρ)``,
``M = 1 + β (B + D̂ θ) = 1 / (1 − β α̂)``)."""
D_HAT = 1 / ((1 - BETA * ALPHA_HAT) * (1 - BETA * RHO))


@pytest.mark.parametrize("ratio", [1.0, 1.025, 0.8])
def test_a_law_moving_with_the_choice_adds_its_term_today(ratio: float) -> None:
    # Saving s = ratio · β α̂: 1/c̃ = β (α / (1 − s) + D̂ θ) / k' (the reward's slope in k' and ∂V/∂a' · ∂a'/∂k'
    # = (D̂ / a') θ a' / k'), so c̃ / c = s / (β (α + (1 − s) D̂ θ)); 1 at ratio 1: rounding level.
    data = model_data(parse_document(_document(next=CHOSEN_LAW)))
    found = euler.setup(data)
    assert isinstance(found, euler.EulerSetup) and found.laws[0].in_choice is not None
    assert found.laws[0].in_state is None

    def exact(points: np.ndarray, rows: np.ndarray, axis: int) -> np.ndarray:
        return D_HAT / points[:, 0]

    s = ratio * BETA * ALPHA_HAT
    errors = euler_states.states_errors(data, found, BETA, _saving(s), slopes=(exact, exact, BETA))
    assert errors["points"] > 0 and errors["undefined"] == 0
    if ratio == 1.0:
        assert errors["max_log10"] < -10
    else:
        expected = math.log10(abs(1 - s / (BETA * (ALPHA + (1 - s) * D_HAT * THETA))))
        assert errors["max_log10"] == pytest.approx(expected, abs=1e-9)
        assert errors["mean_log10"] == pytest.approx(expected, abs=1e-9)


def _log_document(k_points: int = 30, la_points: int = 5, **model: Any) -> dict[str, Any]:
    """The same growth with the state ``la = log a`` instead of ``a``: the same exact policy, and an exact value
    ``A(e) + B log k + D la`` linear in ``la``."""
    document = _document(k_points, **model)
    spec = document["model"]
    del spec["states"]["a"]
    spec["states"] = {"la": {"min": math.log(0.8), "max": math.log(1.25), "points": la_points}, **spec["states"]}
    spec["define"] = {"c": "e * exp(la) * k**alpha - k_next"}
    spec["next"] = {"la": "rho * la + theta * log(k / k_bar)"}
    return document


def _cubic(document: dict[str, Any]) -> dict[str, Any]:
    document["model"]["interpolation"] = "monotone_cubic"
    document["model"]["hints"] = {"concave": True}
    document["model"]["choices"]["k_next"]["continuous"] = True
    return document


def test_the_exact_policy_read_by_the_monotone_cubic_has_errors_at_rounding_level() -> None:
    # The exact value V = A(e) + B log k + D la (B = α̃ / (1 − β α̃), the guess and verify above; A(e) any
    # constants, since only slopes along la are read) on the grid, read as a monotone_cubic solve reads it: its
    # lines along k are one Fritsch–Carlson curve shifted by D la_i, and along la the four-point interpolant of
    # values linear in la is that line (equal secants: the harmonic mean and the three-point end slope are the
    # secant), so ∂EV/∂la = D at every point, to rounding, and the exact policy's errors are at rounding level.
    # In the level a the value is D log a, which no cubic holds exactly: there the read slope carries the cubic's
    # error in D / a (third order in the step of a), so the errors are not at rounding level (that model is
    # measured against an independent reading below).
    data = model_data(parse_document(_cubic(_log_document(20, 5))))
    found = euler.setup(data)
    assert isinstance(found, euler.EulerSetup) and found.laws[0].in_state is not None
    la_grid, k_grid = data.state_grids
    b_coefficient = ALPHA_TILDE / (1 - BETA * ALPHA_TILDE)
    exact = (np.array([1.0, -2.0])[None, None, :] + b_coefficient * np.log(k_grid)[None, :, None]
             + D * la_grid[:, None, None])
    slope = solve_slope(SimpleNamespace(cubic=True), data, exact.reshape(-1))
    rng = np.random.default_rng(5)
    points = np.column_stack([rng.uniform(la_grid[0], la_grid[-1], 200), rng.uniform(k_grid[0], k_grid[-1], 200)])
    assert slope(points, rng.integers(0, 2, 200), 0) == pytest.approx(np.full(200, D), rel=1e-12)

    def saving(points: np.ndarray) -> np.ndarray:
        return BETA * ALPHA_TILDE * E_VALUES[None, :] * (np.exp(points[:, 0]) * points[:, 1] ** ALPHA)[:, None]

    errors = euler_states.states_errors(data, found, BETA, saving, slopes=(slope, slope, BETA))
    assert errors["max_log10"] < -10 and errors["constrained"] == 0 and errors["undefined"] == 0
    assert errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * 20 * 5 * 2


def _pchip_slope(ev: np.ndarray, a_grid: np.ndarray, k_grid: np.ndarray, a: np.ndarray, k: np.ndarray) -> np.ndarray:
    """Independent: the slope along a of the tensor product of monotone cubics of ``ev`` (a, k) at points (a, k),
    along k first, then along a — scipy's PchipInterpolator (Fritsch, F. N. and J. Butland (1984), "A method for
    constructing local monotone piecewise cubic interpolants", SIAM J. Sci. Stat. Comput. 5(2): the weighted
    harmonic mean of the secants, zero where they turn, the three-point formula at the ends, the slopes
    fixq's Fritsch–Carlson interpolant uses)."""
    lines = PchipInterpolator(k_grid, ev, axis=1)(k)  # (a nodes, points)
    return np.array([PchipInterpolator(a_grid, lines[:, i]).derivative()(a[i]) for i in range(a.size)])


def _solved_cubic(k_points: int, a_points: int, **model: Any) -> tuple[Any, Any, np.ndarray, Any]:
    """A solved monotone_cubic model: its diagnostics, the compiled problem, the value, the search rule."""
    document = _cubic(_document(k_points, a_points, **model))
    result = solve(document)
    assert result["status"] == "converged"
    _, problem = compile_document(document)
    value = np.asarray(result["value"], dtype=float).reshape(-1)
    rule = euler_states.search_rule(problem, value, np.asarray(result["policy"]["k_next"], dtype=float).reshape(-1))
    return result["diagnostics"], problem, value, rule


def _scipy_errors(points: np.ndarray, a_grid: np.ndarray, k_grid: np.ndarray, rule: Any, rule_next: Any,
                  value_after: np.ndarray, value_next: np.ndarray | None = None) -> np.ndarray:
    """Independent: the log10 errors at test ``points`` (a, k) of the choices ``rule`` today and ``rule_next``
    tomorrow (points -> (points, e)), slopes along a of continuations EV(·, e) = Σ_e' P[e, e'] V(·, e') read by
    scipy's PchipInterpolator (:func:`_pchip_slope`): (points, e).  The law learns from today's k (GROWTH's:
    ∂EV/∂a'' of ``value_after``, the day after's value, flat), or with ``value_next`` (tomorrow's value) from the
    capital chosen (CHOSEN_LAW's: ∂EV/∂a' of it, today)."""
    chosen = value_next is not None
    ev = np.einsum("zw,akw->zak", E_CHAIN, (value_next if chosen else value_after).reshape(a_grid.size, -1, 2))
    a, k = points[:, 0], points[:, 1]
    x = rule(points)
    reference = np.empty_like(x)
    for j, e in enumerate(E_VALUES):
        raw_next = a**RHO * ((x[:, j] if chosen else k) / K_BAR) ** THETA
        a_next = np.clip(raw_next, a_grid[0], a_grid[-1])
        x_next = rule_next(np.column_stack([a_next, x[:, j]]))
        expected = np.zeros(a.size)
        if chosen:  # moved to a grid end, the law does not move
            moves = np.where(raw_next == a_next, THETA * raw_next / x[:, j], 0.0)
            expected += BETA * moves * _pchip_slope(ev[j], a_grid, k_grid, a_next, x[:, j])
        for jj, e_next in enumerate(E_VALUES):
            c_next = e_next * a_next * x[:, j] ** ALPHA - x_next[:, jj]
            expected += BETA * E_CHAIN[j, jj] * ALPHA * e_next * a_next * x[:, j] ** (ALPHA - 1) / c_next
            if not chosen:
                raw = a_next**RHO * (x[:, j] / K_BAR) ** THETA
                a_after = np.clip(raw, a_grid[0], a_grid[-1])
                moves = np.where(raw == a_after, THETA * raw / x[:, j], 0.0)
                law = _pchip_slope(ev[jj], a_grid, k_grid, a_after, x_next[:, jj]) * moves
                expected += BETA * BETA * E_CHAIN[j, jj] * law
        c = e * a * k**ALPHA - x[:, j]
        reference[:, j] = np.log10(np.maximum(np.abs(1 - 1.0 / expected / c), 2.0**-56))
    return reference


@pytest.mark.parametrize("law", ["state", "choice"])
def test_a_solved_cubic_choice_against_an_independent_scipy_reading(law: str) -> None:
    # Every test point's error against one computed here with numpy and scipy: the choices today and tomorrow by
    # the fitted problem's own search (the policy the solve has between grid points), the value's slope read by
    # scipy; the law learning from today's k (tomorrow's term) or from the capital chosen (today's term).
    diagnostics, problem, value, rule = _solved_cubic(20, 5, **({"next": CHOSEN_LAW} if law == "choice" else {}))
    data = problem.model_data
    found = euler.setup(data)
    points, _ = euler_states.test_points(data, found)
    slope = solve_slope(problem, data, value)
    fixq, constrained = euler_points.errors_at(data, found, BETA, rule, points, (data, rule),
                                               slopes=(slope, slope, BETA))
    a_grid, k_grid = data.state_grids
    reference = _scipy_errors(points, a_grid, k_grid, rule, rule, value, value if law == "choice" else None)
    assert not constrained.any()
    # |1 − c̃/c| alike to 1e-13 at every point (largest gap 7.8e-15, one run: the two readings round differently,
    # which near errors of 1e-6 moves the log10 by up to about 2e-8), and the log10 to 1e-9 where the error is
    # above 1e-4.
    assert np.abs(10.0**fixq - 10.0**reference).max() <= 1e-13
    above = reference > -4
    assert above.sum() > reference.size // 4
    assert fixq[above] == pytest.approx(reference[above], abs=1e-9)
    errors = diagnostics["euler_errors"]
    assert errors["points"] == reference.size and errors["constrained"] == 0 and errors["undefined"] == 0
    assert errors["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
    assert errors["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)


def test_a_cubic_continuous_choice_is_measured_and_its_errors_fall_with_the_grid_step() -> None:
    # Measured mean −3.49, −4.34, −4.97 and worst −2.63, −3.24, −3.85 at (20, 4), (40, 8), (80, 16) points of
    # (k, a), one run (linear interpolation on the same grids: mean −1.76, −2.10, −2.41).
    mean, worst = [], []
    for k_points, a_points in ((20, 4), (40, 8)):
        document = _cubic(_document(k_points, a_points))
        document["report"]["stationary"] = True
        diagnostics = solve(document)["diagnostics"]
        assert not any("value's slope" in note for note in diagnostics.get("notes", []))
        errors = diagnostics["euler_errors"]
        assert errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * k_points * a_points * 2 * 0.9
        assert errors["weighted_mean_log10"] is not None
        mean.append(errors["mean_log10"])
        worst.append(errors["max_log10"])
    assert mean[0] - mean[1] >= 0.5 and worst[0] - worst[1] >= 0.3
    assert mean[1] < -4


def test_a_cubic_finite_horizon_against_the_independent_scipy_reading() -> None:
    # Period t: today's choice by the search against V_{t+1}, tomorrow's against V_{t+2}, ∂EV/∂a'' of V_{t+2}
    # (the terminal value B log k + D log a on the grid for the last period measured), as in the linear test above.
    b_coefficient = ALPHA_TILDE / (1 - BETA * ALPHA_TILDE)
    document = with_horizon(_cubic(_document(16, 4)),
                            {"periods": 3, "terminal_value": f"{b_coefficient} * log(k) + {D} * log(a)"})
    result = solve(document)
    errors = result["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == [0, 1]
    _, problem = compile_document(document)
    data = problem.model_data
    a_grid, k_grid = data.state_grids
    policies = np.asarray(result["policy"]["k_next"], dtype=float).reshape(3, -1)
    terminal = b_coefficient * np.log(k_grid)[None, :, None] + D * np.log(a_grid)[:, None, None] + np.zeros(2)
    values = [*np.asarray(result["value"], dtype=float).reshape(3, -1), terminal.reshape(-1)]  # V_0 .. V_3
    points, _ = euler_states.test_points(data, euler.setup(data))
    for t in (0, 1):
        rule = euler_states.search_rule(problem, values[t + 1], policies[t])
        rule_next = euler_states.search_rule(problem, values[t + 2], policies[t + 1])
        reference = _scipy_errors(points, a_grid, k_grid, rule, rule_next, values[t + 2])
        assert errors["by_period"]["max_log10"][t] == pytest.approx(reference.max(), abs=1e-9)
        assert errors["by_period"]["mean_log10"][t] == pytest.approx(reference.mean(), abs=1e-9)
    assert errors["constrained"] == 0 and errors["points"] == 2 * reference.size


def test_a_continuous_linear_choice_is_measured_and_its_errors_fall_with_the_grid_step() -> None:
    # The choice by the fitted problem's own search between grid points, the value's slope read as the solve reads
    # the value (linear): about first order in the grid step (common practice; measured mean −1.78, −2.03, −2.23
    # and worst −1.02, −1.21, −1.26 at 20, 40, 80 capital points, one run, with 5 points of a).
    mean = []
    for k_points in (20, 40):
        document = _document(k_points, 5, interpolation="linear", hints={"concave": True})
        document["model"]["choices"]["k_next"]["continuous"] = True
        document["report"]["stationary"] = True
        errors = solve(document)["diagnostics"]["euler_errors"]
        assert errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * k_points * 5 * 2 * 0.9
        assert errors["weighted_mean_log10"] is not None
        mean.append(errors["mean_log10"])
    assert mean[0] - mean[1] >= 0.15


EFFORT_CHOICES = {"effort": {"values": [0.0, 1.0]}, "k_next": {"next_of": "k", "continuous": True}}
"""Beside capital, whether to make an effort (invented): it adds ``gain`` to the output and costs ``cost`` in
utility, and sets no state."""


def _effort_document(k_points: int, a_points: int, interpolation: str, law: str, **model: Any) -> dict[str, Any]:
    """The learning-by-doing growth with the effort beside the continuous capital choice (invented: an effort
    worth more at low output, so the best combination switches inside the grid); ``law`` "state" (learning from
    today's k) or "choice" (from the capital chosen)."""
    return _document(k_points, a_points, interpolation=interpolation, hints={"concave": True},
                     choices=copy.deepcopy(EFFORT_CHOICES), reward="log(c) - cost * effort",
                     params={**GROWTH["params"], "gain": 0.1, "cost": 0.2},
                     define={"c": "e * a * k**alpha + gain * effort - k_next"},
                     **({"next": CHOSEN_LAW} if law == "choice" else {}), **model)


def _searched(problem: Any, value: np.ndarray, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The fitted problem's own search against ``value`` at ``points`` (m, (a, k)) and every shock point: the capital
    chosen and the effort, both (m, e)."""
    m = points.shape[0]
    _, chosen = problem.choose_at(value, np.repeat(points, E_VALUES.size, axis=0), np.tile(np.arange(2), m), None)
    effort = problem.combos[chosen[:, 1].astype(np.int64), 0]
    return chosen[:, 0].reshape(m, 2), effort.reshape(m, 2)


def _linear_slope(ev: np.ndarray, a_grid: np.ndarray, k_grid: np.ndarray, a: np.ndarray, k: np.ndarray) -> np.ndarray:
    """Independent: the slope along a of the bilinear interpolant of ``ev`` (a, k) at points (a, k): that of the
    interval of a holding the point (at a node, the one to its right; the last one at the top end), interpolated
    linearly along k."""
    i = np.clip(np.searchsorted(a_grid, a, side="right") - 1, 0, a_grid.size - 2)
    table = np.diff(ev, axis=0) / np.diff(a_grid)[:, None]
    return np.array([np.interp(kk, k_grid, table[ii]) for ii, kk in zip(i, k)])


def _effort_errors(problem: Any, law: str, value_today: np.ndarray, value_after: np.ndarray,
                   ) -> tuple[np.ndarray, np.ndarray]:
    """Independent: the log10 errors and where they are measured, (a, k test values, e), of the capital choice at
    the effort the search chose, as Judd (1992) with the law's term (the guess-and-verify derivation above):
    today's choices by the fitted problem's search against ``value_today`` (V_{t+1}), tomorrow's against
    ``value_after`` (V_{t+2}); ∂EV/∂a read from V_{t+1} at today's shock point (the law in the capital chosen) or
    from V_{t+2} at tomorrow's (the law in today's k), by scipy's monotone cubics (monotone_cubic) or bilinearly
    (linear).  Measured where the effort is the same today and at every shock point tomorrow (no kink between)
    and the choice is more than one local grid step from both grid ends and from c ≤ 0 (common practice, as
    fixq's rule)."""
    data = problem.model_data
    a_grid, k_grid = data.state_grids
    read = _pchip_slope if problem.cubic else _linear_slope
    chosen = law == "choice"
    ev = np.einsum("zw,akw->zak", E_CHAIN, (value_today if chosen else value_after).reshape(a_grid.size, -1, 2))
    parts = math.ceil(10 * k_grid.size / (k_grid.size - 1))
    k_test = (k_grid[:-1, None] + ((np.arange(parts) + 0.5) / parts)[None, :] * np.diff(k_grid)[:, None]).ravel()
    a, k = (grid.ravel() for grid in np.meshgrid(a_grid, k_test, indexing="ij"))
    x, effort = _searched(problem, value_today, np.column_stack([a, k]))
    output = E_VALUES[None, :] * (a * k**ALPHA)[:, None] + 0.1 * effort
    step = np.interp(x, 0.5 * (k_grid[1:] + k_grid[:-1]), np.diff(k_grid))
    measured = (x - step >= k_grid[0]) & (x + step <= k_grid[-1]) & (output - x - step > 0)
    reference = np.empty_like(x)
    for j in range(E_VALUES.size):
        raw_next = a**RHO * ((x[:, j] if chosen else k) / K_BAR) ** THETA
        a_next = np.clip(raw_next, a_grid[0], a_grid[-1])
        x_next, effort_next = _searched(problem, value_after, np.column_stack([a_next, x[:, j]]))
        measured[:, j] &= (effort_next == effort[:, j, None]).all(axis=1)
        expected = np.zeros(a.size)
        if chosen:  # moved to a grid end, the law does not move
            moves = np.where(raw_next == a_next, THETA * raw_next / x[:, j], 0.0)
            expected += BETA * moves * read(ev[j], a_grid, k_grid, a_next, x[:, j])
        for jj, e_next in enumerate(E_VALUES):
            c_next = e_next * a_next * x[:, j] ** ALPHA + 0.1 * effort_next[:, jj] - x_next[:, jj]
            expected += BETA * E_CHAIN[j, jj] * ALPHA * e_next * a_next * x[:, j] ** (ALPHA - 1) / c_next
            if not chosen:
                raw = a_next**RHO * (x[:, j] / K_BAR) ** THETA
                a_after = np.clip(raw, a_grid[0], a_grid[-1])
                moves = np.where(raw == a_after, THETA * raw / x[:, j], 0.0)
                expected += BETA * BETA * E_CHAIN[j, jj] * moves * read(ev[jj], a_grid, k_grid, a_after, x_next[:, jj])
        c = output[:, j] - x[:, j]
        reference[:, j] = np.log10(np.maximum(np.abs(1 - 1.0 / expected / c), 2.0**-56))
    shape = (a_grid.size, k_test.size, 2)
    return reference.reshape(shape), measured.reshape(shape)


def _assert_alike(errors: dict[str, Any], reference: np.ndarray, measured: np.ndarray) -> None:
    """fixq's pooled errors and profile (the worst over a at each test value of k and shock point) against the
    independent ones, to 1e-9 in log10 (the two readings round differently: below errors of 1e-4 compared as
    errors, to 1e-13)."""
    assert 0 < measured.sum() < measured.size  # some points skipped at the switches of the effort, most measured
    assert errors["points"] == measured.sum() and errors["undefined"] == 0
    assert errors["constrained"] == measured.size - measured.sum()
    assert errors["max_log10"] == pytest.approx(reference[measured].max(), abs=1e-9)
    assert errors["mean_log10"] == pytest.approx(reference[measured].mean(), abs=1e-9)
    worst = np.where(measured, reference, -np.inf).max(axis=0)  # (k test values, e)
    profile = np.array([[-np.inf if value is None else value for value in row]
                        for row in errors["profile"]["log10_error"]])
    assert (profile == -np.inf).tolist() == (worst == -np.inf).tolist()
    seen = worst > -np.inf
    assert np.abs(10.0 ** profile[seen] - 10.0 ** worst[seen]).max() <= 1e-13
    above = worst > -4
    assert profile[above] == pytest.approx(worst[above], abs=1e-9)


@pytest.mark.parametrize(("interpolation", "law"), [("linear", "state"), ("linear", "choice"),
                                                    ("monotone_cubic", "state"), ("monotone_cubic", "choice")])
def test_beside_a_discrete_choice_every_point_is_the_independent_computation(interpolation: str, law: str) -> None:
    # The effort switches inside the grid (more effort where output is low): the capital choice is measured at the
    # effort the search chose, where it is the same today and at every shock point tomorrow, with the law's term
    # read from the solved value as the solve reads it; against the computation above with numpy and scipy.
    # Measured worst / mean at 12 × 3 points of (k, a), law in k: linear −0.97 / −1.56 (442 measured, 284 skipped),
    # monotone_cubic −1.36 / −2.25; at 24 × 6 linear −1.09 / −1.87, monotone_cubic −1.13 / −2.92 (one run).
    document = _effort_document(12, 3, interpolation, law)
    if interpolation == "monotone_cubic":
        document["model"]["choices"]["k_next"]["continuous"] = True
    result = solve(document)
    assert result["status"] == "converged"
    effort = np.asarray(result["policy"]["effort"])
    assert effort.min() == 0 and effort.max() == 1
    _, problem = compile_document(document)
    value = np.asarray(result["value"], dtype=float).reshape(-1)
    reference, measured = _effort_errors(problem, law, value, value)
    _assert_alike(result["diagnostics"]["euler_errors"], reference, measured)
    assert any("chosen combination" in note for note in result["diagnostics"]["notes"])


@pytest.mark.parametrize("ratio", [1.0, 1.025])
def test_beside_a_discrete_choice_the_exact_policy_has_errors_at_rounding_level(ratio: float) -> None:
    # A bonus that sets no state and is decided by a constant (always taken): the exact policy and value slope of
    # the guess and verify above, both combinations measured through the mixed path (the search: the exact saving
    # and the bonus everywhere); at ratio 1 rounding level, off by a known factor the derived error as above.
    document = _document(choices={"bonus": {"values": [0.0, 1.0]}, "k_next": {"next_of": "k"}},
                         reward="log(c) + 0.1 * bonus")
    data = model_data(parse_document(document))
    s = ratio * BETA * ALPHA_TILDE
    saving = _saving(s)

    def search(points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        x = saving(points)
        return x, np.ones(x.shape, dtype=np.int64)

    problem = SimpleNamespace(others=("bonus",), combos=np.array([[0.0], [1.0]]))
    found = mixed_euler.mixed_setup(problem, data)
    assert isinstance(found, euler.EulerSetup) and found.laws[0].in_state is not None
    errors, note = mixed_euler.mixed_errors(problem, data, BETA, search, (data, search),
                                            slopes=(_exact_slope, _exact_slope, BETA))
    assert errors["constrained"] == 0 and errors["undefined"] == 0
    assert errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * 30 * 5 * 2
    if ratio == 1.0:
        assert errors["max_log10"] < -10
    else:
        expected = math.log10(abs(1 - s / (BETA * (ALPHA + (1 - s) * BETA * D * THETA))))
        assert errors["max_log10"] == pytest.approx(expected, abs=1e-9)
        assert errors["mean_log10"] == pytest.approx(expected, abs=1e-9)
    # A law moving with the chosen state needs the value's slopes beside other choices too.
    with pytest.raises(ValueError, match="slopes"):
        mixed_euler.mixed_errors(problem, data, BETA, search, (data, search))


@pytest.mark.parametrize("law", ["state", "choice"])
def test_beside_a_discrete_choice_a_finite_horizon_against_the_independent_computation(law: str) -> None:
    # Period t: today's choices by the search against V_{t+1}, tomorrow's against V_{t+2}; ∂EV/∂a'' of V_{t+2} (the
    # law in today's k; for the last period measured the terminal value B log k + D log a on the grid) or ∂EV/∂a'
    # of V_{t+1} (the law in the capital chosen), as in the infinite horizon.
    b_coefficient = ALPHA_TILDE / (1 - BETA * ALPHA_TILDE)
    document = with_horizon(_effort_document(12, 3, "linear", law),
                            {"periods": 3, "terminal_value": f"{b_coefficient} * log(k) + {D} * log(a)"})
    result = solve(document)
    errors = result["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == [0, 1]
    _, problem = compile_document(document)
    a_grid, k_grid = problem.model_data.state_grids
    terminal = b_coefficient * np.log(k_grid)[None, :, None] + D * np.log(a_grid)[:, None, None] + np.zeros(2)
    values = [*np.asarray(result["value"], dtype=float).reshape(3, -1), terminal.reshape(-1)]  # V_0 .. V_3
    points = 0
    for t in (0, 1):
        reference, measured = _effort_errors(problem, law, values[t + 1], values[t + 2])
        assert 0 < measured.sum() < measured.size
        assert errors["by_period"]["max_log10"][t] == pytest.approx(reference[measured].max(), abs=1e-9)
        assert errors["by_period"]["mean_log10"][t] == pytest.approx(reference[measured].mean(), abs=1e-9)
        points += int(measured.sum())
    assert errors["points"] == points and errors["undefined"] == 0
    assert errors["constrained"] == 2 * reference.size - points


@pytest.mark.parametrize("law", ["state", "choice"])
def test_beside_a_discrete_choice_the_weighted_mean_is_the_independent_one(law: str) -> None:
    # weighted_mean_log10 of the capital choice beside the effort: every point measured (the independent errors and
    # rule above) weighted by the stationary distribution of the report, read linearly along k at each grid point
    # of a and each shock point, renormalised over the points measured (in whichever combination: one per point).
    document = _effort_document(12, 3, "linear", law)
    document["report"]["stationary"] = True
    result = solve(document)
    assert result["status"] == "converged"
    _, problem = compile_document(document)
    a_grid, k_grid = problem.model_data.state_grids
    value = np.asarray(result["value"], dtype=float).reshape(-1)
    reference, measured = _effort_errors(problem, law, value, value)
    stationary = np.asarray(result["stationary"]["distribution"], dtype=float).reshape(a_grid.size, k_grid.size, 2)
    assert stationary.sum() == pytest.approx(1.0, abs=1e-9) and stationary.min() >= 0
    parts = math.ceil(10 * k_grid.size / (k_grid.size - 1))
    k_test = (k_grid[:-1, None] + ((np.arange(parts) + 0.5) / parts)[None, :] * np.diff(k_grid)[:, None]).ravel()
    weights = np.stack([np.stack([np.interp(k_test, k_grid, stationary[i, :, j]) for j in range(2)], axis=1)
                        for i in range(a_grid.size)])  # (a, k test values, e), as reference
    expected = float(weights[measured] @ reference[measured] / weights[measured].sum())
    errors = result["diagnostics"]["euler_errors"]
    assert errors["points"] == measured.sum()
    assert errors["weighted_mean_log10"] == pytest.approx(expected, abs=1e-9)
    # The weights matter: the stationary mass sits where the errors differ from their plain mean (measured, one run:
    # law in k weighted −1.28415 both ways, plain mean −1.563; law in the capital chosen −1.70025, plain −1.689).
    assert abs(expected - reference[measured].mean()) > 1e-3
