"""Tags: letters of any alphabet are accepted, and a refusal says exactly what is allowed and which character
was not (worker/document/tags.py).  Before, "Zürich" was refused with a message promising "letters, digits …"
while only ASCII letters passed: the acceptance tests failed before the fix."""

from __future__ import annotations

import unicodedata

import pytest

from tests._documents import machine_shop
from worker.document import parse_document
from worker.document.tags import tag_problem
from worker.errors import InvalidDocument


@pytest.mark.parametrize("tag", ["Zürich", "Łódź", "東京", "São_Paulo-2026", "Αθήνα", "हिन्दी", "plant:v2.1", "३४"])
def test_letters_and_digits_of_any_alphabet_are_tags(tag: str) -> None:
    assert tag_problem(tag) is None
    assert parse_document(machine_shop(tags=[tag, "shop"])).tags == [tag, "shop"]


@pytest.mark.parametrize(
    ("tag", "named"),
    [
        ("Zürich tour", "character 7 is U+0020 (space)"),
        ("plant/2", "character 6 is `/` (solidus)"),
        ("a\u202eb", "character 2 is U+202E (right-to-left override)"),  # text-direction characters are refused
        ("a\u200db", "character 2 is U+200D (zero width joiner)"),
        ("cost€", "character 5 is `€` (euro sign)"),
        ("<b>", "character 1 is `<` (less-than sign)"),
        ("\u0308a", "character 1 is `̈` (combining diaeresis)"),  # a mark may not come first
        ("x" * 65, "this one has 65 characters"),
        ("", "this one has 0 characters"),
    ],
)
def test_a_refusal_says_what_is_allowed_and_which_character_was_not(tag: str, named: str) -> None:
    with pytest.raises(InvalidDocument) as info:
        parse_document(machine_shop(tags=["shop", tag]))
    [error] = info.value.errors
    assert error["path"] == "tags[1]"
    assert error["message"].startswith(
        "a tag must be 1 to 64 characters: letters of any alphabet (such as Zürich), digits and _ . : - (no spaces)"
    )
    assert named in error["message"]


def test_a_decomposed_tag_is_refused_with_the_composed_form_to_write() -> None:
    decomposed = unicodedata.normalize("NFD", "Zürich")
    assert decomposed != "Zürich"
    problem = tag_problem(decomposed)
    assert problem is not None and "written composed (Unicode NFC)" in problem and "write `Zürich`" in problem


def test_names_in_expressions_say_they_must_be_ascii() -> None:
    # A model's names go into generated source, so they stay ASCII; the message now says so (before: "letters").
    from tests._documents import plant_capacity

    document = plant_capacity()
    document["model"]["params"]["größe"] = 1.0
    with pytest.raises(InvalidDocument) as info:
        parse_document(document)
    assert any("use ASCII letters (A-Z, a-z), digits and underscores" in error["message"]
               for error in info.value.errors)
