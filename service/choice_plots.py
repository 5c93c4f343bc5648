"""The picture of a result's choice probabilities (models with taste shocks).

``choice_probabilities`` has the value's axes then the choices' axes; the
picture shows one choice (``?choice=NAME``, default the first), its
probabilities summed over the other choices:

* tabular models: a stacked bar per state, a colour per action (with a finite horizon, a heatmap of
  period × state of the probability of the choice's last value, :mod:`service.period_plots`);
* one state variable: the probabilities of the choice's values stacked
  against the state, at one shock point (``?shock_index=I``, default 0);
* two or more: a heatmap of the probability of the choice's last value
  (for a yes/no choice, of yes) over the first two state variables at one
  shock point, as the value heatmap draws them.

The drawing helpers and the palette are those of :mod:`service.plots`.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from service import plots
from service.period_plots import probability_heatmap
from service.plots import PALETTE, AxisLayout, Format
from service.problems import Problem

__all__ = ["choice_probability_plot"]


def choice_probability_plot(
    result: dict[str, Any],
    *,
    layout: AxisLayout | None = None,
    choice: str | None = None,
    shock_index: int | None = None,
    title: str | None = None,
    fmt: Format = "svg",
) -> bytes:
    """The choice probabilities of a result with taste shocks (see the module docstring).

    Raises
    ------
    Problem
        400 naming ``query.choice`` or ``query.shock_index`` when they do not fit the result;
        404 when the result has no choice probabilities (a model without taste shocks).
    """
    layout = layout or plots.axis_layout(result)
    raw = result.get("choice_probabilities")
    choices = ((result.get("diagnostics") or {}).get("taste_shocks") or {}).get("choices") or {}
    if raw is None or not choices:
        raise Problem(404, "not-found", "this result has no choice probabilities (the model has no taste shocks)")
    names = list(choices)
    if choice is None:
        choice = names[0]
    elif choice not in choices:
        raise plots._bad_query("choice", f"unknown choice {choice!r}; the choices are {', '.join(map(repr, names))}")
    axes: dict[str, list[Any]] = result.get("axes") or {}
    value_shape = tuple(len(values) for values in axes.values())
    probabilities = np.asarray(raw, dtype=float).reshape(value_shape + tuple(len(v) for v in choices.values()))
    j = names.index(choice)
    others = tuple(len(value_shape) + k for k in range(len(names)) if k != j)
    marginal = probabilities.sum(axis=others) if others else probabilities
    labels = [f"{choice}={plots._num(value)}" for value in choices[choice]]
    if layout.tabular and marginal.ndim == 3:  # a finite horizon: [period][state][value]
        return probability_heatmap(axes, marginal[..., -1], labels[-1], title, fmt)
    if layout.tabular:
        return _stacked_bars(axes, marginal, [str(value) for value in choices[choice]], choice, title, fmt)
    n_states = len(layout.states)
    shock_count = int(np.prod(value_shape[n_states:], dtype=int)) if layout.shocks else 1
    if shock_index is not None and not 0 <= shock_index < shock_count:
        raise plots._bad_query(
            "shock_index",
            f"shock index {shock_index} is out of range: this model has {shock_count} shock points "
            f"(0 to {shock_count - 1})",
        )
    by_shock = marginal.reshape(value_shape[:n_states] + (shock_count, marginal.shape[-1]))
    shock_names = plots.shock_labels(axes, layout.shocks)
    if n_states == 1:
        return _stacked_areas(axes, layout, by_shock[:, shock_index or 0, :], labels,
                              shock_names[shock_index or 0], title, fmt)
    return plots._heatmap(axes, layout, by_shock[..., -1], shock_names, shock_index or 0,
                          f"P({labels[-1]})", title, fmt)


def _stacked_bars(
    axes: dict[str, list[Any]], marginal: np.ndarray, labels: list[str], choice: str, title: str | None, fmt: Format
) -> bytes:
    states = [str(s) for s in next(iter(axes.values()), range(marginal.shape[0]))]
    fig, ax = plots._figure()
    positions = np.arange(marginal.shape[0])
    bottom = np.zeros(marginal.shape[0])
    for k, label in enumerate(labels):
        bars = ax.bar(positions, marginal[:, k], bottom=bottom, color=PALETTE[k % len(PALETTE)], width=0.72,
                      label=label)
        for i, patch in enumerate(bars):
            patch.set_gid(f"bar-{k}-{i}")
        bottom += marginal[:, k]
    plots._state_ticks(ax, states)
    ax.set_ylim(0.0, 1.0)
    ax.set_ylabel(f"probability of each {choice}")
    ax.legend(frameon=False, fontsize=8.5, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    return plots._finish(fig, ax, title, fmt)


def _stacked_areas(
    axes: dict[str, list[Any]], layout: AxisLayout, shares: np.ndarray, labels: list[str], shock: str,
    title: str | None, fmt: Format,
) -> bytes:
    x = np.asarray(axes[layout.states[0]], dtype=float)
    fig, ax = plots._figure()
    colours = [PALETTE[k % len(PALETTE)] for k in range(len(labels))]
    areas = ax.stackplot(x, shares.T, labels=labels, colors=colours, alpha=0.9)
    for k, area in enumerate(areas):
        area.set_gid(f"series-{k}")
    ax.set_xlim(float(x[0]), float(x[-1]))
    ax.set_ylim(0.0, 1.0)
    ax.set_xlabel(layout.states[0])
    ax.set_ylabel("choice probability")
    ax.legend(frameon=False, fontsize=8.5, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    if shock:
        ax.set_title(shock, fontsize=9, color=plots.INK, loc="right")
    return plots._finish(fig, ax, title, fmt)
