"""The registries are the single place to extend, and the documents that list their contents are tied to them."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

import gradcheck
from gradcheck._diagnose.kinds import KINDS, FindingKind, register

ROOT = Path(__file__).resolve().parents[1]


def _readme_kinds() -> set[str]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    paragraph = re.search(r"The finding kinds are (.*?)\.\n\n", text, re.S)
    assert paragraph, "README.md lost its sentence 'The finding kinds are ...'"
    return set(re.findall(r"`([a-z-]+)`", paragraph.group(1)))


def test_the_readme_lists_exactly_the_registered_finding_kinds():
    assert _readme_kinds() == set(KINDS)


def test_a_finding_of_an_unregistered_kind_cannot_be_built():
    with pytest.raises(ValueError, match="Register it in gradcheck/_diagnose/kinds.py"):
        gradcheck.Finding("mismatch", None, "W", "a kind nothing produces")


def test_a_kind_is_registered_once():
    with pytest.raises(ValueError, match="registered twice"):
        register(FindingKind(id="sign-flip", meaning="again"))


def test_every_kind_has_a_meaning_and_only_the_unreliable_reference_blames_nobody():
    assert all(k.meaning and k.id == k.id.lower() and " " not in k.id for k in KINDS.values())
    assert [k.id for k in KINDS.values() if not k.blames_user_code] == ["unreliable-reference"]


def test_the_public_surface_is_exactly_all():
    # names that are not identifiers ('@py_builtins') are pytest's assertion rewriting of the installed plugin
    public = {name for name in vars(gradcheck) if name.isidentifier() and not name.startswith("_")} - {"strategies"}
    assert public == set(gradcheck.__all__)
