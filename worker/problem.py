"""The interface every compiled problem offers to the solvers.

A *compiled problem* is a document turned into arrays.  The solvers
(:mod:`worker.solvers`), the reports and the result document only ever talk
to this interface, and every problem class implements all of it, so tabular
and grid problems share one set of solvers, error bounds and reports.

Conventions
-----------
* Points (states) are flattened in C order over ``shape`` (grid: endogenous states
  first, then shocks; tabular: ``(n_states,)``).  ``v`` is always a float64
  vector of length ``n``.
* A *policy* is an int64 vector of length ``n`` holding, per state, the flat
  index of the chosen alternative in the problem's choice space (tabular: the
  action index; grid: the C-order flat index over the product of choices).

Local steps
-----------
A problem may also offer ``local_step(v, policy_guess=...)`` (an optional
attribute, read with ``getattr``; None or absent when it cannot): a Bellman
step whose search is local around ``policy_guess`` (a continuous choice's
concave bracket grown from the previous choice, without the monotone
narrowing).  After the hints fail their check, the solver iterates such
steps from the checked policy and checks them again with an unrestricted
step (:mod:`worker.solvers.loop`, "local phase"); the answer never rests on
an unchecked local step.

Taste shocks
------------
A problem with taste shocks (:mod:`worker.taste`) also has ``taste_scale``
(a float; problems without have no such attribute or None),
``choice_probabilities(policy) -> (n, C)`` (the logit probabilities of its
last Bellman step, whose most probable choices ``policy`` must be),
``choice_axes() -> {choice name: values}`` and ``pair_transition() -> (n·C, n)
CSR`` (row ``x·C + c``: tomorrow's law after choice ``c`` at ``x``).  Its
``bellman_step`` is the smoothed one and returns the most probable choice;
``policy_matrix``, ``policy_reward``, ``policy_step`` and ``policy_steps``
evaluate the last step's probabilities (entropy term included), so the
solvers keep an int64 policy and need not know; only a resumed solve does,
and steps once more from the value the interrupted phase started from
(:class:`worker.solvers.loop.Run`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Protocol

import numpy as np
import scipy.sparse as sp

__all__ = ["CompiledProblem", "Hints", "PolicySteps"]


@dataclass(frozen=True)
class Hints:
    """The hints a compiled problem's hinted search uses (none by default)."""

    monotone: bool = False
    concave: bool = False


PolicySteps = Callable[[np.ndarray, np.ndarray, int, float], tuple[np.ndarray, int, float]]
"""``policy_steps(v, policy, steps, span_stop) -> (new v, steps applied, span of the last increment)``:
up to ``steps`` evaluation steps ``v ← r_σ + β P_σ v`` in one call, ``v`` not modified, stopping
early after the first step whose increment has span ``max − min`` at most ``span_stop``."""


class CompiledProblem(Protocol):
    """What a compiled document must provide."""

    discount: float
    """β, in (0, 1)."""
    shape: tuple[int, ...]
    """Shape of the value array (states then shocks; tabular ``(n_states,)``)."""
    n: int
    """Number of (flattened) states, ``prod(shape)``."""
    axes: dict[str, list[float] | list[str]]
    """Result-document ``axes``: grid values per axis, in array-axis order."""
    hints_active: bool
    """True when ``bellman_step(..., restricted=True)`` exploits hints."""
    hints: Hints
    """The hints in use (both False when ``hints_active`` is False)."""
    policy_steps: PolicySteps | None
    """Fused Howard evaluation steps, or None: the solvers then step with
    :meth:`policy_matrix` and :meth:`policy_reward`."""

    def bellman_step(
        self, v: np.ndarray, *, restricted: bool = False, policy_guess: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Apply the Bellman operator once.

        Parameters
        ----------
        v : (n,) float64
            Current value function.
        restricted : bool
            Exploit the document's hints (monotone/concave); only meaningful
            when ``hints_active``.  ``False`` must be the exact maximum over
            every allowed choice.
        policy_guess : (n,) int64 or None
            Previous policy, which a kernel may use to speed the search.

        Returns
        -------
        Tv : (n,) float64
        policy : (n,) int64  greedy choice (ties: lowest index).
        """

    def policy_step(self, v: np.ndarray, policy: np.ndarray) -> np.ndarray:
        """``r_σ + β P_σ v`` for a fixed policy σ; (n,) → (n,)."""

    def policy_reward(self, policy: np.ndarray) -> np.ndarray:
        """``r_σ``, the per-state reward of the policy; shape (n,)."""

    def policy_matrix(self, policy: np.ndarray) -> sp.csr_matrix:
        """``P_σ``, the (n, n) row-stochastic transition matrix of the policy."""

    def describe_policy(self, policy: np.ndarray) -> tuple[dict[str, Any], dict[str, Any]]:
        """Result-document ``policy`` and ``policy_index``: nested lists of
        shape ``shape`` per choice (tabular: ``{"action": [labels]}``), of
        plain Python numbers and strings (``ndarray.tolist()``): the result
        document uses them as they are."""

    def choice_values(self, policy: np.ndarray) -> dict[str, np.ndarray]:
        """Per choice name, the (n,) numeric value chosen (tabular: the action
        index as float).  Used for means in reports and simulations."""

    def state_values(self) -> dict[str, np.ndarray]:
        """Per axis name, the (n,) value of that axis at each flat state."""

    def diagnostics(self, policy: np.ndarray) -> dict[str, Any]:
        """Problem-specific diagnostics for the final policy (edge hits,
        clamped next states, warnings: a list of plain-English strings)."""
