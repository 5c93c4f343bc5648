"""The problem-document reference of README.md, generated from the JSON Schema.

``python -m service.docref [--write | --check]`` renders
``worker.document.json_schema()`` as Markdown: one table per kind of object
(the document, each model kind, grids, shocks, the solver, ...), each key with
its type, its default (or *required*), its limits and its description, in the
order a reader meets them.  The schema is the contract; this is its reading
copy, and a test keeps README.md equal to it.
"""

from __future__ import annotations

import json
import sys
from collections import deque
from typing import Any

from service._readme import command_line
from worker.document import json_schema

__all__ = ["reference"]

_LIMITS = (
    ("exclusiveMinimum", "> {}"),
    ("minimum", "≥ {}"),
    ("exclusiveMaximum", "< {}"),
    ("maximum", "≤ {}"),
    ("minItems", "at least {} items"),
    ("maxItems", "at most {} items"),
    ("minProperties", "at least {} keys"),
    ("maxProperties", "at most {} keys"),
    ("minLength", "at least {} characters"),
    ("maxLength", "at most {} characters"),
    ("pattern", "matches `{}`"),
)


class _Reference:
    def __init__(self, schema: dict[str, Any]) -> None:
        self.defs: dict[str, Any] = schema.get("$defs", {})
        self.where: dict[str, str] = {}
        self.queue: deque[str] = deque()

    def ref_name(self, node: dict[str, Any]) -> str | None:
        ref = node.get("$ref", "")
        return ref.rsplit("/", 1)[-1] if ref.startswith("#/$defs/") else None

    def visit(self, name: str, path: str) -> None:
        if name not in self.where and name not in ("PackedArray", "NestedNumbers"):
            self.where[name] = path
            self.queue.append(name)

    def type_of(self, node: dict[str, Any], path: str) -> str:
        """A short reading of a schema node's type, queueing the objects it names."""
        name = self.ref_name(node)
        if name == "PackedArray":
            return "packed array"
        if name == "NestedNumbers":
            return "nested lists of numbers"
        if name is not None:
            self.visit(name, path)
            return f"object ({name})"
        for key in ("anyOf", "oneOf"):
            if key in node:
                options = [option for option in node[key] if option.get("type") != "null"]
                text = " or ".join(dict.fromkeys(self.type_of(option, path) for option in options))
                return text + (" or null" if len(options) < len(node[key]) else "")
        if "const" in node:
            return f"`{json.dumps(node['const'])}`"
        if "enum" in node:
            return " \\| ".join(f"`{json.dumps(value)}`" for value in node["enum"])
        kind = node.get("type")
        if isinstance(kind, list):
            return " or ".join(kind)
        if kind == "array":
            items = node.get("items")
            return f"array of {self.plural(self.type_of(items, path + '[i]'))}" if items else "array"
        if kind == "object" and isinstance(node.get("additionalProperties"), dict):
            return f"object: name → {self.type_of(node['additionalProperties'], path + '.NAME')}"
        return kind or "any"

    @staticmethod
    def plural(text: str) -> str:
        words = {"number": "numbers", "string": "strings", "integer": "integers", "boolean": "booleans",
                 "null": "nulls", "array": "arrays"}  # fmt: skip
        head, sep, rest = text.partition(" ")
        if head in words and (not sep or rest.startswith(("of ", "or "))):
            if rest.startswith("or "):
                rest = " or ".join(words.get(part, part) for part in rest[3:].split(" or "))
            return words[head] + (f" or {rest}" if sep and not rest.startswith("of ") else f"{sep}{rest}")
        return text

    def limits(self, node: dict[str, Any]) -> list[str]:
        found = []
        for option in [node, *node.get("anyOf", []), *node.get("oneOf", [])]:
            for key, template in _LIMITS:
                if key in option:
                    text = template.format(option[key])
                    if text not in found:
                        found.append(text)
        return found

    def table(self, node: dict[str, Any], path: str) -> list[str]:
        required = set(node.get("required", []))
        lines = ["| key | type | default | description |", "| --- | --- | --- | --- |"]
        for key, prop in node.get("properties", {}).items():
            kind = self.type_of(prop, f"{path}.{key}" if path else key)
            if key in required:
                default = "*required*"
            elif "default" in prop:
                default = f"`{json.dumps(prop['default'], ensure_ascii=False)}`"
            else:
                default = ""
            description = " ".join(prop.get("description", "").split())
            limits = [text for text in self.limits(prop) if not _said(text, description)]
            if limits:
                description += f" ({'; '.join(limits)})"
            lines.append(f"| `{key}` | {kind} | {default} | {_cell(description)} |")
        return lines

    def render(self, schema: dict[str, Any]) -> str:
        out = [f"Generated from `GET /v1/schema` ({schema.get('title', 'the problem document')}). "
               "Unknown keys are refused, with their path named.", "",
               "### The document", "", _cell(" ".join(schema.get("description", "").split())), ""]  # fmt: skip
        out += self.table(schema, "")
        while self.queue:
            name = self.queue.popleft()
            node = self.defs[name]
            kind = node.get("properties", {}).get("kind", {}).get("const")
            heading = f"`{self.where[name]}`" + (f" with kind `{kind}`" if kind else "") + f" ({name})"
            description = "\n\n".join(" ".join(part.split()) for part in node.get("description", "").split("\n\n"))
            out += ["", f"### {heading}", "", description, ""]
            out += self.table(node, self.where[name])
        packed = self.defs.get("PackedArray")
        if packed:
            out += ["", "### Packed arrays", "", " ".join(packed.get("description", "").split()), ""]
            out += self.table(packed, "packed")
        return "\n".join(out)


def _said(limit: str, description: str) -> bool:
    """True when the description already states the limit's number."""
    number = limit.split()[-2] if limit.endswith(("items", "keys", "characters")) else limit.split()[-1]
    try:
        value = float(number)
    except ValueError:
        return number in description
    return any(form in description for form in (number, f"{value:,.0f}" if value.is_integer() else number))


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def reference(schema: dict[str, Any] | None = None) -> str:
    """The Markdown reference of the problem document."""
    schema = schema if schema is not None else json_schema()
    return _Reference(schema).render(schema)


if __name__ == "__main__":
    sys.exit(command_line("docref", reference))
