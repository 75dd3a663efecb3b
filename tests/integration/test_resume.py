"""Checkpoints and resume: a run killed (SIGKILL) or stopped (SIGTERM) and resumed ends as if never stopped.

Which bug each test catches: a checkpoint that misses any part of the state (a table, a
counter, the logging window, a random stream, the environment's generator: the resumed
table then drifts from the uninterrupted one); metrics logged again after the checkpoint
(a step twice in the store); a stop that leaves the run RUNNING or loses the checkpoint; a
resume that forgets the run's own config.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from mlflow.tracking import MlflowClient

from qtally.control.trainer_state import TrainerState

# Long enough on the gym path to be stopped between two checkpoints (restocking seasons, ~14 steps each);
# log_every=20 fills the recorder's 1000-metric queue between checkpoints and send_every=0 sends a full
# queue at once (by default it waits 2 s, longer than checkpoints here are apart), so some metrics after
# a checkpoint reach the store before the kill and the resume must not send them again.
ARGS = ["env=restock", "engine=gym", "episodes=20000", "checkpoint_every=4000", "eval_every=8000", "eval_episodes=200",
        "log_every=20", "rollout_animation=false", "tracking.log_model=false", "tracking.send_every=0", "quiet=true", "seed=7"]


def _command(*args: str) -> list[str]:
    return [sys.executable, "-c", "from qtally.cli.train import main; main()", *args]


def _env() -> dict:
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    env["PYTHONPATH"] = os.pathsep.join([str(Path(__file__).parents[2]), env.get("PYTHONPATH", "")])
    return env


def _only_run(folder: Path):
    client = MlflowClient(f"sqlite:///{folder / 'mlflow.db'}")
    runs = client.search_runs([client.get_experiment_by_name("qtally").experiment_id])
    assert len(runs) == 1
    return client, runs[0]


def _record(folder: Path):
    """The finished run's final state and every metric as {name: [(step, value), ...]}."""
    client, run = _only_run(folder)
    run_id = run.info.run_id
    state = TrainerState.load(folder / "checkpoints" / run_id / "trainer_state.npz")
    metrics = {key: sorted((m.step, m.value) for m in client.get_metric_history(run_id, key)) for key in run.data.metrics}
    return run, state, metrics


@pytest.fixture(scope="module")
def uninterrupted(tmp_path_factory):
    folder = tmp_path_factory.mktemp("whole")
    subprocess.run(_command(*ARGS), cwd=folder, env=_env(), check=True, capture_output=True, timeout=600)
    return _record(folder)


def _logged_past_checkpoint(folder: Path) -> bool:
    """True once the store holds a metric step beyond the newest checkpoint's episode."""
    found = list(folder.glob("checkpoints/*/trainer_state.npz"))
    if not found:
        return False
    try:
        episode = TrainerState.load(found[0]).episode
        history = MlflowClient(f"sqlite:///{folder / 'mlflow.db'}").get_metric_history(found[0].parent.name, "return_mean")
    except Exception:  # caught mid-write: look again
        return False
    return max((m.step for m in history), default=0) > episode


