"""Euler-equation errors of several next_of choices when another state's law moves with a chosen state.

An invented workshop choosing tomorrow's machines ``k`` and tools ``h`` on their grids out of output
``y = z · a · k**A1 · h**A2`` (``z`` a Markov shock), both wearing out fully, log utility, ``c = y − k_next − h_next``,
and a know-how ``a`` that learns from the machines in use: ``a' = a**RHO · (k / K_BAR)**THETA``.

Exact policy, by the guess and verify of Brock, W. A. and L. J. Mirman (1972), "Optimal economic growth and
uncertainty: the discounted case", Journal of Economic Theory 4(3), 479–513, extended here to two kinds and the
law: with ``V = A(z) + B1 log k + B2 log h + D log a`` and ``S = 1 + β (B1 + B2)``, the first-order conditions
``1/c = β B_i / k_i'`` give ``k_i' = β B_i y / S``; the coefficients of ``log a``, ``log k``, ``log h`` give
``D = S + β ρ D``, ``B1 = S A1 + β θ D``, ``B2 = S A2``, so ``D = S / (1 − β ρ)``, ``B1 = S Ã1`` with
``Ã1 = A1 + β θ / (1 − β ρ)``, ``B2 = S A2``, ``S = 1 / (1 − β (Ã1 + A2))``: ``k' = β Ã1 y``, ``h' = β A2 y``, and
``∂V/∂a = D / a``.  The calibration is invented.
"""

from __future__ import annotations

import math
from types import SimpleNamespace
from typing import Any

import numpy as np
import pytest
from scipy.interpolate import RegularGridInterpolator

from tests._documents import grid_document
from worker.continuous.setters_euler import setters_errors, setters_setup
from worker.document import parse_document
from worker.euler import TEST_POINTS_PER_GRID_POINT
from worker.euler_choices import choices_errors, choices_setup, grid_rules
from worker.euler_laws import value_slope
from worker.euler_points import errors_at
from worker.euler_states import value_reader
from worker.feasibility import model_data
from worker.solve import compile_document, solve

A1, A2, BETA, RHO, THETA, K_BAR = 0.25, 0.15, 0.95, 0.6, 0.05, 0.1
Z_VALUES = np.array([0.95, 1.05])
Z_CHAIN = np.array([[0.8, 0.2], [0.3, 0.7]])
A1_TILDE = A1 + BETA * THETA / (1 - BETA * RHO)
S = 1 / (1 - BETA * (A1_TILDE + A2))
D = S / (1 - BETA * RHO)


def _document(k_points: int = 12, h_points: int = 8) -> dict[str, Any]:
    model = {
        "params": {"a1": A1, "a2": A2, "rho": RHO, "theta": THETA, "k_bar": K_BAR},
        "states": {"a": {"min": 0.85, "max": 1.15, "points": 4},
                   "k": {"min": 0.04, "max": 0.25, "points": k_points},
                   "h": {"min": 0.01, "max": 0.10, "points": h_points}},
        "shocks": {"z": {"markov": {"values": Z_VALUES.tolist(), "matrix": Z_CHAIN.tolist()}, "transform": "none"}},
        "choices": {"k_next": {"next_of": "k"}, "h_next": {"next_of": "h"}},
        "define": {"y": "z * a * k**a1 * h**a2", "c": "y - k_next - h_next"},
        "next": {"a": "a**rho * (k / k_bar)**theta"},
        "reward": "log(c)",
        "feasible": ["c > 0"],
    }
    document = grid_document(model, discount=BETA, method="howard")
    document["solver"]["tolerance"] = 1e-10
    document["report"] = {"stationary": True, "euler_errors": True}
    return document


def _exact_slope(points: np.ndarray, rows: np.ndarray, axis: int) -> np.ndarray:
    """∂EV/∂a = D / a of the exact value, whatever today's shock point."""
    assert axis == 0 and rows.shape == (points.shape[0],)
    return D / points[:, 0]


def _share(share: float) -> Any:
    """Put ``share`` of output into one kind at points (a, k, h), every shock point."""
    return lambda points: share * Z_VALUES[None, :] * (points[:, 0] * points[:, 1] ** A1 * points[:, 2] ** A2)[:, None]


