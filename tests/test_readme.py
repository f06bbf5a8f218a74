"""The README keeps its promises: the job first, two commands, the cautions, CI in step."""

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text()


def _commands():
    quick = README.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```sh\n(.+?)\n```", quick)


def test_first_paragraph_states_the_job():
    first = README.split("\n\n")[1]
    for word in ("credit-risk", "default", "prepayment", "ECL", "YAML"):
        assert word in first


def test_quick_start_has_exactly_two_one_line_commands():
    commands = _commands()
    assert len(commands) == 2
    assert all("\n" not in c for c in commands)
    assert "creditsurv" in commands[0] and "configs/demo.yaml" in commands[0]
    assert "pytest" in commands[1]


def test_ci_runs_the_readme_test_command_verbatim():
    ci = (ROOT / ".ci" / "run").read_text()
    assert _commands()[1] in ci.splitlines()


def test_cautions_are_present():
    cautions = README.split("## Cautions", 1)[1].split("\n## ", 1)[0]
    assert "independently validated" in cautions
    assert "model risk policy" in cautions
    assert "Accounting judgement" in cautions and "supervisory rules" in cautions
