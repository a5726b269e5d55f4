"""The README's promises that can be checked mechanically."""
from __future__ import annotations

import re
from pathlib import Path

from pipeline import DISCLAIMER
from pipeline.cli import main

ROOT = Path(__file__).resolve().parents[2]


def readme_commands() -> list[str]:
    text = (ROOT / "README.md").read_text()
    setup = text.split("## Set up on a fresh machine", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```\n(.+?)\n```", setup)


def test_readme_has_exactly_two_setup_commands_and_ci_runs_the_test_one():
    demo, tests = readme_commands()
    assert "lesion-growth demo" in demo and "pytest" in tests
    ci = (ROOT / ".ci" / "run").read_text()
    assert tests in ci.splitlines() and demo in ci.splitlines()


def test_caution_is_in_readme_and_help(capsys):
    readme = (ROOT / "README.md").read_text().lower()
    assert "research use only" in readme and "not a medical device" in readme
    assert main(["--help"]) == 0
    help_text = " ".join(capsys.readouterr().out.split())
    assert " ".join(DISCLAIMER.split()) in help_text


def test_python_m_pipeline_matches_console_script():
    import subprocess
    import sys

    out = subprocess.run([sys.executable, "-m", "pipeline", "--version"], capture_output=True,
                         text=True, check=True).stdout
    assert out.startswith("lesion-growth ")