def test_each_choice_keeps_its_own_laws() -> None:
    founds = choices_setup(model_data(parse_document(_document())))
    assert isinstance(founds, list) and [(f.choice, f.state) for f in founds] == [("k_next", "k"), ("h_next", "h")]
    assert len(founds[0].laws) == 1 and founds[0].laws[0].in_state is not None and founds[0].laws[0].in_choice is None
    assert founds[1].laws == ()  # the law does not move with the tools: not in their equation


@pytest.mark.parametrize("ratio", [1.0, 1.03])
def test_the_exact_policy_with_the_exact_value_slope(ratio: float) -> None:
    # k' = s_k y with s_k = ratio · β Ã1, h' = s_h y with s_h = β A2, s = s_k + s_h: c = (1 − s) y.  Machines:
    # tomorrow ∂r/∂k' + β ∂V/∂a'' ∂a''/∂k' = (A1 / (1 − s) + β D θ) / k' whatever a', z', z'', so
    # c̃ / c = s_k / (β (A1 + (1 − s) β D θ)) (1 at ratio 1); tools: ∂r/∂h' = A2 / (h' (1 − s)),
    # c̃ / c = s_h / (β A2) = 1.
    data = model_data(parse_document(_document()))
    founds = choices_setup(data)
    assert isinstance(founds, list)
    s_k, s_h = ratio * BETA * A1_TILDE, BETA * A2
    rules = {"k_next": _share(s_k), "h_next": _share(s_h)}
    errors = choices_errors(data, founds, BETA, rules, slopes=(_exact_slope, _exact_slope, BETA))
    for choice, size, others in (("k_next", 12, 4 * 8), ("h_next", 8, 4 * 12)):
        own = errors["by_choice"][choice]
        assert own["constrained"] == 0 and own["undefined"] == 0
        assert own["points"] >= TEST_POINTS_PER_GRID_POINT * size * others * Z_VALUES.size
    assert errors["by_choice"]["h_next"]["max_log10"] < -13
    if ratio == 1.0:
        assert errors["by_choice"]["k_next"]["max_log10"] < -13
    else:
        expected = math.log10(abs(1 - s_k / (BETA * (A1 + (1 - s_k - s_h) * BETA * D * THETA))))
        assert errors["by_choice"]["k_next"]["max_log10"] == pytest.approx(expected, abs=1e-9)
        assert errors["by_choice"]["k_next"]["mean_log10"] == pytest.approx(expected, abs=1e-9)
    with pytest.raises(ValueError, match="slopes"):  # the law's term needs the value's slopes
        choices_errors(data, founds, BETA, rules)


def _between(grid: np.ndarray) -> np.ndarray:
    """Ten or more test values per grid point, the centres of equal parts of each interval (common practice)."""
    parts = math.ceil(10 * grid.size / (grid.size - 1))
    return (grid[:-1, None] + ((np.arange(parts) + 0.5) / parts)[None, :] * np.diff(grid)[:, None]).ravel()


