"""Pictures of a job: its convergence log, value function and policy, as SVG or PNG.

Everything here reads plain result documents and log entries; nothing
touches Redis or HTTP, so the router and the tests share it.

* ``convergence`` — distance between iterates and the certified error bound
  against the iteration, on a log scale (a horizontal line marks the target
  tolerance when known).
* ``value`` / ``policy`` — one state variable: a line per shock point
  (every combination of shock values).  Two or more state variables: a
  heatmap of the first two at one shock point (others held at their middle
  grid point).  Tabular problems: a bar per state.
* ``euler_errors`` — the profile of ``diagnostics.euler_errors``: log10 of
  the Euler-equation error against the state, a line per shock point (gaps
  where a test point was constrained or undefined), the worst and the mean
  written on the plot and the mean drawn as a dotted line (several states:
  along the chosen one, the worst over the others, ``profile.over``).

A request for a picture that cannot be drawn (an unknown choice, a shock
index out of range) raises :class:`service.problems.Problem` (400) naming the
query parameter.

matplotlib is used through its object API (``Figure`` + the Agg canvas): no
pyplot, so no global figure registry and no display backend.  SVG text is
drawn as paths, so a picture needs no font on the machine that shows it.
"""

from __future__ import annotations

import io
import math
import threading
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from matplotlib import rc_context
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.cm import ScalarMappable
from matplotlib.colors import LinearSegmentedColormap, Normalize
from matplotlib.figure import Figure

from service.problems import Problem

__all__ = ["FORMATS", "MEDIA_TYPES", "AxisLayout", "axis_layout", "convergence_plot", "euler_plot", "policy_plot",
           "shock_labels", "value_plot"]

Format = Literal["svg", "png"]
FORMATS: tuple[str, ...] = ("svg", "png")
MEDIA_TYPES: dict[str, str] = {"svg": "image/svg+xml", "png": "image/png"}

FIGURE_SIZE_IN: tuple[float, float] = (7.2, 4.2)
"""Width and height of every picture, in inches."""
PNG_DPI: int = 130
"""Raster resolution of PNG pictures, in dots per inch (7.2 in → 936 px)."""
MAX_LEGEND_LINES: int = 9
"""Above this many shock points the lines share a colour ramp and a colour bar
replaces the legend (a legend of 30 entries hides the plot)."""

INK = "#23303d"
PAPER = "#fbfaf6"
RULE = "#dcdfe2"
PALETTE: tuple[str, ...] = (
    "#1b7f79",  # lagoon
    "#c4572b",  # brick
    "#d4a020",  # mustard
    "#4c5aa8",  # slate blue
    "#6b8e23",  # moss
    "#b4487a",  # mulberry
    "#3f9ad1",  # harbour
    "#8a6a4f",  # walnut
    "#5d6b75",  # pewter
)
HEAT = LinearSegmentedColormap.from_list("fixq_heat", ["#f6f1e3", "#e8c872", "#5fa89a", "#1b5f6e", "#1d2a44"])
RAMP = LinearSegmentedColormap.from_list("fixq_ramp", ["#e0a24a", "#1b7f79", "#23303d"])

# matplotlib's font cache and text layout are shared between figures, and the
# API answers plot requests from a thread pool: draw one picture at a time.
_RENDER_LOCK = threading.Lock()


@dataclass(frozen=True)
class AxisLayout:
    """Which result axes are state variables and which are shocks: ``states`` and ``shocks`` are axis names
    in array-axis order; ``tabular`` is true for a finite Markov decision problem (one axis of state labels)."""

    states: tuple[str, ...]
    shocks: tuple[str, ...]
    tabular: bool = False


def axis_layout(result: dict[str, Any], document: dict[str, Any] | None = None) -> AxisLayout:
    """Split a result's axes into state variables and shocks.

    The result alone does not say which axes are shocks; the submitted
    document does (``model.states`` vs ``model.shocks``).  Without a document
    the first axis is taken as the one state and the rest as shocks, which is
    right for the common one-state models.
    """
    names = list(result.get("axes") or {})
    model = (document or {}).get("model") or {}
    if model.get("kind") == "tabular" or (not model and _looks_tabular(result)):
        return AxisLayout(states=tuple(names[:1]), shocks=(), tabular=True)
    if model:
        # A finite horizon's period axis comes first and is drawn as a state variable: value and policy by age.
        declared_states = (["period"] if model.get("horizon") is not None else []) + list(model.get("states") or {})
        declared_shocks = list(model.get("shocks") or {})
        states = tuple(n for n in names if n in declared_states)
        shocks = tuple(n for n in names if n in declared_shocks)
        if len(states) + len(shocks) == len(names):
            return AxisLayout(states=states, shocks=shocks)
    return AxisLayout(states=tuple(names[:1]), shocks=tuple(names[1:]))


