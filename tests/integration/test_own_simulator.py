"""The README's "Your own simulator" section runs as written (its training runs shortened).

Which bug this catches: example code that no longer imports or trains (an API it uses
changed), a config the commands refuse, an entry point module not found beside the
configs, and a qtally-check report whose capabilities differ from the one the README shows.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

README = Path(__file__).parents[2] / "README.md"
FENCE = re.compile(r"```(\w*)\n(.*?)```", re.S)


def _section() -> str:
    text = README.read_text()
    start = text.index("## Your own simulator")
    return text[start : text.index("\n## ", start + 10)]


def _marks(report: str) -> dict[str, str]:
    found = {}
    for line in report.splitlines():
        parts = re.split(r"\s{2,}", line.strip(), maxsplit=2)
        if len(parts) == 3 and parts[0] in ("yes", "no", "NO"):
            found[parts[1]] = parts[0]
    return found


def test_the_own_simulator_section_runs_as_written(tmp_path):
    blocks = FENCE.findall(_section())
    files = [(kind, body) for kind, body in blocks if kind in ("python", "yaml")]
    assert len(files) == 5
    for _, body in files:
        first, _, rest = body.partition("\n")
        path = tmp_path / first.removeprefix("# ").strip()
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(body)
    shown_report = next(body for kind, body in blocks if kind == "" and body.startswith("qtally-check:"))
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    env["PATH"] = os.pathsep.join([str(Path(sys.executable).parent), env.get("PATH", "")])
    commands = [line for kind, body in blocks if kind == "bash" for line in body.splitlines() if line.strip()]
    assert sum(c.startswith("qtally-train") for c in commands) == 4 and sum(c.startswith("qtally-check") for c in commands) == 3
    for command in commands:
        command = command.replace("episodes=20000", "episodes=200 eval_episodes=200")
        if command.startswith("qtally-check"):
            command += " probe_seconds=0.2"
        result = subprocess.run(["bash", "-c", command], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=600)
        assert result.returncode == 0, (command, result.stderr[-2000:])
        if command.startswith("qtally-check --config-dir my_configs env=clinic "):
            assert _marks(result.stdout) == _marks(shown_report), result.stdout
        if command.startswith("qtally-check --config-dir my_configs env=clinic_model"):
            marks = _marks(result.stdout)
            assert marks["start control"] == marks["model"] == "yes"