def _stop_after_first_checkpoint(folder: Path, signum: int) -> subprocess.CompletedProcess:
    """Signal the run between two checkpoints, once some metrics after the first have reached the store."""
    process = subprocess.Popen(_command(*ARGS), cwd=folder, env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 300
    while not _logged_past_checkpoint(folder):
        assert process.poll() is None, process.communicate()
        assert time.monotonic() < deadline
        time.sleep(0.05)
    process.send_signal(signum)
    out, err = process.communicate(timeout=120)
    return subprocess.CompletedProcess(process.args, process.returncode, out, err)


def _assert_same(resumed, whole):
    (run, state, metrics), (_, whole_state, whole_metrics) = resumed, whole
    assert run.info.status == "FINISHED"
    for name in ("q", "visits", "cumulative_weights", "state_visits"):
        np.testing.assert_array_equal(getattr(state.values, name), getattr(whole_state.values, name), err_msg=name)
    assert state.history == whole_state.history
    assert metrics == whole_metrics  # every step exactly once, with the uninterrupted values


def test_sigkill_then_resume_equals_an_uninterrupted_run(tmp_path, uninterrupted):
    killed = _stop_after_first_checkpoint(tmp_path, signal.SIGKILL)
    assert killed.returncode == -signal.SIGKILL
    client, run = _only_run(tmp_path)
    assert run.info.status == "RUNNING"  # a crash: nobody closed it, and it can be resumed
    resumed = subprocess.run(_command(f"resume={run.info.run_id}", "quiet=true"), cwd=tmp_path, env=_env(), capture_output=True, text=True, timeout=600)
    assert resumed.returncode == 0, resumed.stderr[-2000:]
    record = _record(tmp_path)
    assert int(record[0].data.tags["qtally.resumed_at_episode"]) % 4000 == 0
    _assert_same(record, uninterrupted)


def test_sigterm_stops_with_a_checkpoint_as_killed_then_resumes_to_finished(tmp_path, uninterrupted):
    stopped = _stop_after_first_checkpoint(tmp_path, signal.SIGTERM)
    assert stopped.returncode == 143
    lines = [line for line in stopped.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "SIGTERM" in lines[0] and "KILLED" in lines[0] and "resume=" in lines[0], stopped.stderr
    client, run = _only_run(tmp_path)
    assert run.info.status == "KILLED"
    stopped_at = int(lines[0].split("at episode ")[1].split(";")[0])
    assert 4000 <= stopped_at < 20000
    assert "checkpoint/trainer_state.npz" in [a.path for a in client.list_artifacts(run.info.run_id, "checkpoint")]
    resumed = subprocess.run(_command(f"resume={run.info.run_id}", "quiet=true"), cwd=tmp_path, env=_env(), capture_output=True, text=True, timeout=600)
    assert resumed.returncode == 0, resumed.stderr[-2000:]
    record = _record(tmp_path)
    assert int(record[0].data.tags["qtally.resumed_at_episode"]) == stopped_at
    _assert_same(record, uninterrupted)


@pytest.mark.parametrize(
    "arguments, words",
    [
        (["resume=0123456789abcdef"], ["resume=0123456789abcdef", "no run with this id"]),
        (["-m", "seed=1,2", "resume=abc"], ["resume=abc: no run with this id", "parent run id of the sweep"]),
        (["resume=abc", "seed=3"], ["resume=<run id> continues the run with the config it was started with", "drop seed=3"]),
        (["checkpoint_dir=/proc/qtally-cannot-write", "episodes=10"], ["checkpoint_dir='/proc/qtally-cannot-write'", "cannot be written"]),
        (["checkpoint_every=-1", "episodes=10"], ["checkpoint_every=-1", "0 (off) or a positive"]),
    ],
)
def test_bad_resume_and_checkpoint_input_fails_in_one_line(tmp_path, arguments, words):
    result = subprocess.run(_command(*arguments), cwd=tmp_path, env=_env(), capture_output=True, text=True, timeout=300)
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert result.returncode != 0 and len(lines) == 1 and "Traceback" not in result.stderr, result.stderr
    for word in words:
        assert word in lines[0], (word, lines[0])


def test_a_stopped_sweep_resumes_skipping_finished_jobs(tmp_path):
    """Two jobs one after the other; Ctrl-C during the second; resume: the first is skipped, the second continues."""
    sweep = ["-m", "env=restock", "engine=gym", "episodes=12000", "checkpoint_every=3000", "eval_every=15000", "eval_episodes=100",
             "rollout_animation=false", "tracking.log_model=false", "quiet=true", "seed=0,1"]
    process = subprocess.Popen(_command(*sweep), cwd=tmp_path, env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 300
    while len(list(tmp_path.glob("checkpoints/*/trainer_state.npz"))) < 2:  # the second job has checkpointed
        assert process.poll() is None, process.communicate()
        assert time.monotonic() < deadline
        time.sleep(0.05)
    process.send_signal(signal.SIGINT)
    process.communicate(timeout=120)
    assert process.returncode != 0
    client = MlflowClient(f"sqlite:///{tmp_path / 'mlflow.db'}")
    experiment = client.get_experiment_by_name("qtally").experiment_id
    (parent,) = client.search_runs([experiment], filter_string="tags.`qtally.role` = 'sweep'")
    before = {r.data.tags["seed"]: (r.info.run_id, r.info.status) for r in client.search_runs([experiment], filter_string="tags.`qtally.role` = 'job'")}
    assert parent.info.status == "KILLED" and sorted(status for _, status in before.values()) == ["FINISHED", "KILLED"]
    resumed = subprocess.run(_command(*sweep, f"resume={parent.info.run_id}"), cwd=tmp_path, env=_env(), capture_output=True, text=True, timeout=600)
    assert resumed.returncode == 0, resumed.stderr[-2000:]
    assert "had finished; skipped" in resumed.stdout
    after = {r.data.tags["seed"]: (r.info.run_id, r.info.status) for r in client.search_runs([experiment], filter_string="tags.`qtally.role` = 'job'")}
    assert {seed: run_id for seed, (run_id, _) in after.items()} == {seed: run_id for seed, (run_id, _) in before.items()}  # no job ran twice
    assert {status for _, status in after.values()} == {"FINISHED"}
    assert client.get_run(parent.info.run_id).info.status == "FINISHED"
