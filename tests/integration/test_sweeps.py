"""Sweeps end to end: one parent run with a child per job, through each launcher; failures recorded; bad jobs refused up front.

Every check reads the store back through MlflowClient, as the UI would.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import pytest
from mlflow.tracking import MlflowClient

from qtally.tracking.sweep_tags import GROUP_LABEL_TAG, GROUP_TAG, PARENT_TAG, ROLE_TAG, SWEEP_TAG

SMALL = ["env=frozen_lake_4x4", "episodes=60", "eval_episodes=10", "eval_every=0", "rollout_animation=false", "tracking.log_model=false"]


def _runs(tmp_path: Path, experiment: str = "qtally"):
    client = MlflowClient(tracking_uri=f"sqlite:///{tmp_path / 'mlflow.db'}")
    found = client.get_experiment_by_name(experiment)
    runs = client.search_runs([found.experiment_id], max_results=1000) if found else []
    parents = [r for r in runs if r.data.tags.get(ROLE_TAG) == "sweep"]
    children = [r for r in runs if r.data.tags.get(ROLE_TAG) == "job"]
    return parents, children


def _check_two_schedules_by_seeds(tmp_path: Path, seeds: int) -> None:
    parents, children = _runs(tmp_path)
    assert len(parents) == 1 and parents[0].info.status == "FINISHED"
    parent = parents[0]
    assert len(children) == 2 * seeds
    assert all(c.info.status == "FINISHED" for c in children)
    assert {c.data.tags[PARENT_TAG] for c in children} == {parent.info.run_id}
    assert {c.data.tags[SWEEP_TAG] for c in children} == {parent.info.run_id}
    groups = Counter((c.data.tags[GROUP_TAG], c.data.tags[GROUP_LABEL_TAG]) for c in children)
    assert sorted(label for _, label in groups) == ["schedule=constant", "schedule=glie_visits"]
    assert set(groups.values()) == {seeds}
    assert sorted(c.info.run_name for c in children) == sorted(f"on_policy {s} seed={n}" for s in ("constant", "glie_visits") for n in range(seeds))
    assert parent.data.metrics["jobs_finished"] == 2 * seeds and parent.data.metrics["jobs_failed"] == 0
    for key, _ in groups:
        assert parent.data.metrics[f"group.{key}.seeds"] == seeds
    assert parent.data.params["sweep.jobs"] == str(2 * seeds)


def test_joblib_sweep_is_one_parent_with_a_child_per_job(run_cli, tmp_path):
    result = run_cli("qtally-train", "-m", *SMALL, "schedule=constant,glie_visits", "seed=0,1,2", "hydra/launcher=joblib", "hydra.launcher.n_jobs=2")
    assert result.returncode == 0, result.stderr[-3000:]
    _check_two_schedules_by_seeds(tmp_path, 3)


def test_submitit_local_sweep_is_one_parent_with_a_child_per_job(run_cli, tmp_path):
    result = run_cli("qtally-train", "-m", *SMALL, "schedule=constant,glie_visits", "seed=0,1,2", "hydra/launcher=submitit_local", "hydra.launcher.timeout_min=10")
    assert result.returncode == 0, result.stderr[-3000:]
    _check_two_schedules_by_seeds(tmp_path, 3)


@pytest.mark.slow
def test_ray_local_sweep_is_one_parent_with_a_child_per_job(run_cli, tmp_path):
    result = run_cli("qtally-train", "-m", *SMALL, "schedule=constant,glie_visits", "seed=0,1,2", "hydra/launcher=ray_loopback", env_extra={"RAY_AUTH_MODE": "disabled"})
    assert result.returncode == 0, result.stderr[-3000:]
    _check_two_schedules_by_seeds(tmp_path, 3)


def test_a_job_that_breaks_is_recorded_failed_and_the_sweep_goes_on(run_cli, tmp_path):
    corridor = ["env=cliff_walking", "env.id=support.breaking:BreakingCorridor", "env.max_episode_steps=20", "env.eval_episodes=5", "episodes=50", "rollout_animation=false", "tracking.log_model=false"]
    result = run_cli("qtally-train", "-m", *corridor, "+env.kwargs.break_after_steps=100,1000000000", "seed=0,1")
    assert result.returncode == 1
    assert "Traceback" not in result.stderr
    failed_lines = [line for line in result.stderr.splitlines() if "failed: RuntimeError: simulator broke after 100 steps" in line and "seed=" in line]
    assert len(failed_lines) >= 2  # one as each job fails, one per job in the closing summary
    assert "2 job(s) of the sweep failed" in result.stderr
    parents, children = _runs(tmp_path)
    assert [p.info.status for p in parents] == ["FAILED"]
    statuses = Counter((c.data.tags[GROUP_LABEL_TAG], c.info.status) for c in children)
    assert statuses == {("+env.kwargs.break_after_steps=100", "FAILED"): 2, ("+env.kwargs.break_after_steps=1000000000", "FINISHED"): 2}
    for child in children:
        if child.info.status == "FAILED":
            assert child.data.tags["qtally.failure"] == "RuntimeError: simulator broke after 100 steps"
    assert parents[0].data.metrics["jobs_failed"] == 2 and parents[0].data.metrics["jobs_finished"] == 2


def test_a_bad_combination_stops_the_sweep_before_anything_starts(run_cli, tmp_path):
    result = run_cli("qtally-train", "-m", *SMALL, "schedule=constant", "schedule.epsilon=0.1,1.5", "seed=0,1")
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "schedule.epsilon=1.5" in lines[0] and "nothing was started" in lines[0], result.stderr
    assert not (tmp_path / "mlflow.db").exists() or _runs(tmp_path) == ([], [])


def test_four_jobs_opening_a_new_sqlite_store_at_once_all_succeed(tmp_path):
    # Each process waits for the same instant, then opens the brand-new store and records a run.
    start = time.time() + 4.0
    code = (
        "import sys, time; from qtally.tracking.runs import open_experiment; import mlflow\n"
        f"time.sleep(max(0.0, {start} - time.time()))\n"
        f"open_experiment('sqlite:///{tmp_path / 'fresh.db'}', 'race')\n"
        "with mlflow.start_run(): mlflow.log_metric('x', 1.0)\n"
    )
    processes = [subprocess.Popen([sys.executable, "-c", code], stderr=subprocess.PIPE, text=True) for _ in range(4)]
    errors = [p.communicate(timeout=180)[1] for p in processes]
    assert [p.returncode for p in processes] == [0, 0, 0, 0], errors
    client = MlflowClient(tracking_uri=f"sqlite:///{tmp_path / 'fresh.db'}")
    assert len(client.search_runs([client.get_experiment_by_name("race").experiment_id])) == 4


def test_an_optuna_search_records_every_trial_and_names_the_best(run_cli, tmp_path):
    # Two trials of the GLIE search, each trained on two seeds: four children in two groups;
    # the parent names the trial with the higher seed-averaged final eval_return_mean.
    arguments = ["env=restock", "episodes=40", "eval_episodes=20", "eval_every=0", "rollout_animation=false", "tracking.log_model=false"]
    result = run_cli("qtally-train", "-m", *arguments, "hydra/sweeper=tune_glie", "schedule=glie_visits", "repeat_seeds=[0,1]", "hydra.sweeper.n_trials=2")
    assert result.returncode == 0, result.stderr[-3000:]
    parents, children = _runs(tmp_path)
    assert len(parents) == 1 and parents[0].info.status == "FINISHED"
    assert len(children) == 4 and all(c.info.status == "FINISHED" for c in children)
    by_group: dict[str, list[float]] = {}
    for child in children:
        by_group.setdefault(child.data.tags[GROUP_LABEL_TAG], []).append(child.data.metrics["eval_return_mean"])
    assert len(by_group) == 2 and all(len(v) == 2 for v in by_group.values())
    best_label, best_finals = max(by_group.items(), key=lambda item: sum(item[1]) / 2)
    parent = parents[0]
    assert parent.data.metrics["best_trial_eval_return_mean"] == pytest.approx(sum(best_finals) / 2)
    assert sorted(parent.data.tags["qtally.best_trial"].split()) == sorted(best_label.split())
