"""The shocks of a grid model: AR(1) processes, explicit Markov chains and i.i.d. draws.

Only the specifications and their checks are here; :meth:`ShockSpec.chain`
builds the chain through :mod:`worker.shocks` when the numerics ask.
"""

from __future__ import annotations

import math
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import BeforeValidator, Field, PlainSerializer, WithJsonSchema, model_validator
from pydantic_core import PydanticCustomError

from worker.document._faults import (
    fault,
    faults_error,
    form_faults,
    increasing_faults,
    number,
    raise_faults,
    stochastic_faults,
)
from worker.document._fields import (
    Matrix,
    Part,
    Points,
    Positive,
    SchemaExtra,
    Vector,
    check,
)
from worker.document.limits import DEFAULT_WIDTH, MAX_CHAIN_POINTS, MAX_ENTRIES, MAX_EXPRESSION_CHARS
from worker.errors import join_path

_EXP_LIMIT = math.log(np.finfo(np.float64).max)
"""Largest value whose ``exp`` is finite in float64 (about 709.78)."""


class AR1Spec(Part):
    """An AR(1) process y' = (1 - rho) * mean + rho * y + e, with e normal with mean 0 and standard
    deviation sigma, replaced by a finite Markov chain. It may instead be given by y's unconditional standard
    deviation sd = sigma / sqrt(1 - rho**2)."""

    rho: Annotated[
        float,
        check(
            lambda r: -1 < r < 1,
            "rho must lie strictly between -1 and 1, got {value}: with |rho| >= 1 the process is not stationary "
            "(its variance grows without bound), so there is no long-run distribution for a finite chain to match",
        ),
        SchemaExtra(exclusiveMinimum=-1, exclusiveMaximum=1),
    ] = Field(description="Persistence, strictly between -1 and 1.")
    sigma: Annotated[
        float | None,
        check(
            lambda s: s is None or s > 0,
            "sigma, the standard deviation of the innovation e, must be positive, got {value} "
            "(for a shock that never moves, use markov with one value)",
        ),
        SchemaExtra(exclusiveMinimum=0),
    ] = Field(default=None, description=(
        "Standard deviation of the innovation e (not of y itself); positive, in the units of y. Give exactly one "
        "of sigma and sd."))
    sd: Annotated[
        float | None,
        check(
            lambda s: s is None or s > 0,
            "sd, the unconditional standard deviation of y, must be positive, got {value} "
            "(for a shock that never moves, use markov with one value)",
        ),
        SchemaExtra(exclusiveMinimum=0),
    ] = Field(default=None, description=(
        "Unconditional (long-run) standard deviation of y, as papers often quote it; the innovation's is then "
        "sigma = sd * sqrt(1 - rho**2). Give exactly one of sigma and sd."))
    points: Points = Field(description=f"Number of chain values, 2 to {MAX_CHAIN_POINTS:,}.")
    method: Literal["rouwenhorst", "tauchen"] = Field(
        default="rouwenhorst",
        description=(
            'How the chain is built: "rouwenhorst" (Rouwenhorst 1995; matches the conditional mean and variance '
            'exactly, the better choice for persistent processes; the default) or "tauchen" (Tauchen 1986; an '
            "evenly spaced grid of half-width `width` unconditional standard deviations)."
        ),
    )
    width: Positive | None = Field(
        default=None,
        description=(
            f'Only for "tauchen": half-width of the grid in unconditional standard deviations of y '
            f"(default {DEFAULT_WIDTH:g}). Rouwenhorst's grid always spans sqrt(points - 1) of them."
        ),
    )
    mean: float = Field(default=0.0, description="Long-run mean of y (before any transform).")

    @model_validator(mode="after")
    def _check_ar1(self) -> AR1Spec:
        if (self.sigma is None) == (self.sd is None):
            which = "neither" if self.sigma is None else "both"
            raise faults_error([fault("sigma" if self.sigma is None else "sd", (
                f"give exactly one of sigma (the innovation's standard deviation) and sd (the unconditional "
                f"standard deviation of y, sd = sigma / sqrt(1 - rho**2)); {which} given"))])
        if self.width is not None and self.method != "tauchen":
            raise faults_error(
                [
                    fault(
                        "width",
                        'width is used only with method "tauchen"; Rouwenhorst\'s grid spans sqrt(points - 1) '
                        'unconditional standard deviations',
                    )
                ]
            )
        if self.method == "tauchen" and self.width is None:
            self.width = DEFAULT_WIDTH
        return self

    @property
    def innovation_sd(self) -> float:
        """The innovation's standard deviation: ``sigma``, or ``sd * sqrt(1 - rho**2)`` when ``sd`` is given."""
        return float(self.sigma) if self.sigma is not None else float(self.sd) * math.sqrt(1.0 - self.rho * self.rho)

    def half_width(self) -> float:
        """Distance from ``mean`` to the outermost chain value (no chain is built)."""
        spread = self.sd if self.sd is not None else self.sigma / math.sqrt(1.0 - self.rho * self.rho)
        return spread * (math.sqrt(self.points - 1) if self.method == "rouwenhorst" else self.width)


