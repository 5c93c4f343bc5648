"""The walls between fixq's packages, read from the source with ``ast``.

Every import statement of every module under ``service/`` and ``worker/`` counts:
top-level ones, ones inside functions and methods, and ones under
``if TYPE_CHECKING:`` (a type named in a signature is a dependency a reader must
follow as well).  Relative imports are resolved against the importing module.
``from package import name`` depends on ``package.name`` when that is a module,
otherwise on ``package``.  Importing ``a.b`` is not counted as importing the
package ``a`` itself: the parent package's ``__init__`` is Python's business, and
counting it would tie every module into one cycle with its package.  Imports made
by ``importlib`` from a computed string are not seen.

The walls:

* one direction: no module of ``worker/`` imports ``service`` or any module in it;
* the HTTP routes (``service/routers/``) import no numerical kernel module.  The
  kernel modules are the ones that compile, build or run a Bellman operator:
  ``numba`` itself; ``worker._codegen`` and ``worker._compile_later`` (generated
  kernels and their background compile); ``worker.expressions.intervals``,
  ``worker.expressions.interval_kernels`` and ``worker.expressions.scalar``
  (expressions written as numba source and its jitted helpers); ``worker.kernels``
  (shared compiled kernels); ``worker.gridmodel``, ``worker.gridproblem``,
  ``worker.gridtables`` and ``worker.tabular`` (documents compiled to Bellman
  operators); ``worker.reference`` and ``worker.bridge`` (the numpy Bellman step
  and the first solve that uses it); ``worker.solvers`` (the iterations) and
  ``worker.solve`` (the front door that runs a solve).  A test checks that each
  of them exists, so the list follows renames.  The document format
  (``worker.document``), the estimate, the feasibility check and the error tree
  are not kernels: the service needs them to admit a document.  At run time the
  same wall means that building the app never loads ``numba`` or a module that
  compiles kernels;
* no import cycle among the modules of ``service/`` and ``worker/``; a failure
  names the modules of each strongly connected component and one cycle through it.
"""

from __future__ import annotations

import ast
import subprocess
import sys
import textwrap
from collections import deque
from dataclasses import dataclass
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
PACKAGES = ("service", "worker")
ROUTES_PACKAGE = "service.routers"
KERNEL_MODULES = (
    "numba",
    "worker._codegen",
    "worker._compile_later",
    "worker.expressions.intervals",
    "worker.expressions.interval_kernels",
    "worker.expressions.scalar",
    "worker.kernels",
    "worker.gridmodel",
    "worker.gridproblem",
    "worker.gridtables",
    "worker.tabular",
    "worker.reference",
    "worker.bridge",
    "worker.solvers",
    "worker.solve",
)
"""Modules the HTTP routes never import (see the module docstring for why each is here)."""
COMPILING_MODULES = (
    "numba", "worker._codegen", "worker.expressions.interval_kernels", "worker.kernels", "worker.gridmodel"
)
"""Modules that building the app must not load at run time: numba and the modules that compile with it."""


@dataclass(frozen=True)
class Edge:
    """One import: ``source`` imports ``target`` (a module of the packages, or an outside name) at ``line``."""

    source: str
    target: str
    line: int

    def __str__(self) -> str:
        return f"{self.source} imports {self.target} (line {self.line})"


def find_modules(root: Path, packages: tuple[str, ...] = PACKAGES) -> dict[str, Path]:
    """Dotted module name -> file, for every ``.py`` file under each package directory of ``root``."""
    modules: dict[str, Path] = {}
    for package in packages:
        for path in sorted((root / package).rglob("*.py")):
            parts = path.relative_to(root).with_suffix("").parts
            if parts[-1] == "__init__":
                parts = parts[:-1]
            modules[".".join(parts)] = path
    return modules


def _absolute_base(module: str, path: Path, node: ast.ImportFrom) -> str:
    """The absolute module a ``from ... import`` statement reads from."""
    if not node.level:
        return node.module or ""
    package = module.split(".") if path.name == "__init__.py" else module.split(".")[:-1]
    if node.level - 1 > len(package):
        raise ValueError(f"{path}:{node.lineno}: relative import beyond the top-level package")
    package = package[: len(package) - (node.level - 1)]
    return ".".join(package + ([node.module] if node.module else []))


def _imported_names(module: str, path: Path, node: ast.Import | ast.ImportFrom, modules: dict[str, Path]) -> list[str]:
    if isinstance(node, ast.Import):
        return [alias.name for alias in node.names]
    base = _absolute_base(module, path, node)
    return [f"{base}.{alias.name}" if f"{base}.{alias.name}" in modules else base for alias in node.names]