def _looks_tabular(result: dict[str, Any]) -> bool:
    axes = result.get("axes") or {}
    policy = result.get("policy") or {}
    return len(axes) == 1 and list(policy) == ["action"]


def convergence_plot(
    log: Sequence[dict[str, Any]],
    *,
    tolerance: float | None = None,
    title: str | None = None,
    fmt: Format = "svg",
) -> bytes:
    """Distance and error bound against the iteration, log scale.

    Parameters
    ----------
    log : sequence of log entries (``iteration``, ``distance``, ``error_bound``)
    tolerance : the document's target error bound, drawn as a dashed line
    title : heading above the plot (default: none)
    fmt : ``"svg"`` or ``"png"``
    """
    fig, ax = _figure()
    iterations = np.array([float(e.get("iteration", i + 1)) for i, e in enumerate(log)])
    for key, name, colour in (
        ("distance", "distance between iterates", PALETTE[0]),
        ("error_bound", "certified error bound", PALETTE[1]),
    ):
        y = _positive([e.get(key) for e in log])
        if np.isfinite(y).any():
            ax.plot(
                iterations,
                y,
                color=colour,
                lw=1.8,
                marker="o" if len(log) <= 40 else None,
                ms=3.5,
                label=name,
                gid=f"series-{key}",
            )
    if tolerance is not None and tolerance > 0:
        ax.axhline(tolerance, color=INK, lw=1.0, ls=(0, (4, 3)), label=f"tolerance {tolerance:g}")
    if not log:
        ax.text(0.5, 0.5, "no iterations logged yet", transform=ax.transAxes, ha="center", va="center", color=INK)
        ax.set_yticks([])
    else:
        ax.set_yscale("log")
        ax.legend(frameon=False, loc="upper right")
    ax.set_xlabel("iteration")
    ax.set_ylabel("sup-norm (log scale)")
    ax.xaxis.get_major_locator().set_params(integer=True)
    return _finish(fig, ax, title, fmt)


def value_plot(
    result: dict[str, Any],
    *,
    layout: AxisLayout | None = None,
    shock_index: int | None = None,
    title: str | None = None,
    fmt: Format = "svg",
) -> bytes:
    """The value function of a result document (see module docstring).

    ``shock_index`` is the flat index (C order over the shocks) of the shock
    point a heatmap shows; default 0.
    """
    layout = layout or axis_layout(result)
    values = np.asarray(result.get("value"), dtype=float)
    return _field_plot(result, layout, values, "value", shock_index, title, fmt)


def policy_plot(
    result: dict[str, Any],
    *,
    layout: AxisLayout | None = None,
    choice: str | None = None,
    shock_index: int | None = None,
    title: str | None = None,
    fmt: Format = "svg",
) -> bytes:
    """One choice of a result's policy; ``choice`` (a name) defaults to the first.

    A tabular model has one choice, named ``action``.  ``shock_index`` is as
    in :func:`value_plot`.
    """
    layout = layout or axis_layout(result)
    policy = result.get("policy") or {}
    if not policy:
        raise _bad_query("choice", "this result has no policy to plot")
    if choice is None:
        choice = next(iter(policy))
    elif choice not in policy:
        raise _bad_query("choice", f"unknown choice {choice!r}; this policy has {', '.join(map(repr, policy))}")
    if layout.tabular:
        labels = [str(a) for a in policy[choice]]
        index = (result.get("policy_index") or {}).get(choice)
        return _tabular_policy(result, labels, index, choice, title, fmt)
    values = np.asarray(policy[choice], dtype=float)
    return _field_plot(result, layout, values, choice, shock_index, title, fmt)


