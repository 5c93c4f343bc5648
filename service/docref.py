"""The problem-document and result-document references of README.md, generated from their JSON Schemas.

``python -m service.docref [--write | --check]`` renders
``worker.document.json_schema()`` as Markdown: one table per kind of object
(the document, each model kind, grids, shocks, the solver, ...), each key with
its type, its default (or *required*), its limits and its description, in the
order a reader meets them.  It renders the schema of the result document
(``worker.result_document``, the schema of ``GET /v1/jobs/{id}/result`` in the
OpenAPI description) the same way into a second section, each key saying whether
every result has it, followed by the CSV form.  The schemas are the contract;
these are their reading copies, and a test keeps README.md equal to them.
"""

from __future__ import annotations

import json
import sys
from collections import deque
from typing import Any

from service._readme import command_line
from service.result_openapi import CSV_TABLE
from worker.document import json_schema
from worker.result_document import result_json_schema

__all__ = ["RESULT_SECTION", "reference", "result_reference"]

RESULT_SECTION = "docref_result"
"""The name of the README section holding the result document's reference."""

_ARRAYS = {
    "PackedArray": "packed array",
    "NestedNumbers": "nested lists of numbers",
    "NestedIntegers": "nested lists of integers",
    "NestedLabels": "nested lists of labels",
    "NestedOptionalNumbers": "nested lists of numbers or nulls",
}
"""Shared array definitions, named by a phrase instead of a table of their own."""

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
    def __init__(self, schema: dict[str, Any], *, presence: bool = False) -> None:
        self.defs: dict[str, Any] = schema.get("$defs", {})
        self.presence = presence  # a result's "present" column (always / optional) instead of a default
        self.where: dict[str, str] = {}
        self.queue: deque[str] = deque()

    def ref_name(self, node: dict[str, Any]) -> str | None:
        ref = node.get("$ref", "")
        return ref.rsplit("/", 1)[-1] if ref.startswith("#/$defs/") else None

    def visit(self, name: str, path: str) -> None:
        if name not in self.where and name not in _ARRAYS:
            self.where[name] = path
            self.queue.append(name)

    def type_of(self, node: dict[str, Any], path: str) -> str:
        """A short reading of a schema node's type, queueing the objects it names."""
        name = self.ref_name(node)
        if name in _ARRAYS:
            return _ARRAYS[name]
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
        lines = [
            f"| key | type | {'present' if self.presence else 'default'} | description |",
            "| --- | --- | --- | --- |",
        ]
        for key, prop in node.get("properties", {}).items():
            kind = self.type_of(prop, f"{path}.{key}" if path else key)
            if self.presence:
                default = "always" if key in required else "optional"
            elif key in required:
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

    def render(self, schema: dict[str, Any], intro: str) -> str:
        out = [intro, "", "### The document", "", _cell(" ".join(schema.get("description", "").split())), ""]
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
    intro = (
        f"Generated from `GET /v1/schema` ({schema.get('title', 'the problem document')}). "
        "Unknown keys are refused, with their path named."
    )
    return _Reference(schema).render(schema, intro)


def result_reference(schema: dict[str, Any] | None = None) -> str:
    """The Markdown reference of the result document, and of its CSV form."""
    schema = schema if schema is not None else result_json_schema()
    intro = (
        "Generated from the schema of `GET /v1/jobs/{id}/result` in the OpenAPI description (`/openapi.json`, "
        "`ResultDocument`). It lists every key today's results carry (a test solves results of every shape and "
        "refuses any key not listed); later versions may add keys, so a client should ignore the ones it does not "
        "know. *present*: **always**, or **optional** — only in the cases its description names. A key always "
        "present may still be null where its type says so."
    )
    text = _Reference(schema, presence=True).render(schema, intro)
    return f"{text}\n\n### The CSV table\n\n{CSV_TABLE}"


if __name__ == "__main__":
    sys.exit(command_line("docref", reference, more={RESULT_SECTION: result_reference}))
