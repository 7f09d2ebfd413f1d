"""The README's set-up commands are the ones CI runs."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def readme_commands() -> list[str]:
    text = (ROOT / "README.md").read_text()
    head = text.split("## ", 1)[0]
    return [block.strip() for block in re.findall(r"```\n(.*?)```", head, flags=re.S)]


def test_readme_top_has_exactly_two_setup_commands() -> None:
    commands = readme_commands()
    assert len(commands) == 2
    assert all("\n" not in c for c in commands)
    assert "demo" in commands[0] and "pytest" in commands[1]


def test_ci_runs_the_readme_test_command() -> None:
    ci = (ROOT / ".ci" / "run").read_text()
    assert readme_commands()[1] in ci.splitlines()
