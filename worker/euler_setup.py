"""What a model's Euler equation needs: which state the choice sets, the define carrying it, derivative trees.

See :mod:`worker.euler` for the equation and where the errors are measured.  A model qualifies when its one
choice ``x`` is ``next_of`` a state ``k``, its reward depends on the choice only through one define ``c``,
differentiably.  When every other state moves by a law of motion that does not move with ``k`` or ``x``
(directly or through a define), the envelope condition ``∂V/∂k = ∂r/∂k`` holds at the chosen choice and
tomorrow's marginal value needs the policy alone; a law that moves with them adds terms in the value's
slope in its state (:mod:`worker.euler_laws`, :attr:`EulerSetup.laws`).  With several ``next_of`` choices
each has its own setup (:func:`choice_setup`, :mod:`worker.euler_choices`), its own laws.  Shocks
drawn after the choice are allowed when ``c`` and its marginal reward do not change with the draw
(:func:`_draw_form` says why); probabilities that move with ``k`` or ``x`` add a term in the value's level
(:func:`needs_value`).
"""

from __future__ import annotations

from dataclasses import dataclass

from worker import _slopes
from worker.euler_laws import OpenLaw, open_laws
from worker.expressions import Node, Number, names_in
from worker.feasibility import ModelData

__all__ = ["EulerSetup", "choice_setup", "needs_value", "setup", "slope_trees"]


@dataclass(frozen=True)
class EulerSetup:
    """What the errors of one model need: names and derivative trees."""

    state: str
    choice: str
    define: str
    marginal: Node
    """∂r/∂c, with ``c`` a leaf and the defines after it that depend on it as primed names."""
    marginal_slope: Node
    """∂²r/∂c², for the Newton steps."""
    after: dict[str, tuple[Node, Node]]
    """The defines after ``c`` that depend on it, in order: their trees and their derivatives in ``c``."""
    define_slope: tuple[Node, dict[str, Node]]
    """∂c/∂x: the tree and the defines' derivatives in ``x`` it uses."""
    state_slope: tuple[Node, dict[str, Node]]
    """∂r/∂k at a fixed choice: the tree and the defines' derivatives in ``k`` it uses."""
    chance_slopes: tuple[tuple[tuple[Node | None, Node | None], ...], ...] | None = None
    """With draws after the choice whose probabilities move with ``x`` or ``k``: per draw, per value,
    ``(∂p/∂x, ∂p/∂k)`` (None where it does not move; the defines' derivatives are those of ``define_slope``
    and ``state_slope``); None when no probability moves.  The errors then need the value
    (:func:`needs_value`)."""
    laws: tuple[OpenLaw, ...] = ()
    """The other states' laws of motion that move with ``k`` or ``x`` (with several ``next_of`` choices, this
    choice's and its state's): their slopes, whose terms need the value's slopes (:mod:`worker.euler_laws`)."""
    companions: tuple[tuple[str, str], ...] = ()
    """With several ``next_of`` choices (:mod:`worker.euler_choices`): ``(state, choice)`` of each of the others,
    whose values the measurement holds at the policy's and whose states move to them tomorrow."""


def needs_value(found: EulerSetup) -> bool:
    """Whether the first-order or envelope condition carries ``Σ_d ∂p_d · (r_d + β E V_d)``, a level of the value
    (draws whose probabilities move with the choice or the chosen state)."""
    return found.chance_slopes is not None


def setup(data: ModelData) -> EulerSetup | str | None:
    """The derivative trees of ``data``'s Euler equation; a note why not; None when it does not apply.

    It applies to models with one choice that is ``next_of`` a state; the
    note explains what else is missing (one define carrying the choice, a
    differentiable reward, other states' laws of motion free of the chosen
    state and of the choice).
    """
    if not any(j is not None for j in data.setter):
        return None
    if len(data.choices) != 1:
        return ("Euler-equation errors were not measured: they are measured for models with one choice that sets "
                "tomorrow's value of a state, several choices of which one or more set states (the others on grids "
                "or menus), or a continuous one beside discrete choices")
    position = data.setter.index(0)
    if data.choice_is_menu[0] or data.state_grids[position].size < 2:
        return None
    return choice_setup(data, position)


