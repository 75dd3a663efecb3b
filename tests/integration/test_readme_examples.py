"""The README's example commands run as written, in shortened form (fewer episodes, a quiet console).

What each example should give at full length is stated beside it in the README; these runs
check that the commands themselves stay valid as the code changes.
"""

from __future__ import annotations

import re
import shlex
from pathlib import Path

import pytest
from mlflow.tracking import MlflowClient

README = Path(__file__).resolve().parents[2] / "README.md"


def _training_examples() -> list[list[str]]:
    text = README.read_text()
    block = text.split("## Training", 1)[1].split("```bash", 1)[1].split("```", 1)[0]
    commands = []
    for line in block.strip().splitlines():
        line = line.split("#", 1)[0].strip()
        if line.startswith("qtally-train"):
            commands.append(shlex.split(line)[1:])
    return commands


def _shortened(arguments: list[str]) -> list[str]:
    kept = [a for a in arguments if not re.match(r"^(episodes|eval_every|schedule\.decay_episodes)=", a)]
    return kept + ["episodes=40", "eval_every=0", "eval_episodes=5", "rollout_animation=false", "tracking.log_model=false", "quiet=true"]


def test_the_readme_has_training_examples():
    assert len(_training_examples()) >= 4


@pytest.mark.parametrize("arguments", _training_examples(), ids=lambda a: " ".join(a)[:60])
def test_a_readme_training_example_runs(run_cli, tmp_path, arguments):
    result = run_cli("qtally-train", *_shortened(arguments))
    assert result.returncode == 0, result.stderr[-2000:]
    client = MlflowClient(tracking_uri=f"sqlite:///{tmp_path / 'mlflow.db'}")
    runs = client.search_runs([e.experiment_id for e in client.search_experiments()])
    assert runs and all(r.info.status == "FINISHED" for r in runs)
