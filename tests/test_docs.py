"""Keep the documentation honest: doctests run, README's commands are the ones CI runs, and the
repository stays lint-clean."""

from __future__ import annotations

import doctest
import importlib
import subprocess
import sys

import pytest

from tests.conftest import REPO

README = (REPO / "README.md").read_text(encoding="utf-8")
TEST_COMMAND = "pip install -e '.[test]' && python -m pytest"


def _modules():
    for package in ("sensor", "controller", "simulators"):
        for path in sorted((REPO / package).rglob("*.py")):
            parts = path.relative_to(REPO).with_suffix("").parts
            yield ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


@pytest.mark.parametrize("name", list(_modules()))
def test_doctests(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0


def test_readme_gives_the_two_commands_and_ci_runs_the_test_one():
    lines = [line.strip() for line in README.splitlines()]
    commands = [line for line in lines if line.startswith("pip install -e . && sigmatrack ")]
    assert commands[0] == "pip install -e . && sigmatrack demo"  # the first thing to run
    assert TEST_COMMAND in lines
    ci = (REPO / ".ci" / "run").read_text(encoding="utf-8")
    assert TEST_COMMAND in ci


def test_readme_first_paragraph_states_the_job():
    first = README.split("\n\n")[1] if README.startswith("#") else README.split("\n\n")[0]
    for words in ("soft sensor", "cooling", "DCS"):
        assert words in first


def test_ruff_is_clean():
    done = subprocess.run(
        [sys.executable, "-m", "ruff", "check", "--no-cache", str(REPO)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert done.returncode == 0, done.stdout + done.stderr