def _owning_module(name: str, modules: dict[str, Path]) -> str:
    """``name`` or its nearest enclosing module among ``modules``; ``name`` itself when none encloses it."""
    candidate = name
    while candidate not in modules and "." in candidate:
        candidate = candidate.rsplit(".", 1)[0]
    return candidate if candidate in modules else name


def import_edges(modules: dict[str, Path]) -> list[Edge]:
    """Every import of every module, wherever it stands in the file, resolved to absolute names."""
    edges: set[Edge] = set()
    for module, path in modules.items():
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        for node in ast.walk(tree):
            if isinstance(node, ast.Import | ast.ImportFrom):
                for name in _imported_names(module, path, node, modules):
                    target = _owning_module(name, modules)
                    if target != module:
                        edges.add(Edge(module, target, node.lineno))
    return sorted(edges, key=lambda edge: (edge.source, edge.target, edge.line))


def _within(name: str, package: str) -> bool:
    return name == package or name.startswith(package + ".")


def wall_crossings(edges: list[Edge]) -> list[Edge]:
    """Imports of ``service`` (or anything in it) from a module of ``worker``."""
    return [edge for edge in edges if _within(edge.source, "worker") and _within(edge.target, "service")]


def kernel_imports_in_routes(edges: list[Edge]) -> list[Edge]:
    """Imports of a kernel module (or anything in it) from a module of the routes package."""
    return [
        edge
        for edge in edges
        if _within(edge.source, ROUTES_PACKAGE) and any(_within(edge.target, kernel) for kernel in KERNEL_MODULES)
    ]


def _strongly_connected(graph: dict[str, set[str]]) -> list[list[str]]:
    """Tarjan's algorithm, iterative; components of more than one module (or a module importing itself)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    components: list[list[str]] = []
    for start in sorted(graph):
        if start in index:
            continue
        work = [(start, iter(sorted(graph[start])))]
        index[start] = low[start] = len(index)
        stack.append(start)
        on_stack.add(start)
        while work:
            node, successors = work[-1]
            for successor in successors:
                if successor not in index:
                    index[successor] = low[successor] = len(index)
                    stack.append(successor)
                    on_stack.add(successor)
                    work.append((successor, iter(sorted(graph[successor]))))
                    break
                if successor in on_stack:
                    low[node] = min(low[node], index[successor])
            else:
                work.pop()
                if work:
                    low[work[-1][0]] = min(low[work[-1][0]], low[node])
                if low[node] == index[node]:
                    component = []
                    while True:
                        member = stack.pop()
                        on_stack.discard(member)
                        component.append(member)
                        if member == node:
                            break
                    if len(component) > 1 or node in graph[node]:
                        components.append(sorted(component))
    return sorted(components)


def _one_cycle(graph: dict[str, set[str]], component: list[str]) -> list[str]:
    """A shortest cycle through the component's first module, staying inside the component."""
    first, members = component[0], set(component)
    parents: dict[str, str] = {}
    queue = deque([first])
    while queue:
        node = queue.popleft()
        for successor in sorted(graph[node] & members):
            if successor == first:
                path = [node]
                while path[-1] != first:
                    path.append(parents[path[-1]])
                return [first, *reversed(path[:-1]), first]
            if successor not in parents:
                parents[successor] = node
                queue.append(successor)
    raise AssertionError(f"no cycle through {first} in {component}")


def import_cycles(edges: list[Edge], modules: dict[str, Path]) -> list[tuple[list[str], list[str]]]:
    """(modules of the component, one cycle through it) for each import cycle among ``modules``."""
    graph: dict[str, set[str]] = {module: set() for module in modules}
    for edge in edges:
        if edge.target in modules:
            graph[edge.source].add(edge.target)
    return [(component, _one_cycle(graph, component)) for component in _strongly_connected(graph)]


def describe_cycles(cycles: list[tuple[list[str], list[str]]]) -> str:
    return "\n".join(
        f"{len(component)} modules in a cycle: {', '.join(component)}\n    e.g. {' -> '.join(cycle)}"
        for component, cycle in cycles
    )


@pytest.fixture(scope="module")
def modules() -> dict[str, Path]:
    return find_modules(REPO)


@pytest.fixture(scope="module")
def edges(modules: dict[str, Path]) -> list[Edge]:
    return import_edges(modules)


def test_the_checker_reads_both_packages(modules: dict[str, Path], edges: list[Edge]) -> None:
    for expected in ("service", "service.app", "service.routers.jobs", "worker", "worker.solve", "worker.solvers"):
        assert expected in modules
    assert len(modules) > 40
    assert any(edge.source == "service.routers.jobs" and edge.target == "service.store" for edge in edges)
    assert any(edge.source.startswith("service.") and edge.target.startswith("worker.") for edge in edges)