def _machine_errors(policy_k: np.ndarray, policy_h: np.ndarray, value: np.ndarray, grids: tuple[np.ndarray, ...],
                    tomorrow: tuple[np.ndarray, np.ndarray] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Independent (numpy and scipy): the machines' errors at their test points (a grid, k between grid points, h
    grid; C order), every shock point, (points, z), and the points.  Both grid policies (a, k, h, z) read
    multilinearly by scipy; the law's term ``β ∂EV/∂a(s'') · θ a''/k'`` tomorrow, ``EV(·, z') = Σ P[z', z''] V``
    read as the solve reads it: the slope of the grid interval of a holding a'' (the one to its right at a node),
    linear along k and h; zero where a'' is moved to a grid end.  ``tomorrow``: tomorrow's policies (a finite
    horizon's next period; ``value`` then the day after's), by default today's."""
    a_grid, k_grid, h_grid = grids
    read = [[RegularGridInterpolator(grids, table[..., j]) for j in range(Z_VALUES.size)]
            for table in (policy_k, policy_h)]
    read_next = read if tomorrow is None else [[RegularGridInterpolator(grids, table[..., j])
                                                for j in range(Z_VALUES.size)] for table in tomorrow]
    ev = np.einsum("wv,akhv->wakh", Z_CHAIN, value)  # EV(·, w) at tomorrow's shock w
    slope_table = np.diff(ev, axis=1) / np.diff(a_grid)[None, :, None, None]

    def ev_slope(w: int, a: np.ndarray, k: np.ndarray, h: np.ndarray) -> np.ndarray:
        i = np.clip(np.searchsorted(a_grid, a, side="right") - 1, 0, a_grid.size - 2)
        out = np.empty(a.size)
        for interval in np.unique(i):
            rows = i == interval
            out[rows] = RegularGridInterpolator((k_grid, h_grid), slope_table[w, interval])(
                np.column_stack([k[rows], h[rows]]))
        return out

    a, k, h = (g.ravel() for g in np.meshgrid(a_grid, _between(k_grid), h_grid, indexing="ij"))
    points = np.column_stack([a, k, h])
    out = np.empty((a.size, Z_VALUES.size))
    for j, z in enumerate(Z_VALUES):
        xk, xh = read[0][j](points), read[1][j](points)
        c = z * a * k**A1 * h**A2 - xk - xh
        a_next = np.clip(a**RHO * (k / K_BAR) ** THETA, a_grid[0], a_grid[-1])
        states = np.column_stack([a_next, xk, xh])
        expected = np.zeros(a.size)
        for jj, z_next in enumerate(Z_VALUES):
            xk2, xh2 = read_next[0][jj](states), read_next[1][jj](states)
            y_next = z_next * a_next * xk**A1 * xh**A2
            raw = a_next**RHO * (xk / K_BAR) ** THETA
            a_after = np.clip(raw, a_grid[0], a_grid[-1])
            moves = np.where(raw == a_after, THETA * raw / xk, 0.0)
            law = BETA * moves * ev_slope(jj, a_after, xk2, xh2)
            expected += Z_CHAIN[j, jj] * (A1 * y_next / (xk * (y_next - xk2 - xh2)) + law)
        out[:, j] = np.log10(np.maximum(np.abs(1 - 1.0 / (BETA * expected) / c), 2.0**-56))
    return out, points