class MarkovSpec(Part):
    """A finite Markov chain given explicitly."""

    values: Vector = Field(description=f"The values the shock can take, strictly increasing; at most "
                           f"{MAX_CHAIN_POINTS:,}.")
    matrix: Matrix = Field(
        description=(
            "matrix[i][j]: the probability that tomorrow's value is values[j] when today's is values[i]. "
            "Square, one row and column per value; each row non-negative and summing to 1 (within 1e-9)."
        )
    )

    @model_validator(mode="after")
    def _check_markov(self) -> MarkovSpec:
        n = self.values.size
        faults = (
            [fault("values", "there must be at least one value")]
            if n == 0
            else increasing_faults(self.values, "values")
        )
        shape = self.matrix.shape
        if shape[0] != shape[1]:
            faults.append(fault("matrix", f"the matrix must be square, got shape {list(shape)}"))
        elif shape[0] != n:
            faults.append(
                fault(
                    "matrix",
                    f"the matrix is {shape[0]} by {shape[1]} but there are {n} values: it needs one row and column "
                    "per value",
                )
            )
        else:
            faults += stochastic_faults(self.matrix, "matrix")
        raise_faults(faults)
        return self


def _probabilities(value: Any) -> Any:
    """A list with an expression among its entries stays a list of numbers and texts; anything else is an array."""
    if isinstance(value, list) and any(isinstance(entry, str) for entry in value):
        if len(value) > MAX_ENTRIES:
            raise PydanticCustomError(
                "fixq_probability", "at most {limit} probabilities may be written with expressions",
                {"limit": MAX_ENTRIES},
            )
        for k, entry in enumerate(value):
            number_like = isinstance(entry, (int, float)) and not isinstance(entry, bool)
            text_like = isinstance(entry, str) and 0 < len(entry) <= MAX_EXPRESSION_CHARS
            if not (number_like and math.isfinite(entry) or text_like):
                raise PydanticCustomError(
                    "fixq_probability",
                    "entry {k} must be a finite number or an expression (a non-empty string of at most {limit} "
                    "characters)",
                    {"k": k, "limit": MAX_EXPRESSION_CHARS},
                )
        return [float(entry) if not isinstance(entry, str) else entry for entry in value]
    return _VECTOR_DECODE(value)


_VECTOR_DECODE = next(m for m in Vector.__metadata__ if isinstance(m, BeforeValidator)).func
_VECTOR_JSON = next(m for m in Vector.__metadata__ if isinstance(m, PlainSerializer)).func
_VECTOR_SCHEMA = next(m for m in Vector.__metadata__ if isinstance(m, WithJsonSchema)).json_schema

Probabilities = Annotated[
    Any,
    BeforeValidator(_probabilities),
    PlainSerializer(lambda v: list(v) if isinstance(v, list) else _VECTOR_JSON(v), when_used="json"),
    WithJsonSchema({
        "anyOf": [
            *_VECTOR_SCHEMA["anyOf"],
            {"type": "array", "items": {"anyOf": [{"type": "number"}, {"type": "string", "minLength": 1}]}},
        ]
    }),
]
"""Numbers (an array), or a list of numbers and expressions (a shock drawn after the choice)."""


class IIDSpec(Part):
    """A shock drawn afresh each period, independently of its past, from a finite distribution."""

    values: Vector = Field(description=f"The values the shock can take, strictly increasing; at most "
                           f"{MAX_CHAIN_POINTS:,} for a shock drawn before the choice.")
    probs: Probabilities = Field(
        description=(
            "probs[i]: the probability of values[i]; non-negative, summing to 1 (within 1e-9). A shock drawn "
            "after the choice may give expressions of today's states, shocks, choices and params instead of "
            f"numbers (at most {MAX_ENTRIES:,} entries then); they are checked at every point and feasible choice."
        )
    )

    @property
    def written(self) -> bool:
        """Whether the probabilities are written as expressions (a list of numbers and texts)."""
        return isinstance(self.probs, list)

    @model_validator(mode="after")
    def _check_iid(self) -> IIDSpec:
        n = self.values.size
        faults = (
            [fault("values", "there must be at least one value")]
            if n == 0
            else increasing_faults(self.values, "values")
        )
        given = len(self.probs) if self.written else self.probs.size
        if given != n:
            faults.append(
                fault("probs", f"there are {n} values but {given} probabilities: give one per value")
            )
        elif not self.written:
            faults += stochastic_faults(self.probs[None, :], "probs", single_row=True)
        raise_faults(faults)
        return self