def _field_plot(
    result: dict[str, Any],
    layout: AxisLayout,
    field: np.ndarray,
    name: str,
    shock_index: int | None,
    title: str | None,
    fmt: Format,
) -> bytes:
    axes: dict[str, list[Any]] = result.get("axes") or {}
    if layout.tabular:
        labels = [str(s) for s in next(iter(axes.values()), range(field.size))]
        return _tabular_bars(labels, field.ravel(), name, title, fmt)
    shape = tuple(len(axes[a]) for a in (*layout.states, *layout.shocks))
    if field.shape != shape:
        raise ValueError(f"{name}: array of shape {field.shape} does not match the axes {shape}")
    n_states = len(layout.states)
    shock_count = int(np.prod(shape[n_states:], dtype=int)) if layout.shocks else 1
    if shock_index is not None and not 0 <= shock_index < shock_count:
        raise _bad_query(
            "shock_index",
            f"shock index {shock_index} is out of range: this model has {shock_count} shock points "
            f"(0 to {shock_count - 1})",
        )
    by_shock = field.reshape(shape[:n_states] + (shock_count,))
    labels = shock_labels(axes, layout.shocks)
    if n_states == 1:
        x = np.asarray(axes[layout.states[0]], dtype=float)
        first_shock = axes[layout.shocks[0]] if layout.shocks else []
        return _lines(x, first_shock, by_shock, layout, labels, name, title, fmt)
    return _heatmap(axes, layout, by_shock, labels, shock_index or 0, name, title, fmt)


def shock_labels(axes: dict[str, list[Any]], shocks: Sequence[str]) -> list[str]:
    """One label per shock point, in flat (C) order over ``shocks``, e.g. ``"z=0.95, y=1"``."""
    if not shocks:
        return [""]
    grids = [[f"{s}={_num(v)}" for v in axes[s]] for s in shocks]
    labels = [""]
    for grid in grids:
        labels = [f"{a}, {b}" if a else b for a in labels for b in grid]
    return labels


def _lines(
    x: np.ndarray,
    shock_axis_values: Sequence[Any],
    by_shock: np.ndarray,
    layout: AxisLayout,
    labels: list[str],
    name: str,
    title: str | None,
    fmt: Format,
) -> bytes:
    fig, ax = _figure()
    _shock_lines(fig, ax, x, shock_axis_values, by_shock, layout, labels)
    ax.set_xlabel(layout.states[0])
    ax.set_ylabel(name)
    return _finish(fig, ax, title, fmt)


def _shock_lines(
    fig: Figure,
    ax: Any,
    x: np.ndarray,
    shock_axis_values: Sequence[Any],
    by_shock: np.ndarray,
    layout: AxisLayout,
    labels: list[str],
) -> None:
    """A line per shock point, with a legend, or a colour bar when there are too many for one."""
    count = by_shock.shape[1]
    ramp = count > MAX_LEGEND_LINES
    for j in range(count):
        colour = RAMP(j / max(count - 1, 1)) if ramp else PALETTE[j % len(PALETTE)]
        ax.plot(x, by_shock[:, j], color=colour, lw=1.6, label=labels[j] or None, gid=f"series-{j}")
    if ramp:
        # One shock: the colour bar reads in its own values; several: in the flat shock index.
        if len(layout.shocks) == 1:
            shock_values = np.asarray(shock_axis_values, dtype=float)
            low, high, label = float(shock_values[0]), float(shock_values[-1]), layout.shocks[0]
        else:
            low, high, label = 0.0, float(count - 1), "shock point index"
        _colorbar(fig, ax, _mappable(RAMP, low, high), label)
    elif layout.shocks:
        ax.legend(frameon=False, fontsize=8.5, loc="best")