def test_the_solved_workshop_against_an_independent_computation_at_every_test_point() -> None:
    document = _document()
    result = solve(document)
    assert result["status"] == "converged"
    grids = tuple(np.asarray(result["axes"][name]) for name in ("a", "k", "h"))
    policy_k = np.asarray(result["policy"]["k_next"], dtype=float)
    policy_h = np.asarray(result["policy"]["h_next"], dtype=float)
    value = np.asarray(result["value"], dtype=float)
    reference, points = _machine_errors(policy_k, policy_h, value, grids)
    # fixq's per-point errors (its grid rules and value slope) against the independent ones.
    data = model_data(parse_document(document))
    founds = choices_setup(data)
    assert isinstance(founds, list)
    rules, _ = grid_rules(data, founds, {"k_next": policy_k.reshape(-1), "h_next": policy_h.reshape(-1)})
    slope = value_slope(data, value.reshape(-1))
    fixq, constrained = errors_at(data, founds[0], BETA, rules["k_next"], points, (data, rules["k_next"]),
                                  companions=(lambda at: {"h_next": rules["h_next"](at)},) * 2,
                                  slopes=(slope, slope, BETA))
    assert not constrained.any()
    assert np.abs(fixq - reference).max() <= 1e-9
    own = result["diagnostics"]["euler_errors"]["by_choice"]["k_next"]
    assert own["constrained"] == 0 and own["undefined"] == 0 and own["points"] == reference.size
    assert own["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
    assert own["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)
    assert result["diagnostics"]["euler_errors"]["by_choice"]["h_next"]["points"] > 0


def test_a_finite_horizon_against_the_independent_computation() -> None:
    # Period t: its grid policies today, period t + 1's tomorrow, the law's term read from V_{t+2} (the terminal
    # value B1 log k + B2 log h + D log a on the grid, the exact coefficients, for the last period measured).
    document = _document()
    terminal = f"{S * A1_TILDE} * log(k) + {S * A2} * log(h) + {D} * log(a)"
    document["model"]["horizon"] = {"periods": 3, "terminal_value": terminal}
    document["report"] = {"euler_errors": True}
    result = solve(document)
    errors = result["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == [0, 1]
    grids = tuple(np.asarray(result["axes"][name]) for name in ("a", "k", "h"))
    a_grid, k_grid, h_grid = np.meshgrid(*grids, indexing="ij")
    last = S * A1_TILDE * np.log(k_grid) + S * A2 * np.log(h_grid) + D * np.log(a_grid)
    values = [*np.asarray(result["value"], dtype=float), np.repeat(last[..., None], Z_VALUES.size, axis=-1)]
    policy_k = np.asarray(result["policy"]["k_next"], dtype=float)  # (period, a, k, h, z)
    policy_h = np.asarray(result["policy"]["h_next"], dtype=float)
    parts = [_machine_errors(policy_k[t], policy_h[t], values[t + 2], grids, (policy_k[t + 1], policy_h[t + 1]))[0]
             for t in (0, 1)]
    for t, part in enumerate(parts):
        assert errors["by_period"]["max_log10"][t] >= part.max() - 1e-9  # the pool of both choices
    pooled = np.concatenate([part.ravel() for part in parts])
    own = errors["by_choice"]["k_next"]
    assert own["constrained"] == 0 and own["points"] == pooled.size
    assert own["max_log10"] == pytest.approx(pooled.max(), abs=1e-9)
    assert own["mean_log10"] == pytest.approx(pooled.mean(), abs=1e-9)


# The machines continuous beside the tools on their grid (worker.continuous.setters_euler), the tools bought out of
# a fixed allowance ``e`` (``w = e − h_next``, reward ``log(c) + log(w)``, ``c = y − k_next``; invented): the guess
# above with ``S = 1 + β B1`` gives ``D = S / (1 − β ρ)``, ``B1 = S Ã1``, ``S = 1 / (1 − β Ã1)``, ``k' = β Ã1 y`` and
# ``B2 = S A2``, ``h' = β B2 e / (1 + β B2)``: a constant, H_BAR, which the tools' grid holds.

ALLOWANCE = 0.4
B2 = A2 / (1 - BETA * A1_TILDE)
H_BAR = BETA * B2 * ALLOWANCE / (1 + BETA * B2)
D_ALLOWANCE = 1 / ((1 - BETA * A1_TILDE) * (1 - BETA * RHO))


def _allowance_document(k_points: int) -> dict[str, Any]:
    document = _document(k_points)
    model = document["model"]
    model["params"]["e"] = ALLOWANCE
    model["states"]["h"] = {"values": (H_BAR * np.array([0.6, 0.8, 1.0, 1.2, 1.4])).tolist()}
    model["choices"] = {"k_next": {"next_of": "k", "continuous": True}, "h_next": {"next_of": "h"}}
    model["define"] = {"y": "z * a * k**a1 * h**a2", "c": "y - k_next", "w": "e - h_next"}
    model["reward"] = "log(c) + log(w)"
    model["feasible"] = ["c > 0", "w > 0"]
    model["hints"] = {"concave": True}
    return document


@pytest.mark.parametrize("ratio", [1.0, 1.03])
def test_a_continuous_choice_beside_tools_with_the_exact_policy_and_value_slope(ratio: float) -> None:
    # k' = s y, s = ratio · β Ã1, h' = H_BAR: the machines' c̃ / c = s / (β (A1 + (1 − s) β D θ)) as above (D of
    # this shop); the tools' ∂r/∂h' = A2 / (H_BAR (1 − s)) gives w̃ / w = (1 − s) / (1 − β Ã1).
    data = model_data(parse_document(_allowance_document(8)))
    founds = setters_setup(SimpleNamespace(others=("h_next",)), data)
    assert isinstance(founds, list) and len(founds[0].laws) == 1 and founds[1].laws == ()
    h_grid = data.state_grids[2]
    index = int(np.flatnonzero(h_grid == H_BAR)[0])
    s = ratio * BETA * A1_TILDE
    machines = _share(s)

    def search(points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return machines(points), np.full((points.shape[0], Z_VALUES.size), index)

    def slope(points: np.ndarray, rows: np.ndarray, axis: int) -> np.ndarray:
        assert axis == 0
        return D_ALLOWANCE / points[:, 0]

    rules = {"k_next": machines, "h_next": lambda points: np.full((points.shape[0], Z_VALUES.size), H_BAR)}
    errors = setters_errors(data, founds, BETA, search, (("h_next",), h_grid[:, None]), rules,
                            slopes=(slope, slope, BETA))
    gaps = {"k_next": abs(1 - s / (BETA * (A1 + (1 - s) * BETA * D_ALLOWANCE * THETA))),
            "h_next": abs(1 - (1 - s) / (1 - BETA * A1_TILDE))}
    for choice, gap in gaps.items():
        own = errors["by_choice"][choice]
        assert own["constrained"] == 0 and own["undefined"] == 0 and own["points"] > 0
        if ratio == 1.0:
            assert own["max_log10"] < -13
        else:
            assert own["max_log10"] == pytest.approx(math.log10(gap), abs=1e-9)
            assert own["mean_log10"] == pytest.approx(math.log10(gap), abs=1e-9)


def test_the_errors_fall_as_the_grids_are_refined() -> None:
    # One run (worst / mean log10), both choices on their grids: machines 12 × 8 points of (k, h) −0.70 / −1.48,
    # 24 × 16 −0.96 / −1.79, 48 × 32 −1.16 / −2.03; tools −0.66 / −1.34, −0.91 / −1.69, −1.18 / −2.02: about first
    # order in the grid step, as for one grid choice.  The machines continuous beside the tools (the allowance shop,
    # 8, 16, 32 points of k): machines −0.72 / −1.38, −0.99 / −1.70, −1.15 / −1.98.
    grid_errors = [solve(_document(k, h))["diagnostics"]["euler_errors"]["by_choice"] for k, h in ((12, 8), (24, 16))]
    for choice in ("k_next", "h_next"):
        coarse, fine = (errors[choice] for errors in grid_errors)
        assert coarse["max_log10"] > fine["max_log10"] + 0.2 and coarse["mean_log10"] > fine["mean_log10"] + 0.3
    beside = [solve(_allowance_document(k))["diagnostics"]["euler_errors"]["by_choice"]["k_next"] for k in (8, 16)]
    assert beside[0]["constrained"] == beside[1]["constrained"] == 0
    assert beside[0]["max_log10"] > beside[1]["max_log10"] + 0.2
    assert beside[0]["mean_log10"] > beside[1]["mean_log10"] + 0.25


def test_a_solved_continuous_choice_beside_tools_against_an_independent_computation() -> None:
    # Today's and tomorrow's choices by the fitted problem's own search (its maximiser, not its Euler code); the
    # law's term tomorrow β ∂EV/∂a(s'') · θ a''/k' with EV read as the solve reads the value (multilinearly: the
    # slope of the grid interval of a holding a'', linear along k and h); skipped as fixq documents (k' within one
    # local grid step of an end of its grid or c ≤ 0 a step away; tomorrow's tools switching along k: never here,
    # the solved tools being H_BAR everywhere).
    document = _allowance_document(8)
    result = solve(document)
    assert result["status"] == "converged" and np.all(np.asarray(result["policy"]["h_next"]) == H_BAR)
    problem = compile_document(document)[1]
    assert not getattr(problem, "cubic", False)
    grids = tuple(np.asarray(result["axes"][name]) for name in ("a", "k", "h"))
    a_grid, k_grid, h_grid = grids
    v = np.asarray(result["value"], dtype=float).reshape(-1)
    ev = np.einsum("wv,akhv->wakh", Z_CHAIN, v.reshape(*(g.size for g in grids), Z_VALUES.size))
    slope_table = np.diff(ev, axis=1) / np.diff(a_grid)[None, :, None, None]

    def searched(points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        m = points.shape[0]
        _, chosen = problem.choose_at(v, np.repeat(points, Z_VALUES.size, axis=0), np.tile(np.arange(2), m), None)
        return chosen[:, 0].reshape(m, 2), h_grid[chosen[:, 1].astype(int)].reshape(m, 2)

    a, k, h = (g.ravel() for g in np.meshgrid(a_grid, _between(k_grid), h_grid, indexing="ij"))
    x, tools = searched(np.column_stack([a, k, h]))
    reference = np.empty_like(x)
    measured = np.ones(x.shape, dtype=bool)
    for j, z in enumerate(Z_VALUES):
        c = z * a * k**A1 * h**A2 - x[:, j]
        step = np.interp(x[:, j], 0.5 * (k_grid[1:] + k_grid[:-1]), np.diff(k_grid))
        measured[:, j] = (x[:, j] - step >= k_grid[0]) & (x[:, j] + step <= k_grid[-1]) & (c - step > 0)
        a_next = np.clip(a**RHO * (k / K_BAR) ** THETA, a_grid[0], a_grid[-1])
        x_next, tools_next = searched(np.column_stack([a_next, x[:, j], tools[:, j]]))
        expected = np.zeros(a.size)
        for jj, z_next in enumerate(Z_VALUES):
            y_next = z_next * a_next * x[:, j] ** A1 * tools[:, j] ** A2
            raw = a_next**RHO * (x[:, j] / K_BAR) ** THETA
            a_after = np.clip(raw, a_grid[0], a_grid[-1])
            moves = np.where(raw == a_after, THETA * raw / x[:, j], 0.0)
            i = np.clip(np.searchsorted(a_grid, a_after, side="right") - 1, 0, a_grid.size - 2)
            read = np.array([RegularGridInterpolator((k_grid, h_grid), slope_table[jj, ii])([kk, hh])[0]
                             for ii, kk, hh in zip(i, x_next[:, jj], tools_next[:, jj])])
            expected += Z_CHAIN[j, jj] * (A1 * y_next / (x[:, j] * (y_next - x_next[:, jj])) + BETA * moves * read)
        reference[:, j] = np.log10(np.maximum(np.abs(1 - 1.0 / (BETA * expected) / c), 2.0**-56))
    own = result["diagnostics"]["euler_errors"]["by_choice"]["k_next"]
    assert own["points"] == measured.sum() > 0 and own["undefined"] == 0
    assert own["constrained"] == measured.size - measured.sum()
    assert own["max_log10"] == pytest.approx(reference[measured].max(), abs=1e-9)
    assert own["mean_log10"] == pytest.approx(reference[measured].mean(), abs=1e-9)
    worst = np.where(measured, reference, -np.inf).reshape(a_grid.size, -1, h_grid.size, 2).max(axis=(0, 2))
    profile = np.array([[-np.inf if entry is None else entry for entry in row]
                        for row in own["profile"]["log10_error"]])
    assert np.array_equal(profile == -np.inf, worst == -np.inf)
    np.testing.assert_allclose(profile[worst > -np.inf], worst[worst > -np.inf], rtol=0, atol=1e-9)


def _spoiling(document: dict[str, Any]) -> dict[str, Any]:
    """Invented: a spoilage drawn after the choice, likelier with more tools bought, costing 0.1 in utility."""
    model = document["model"]
    model["shocks"]["spoil"] = {"iid": {"values": [0.0, 1.0], "probs": ["0.9 - 2 * h_next", "0.1 + 2 * h_next"]},
                                "timing": "after_choice"}
    model["reward"] = "log(c) - 0.1 * spoil"
    return document


def test_draw_probabilities_moving_with_one_of_several_choices_against_an_independent_computation() -> None:
    # The tools' first-order condition carries Σ_d ∂p_d/∂h' (r_d + β EV_d) = 2 (−0.1) (tomorrow's state does not
    # depend on the draw, so EV_d is the same for both): 1/c̃ = β Σ_z' P[z, z'] A2 y'/(h' c'') − 0.2, both grid
    # policies read multilinearly by scipy; the machines' equation is the one above (the draw does not move with k').
    document = _spoiling(_document())
    result = solve(document)
    assert result["status"] == "converged"
    errors = result["diagnostics"]["euler_errors"]
    grids = tuple(np.asarray(result["axes"][name]) for name in ("a", "k", "h"))
    a_grid, k_grid, h_grid = grids
    policy_k = np.asarray(result["policy"]["k_next"], dtype=float)
    policy_h = np.asarray(result["policy"]["h_next"], dtype=float)
    value = np.asarray(result["value"], dtype=float)
    machines, _ = _machine_errors(policy_k, policy_h, value, grids)
    read = [[RegularGridInterpolator(grids, table[..., j]) for j in range(Z_VALUES.size)]
            for table in (policy_k, policy_h)]
    a, k, h = (g.ravel() for g in np.meshgrid(a_grid, k_grid, _between(h_grid), indexing="ij"))
    points = np.column_stack([a, k, h])
    tools, plain = np.empty((a.size, Z_VALUES.size)), np.empty((a.size, Z_VALUES.size))
    for j, z in enumerate(Z_VALUES):
        xk, xh = read[0][j](points), read[1][j](points)
        c = z * a * k**A1 * h**A2 - xk - xh
        a_next = np.clip(a**RHO * (k / K_BAR) ** THETA, a_grid[0], a_grid[-1])
        states = np.column_stack([a_next, xk, xh])
        expected = np.zeros(a.size)
        for jj, z_next in enumerate(Z_VALUES):
            y_next = z_next * a_next * xk**A1 * xh**A2
            expected += Z_CHAIN[j, jj] * A2 * y_next / (xh * (y_next - read[0][jj](states) - read[1][jj](states)))
        tools[:, j] = np.log10(np.maximum(np.abs(1 - 1.0 / (BETA * expected - 0.2) / c), 2.0**-56))
        plain[:, j] = np.log10(np.maximum(np.abs(1 - 1.0 / (BETA * expected) / c), 2.0**-56))
    data = model_data(parse_document(document))
    founds = choices_setup(data)
    assert isinstance(founds, list) and founds[0].chance_slopes is None and founds[1].chance_slopes is not None
    for choice, reference in (("k_next", machines), ("h_next", tools)):
        own = errors["by_choice"][choice]
        assert own["constrained"] == 0 and own["undefined"] == 0 and own["points"] == reference.size
        assert own["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
        assert own["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)
    # Every test point of the tools: fixq's per-point errors with its grid rules and value reading.
    rules, _ = grid_rules(data, founds, {"k_next": policy_k.reshape(-1), "h_next": policy_h.reshape(-1)})
    read_value = value_reader(data, value.reshape(-1))
    fixq, _ = errors_at(data, founds[1], BETA, rules["h_next"], points, (data, rules["h_next"]),
                        values=(read_value, read_value, BETA),
                        companions=(lambda at: {"k_next": rules["k_next"](at)},) * 2)
    assert np.abs(fixq - tools).max() <= 1e-9
    # The term matters: without it the tools' |1 − c̃/c| would differ by several hundredths at some points.
    assert np.abs(10.0**plain - 10.0**tools).max() > 0.03


def test_a_continuous_choice_that_sets_no_state_beside_a_discrete_next_of_gets_a_note() -> None:
    # Invented: a shop with machines alone (no know-how, no tools), chosen on their grid, and hours worked chosen
    # anywhere in an interval; the smallest model of this kind, since its kernels are no other test's.
    document = _document(6)
    model = document["model"]
    model["params"] = {"a1": A1}
    model["states"] = {"k": model["states"]["k"]}
    model["choices"] = {"k_next": {"next_of": "k"}, "hours": {"min": 0.0, "max": 1.0, "continuous": True}}
    model["define"] = {"c": "z * k**a1 * (1 + 0.1 * hours) - k_next"}
    model["next"] = {}
    model["reward"] = "log(c) - 0.2 * hours**2"
    result = solve(document)
    assert result["status"] == "converged"
    assert "euler_errors" not in result["diagnostics"]
    assert ("Euler-equation errors were not measured: the continuous choice `hours` sets no state beside a discrete "
            "choice that sets one; a continuous choice that sets no state is not maximised out within the period"
            in result["diagnostics"]["notes"])
