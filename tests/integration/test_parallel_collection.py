"""Parallel collection through ``qtally-train``: a lost worker, a resumed run, and Ray on loopback.

Which bug each test catches: a worker that dies leaving the trainer waiting, a traceback,
or a run left RUNNING; a resumed parallel run that does not end as the uninterrupted one
(a worker's stream not in the checkpoint, a batch learned twice); Ray services that listen
beyond this machine, or a Ray run that does not train as local processes do.
"""

from __future__ import annotations

import ipaddress
import os
import sys
from pathlib import Path

import numpy as np
import pytest
from mlflow.tracking import MlflowClient

from qtally.control.trainer_state import TrainerState

ARGS = ["env=cliff_walking", "env.id=support.fragile:FragileCorridor", "env.max_episode_steps=20", "env.gamma=1.0", "env.eval_every=400", "env.eval_episodes=20",
        "episodes=800", "log_every=40", "collect.workers=2", "collect.batch=8", "checkpoint_every=200", "rollout_animation=false",
        "tracking.log_model=false", "schedule=constant", "schedule.epsilon=0.2", "quiet=true", "seed=5"]


def _runs(folder: Path):
    client = MlflowClient(f"sqlite:///{folder / 'mlflow.db'}")
    return client, client.search_runs([client.get_experiment_by_name("qtally").experiment_id])


def _record(folder: Path, run):
    client, _ = _runs(folder)
    state = TrainerState.load(folder / "checkpoints" / run.info.run_id / "trainer_state.npz")
    metrics = {key: sorted((m.step, m.value) for m in client.get_metric_history(run.info.run_id, key)) for key in run.data.metrics if not key.startswith("collect_rate_")}
    return state, metrics


def test_a_worker_that_dies_ends_the_run_in_one_line_and_resume_finishes_it_as_if_never_lost(run_cli, tmp_path):
    whole_folder = tmp_path / "whole"
    whole_folder.mkdir()
    run_cli("qtally-train", *ARGS, check=True)  # the reference: the same run, never interrupted
    for name in ("mlflow.db", "checkpoints"):
        os.replace(tmp_path / name, whole_folder / name)
    _, (whole_run,) = _runs(whole_folder)
    assert any(key.startswith("collect_rate_w1") for key in whole_run.data.metrics)  # the rate per worker is recorded

    lost = run_cli("qtally-train", *ARGS, env_extra={"QTALLY_TEST_FAULT": "exit", "QTALLY_TEST_FAULT_AT": "150"})
    lines = [line for line in lost.stderr.splitlines() if line.strip()]
    assert lost.returncode != 0 and len(lines) == 1, lost.stderr
    assert "collection worker 1" in lines[0] and "exited with code 3" in lines[0] and "FAILED" in lines[0] and "resume=" in lines[0]
    assert "Traceback" not in lost.stderr
    _, (run,) = _runs(tmp_path)
    assert run.info.status == "FAILED"

    resumed = run_cli("qtally-train", f"resume={run.info.run_id}", "quiet=true")
    assert resumed.returncode == 0, resumed.stderr[-2000:]
    _, (run,) = _runs(tmp_path)
    assert run.info.status == "FINISHED"
    # Worker 1 plays 4 episodes a batch; its 150th reset is in the batch of episodes 297-304: the
    # checkpoint written on the loss holds the batches before it, learned whole.
    assert int(run.data.tags["qtally.resumed_at_episode"]) == 296
    state, metrics = _record(tmp_path, run)
    whole_state, whole_metrics = _record(whole_folder, whole_run)
    for name in ("q", "visits", "state_visits"):
        np.testing.assert_array_equal(getattr(state.values, name), getattr(whole_state.values, name), err_msg=name)
    assert metrics == whole_metrics


def _is_loopback(address: str) -> bool:
    ip = ipaddress.ip_address(address.split("%")[0])
    return (getattr(ip, "ipv4_mapped", None) or ip).is_loopback


def test_ray_actors_train_end_to_end_as_local_processes_do_and_listen_on_loopback_only(tmp_path, monkeypatch):
    from qtally.engine.ray_collection import keep_ray_on_loopback

    assert keep_ray_on_loopback(), "Ray was imported before this test with its cluster switch on"
    pytest.importorskip("ray")
    import psutil  # Ray brings its own copy, importable once ray is
    from qtally.control.schedules import Constant
    from qtally.control.variants import make_variant
    from qtally.engine.collection import CollectSettings
    from qtally.envs.factory import EnvironmentSpec, make_environment
    from qtally.trainer import Trainer, TrainingSettings

    spec = EnvironmentSpec(id="support.corridor:Corridor", max_episode_steps=20)

    def trainer(backend):
        settings = TrainingSettings(episodes=600, seed=2, log_every=50, eval_every=300, eval_episodes=10, engine="gym", collect=CollectSettings(workers=2, batch=8, backend=backend))
        return Trainer(make_environment(spec), make_variant("off_policy", 1.0, True, None), Constant(0.3), settings)

    local = trainer("local").run()
    on_ray = trainer("ray")
    on_ray.start_workers()
    me = psutil.Process()
    listening = []
    for process in [me, *me.children(recursive=True)]:
        try:
            listening += [(c.laddr.ip, c.laddr.port, process.name()) for c in process.net_connections(kind="inet") if c.status == psutil.CONN_LISTEN]
        except psutil.Error:
            continue
    outcome = on_ray.run()
    assert listening, "no Ray service found listening: the check looked at the wrong processes"
    assert not [entry for entry in listening if not _is_loopback(entry[0])], listening
    np.testing.assert_array_equal(outcome.values.q, local.values.q)
    assert outcome.history == local.history


SCRIPT = """
from qtally.control.schedules import Constant
from qtally.control.variants import make_variant
from qtally.engine.collection import CollectSettings
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.trainer import Trainer, TrainingSettings

def train(seed):
    spec = EnvironmentSpec(id="support.corridor:Corridor", max_episode_steps=20)
    settings = TrainingSettings(episodes=200, seed=seed, eval_every=0, eval_episodes=2, engine="gym", collect=CollectSettings(workers=2))
    return float(Trainer(make_environment(spec), make_variant("on_policy", 1.0, True, None), Constant(0.2), settings).run().values.q.sum())
"""


@pytest.mark.parametrize("caller", ["an unguarded script", "a joblib (loky) worker"])
def test_workers_start_from_an_unguarded_script_and_inside_a_joblib_worker(tmp_path, caller):
    # Breakages caught: spawn re-running the caller's script in every worker (an unguarded
    # script trains again, recursively, and the worker dies starting), and a worker told to
    # use loky's start method, which a plain child cannot set (every sweep job under
    # hydra/launcher=joblib with collect.workers failed so).
    import subprocess

    body = SCRIPT + ("print(train(3))\n" if caller == "an unguarded script" else
                     "if __name__ == '__main__':\n    from joblib import Parallel, delayed\n    print(Parallel(n_jobs=2)(delayed(train)(s) for s in (3, 4)))\n")
    script = tmp_path / "caller.py"
    script.write_text(body)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(Path(__file__).parents[1]), os.environ.get("PYTHONPATH", "")]))
    result = subprocess.run([sys.executable, str(script)], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stderr[-2000:]
    assert result.stdout.count("\n") == 1 and "collection worker" not in result.stderr
