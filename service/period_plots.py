"""Value and policy pictures of a tabular model with a finite horizon: a heatmap of period × state.

Such a result's ``value`` and ``policy`` are ``[period][state]`` (axes ``period`` then ``state_label``),
where the bar charts of :mod:`service.plots` draw one bar per state of an infinite-horizon tabular model.
The value heatmap colours each (period, state) by its value; the policy heatmap by the chosen action, one
colour per action with the action labels on the colour bar.  Drawn with the look of :mod:`service.plots`.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from matplotlib.colors import BoundaryNorm, ListedColormap

from service import plots
from service.plots import HEAT, PALETTE, Format

__all__ = ["is_tabular_horizon", "probability_heatmap", "tabular_horizon_plot"]


def is_tabular_horizon(result: dict[str, Any], layout: plots.AxisLayout) -> bool:
    """Whether ``result`` is a tabular model's with a finite horizon (a ``period`` axis before the states)."""
    return layout.tabular and list(result.get("axes") or {})[:1] == ["period"] and len(result["axes"]) == 2


def tabular_horizon_plot(
    result: dict[str, Any], picture: str, *, choice: str | None = None, title: str | None = None,
    fmt: Format = "svg",
) -> bytes:
    """``picture`` ``"value"`` or ``"policy"`` of a tabular finite-horizon result, as a period × state heatmap."""
    axes = result["axes"]
    periods, states = axes["period"], [str(s) for s in list(axes.values())[1]]
    fig, ax = plots._figure()
    x_edges = np.arange(len(states) + 1) - 0.5
    y_edges = plots._edges(np.asarray(periods, dtype=float))
    if picture == "value":
        field = np.asarray(result["value"], dtype=float)
        mesh = ax.pcolormesh(x_edges, y_edges, np.ma.masked_invalid(field), cmap=HEAT, shading="flat",
                             rasterized=True)
        plots._colorbar(fig, ax, mesh, "value")
    else:
        policy = result.get("policy") or {}
        if choice is not None and choice not in policy:
            raise plots._bad_query("choice", f"unknown choice {choice!r}; this policy has "
                                   f"{', '.join(map(repr, policy))}")
        name = choice or next(iter(policy))
        chosen = [[str(a) for a in row] for row in policy[name]]
        index = (result.get("policy_index") or {}).get(name)
        pairs = sorted({(int(i), a) for row_i, row_a in zip(index, chosen, strict=True)
                        for i, a in zip(row_i, row_a, strict=True)}) if index else []
        actions = [a for _, a in pairs] or sorted({a for row in chosen for a in row})
        level = {a: k for k, a in enumerate(actions)}
        field = np.array([[level[a] for a in row] for row in chosen], dtype=float)
        colours = ListedColormap([PALETTE[k % len(PALETTE)] for k in range(len(actions))])
        norm = BoundaryNorm(np.arange(len(actions) + 1) - 0.5, len(actions))
        mesh = ax.pcolormesh(x_edges, y_edges, field, cmap=colours, norm=norm, shading="flat", rasterized=True)
        plots._colorbar(fig, ax, mesh, name)
        mesh.colorbar.set_ticks(np.arange(len(actions)), labels=actions)
    plots._state_ticks(ax, states)
    ax.set_xlabel(list(axes)[1])
    ax.set_ylabel("period")
    return plots._finish(fig, ax, title, fmt, grid=False)


def probability_heatmap(axes: dict[str, list[Any]], shares: np.ndarray, label: str, title: str | None,
                        fmt: Format) -> bytes:
    """``shares`` ``[period][state]``, the probability of one choice value (``label``), as a heatmap in [0, 1]."""
    states = [str(s) for s in list(axes.values())[1]]
    fig, ax = plots._figure()
    mesh = ax.pcolormesh(np.arange(len(states) + 1) - 0.5, plots._edges(np.asarray(axes["period"], dtype=float)),
                         shares, cmap=HEAT, vmin=0.0, vmax=1.0, shading="flat", rasterized=True)
    plots._colorbar(fig, ax, mesh, f"P({label})")
    plots._state_ticks(ax, states)
    ax.set_xlabel(list(axes)[1])
    ax.set_ylabel("period")
    return plots._finish(fig, ax, title, fmt, grid=False)