def test_every_kernel_module_named_exists(modules: dict[str, Path]) -> None:
    missing = [name for name in KERNEL_MODULES if name != "numba" and name not in modules]
    assert not missing, f"KERNEL_MODULES names modules that do not exist (moved or renamed?): {missing}"


def test_no_worker_module_imports_service(edges: list[Edge]) -> None:
    crossings = wall_crossings(edges)
    assert not crossings, "worker/ must not import service/:\n" + "\n".join(map(str, crossings))


def test_the_routes_import_no_numerical_kernel(edges: list[Edge]) -> None:
    found = kernel_imports_in_routes(edges)
    assert not found, "service/routers/ must not import a numerical kernel module:\n" + "\n".join(map(str, found))


def test_no_import_cycle(edges: list[Edge], modules: dict[str, Path]) -> None:
    cycles = import_cycles(edges, modules)
    assert not cycles, "import cycles among service/ and worker/:\n" + describe_cycles(cycles)


def test_building_the_app_loads_no_compiling_module() -> None:
    probe = (
        "import sys\n"
        "from service.app import create_app\n"
        "import service.routers\n"
        f"print(' '.join(sorted(m for m in {COMPILING_MODULES!r} if m in sys.modules)))\n"
    )
    completed = subprocess.run(
        [sys.executable, "-c", probe], cwd=REPO, capture_output=True, text=True, timeout=120, check=False
    )
    assert completed.returncode == 0, completed.stderr
    assert completed.stdout.split() == [], f"importing the app loaded {completed.stdout.strip()}"


def write_tree(root: Path, files: dict[str, str]) -> None:
    for name, source in files.items():
        path = root / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(source), encoding="utf-8")


def test_the_checker_sees_an_import_of_service_inside_a_worker_function(tmp_path: Path) -> None:
    write_tree(
        tmp_path,
        {
            "service/__init__.py": "",
            "service/store.py": "VALUE = 1\n",
            "worker/__init__.py": "",
            "worker/clean.py": "import math\n",
            "worker/sneaky.py": """\
                def later():
                    from ..service import store
                    return store.VALUE
            """,
        },
    )
    modules = find_modules(tmp_path)
    crossings = wall_crossings(import_edges(modules))
    assert [str(edge) for edge in crossings] == ["worker.sneaky imports service.store (line 2)"]


def test_the_checker_sees_a_kernel_import_in_a_route(tmp_path: Path) -> None:
    write_tree(
        tmp_path,
        {
            "service/__init__.py": "",
            "service/routers/__init__.py": "",
            "service/routers/fine.py": "from worker.document import schema\n",
            "service/routers/heavy.py": "import numba\nfrom worker import solvers as s\n",
            "worker/__init__.py": "",
            "worker/solvers.py": "",
            "worker/document/__init__.py": "",
            "worker/document/schema.py": "",
        },
    )
    found = kernel_imports_in_routes(import_edges(find_modules(tmp_path)))
    assert [str(edge) for edge in found] == [
        "service.routers.heavy imports numba (line 1)",
        "service.routers.heavy imports worker.solvers (line 2)",
    ]


def test_the_checker_names_a_cycle_made_of_relative_and_deferred_imports(tmp_path: Path) -> None:
    write_tree(
        tmp_path,
        {
            "service/__init__.py": "",
            "worker/__init__.py": "",
            "worker/a.py": "from . import b\n",
            "worker/b.py": "from .c import thing\n",
            "worker/c.py": "thing = 1\ndef f():\n    import worker.a\n",
            "worker/d.py": "from worker import a, b, c\n",
        },
    )
    modules = find_modules(tmp_path)
    cycles = import_cycles(import_edges(modules), modules)
    assert cycles == [(["worker.a", "worker.b", "worker.c"], ["worker.a", "worker.b", "worker.c", "worker.a"])]
    assert "worker.a -> worker.b -> worker.c -> worker.a" in describe_cycles(cycles)


def test_no_test_module_imports_another_test_module_or_a_conftest() -> None:
    # Shared documents and helpers live in underscored modules (tests/_documents.py,
    # tests/service/_http.py, ...); a test module or conftest imported elsewhere runs twice
    # under two names and ties one test file's edits to another's.
    found = []
    for path in sorted((REPO / "tests").rglob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                names = [node.module or ""] + [f"{node.module or ''}.{alias.name}" for alias in node.names]
            else:
                continue
            last_parts = {name.rsplit(".", 1)[-1] for name in names}
            if any(part.startswith("test_") or part == "conftest" for part in last_parts):
                found.append(f"{path.relative_to(REPO)}:{node.lineno}")
    assert not found, "test modules imported by other modules:\n" + "\n".join(found)