class ShockSpec(Part):
    """An exogenous shock: a Markov chain that evolves on its own, whatever is chosen. Give exactly
    one of ar1, markov or iid. With timing "after_choice", an iid draw revealed after the period's
    choice, whose probabilities may depend on it."""

    ar1: AR1Spec | None = Field(default=None, description="An AR(1) process, discretised.")
    markov: MarkovSpec | None = Field(default=None, description="An explicit Markov chain.")
    iid: IIDSpec | None = Field(default=None, description="Independent draws from a finite distribution.")
    transform: Literal["exp", "none"] = Field(
        default="none",
        description=(
            'Applied to the chain values before use: "exp" (values become exp(value), e.g. a log-AR(1) productivity) '
            'or "none" (the default).'
        ),
    )

    timing: Literal["before_choice", "after_choice"] = Field(
        default="before_choice",
        description=(
            'When the value is revealed: "before_choice" (the default; the shock is an axis of the value '
            'function and evolves by its chain) or "after_choice" (an iid draw revealed after the period\'s '
            "choice: its probabilities may be expressions of today's states, shocks drawn before the choice, "
            "choices and params; next and reward may use it, the reward of a choice is its expectation over "
            "the draw and tomorrow's state the mixture over it; it is not an axis of the value function)."
        ),
    )

    @property
    def after_choice(self) -> bool:
        """Whether the shock is drawn after the choice (integrated out within the period)."""
        return self.timing == "after_choice"

    @property
    def size(self) -> int:
        """Number of chain values (no chain is built)."""
        if self.ar1 is not None:
            return self.ar1.points
        return int((self.markov or self.iid).values.size)

    @property
    def bounds(self) -> tuple[float, float]:
        """Smallest and largest chain value, after the transform (no chain is built)."""
        if self.ar1 is not None:
            half = self.ar1.half_width()
            lo, hi = self.ar1.mean - half, self.ar1.mean + half
        else:
            values = (self.markov or self.iid).values
            lo, hi = float(values[0]), float(values[-1])
        return (math.exp(lo), math.exp(hi)) if self.transform == "exp" else (lo, hi)

    def chain(self, *, path: str = "") -> tuple[np.ndarray, np.ndarray]:
        """The chain: values ``(n,)`` (transform applied) and row-stochastic ``P`` ``(n, n)``
        (via :mod:`worker.shocks`)."""
        from worker import shocks

        if self.ar1 is not None:
            spec, where = self.ar1, join_path(path, "ar1")
            if spec.method == "tauchen":
                values, matrix = shocks.tauchen(spec.rho, spec.innovation_sd, spec.points, spec.width, spec.mean,
                                                path=where)
            else:
                values, matrix = shocks.rouwenhorst(spec.rho, spec.innovation_sd, spec.points, spec.mean, path=where)
        elif self.markov is not None:
            values, matrix = shocks.markov_chain(self.markov.values, self.markov.matrix, path=join_path(path, "markov"))
        else:
            values, matrix = shocks.iid_chain(self.iid.values, self.iid.probs, path=join_path(path, "iid"))
        return shocks.apply_transform(values, self.transform, path=path), matrix

    @model_validator(mode="after")
    def _check_shock(self) -> ShockSpec:
        form, faults = form_faults(
            self, {"ar1": ("ar1",), "markov": ("markov",), "iid": ("iid",)}, "exactly one of `ar1`, `markov` or `iid`"
        )
        if form and self.after_choice and self.iid is None:
            faults.append(fault("timing", 'a shock drawn after the choice must be an `iid` distribution '
                                '(values and probs): a chain would link it to the next period\'s draw'))
        if form and not self.after_choice and self.size > MAX_CHAIN_POINTS:
            where = join_path("ar1", "points") if form == "ar1" else join_path(form, "values")
            faults.append(fault(where, f"at most {MAX_CHAIN_POINTS:,} values are accepted for a shock drawn before "
                                f"the choice (its chain is a dense {MAX_CHAIN_POINTS:,} by {MAX_CHAIN_POINTS:,} matrix "
                                f"at most), got {self.size:,}"))
        if form == "iid" and self.iid.written and not self.after_choice:
            faults.append(fault(join_path("iid", "probs"), 'probabilities written as expressions need "timing": '
                                '"after_choice" (a shock drawn before the choice is a point of the value function, '
                                'with fixed probabilities)'))
        if form and self.transform == "exp":
            top = (
                self.ar1.mean + self.ar1.half_width()
                if self.ar1 is not None
                else float((self.markov or self.iid).values[-1])
            )
            if not top < _EXP_LIMIT:
                faults.append(
                    fault(
                        "transform",
                        f"exp of the largest chain value ({number(top)}) overflows float64; values must stay below "
                        f"{_EXP_LIMIT:.2f}",
                    )
                )
        raise_faults(faults)
        return self
