"""The settings table of README.md, generated from :class:`service.settings.Settings`.

The few variables only the numerics read (:mod:`worker.environment`, which
has no settings class so that ``from worker import solve`` needs no service)
follow, read from that module's constants and their docstrings.

``python -m service.settings_doc [--write | --check]``.
"""

from __future__ import annotations

import ast
import itertools
import re
import sys
from pathlib import Path
from typing import Any

from pydantic_core import PydanticUndefined

import worker.environment
from service._readme import command_line
from service.settings import Settings

__all__ = ["settings_table", "worker_variables"]


def _default(value: Any) -> str:
    if value is None or value is PydanticUndefined:
        return "unset"
    if isinstance(value, bool):
        return "on" if value else "off"
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    if isinstance(value, Path):
        return str(value)
    return str(value)


_DEFAULT_IN_TEXT = (re.compile(r"\(default ``([^`]*)``\)"), re.compile(r"``([^`]*)`` \(default\)"))


def worker_variables() -> list[tuple[str, str, str]]:
    """``(variable, default, meaning)`` of each ``FIXQ_*`` constant of :mod:`worker.environment`.

    The meaning is the constant's docstring (reST markup turned into
    Markdown code); the default is the value it names as ``(default ``X``)``
    or ``X`` ``(default)``, else ``unset``.
    """
    source = Path(worker.environment.__file__).read_text(encoding="utf-8")
    body = ast.parse(source).body
    rows = []
    for statement, following in itertools.pairwise(body):
        if not (isinstance(statement, ast.Assign) and isinstance(statement.value, ast.Constant)):
            continue
        variable = statement.value.value
        if not (isinstance(variable, str) and variable.startswith("FIXQ_")):
            continue
        documented = isinstance(following, ast.Expr) and isinstance(following.value, ast.Constant)
        doc = following.value.value if documented else ""
        text = " ".join(str(doc).split())
        default = next((m.group(1) for pattern in _DEFAULT_IN_TEXT if (m := pattern.search(text))), "unset")
        meaning = re.sub(r":mod:`([^`]*)`", r"``\1``", text).replace("``", "`")
        rows.append((variable, default, meaning))
    return rows


def settings_table() -> str:
    """A Markdown table: variable, default, meaning; one row per ``FIXQ_*`` variable.

    The fields of ``Settings`` come first, then the variables only the
    numerics read (:func:`worker_variables`).
    """
    prefix = Settings.model_config.get("env_prefix", "")
    lines = ["| variable | default | meaning |", "| --- | --- | --- |"]
    listed = set()
    for name, field in Settings.model_fields.items():
        description = (field.description or "").replace("|", "\\|")
        variable = f"{prefix}{name.upper()}"
        listed.add(variable)
        lines.append(f"| `{variable}` | `{_default(field.default)}` | {description} |")
    for variable, default, meaning in worker_variables():
        if variable not in listed:
            escaped = meaning.replace("|", "\\|")
            lines.append(f"| `{variable}` | `{default}` | {escaped} |")
    return "\n".join(lines)


if __name__ == "__main__":
    sys.exit(command_line("settings_doc", settings_table))
