"""The README's promises to a newcomer: two commands, and CI runs the second verbatim."""
from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).parent.parent


def _blocks(text: str) -> list[str]:
    return [b.strip() for b in re.findall(r"```\n(.*?)```", text, re.S)]


def test_two_commands_and_ci_runs_the_test_command():
    readme = (ROOT / "README.md").read_text()
    opening = readme.split("\n## ", 1)[0]
    blocks = _blocks(opening)
    assert len(blocks) == 2, blocks
    assert all("\n" not in b for b in blocks), "each is one command line"
    assert "shoal demo" in blocks[0] and "fuse3" in blocks[0] and "libfuse3-dev" in blocks[0]
    ci = (ROOT / ".ci" / "run").read_text().splitlines()
    assert blocks[1] in ci, "CI must call the README's test command verbatim"


def test_cautions_are_there():
    readme = (ROOT / "README.md").read_text()
    assert "not a backup" in readme and "Test recovery" in readme and "a model" in readme
