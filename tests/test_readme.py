"""The README's promises: the test command CI runs, the cautions, the quick start."""

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _commands():
    readme = (ROOT / "README.md").read_text()
    quick = readme.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```\n(.+?)\n```", quick)


def test_quick_start_has_two_commands_and_ci_runs_the_test_one():
    commands = _commands()
    assert len(commands) == 2
    demo, tests = commands
    assert "beatlab" in demo and "pytest" in tests
    assert tests in (ROOT / ".ci" / "run").read_text()


def test_cautions_present():
    readme = (ROOT / "README.md").read_text()
    # CHECKS.md: cautions to show users (research use only; ICH S7B, E14/S7B Q&A)
    assert "Research use only" in readme
    assert "ICH S7B" in readme and "E14/S7B" in readme
