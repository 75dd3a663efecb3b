"""The README's promises: a job paragraph, then exactly two set-up commands; CI runs the second as written."""

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def _setup_commands() -> list[str]:
    text = (ROOT / "README.md").read_text()
    head = text.split("\n## ", 1)[0]
    return re.findall(r"```bash\n(.+?)\n```", head, flags=re.S)


def test_readme_opens_with_the_job_and_two_commands():
    text = (ROOT / "README.md").read_text()
    paragraphs = [p for p in text.split("\n\n") if p.strip() and not p.startswith("#")]
    assert paragraphs[0].startswith("qtally is for")
    commands = _setup_commands()
    assert len(commands) == 2
    assert commands[0].rstrip().endswith("qtally-train")
    assert "pytest" in commands[1]


def test_ci_runs_the_readme_test_command_exactly():
    ci_lines = [line for line in (ROOT / ".ci" / "run").read_text().splitlines() if line.strip() and not line.startswith("#")]
    assert ci_lines[-1] == _setup_commands()[1]
