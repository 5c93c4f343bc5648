"""README.md's generated sections match their sources: the Settings class and the JSON Schemas of the problem
and result documents."""

from __future__ import annotations

from service import _readme
from service.docref import RESULT_SECTION, reference, result_reference
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


def test_result_reference_is_current() -> None:
    text = _readme.README.read_text(encoding="utf-8")
    stale = "README.md is stale: run python -m service.docref --write"
    assert _readme.current_section(text, RESULT_SECTION, "docref") == result_reference(), stale


def test_result_reference_covers_every_object_and_key_of_the_result_schema() -> None:
    from worker.result_document import result_json_schema

    text = result_reference()
    schema = result_json_schema()
    for name, definition in schema["$defs"].items():
        if not name.startswith("Nested"):
            assert f"({name})" in text, name
        for key in definition.get("properties", {}):
            assert f"| `{key}` |" in text, (name, key)
    for key in schema["properties"]:
        assert f"| `{key}` |" in text, key


def test_the_result_reference_sits_after_the_problem_reference_and_before_the_measurements() -> None:
    text = _readme.README.read_text(encoding="utf-8")
    problem = text.index(_readme.markers("docref")[1])
    result = text.index("## The result document")
    assert (
        problem
        < result
        < text.index(_readme.markers(RESULT_SECTION, "docref")[0])
        < text.index("## Measured performance")
    )


def test_check_names_a_stale_second_section(tmp_path, monkeypatch) -> None:
    """``--check`` fails when any section the module writes is stale, and ``--write`` mends them all."""
    readme = tmp_path / "README.md"
    sections = [_readme.markers(name, "demo") for name in ("demo", "demo_more")]
    readme.write_text("".join(f"{begin}\nold\n{end}\n" for begin, end in sections), encoding="utf-8")
    monkeypatch.setattr(_readme, "README", readme)

    def run(*argv: str) -> int:
        return _readme.command_line("demo", lambda: "one", list(argv), more={"demo_more": lambda: "two"})

    assert run("--check") == 1
    assert run("--write") == 0 and run("--check") == 0
    text = readme.read_text(encoding="utf-8")
    assert _readme.current_section(text, "demo", "demo") == "one"
    assert _readme.current_section(text, "demo_more", "demo") == "two"


def test_replace_section_keeps_the_rest() -> None:
    begin, end = _readme.markers("demo")
    text = f"head\n{begin}\nold\n{end}\ntail\n"
    replaced = _readme.replace_section(text, "demo", "new")
    assert replaced == f"head\n{begin}\nnew\n{end}\ntail\n"
    assert _readme.current_section(replaced, "demo") == "new"
