"""Docs and code agree: every setting and every policy key is documented in the README."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from service.cli import build_parser
from service.gate.policy import describe_keys
from service.settings import Settings

README = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")


@pytest.mark.parametrize("name", sorted(Settings.model_fields))
def test_every_setting_is_documented(name: str) -> None:
    assert f"`TIDEGATE_{name.upper()}`" in README


@pytest.mark.parametrize(
    ("section", "key"),
    [(section, key) for section, keys in describe_keys().items() for key in keys],
)
def test_every_policy_key_is_documented(section: str, key: str) -> None:
    assert f"`{key}`" in README, f"policy key {key!r} of {section} is not in the README"


def test_every_check_kind_is_documented() -> None:
    for section in describe_keys():
        if section.startswith("check:"):
            kind = section.split(":", 1)[1]
            assert f'kind = "{kind}"' in README, kind


def test_every_cli_command_is_documented() -> None:
    parser = build_parser()
    sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    for command in sub.choices:  # type: ignore[union-attr]
        assert re.search(rf"`tidegate {command}\b", README), command


def test_caution_is_near_the_top() -> None:
    head = README[:3000]
    assert "decision support" in head and "release" in head