def choice_setup(data: ModelData, position: int) -> EulerSetup | str:
    """The derivative trees of the Euler equation of the choice that sets the state at ``position``, or a note
    why there are none; the model's other ``next_of`` choices, if any, are its :attr:`EulerSetup.companions`.

    With several such choices each has its own equation: the first-order condition in its choice ``x_i``
    (the others held at the policy's) and the envelope condition in its state ``k_i``, as for one choice,
    ``∂r/∂c · ∂c/∂x_i = −β E[∂r/∂k_i(s')]``; a law of a state no choice sets that moves with ``k_i`` or ``x_i``
    adds its terms in the value's slopes (:mod:`worker.euler_laws`) to that choice's equation (one that moves
    only with the others' choices or states is not in it).
    """
    j = data.setter[position]
    assert j is not None
    state, choice = data.states[position], data.choices[j]
    companions = tuple((data.states[p], data.choices[i]) for p, i in enumerate(data.setter)
                       if i is not None and i != j)
    src = data.source
    defines = {name: expr.tree for name, expr in src.defines}
    reward = src.reward.tree
    moving = _depends(defines, choice)
    define, reason = _carrier(defines, reward, choice, moving)
    if define is None:
        return f"Euler-equation errors were not measured: {reason}"
    try:
        after = slope_trees(defines, define, skip_own=True)
        marginal = _slopes.derivative(reward, define, after)
        marginal_slope = _slopes.derivative(marginal, define, after)
        if isinstance(marginal, Number):
            return (f"Euler-equation errors were not measured: the marginal reward of `{define}` is constant, so it "
                    "cannot be inverted")
        in_choice = slope_trees(defines, choice)
        define_slope = _slopes.derivative(defines[define], choice, in_choice)
        in_state = slope_trees(defines, state)
        state_slope = _slopes.derivative(reward, state, in_state)
    except _slopes.NotSmooth as error:
        return f"Euler-equation errors were not measured: the reward is not differentiable ({error})"
    reason = _draw_form(data, defines, state, choice, define, [marginal, marginal_slope, define_slope], after)
    if reason:
        return f"Euler-equation errors were not measured: {reason}"
    try:
        chances = _chance_slopes(data, defines, state, choice, in_choice, in_state)
    except _slopes.NotSmooth as error:
        return f"Euler-equation errors were not measured: a draw's probability is not differentiable ({error})"
    try:
        laws = open_laws(data, {state, *_depends(defines, state)}, {choice, *_depends(defines, choice)}, state,
                         choice, in_choice, in_state)
    except _slopes.NotSmooth as error:
        return f"Euler-equation errors were not measured: a law of motion is not differentiable ({error})"
    later = {name: (defines[name], derived) for name, derived in after.items()}
    return EulerSetup(state, choice, define, marginal, marginal_slope, later, (define_slope, in_choice),
                      (state_slope, in_state), chances, laws, companions)


def _chance_slopes(data: ModelData, defines: dict[str, Node], state: str, choice: str, in_choice: dict[str, Node],
                   in_state: dict[str, Node]) -> tuple[tuple[tuple[Node | None, Node | None], ...], ...] | None:
    """Per draw, per value, the probability's derivatives in ``x`` and ``k`` (None where it does not move
    with them); None when no probability moves."""
    draws = data.draws
    if draws is None:
        return None
    moved_x = {choice, *_depends(defines, choice)}
    moved_k = {state, *_depends(defines, state)}
    out, moving = [], False
    for entries in draws.probs:
        row = []
        for entry in entries:
            used = set() if isinstance(entry, float) else names_in(entry.tree)
            in_x = _slopes.derivative(entry.tree, choice, in_choice) if used & moved_x else None
            in_k = _slopes.derivative(entry.tree, state, in_state) if used & moved_k else None
            moving = moving or in_x is not None or in_k is not None
            row.append((in_x, in_k))
        out.append(tuple(row))
    return tuple(out) if moving else None


