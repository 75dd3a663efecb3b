"""``qtally-promote`` and ``qtally-rollout`` as a user runs them, on tiny FrozenLake runs in one SQLite store.

The story: a sweep of two short runs (both reach the goal in no evaluation episode, so the
tie is broken by fewer training episodes), promoted; a longer run with a decaying schedule
(better), promoted over it; the sweep promoted again (worse: the alias stays). Then
rollouts by run id, by alias and by sweep, and bad input. Each subprocess costs seconds,
so the store is built once for the module.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
TINY = ["eval_episodes=100", "rollout_animation=false", "quiet=true"]


def _cli(cwd: Path, program: str, *args: str) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), env.get("PYTHONPATH", "")])
    script = str(Path(sys.executable).with_name(program))
    return subprocess.run([script, *args], cwd=cwd, env=env, capture_output=True, text=True, timeout=600)


def _ok(result: subprocess.CompletedProcess) -> str:
    assert result.returncode == 0, result.stderr[-3000:]
    return result.stdout


def _one_line_error(result: subprocess.CompletedProcess, program: str) -> str:
    assert result.returncode != 0
    assert "Traceback" not in result.stderr
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith(f"{program}: error: "), result.stderr
    return lines[0]


@pytest.fixture(scope="module")
def story(tmp_path_factory):
    from mlflow.tracking import MlflowClient

    cwd = tmp_path_factory.mktemp("promote_rollout")
    _ok(_cli(cwd, "qtally-train", "-m", "episodes=300,600", "seed=0", *TINY))
    first = _ok(_cli(cwd, "qtally-promote", "name=lake", "sweep=latest"))
    better_run = _ok(_cli(cwd, "qtally-train", "schedule=exponential", "episodes=4000", "eval_episodes=200", "seed=0", "rollout_animation=false", "quiet=true")).split()[-1]
    moved = _ok(_cli(cwd, "qtally-promote", "name=lake"))
    stays = _ok(_cli(cwd, "qtally-promote", "name=lake", "sweep=latest"))
    client = MlflowClient(tracking_uri=f"sqlite:///{cwd / 'mlflow.db'}")
    sweep_runs = [r for r in client.search_runs([client.get_experiment_by_name("qtally").experiment_id]) if r.data.tags.get("qtally.role") == "job"]
    return {"cwd": cwd, "client": client, "first": first, "moved": moved, "stays": stays, "better_run": better_run, "sweep_runs": sweep_runs}


def _expected_winner(runs) -> str:
    """The ranking rule, written out independently: highest mean, then narrower interval, then fewer episodes."""
    key = lambda r: (-r.data.metrics["eval_return_mean"], r.data.metrics["eval_return_ci95"], int(r.data.params["episodes"]), r.info.run_id)
    return sorted(runs, key=key)[0].info.run_id


def _alias_run(story) -> str:
    return story["client"].get_model_version_by_alias("lake", "best").run_id


def test_first_promotion_points_the_alias_at_the_best_sweep_run_and_the_model_acts_like_its_table(story):
    import mlflow

    from qtally.policy.artifact import load_policy

    runs = story["sweep_runs"]
    assert len(runs) == 2
    winner = _expected_winner(runs)
    assert f"models:/lake@best -> run {winner}" in story["first"]
    # The reloaded model, through the alias, acts as the winner's table greedily does on every visited state.
    client = story["client"]
    mlflow.set_tracking_uri(client.tracking_uri)
    version = [v for v in client.search_model_versions("name = 'lake'") if v.run_id == winner][0]
    model = mlflow.pyfunc.load_model(f"models:/lake/{version.version}")
    local = client.download_artifacts(winner, "policy_file/policy.npz", str(story["cwd"]))
    artifact = load_policy(local)
    visited = np.flatnonzero(artifact.visited)
    assert visited.size > 0
    actions = np.asarray(model.predict(visited.reshape(-1, 1).astype(np.int64))).reshape(-1)
    np.testing.assert_array_equal(actions, np.argmax(artifact.q[visited], axis=1))


def test_the_alias_moves_for_a_better_run_and_says_what_changed(story):
    old = _expected_winner(story["sweep_runs"])
    better = story["better_run"]
    text = story["moved"]
    assert f"models:/lake@best moved: run {old} (eval_return_mean=" in text and f"-> run {better} (eval_return_mean=" in text
    mean = story["client"].get_run(better).data.metrics["eval_return_mean"]
    assert f"eval_return_mean={mean:.4g}" in text and mean > 0.1


def test_the_alias_stays_when_the_candidates_are_worse(story):
    assert _alias_run(story) == story["better_run"]
    assert f"models:/lake@best stays on run {story['better_run']}" in story["stays"]
    assert "is not better" in story["stays"]


def test_rollouts_by_run_id_alias_and_sweep_are_recorded_and_linked(story):
    cwd, client = story["cwd"], story["client"]
    text = _ok(_cli(cwd, "qtally-rollout", f"run_id={story['better_run']}", "episodes=300", "trace=1"))
    assert "return: " in text and "exact expected return: " in text and "success: " in text and "unvisited states: " in text
    assert "episode 0 (environment seed 2147483648)" in text and "-> action" in text
    by_alias = _ok(_cli(cwd, "qtally-rollout", "name=lake", "alias=best", "episodes=50", "quiet=true")).split()[-1]
    by_sweep = _ok(_cli(cwd, "qtally-rollout", "sweep=latest", "episodes=50", "quiet=true")).split()[-1]
    runs = {r.info.run_id: r for r in client.search_runs([client.get_experiment_by_name("qtally-rollout").experiment_id])}
    assert len(runs) == 3 and all(r.info.status == "FINISHED" for r in runs.values())
    assert runs[by_alias].data.tags["qtally.source_run"] == story["better_run"]
    assert runs[by_sweep].data.tags["qtally.source_run"] == _expected_winner(story["sweep_runs"])
    first = next(r for r in runs.values() if r.info.run_id not in (by_alias, by_sweep))
    assert first.data.tags["qtally.source_run"] == story["better_run"]
    assert {a.path for a in client.list_artifacts(first.info.run_id, "rollout")} == {"rollout/summary.json", "rollout/trace.txt"}
    summary = json.loads(Path(client.download_artifacts(first.info.run_id, "rollout/summary.json", str(cwd))).read_text())
    assert summary["environment_seeds"][0] >= 2**31 and summary["metrics"]["rollout_episodes"] == 300


def test_bad_input_is_one_line_and_leaves_no_run_open(story):
    cwd, client = story["cwd"], story["client"]
    refused = _one_line_error(_cli(cwd, "qtally-rollout", "name=lake", "env.kwargs.is_slippery=false", "episodes=10"), "qtally-rollout")
    assert '"is_slippery": true' in refused and '"is_slippery": false' in refused
    assert "metric='nope'" in _one_line_error(_cli(cwd, "qtally-promote", "name=lake", "metric=nope"), "qtally-promote")
    assert "exactly one of run_id=" in _one_line_error(_cli(cwd, "qtally-rollout", "episodes=10"), "qtally-rollout")
    experiments = [e.experiment_id for e in client.search_experiments()]
    assert not [r.info.run_id for r in client.search_runs(experiments) if r.info.status == "RUNNING"]
    assert _alias_run(story) == story["better_run"]  # nothing above moved the alias
