"""The problem document (version 1): the public contract the numerics consume.

The pydantic models, the checks behind them, the canonical form and hash and
the JSON Schema live here, beside the solvers that read them, so that
``worker.solve`` validates through them with no web stack; the service
imports them from here.  A newcomer reads, in order:

* :mod:`~worker.document.document`: :class:`ProblemDocument` and :func:`parse_document`, the one way in;
* :mod:`~worker.document.tabular`, :mod:`~worker.document.grid` and
  :mod:`~worker.document.shock_specs`: the two kinds of model and their checks;
* :mod:`~worker.document.options`: the ``solver``, ``report`` and ``notify`` objects;
* :mod:`~worker.document.canonical`: the canonical form and the hash;
* :mod:`~worker.document.limits`: every cap a document is held to.

The private modules hold the machinery: fault reporting (``_faults``), the
translation of pydantic's errors (``_translate``), annotated field types
(``_fields``) and the finishing of the JSON Schema (``_json_schema``).
"""

from worker.document._json_schema import json_schema
from worker.document.canonical import canonical_json, document_hash
from worker.document.document import (
    DEFAULT_PRIORITY,
    PRIORITIES,
    SUBMISSION_KEYS,
    ProblemDocument,
    parse_document,
)
from worker.document.grid import ChoiceSpec, GridAxis, GridModel, Hints
from worker.document.limits import (
    CANONICAL_INLINE_ELEMENTS,
    DOCUMENT_VERSION,
    MAX_ARRAY_ELEMENTS,
    MAX_AXES,
    MAX_LABEL_CHARS,
    MAX_POINTS,
    MAX_REPORTED,
    MAX_TAGS,
)
from worker.document.options import (
    METHOD_NAMES,
    InitialJob,
    InitialValues,
    NotifySpec,
    ReportSpec,
    SimulateSpec,
    SolverSpec,
)
from worker.document.shock_specs import AR1Spec, IIDSpec, MarkovSpec, ShockSpec
from worker.document.tabular import SparseTransition, TabularModel

__all__ = [
    "CANONICAL_INLINE_ELEMENTS",
    "DEFAULT_PRIORITY",
    "DOCUMENT_VERSION",
    "MAX_ARRAY_ELEMENTS",
    "MAX_AXES",
    "MAX_LABEL_CHARS",
    "MAX_POINTS",
    "MAX_REPORTED",
    "MAX_TAGS",
    "METHOD_NAMES",
    "PRIORITIES",
    "SUBMISSION_KEYS",
    "AR1Spec",
    "ChoiceSpec",
    "GridAxis",
    "GridModel",
    "Hints",
    "IIDSpec",
    "InitialJob",
    "InitialValues",
    "MarkovSpec",
    "NotifySpec",
    "ProblemDocument",
    "ReportSpec",
    "ShockSpec",
    "SimulateSpec",
    "SolverSpec",
    "SparseTransition",
    "TabularModel",
    "canonical_json",
    "document_hash",
    "json_schema",
    "parse_document",
]
