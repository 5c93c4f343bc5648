"""The ``taste_shocks`` key of a model: extreme-value taste shocks on its choices."""

from __future__ import annotations

from pydantic import Field

from worker.document._fields import Part, Positive


class TasteShocks(Part):
    """Additive taste shocks on every choice: independent, extreme value type I (Gumbel), centred, seen before
    the choice. The best choice becomes random to an onlooker, with logit choice probabilities, and the value
    becomes the smoothed maximum scale × log Σ exp(choice value / scale) over the choices."""

    scale: Positive = Field(
        description=(
            "The scale of the shocks, in units of the reward (> 0). Small scales approach the model without "
            "taste shocks; large ones make every allowed choice nearly equally likely. The shocks are centred "
            "(mean zero), so Euler's constant is not in the value: with location-zero shocks every value would be "
            "scale × 0.5772156649 / (1 − discount) higher (the result's diagnostics.taste_shocks says so)."
        )
    )
