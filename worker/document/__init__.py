"""The problem document (version 1): the public contract the numerics consume.

The pydantic models, the checks behind them, the canonical form and hash and
the JSON Schema live here, beside the solvers that read them, so that
``worker.solve`` validates through them with no web stack; the service
imports them from here.
"""

from worker.document.schema import *  # noqa: F401,F403
from worker.document.schema import __all__  # noqa: F401
