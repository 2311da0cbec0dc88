"""The README stays true: its settings reference is what the code declares, and its examples run."""

from __future__ import annotations

import re
from pathlib import Path

from corpusprep.reference import BEGIN, END, settings_reference

ROOT = Path(__file__).parent.parent
README = (ROOT / "README.md").read_text(encoding="utf-8")


def test_settings_reference_is_current() -> None:
    section = README.split(BEGIN, 1)[1].split(END, 1)[0].strip()
    assert section == settings_reference().strip(), "run: python -m corpusprep.reference README.md"


def test_readme_has_the_two_setup_commands_and_the_caution() -> None:
    quickstart = README.split("## Quickstart", 1)[1].split("##", 1)[0]
    commands = re.findall(r"^make (\w+)", quickstart, flags=re.MULTILINE)
    assert commands == ["demo", "test"]
    assert "licen" in README and "consent" in README and "personal" in README


def test_every_pipeline_named_in_the_readme_exists() -> None:
    for name in re.findall(r"pipelines/([\w.-]+\.toml)", README):
        assert (ROOT / "pipelines" / name).is_file(), name