def euler_plot(
    result: dict[str, Any], *, layout: AxisLayout | None = None, title: str | None = None, fmt: Format = "svg"
) -> bytes:
    """log10 Euler-equation errors across the state, from ``diagnostics.euler_errors.profile``; 404 without one."""
    errors = (result.get("diagnostics") or {}).get("euler_errors") or {}
    profile = errors.get("profile")
    if not profile:
        raise Problem(404, "not-found", "this result has no Euler-equation errors to plot (report.euler_errors)")
    layout = layout or axis_layout(result)
    axes: dict[str, list[Any]] = result.get("axes") or {}
    if profile.get("over"):  # several states: the profile names them, so its columns are the other axes' points
        known = {profile["state"], *profile["over"], "period"}
        layout = AxisLayout(tuple(n for n in axes if n in known), tuple(n for n in axes if n not in known))
    x = np.asarray(profile["at"], dtype=float)
    by_shock = np.array(profile["log10_error"], dtype=float).reshape(x.size, -1)
    labels = shock_labels(axes, layout.shocks)
    labels = labels if len(labels) == by_shock.shape[1] else [""] * by_shock.shape[1]
    fig, ax = _figure()
    _shock_lines(fig, ax, x, axes[layout.shocks[0]] if layout.shocks else [], by_shock, layout, labels)
    power = "$10^{{{:.2f}}}$".format
    if errors.get("max_log10") is None:
        words = ["no test point could be measured"]
    else:
        ax.axhline(errors["mean_log10"], color=INK, lw=1.0, ls=(0, (1, 2.5)), gid="mean")
        words = [f"worst {power(errors['max_log10'])}, mean {power(errors['mean_log10'])} (dotted)"]
    if errors.get("weighted_mean_log10") is not None:
        words.append(f"weighted by the stationary distribution {power(errors['weighted_mean_log10'])}")
    counts = [f"{errors.get('points', 0):,} test points"]
    counts += [f"{errors[key]:,} {key}" for key in ("constrained", "undefined") if errors.get(key)]
    pooled = f"; the worst of every {profile['pooled']} shown" if profile.get("pooled", 1) > 1 else ""
    pooled += f"; the worst over {', '.join(profile['over'])}" if profile.get("over") else ""  # several states
    periods = (errors.get("by_period") or {}).get("period") or []  # a horizon: the title pools them, a curve is one
    pooled += f"; curves: period {periods[0]} (of {periods[0]}–{periods[-1]})" if len(periods) > 1 else ""
    ax.set_title("\n".join([*words, ", ".join(counts) + pooled]), fontsize=8.5, color=INK, loc="left", gid="summary")
    ax.set_xlabel(profile.get("state") or layout.states[0])
    ax.set_ylabel(f"log10 Euler-equation error in {errors.get('define', 'c')}")
    return _finish(fig, ax, title, fmt)


