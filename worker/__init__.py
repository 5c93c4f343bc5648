"""fixq numerics: compile a validated problem document, solve it, report.

The one front door is :func:`solve`; :data:`METHODS` is the registry of
solution methods that the schema and the tests share; :func:`estimate` sizes
a validated document without allocating it.  Importing this package stays
light: numpy and scipy, never numba (the grid compiler is imported on first
use).
"""

from worker.errors import Canceled, FixqError, InfeasibleModel, InvalidDocument, TooLarge
from worker.estimate import estimate
from worker.solve import solve
from worker.solvers import METHODS

__all__ = ["Canceled", "FixqError", "InfeasibleModel", "InvalidDocument", "METHODS", "TooLarge", "estimate", "solve"]
