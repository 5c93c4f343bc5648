"""README.md's generated sections match their sources: the Settings class and the JSON Schema."""

from __future__ import annotations

from service import _readme
from service.docref import reference
from service.settings_doc import settings_table


def test_settings_table_is_current() -> None:
    text = _readme.README.read_text(encoding="utf-8")
    assert _readme.current_section(text, "settings_doc") == settings_table(), (
        "README.md is stale: run python -m service.settings_doc --write"
    )


def test_settings_table_names_every_field() -> None:
    from service.settings import Settings

    table = settings_table()
    for name in Settings.model_fields:
        assert f"`FIXQ_{name.upper()}`" in table


def test_settings_table_names_every_variable_of_the_numerics() -> None:
    import worker.environment

    table = settings_table()
    constants = vars(worker.environment).values()
    variables = [value for value in constants if isinstance(value, str) and value.startswith("FIXQ_")]
    assert variables
    for variable in variables:
        assert f"`{variable}`" in table
    assert "| `FIXQ_KERNEL_CACHE` | `~/.cache/fixq/kernels` |" in table


def test_document_reference_is_current() -> None:
    text = _readme.README.read_text(encoding="utf-8")
    stale = "README.md is stale: run python -m service.docref --write"
    assert _readme.current_section(text, "docref") == reference(), stale


def test_document_reference_covers_every_object_of_the_schema() -> None:
    from worker.document import json_schema

    text = reference()
    for name in json_schema()["$defs"]:
        if name != "NestedNumbers":
            assert f"({name})" in text or name == "PackedArray" and "### Packed arrays" in text


def test_replace_section_keeps_the_rest() -> None:
    begin, end = _readme.markers("demo")
    text = f"head\n{begin}\nold\n{end}\ntail\n"
    replaced = _readme.replace_section(text, "demo", "new")
    assert replaced == f"head\n{begin}\nnew\n{end}\ntail\n"
    assert _readme.current_section(replaced, "demo") == "new"
