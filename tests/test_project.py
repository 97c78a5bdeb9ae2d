"""Project hygiene: the README's set-up commands and the CI script agree."""
from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_readme_has_two_setup_commands_and_ci_runs_the_test_one():
    readme = (ROOT / "README.md").read_text()
    setup = readme.split("## Set up", 1)[1].split("## ", 1)[0]
    commands = re.findall(r"```\n(.+?)\n```", setup)
    assert commands == ['pip install . && robustbox demo', 'pip install ".[test]" && python -m pytest -q tests']
    assert commands[1] in (ROOT / ".ci" / "run").read_text()


def test_readme_carries_the_caution():
    text = (ROOT / "README.md").read_text()
    assert "not a substitute for grid codes, protection studies" in text