def _draw_form(data: ModelData, defines: dict[str, Node], state: str, choice: str, define: str,
               trees: list[Node], after: dict[str, Node]) -> str:
    """Why shocks drawn after the choice keep the Euler equation from the policy alone ("" when they do not).

    The define ``c`` and its marginal reward must not change with the draw (one ``c`` to compare with
    ``c̃``).  The draws may move the reward's slope in the state and the other states' laws of motion; their
    probabilities may move with the choice or the chosen state (:func:`_chance_slopes`): a probability
    ``p_d(x)`` adds ``Σ_d ∂p_d/∂x · (r_d + β E V_d)`` to the first-order condition (its slope in ``k`` the
    same to the envelope condition), a term in the level of the value, read as the solve reads it.
    """
    draws = data.draws
    if draws is None:
        return ""
    moving = draws.dependent
    used: set[str] = {define}
    for tree in trees:
        used |= names_in(tree)
    for name, derived in reversed(after.items()):  # the later defines' slopes the trees use, and what those use
        if _slopes.prime(name) in used:
            used |= names_in(derived)
    changing = sorted(name for name in used if name in moving)
    if changing:
        return (f"the define `{define}` or its marginal reward changes with the draw after the choice (through "
                f"{', '.join(f'`{name}`' for name in changing)}), so there is no one `{define}` to compare with the "
                "Euler equation's")
    return ""


def _depends(defines: dict[str, Node], variable: str) -> dict[str, bool]:
    """The defines that depend on ``variable``, directly or through earlier defines (in order)."""
    moving: dict[str, bool] = {}
    for name, tree in defines.items():
        if any(used == variable or used in moving for used in names_in(tree)):
            moving[name] = True
    return moving


def _carrier(
    defines: dict[str, Node], reward: Node, choice: str, moving: dict[str, bool]
) -> tuple[str | None, str]:
    """The one define through which the choice enters the reward, or None and why.

    A define whose only role is to rename another (``u = log(c)``, reward
    ``u``: a marginal reward that is a constant) is looked through, down to
    the define nearest the choice that still carries it alone.
    """
    carried = sorted(name for name in names_in(reward) if name == choice or name in moving)
    if choice in carried:
        return None, f"the reward uses the choice `{choice}` directly, not through one define"
    if not carried:
        return None, f"the reward does not depend on the choice `{choice}`"
    if len(carried) > 1:
        return None, (f"the choice `{choice}` enters the reward through several defines "
                      f"({', '.join(f'`{name}`' for name in carried)}), not one")
    define = carried[0]
    while True:
        inner = sorted(name for name in names_in(defines[define]) if name == choice or name in moving)
        try:
            constant = isinstance(_slopes.derivative(reward, define, slope_trees(defines, define, skip_own=True)),
                                  Number)
        except _slopes.NotSmooth:
            constant = False
        if not constant or len(inner) != 1 or inner[0] == choice:
            return define, ""
        define = inner[0]


def slope_trees(defines: dict[str, Node], variable: str, *, skip_own: bool = False) -> dict[str, Node]:
    """Derivatives in ``variable`` of the defines that depend on it, in order.

    With ``skip_own`` the variable is itself a define, held as a leaf.
    """
    moving = _depends({name: tree for name, tree in defines.items() if not (skip_own and name == variable)}, variable)
    if skip_own:
        names = list(defines)
        later = set(names[names.index(variable) + 1:])
        moving = {name: True for name in moving if name in later}
    return {name: _slopes.derivative(defines[name], variable, moving) for name in moving}

