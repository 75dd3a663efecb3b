"""``qtally-evaluate`` as a user runs it: a subprocess, a fresh sqlite MLflow store, the record read back."""

from __future__ import annotations

import csv
import io
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest


def _command() -> list[str]:
    script = Path(sys.executable).with_name("qtally-evaluate")
    if script.exists():
        return [str(script)]
    found = shutil.which("qtally-evaluate")
    if found is None:
        pytest.skip("qtally-evaluate is not installed")
    return [found]


def _run(tmp_path: Path, *overrides: str) -> subprocess.CompletedProcess:
    env = dict(os.environ, MLFLOW_TRACKING_URI=f"sqlite:///{tmp_path / 'mlflow.db'}")
    args = _command() + [f"hydra.run.dir={tmp_path / 'hydra'}", *overrides]
    return subprocess.run(args, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=120)


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """One good run and two bad ones against the same store."""
    tmp_path = tmp_path_factory.mktemp("evaluate")
    # No policy.* override: the default target policy must fit FrozenLake (it is uniform).
    good = _run(tmp_path, "env=frozen_lake_4x4", "gamma=0.9", "episodes=400", "seed=3", "min_visits=20", "quiet=false")
    bad_part = _run(tmp_path, "env=frozen_lake_4x4", "policy.rule=threshold", "policy.part=hand", "policy.threshold=3",
                    "policy.low_action=0", "policy.high_action=1", "episodes=10")
    bad_run = _run(tmp_path, "env=frozen_lake_4x4", "policy.source=run", "policy.run_id=0123456789abcdef0123456789abcdef", "episodes=10")
    return tmp_path, good, bad_part, bad_run


def _client(tmp_path: Path):
    from mlflow.tracking import MlflowClient

    return MlflowClient(tracking_uri=f"sqlite:///{tmp_path / 'mlflow.db'}")


def test_a_rule_policy_on_frozen_lake_is_estimated_and_recorded(store):
    tmp_path, good, _, _ = store
    assert good.returncode == 0, good.stderr[-2000:]
    lines = good.stdout.strip().splitlines()
    assert lines[0].startswith("prediction of [uniform] on FrozenLake-v1: 400 episodes, first-visit, on-policy")
    # The answer comes first: the value from the start distribution, its interval, the exact value.
    assert lines[1].startswith("value of the policy from the start distribution: ") and "(95%, 400 episodes); exact " in lines[1]
    assert "exact" in lines[2] and "err/se" in lines[2]
    table = [line for line in lines[3:] if line.startswith("  v ") or line.startswith("  q ")]
    assert 1 <= len(table) <= 20
    assert any("summary: states_estimated=" in line and "max_error_in_se=" in line for line in lines)
    run_id = lines[-1].split()[1]

    client = _client(tmp_path)
    run = client.get_run(run_id)
    assert run.info.status == "FINISHED"
    assert run.data.tags["kind"] == "prediction"
    assert run.data.tags["env"] == "FrozenLake-v1"
    assert run.data.tags["policy_source"] == "rule"
    metrics = run.data.metrics
    for name in ("max_abs_error", "mean_abs_error", "max_error_in_se", "states_estimated"):
        assert name in metrics
    assert metrics["episodes"] == 400
    assert abs(metrics["start_value_estimate"] - metrics["start_value_exact"]) < 4 * metrics["start_value_ci95"]
    assert 0 <= metrics["mean_abs_error"] <= metrics["max_abs_error"] < 1
    assert run.data.params["policy.rule"] == "uniform" and run.data.params["gamma"] == "0.9"

    experiment = client.get_experiment(run.info.experiment_id)
    assert experiment.name == "qtally-evaluate"
    artifacts = {a.path for a in client.list_artifacts(run_id)} | {a.path for a in client.list_artifacts(run_id, "plots")}
    assert "tables" in artifacts and any(p.startswith("plots/") and p.endswith(".png") for p in artifacts)
    local = client.download_artifacts(run_id, "tables/prediction.csv", str(tmp_path))
    rows = list(csv.DictReader(io.StringIO(Path(local).read_text())))
    v_rows = [r for r in rows if r["kind"] == "v"]
    start = next(r for r in v_rows if r["state"] == "0")
    assert int(start["visits"]) == 400  # every episode starts in cell 0
    assert float(start["exact"]) > 0 and start["error_in_se"] != ""
    assert {r["kind"] for r in rows} == {"v", "q"}


@pytest.mark.parametrize("case, expected", [(2, "policy.part='hand' is not a part of the observation"), (3, "policy.run_id='0123456789abcdef0123456789abcdef'")])
def test_bad_input_fails_in_one_line_and_leaves_no_running_run(store, case, expected):
    tmp_path, bad = store[0], store[case]
    assert bad.returncode != 0
    error_lines = [line for line in bad.stderr.splitlines() if line.startswith("qtally-evaluate:")]
    assert len(error_lines) == 1 and error_lines[0].startswith("qtally-evaluate: error: ")
    assert expected in error_lines[0]
    assert "Traceback" not in bad.stderr
    client = _client(tmp_path)
    runs = [run for experiment in client.search_experiments() for run in client.search_runs([experiment.experiment_id])]
    assert runs and all(run.info.status != "RUNNING" for run in runs)
    assert len(runs) == 1  # only the good run: bad input opened none


# A behaviour that acts like the target everywhere an episode can act, and differs only where
# no action is ever taken: FrozenLake's goal (cell 15, terminal in the model), and Blackjack's
# player sums of 22 and more (busts: terminal in qtally's Blackjack table).
COVERED_BUT_FOR_TERMINAL_STATES = {
    "frozen_lake_goal": ["env=frozen_lake_4x4", "gamma=0.9", "policy.rule=constant", "policy.action=1",
                         "behaviour.threshold=15", "behaviour.part=state"],
    "blackjack_bust": ["env=blackjack", "policy.rule=constant", "policy.action=1", "behaviour.threshold=22", "behaviour.part=player_sum"],
}


@pytest.mark.parametrize("case", sorted(COVERED_BUT_FOR_TERMINAL_STATES))
def test_coverage_ignores_states_no_episode_acts_in(tmp_path, case):
    behaviour = ["behaviour.source=rule", "behaviour.rule=threshold", "behaviour.low_action=1", "behaviour.high_action=0"]
    result = _run(tmp_path, *COVERED_BUT_FOR_TERMINAL_STATES[case], *behaviour, "episodes=50", "quiet=true")
    assert result.returncode == 0, result.stderr[-2000:]
    run_id = result.stdout.strip()
    assert _client(tmp_path).get_run(run_id).info.status == "FINISHED"
