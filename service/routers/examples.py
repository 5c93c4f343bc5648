"""``/v1/examples``: the bundled example problems, ready to submit.

They are invented scenarios that ship with the service, so they need no key.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter

from service.examples import example_names, list_examples, load_example
from service.problems import Problem

__all__ = ["router"]

router = APIRouter(prefix="/v1/examples", tags=["examples"])


@router.get("")
def list_bundled_examples() -> dict[str, Any]:
    """List the bundled example problems (name, label, tags, kind, size)."""
    return {"data": list_examples(), "next": None}


@router.get("/{name}")
def get_example(name: str) -> dict[str, Any]:
    """One bundled example: a problem document ready for POST /v1/jobs."""
    if name not in example_names():
        raise Problem(404, "not-found", f"no example named {name!r}; the examples are: {', '.join(example_names())}")
    return load_example(name)