def _heatmap(
    axes: dict[str, list[Any]],
    layout: AxisLayout,
    by_shock: np.ndarray,
    labels: list[str],
    shock_index: int,
    name: str,
    title: str | None,
    fmt: Format,
) -> bytes:
    first, second = layout.states[:2]
    held = {s: len(axes[s]) // 2 for s in layout.states[2:]}
    plane = by_shock[(slice(None), slice(None), *held.values(), shock_index)]
    x = np.asarray(axes[second], dtype=float)
    y = np.asarray(axes[first], dtype=float)
    fig, ax = _figure()
    finite = plane[np.isfinite(plane)]
    if finite.size:
        # Rasterised inside the SVG: a vector mesh of 200 x 200 cells would be megabytes of paths.
        mesh = ax.pcolormesh(
            _edges(x), _edges(y), np.ma.masked_invalid(plane), cmap=HEAT, shading="flat", rasterized=True
        )
        _colorbar(fig, ax, mesh, name)
    ax.set_xlabel(second)
    ax.set_ylabel(first)
    notes = [labels[shock_index]] if labels[shock_index] else []
    notes += [f"{s}={_num(axes[s][i])}" for s, i in held.items()]
    if notes:
        ax.set_title(", ".join(notes), fontsize=9, color=INK, loc="right")
    return _finish(fig, ax, title, fmt, grid=False)


def _tabular_bars(labels: list[str], heights: np.ndarray, name: str, title: str | None, fmt: Format) -> bytes:
    fig, ax = _figure()
    positions = np.arange(len(labels))
    _tag_bars(ax.bar(positions, heights, color=PALETTE[0], width=0.72))
    _state_ticks(ax, labels)
    ax.set_ylabel(name)
    ax.axhline(0.0, color=INK, lw=0.8)
    return _finish(fig, ax, title, fmt)


def _tabular_policy(
    result: dict[str, Any],
    chosen: list[str],
    index: list[int] | None,
    name: str,
    title: str | None,
    fmt: Format,
) -> bytes:
    states = [str(s) for s in next(iter((result.get("axes") or {}).values()), range(len(chosen)))]
    # Order the action labels by their index in the model when known, else by first use.
    actions: list[str] = []
    if index is not None and len(index) == len(chosen):
        by_index = sorted({(int(i), a) for i, a in zip(index, chosen, strict=True)})
        actions = [a for _, a in by_index]
    for a in chosen:
        if a not in actions:
            actions.append(a)
    level = {a: k for k, a in enumerate(actions)}
    fig, ax = _figure()
    positions = np.arange(len(chosen))
    heights = np.array([level[a] + 1 for a in chosen], dtype=float)
    colours = [PALETTE[level[a] % len(PALETTE)] for a in chosen]
    _tag_bars(ax.bar(positions, heights, color=colours, width=0.72))
    ax.set_yticks(np.arange(1, len(actions) + 1), actions)
    ax.set_ylim(0, len(actions) + 0.5)
    _state_ticks(ax, states)
    ax.set_ylabel(name)
    return _finish(fig, ax, title, fmt)


def _tag_bars(bars: Any) -> None:
    for i, patch in enumerate(bars):
        patch.set_gid(f"bar-{i}")


def _state_ticks(ax: Any, labels: list[str]) -> None:
    step = max(1, math.ceil(len(labels) / 24))
    shown = list(range(0, len(labels), step))
    ax.set_xticks(shown, [labels[i] for i in shown], rotation=45 if max(map(len, labels), default=0) > 3 else 0)
    for tick in ax.get_xticklabels():
        tick.set_horizontalalignment("right" if tick.get_rotation() else "center")
    ax.set_xlabel("state")
    ax.set_xlim(-0.6, len(labels) - 0.4)


def _figure() -> tuple[Figure, Any]:
    fig = Figure(figsize=FIGURE_SIZE_IN, facecolor=PAPER, layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    ax.set_facecolor("#ffffff")
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(INK)
    ax.tick_params(colors=INK, labelsize=9)
    ax.xaxis.label.set_color(INK)
    ax.yaxis.label.set_color(INK)
    return fig, ax


def _colorbar(fig: Figure, ax: Any, mappable: Any, label: str) -> None:
    bar = fig.colorbar(mappable, ax=ax, pad=0.02, fraction=0.05)
    bar.outline.set_visible(False)
    bar.ax.tick_params(colors=INK, labelsize=9)
    bar.set_label(label, color=INK)


def _finish(fig: Figure, ax: Any, title: str | None, fmt: Format, *, grid: bool = True) -> bytes:
    if grid:
        ax.grid(True, color=RULE, lw=0.7)
        ax.set_axisbelow(True)
    if title:
        fig.suptitle(title, color=INK, fontsize=11, x=0.01, ha="left")
    if fmt not in FORMATS:
        raise _bad_query("format", f"unknown picture format {fmt!r}; use svg or png")
    out = io.BytesIO()
    # A fixed salt makes the SVG's generated ids, hence its bytes, repeatable.
    with _RENDER_LOCK, rc_context({"svg.hashsalt": "fixq"}):
        if fmt == "svg":
            fig.savefig(out, format="svg", metadata={"Date": None})
        else:
            fig.savefig(out, format="png", dpi=PNG_DPI, metadata={"Software": None})
    return out.getvalue()


def _bad_query(parameter: str, message: str) -> Problem:
    return Problem(
        400,
        "invalid-request",
        f"query.{parameter}: {message}",
        errors=[{"path": f"query.{parameter}", "message": message}],
    )


def _positive(values: Sequence[Any]) -> np.ndarray:
    """Floats with non-positive and missing entries as NaN (a log axis cannot show them)."""
    out = np.array([v if isinstance(v, (int, float)) else np.nan for v in values], dtype=float)
    out[~(out > 0)] = np.nan
    return out


def _edges(centres: np.ndarray) -> np.ndarray:
    if centres.size == 1:
        return np.array([centres[0] - 0.5, centres[0] + 0.5])
    mid = (centres[1:] + centres[:-1]) / 2
    return np.concatenate([[2 * centres[0] - mid[0]], mid, [2 * centres[-1] - mid[-1]]])


def _mappable(cmap: Any, low: float, high: float) -> ScalarMappable:
    return ScalarMappable(norm=Normalize(low, high), cmap=cmap)


def _num(value: Any) -> str:
    return f"{value:.4g}" if isinstance(value, float) else str(value)
