"""The README's quick start: what a new user on a fresh machine needs before the two commands."""

import re
from pathlib import Path

README = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
QUICK = README[README.index("## Quick start"):README.index("\n## ", README.index("## Quick start") + 5)]


def test_the_quick_start_creates_and_activates_a_virtual_environment_first():
    venv, demo = QUICK.index("python3 -m venv"), QUICK.index("sweepgen demo")
    assert venv < QUICK.index("bin/activate") < demo


def test_the_quick_start_gives_the_two_commands_and_the_test_command_ci_runs():
    assert 'pip install . && sweepgen demo' in QUICK
    assert 'pip install ".[test]" && pytest' in QUICK
    ci = (Path(__file__).resolve().parents[1] / ".ci" / "run").read_text(encoding="utf-8")
    assert 'pip install ".[test]" && pytest' in ci


def test_the_quick_start_says_how_long_the_tests_take_and_how_to_run_the_fast_ones():
    assert 'pytest -m "not slow"' in QUICK
    assert re.search(r"\b(minute|minutes)\b", QUICK)
