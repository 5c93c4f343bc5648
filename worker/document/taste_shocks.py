"""The ``taste_shocks`` key of a model: extreme-value taste shocks on its choices (all, or the ones listed)."""

from __future__ import annotations

from typing import Any

from pydantic import Field, model_validator

from worker.document._faults import Fault, fault, raise_faults
from worker.document._fields import Part, Positive
from worker.errors import join_path

__all__ = ["TasteShocks", "taste_choice_faults"]


class TasteShocks(Part):
    """Additive taste shocks on the choices: independent, extreme value type I (Gumbel), centred, seen before
    the choice. The best choice becomes random to an onlooker, with logit choice probabilities, and the value
    becomes the smoothed maximum scale × log Σ exp(choice value / scale) over the combinations of the choices
    that carry the shocks (the others maximised exactly given them)."""

    scale: Positive = Field(
        description=(
            "The scale of the shocks, in units of the reward (> 0). Small scales approach the model without "
            "taste shocks; large ones make every allowed choice nearly equally likely. The shocks are centred "
            "(mean zero), so Euler's constant is not in the value: with location-zero shocks every value would be "
            "scale × 0.5772156649 / (1 − discount) higher (the result's diagnostics.taste_shocks says so)."
        )
    )
    choices: list[str] | None = Field(
        default=None,
        description=(
            "Optional: the names of the choices that carry the shocks (default: every choice). Each combination "
            "of the listed choices gets its own shock and a logit probability; the other choices are maximised "
            "exactly given it (a retirement or work decision with shocks, the saving beside it without). A list "
            "naming every choice is the default."
        ),
    )

    @model_validator(mode="after")
    def _check(self) -> TasteShocks:
        faults: list[Fault] = []
        if self.choices is not None and not self.choices:
            faults.append(fault("choices", "name at least one choice to carry the taste shocks, or leave "
                                           "`choices` out for every choice"))
        for k, name in enumerate(self.choices or []):
            if name in self.choices[:k]:
                faults.append(fault(join_path("choices", k), f"`{name}` is listed twice; list each choice once"))
        raise_faults(faults)
        return self


def taste_choice_faults(shocks: Any, known: list[str]) -> list[Fault]:
    """Faults of ``taste_shocks.choices`` naming a choice the model does not have (paths relative to the model)."""
    if shocks is None or shocks.choices is None:
        return []
    return [
        fault(join_path("taste_shocks", "choices", k),
              f"`{name}` is not a choice of the model; its choices are {', '.join(f'`{c}`' for c in known)}")
        for k, name in enumerate(shocks.choices)
        if name not in known
    ]
