"""The settings table of README.md, generated from :class:`service.settings.Settings`.

``python -m service.settings_doc [--write | --check]``.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

from pydantic_core import PydanticUndefined

from service._readme import command_line
from service.settings import Settings

__all__ = ["settings_table"]


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


def settings_table() -> str:
    """A Markdown table: variable, default, meaning; one row per field of ``Settings``."""
    prefix = Settings.model_config.get("env_prefix", "")
    lines = ["| variable | default | meaning |", "| --- | --- | --- |"]
    for name, field in Settings.model_fields.items():
        description = (field.description or "").replace("|", "\\|")
        lines.append(f"| `{prefix}{name.upper()}` | `{_default(field.default)}` | {description} |")
    return "\n".join(lines)


if __name__ == "__main__":
    sys.exit(command_line("settings_doc", settings_table))
