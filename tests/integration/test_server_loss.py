"""A tracking server that goes away mid-run and comes back: training goes on, every metric step lands once.

Which bug this catches: a recorder that raises when a batch cannot be sent (the run dies
with the server), one that drops the batch (steps missing), or one that sends it twice
(steps doubled). The server is a real ``mlflow server`` on loopback with its own SQLite
store, stopped with SIGTERM and started again on the same store and port.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
import urllib.request
from collections import Counter
from pathlib import Path

import pytest
from mlflow.tracking import MlflowClient

EPISODES, LOG_EVERY = 60000, 20


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _start_server(folder: Path, port: int) -> subprocess.Popen:
    server = subprocess.Popen(
        [sys.executable, "-m", "mlflow", "server", "--host", "127.0.0.1", "--port", str(port), "--workers", "1",
         "--backend-store-uri", f"sqlite:///{folder / 'server.db'}", "--artifacts-destination", str(folder / "artifacts")],
        cwd=folder, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    deadline = time.monotonic() + 90
    while time.monotonic() < deadline:
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{port}/health", timeout=2):
                return server
        except OSError:
            time.sleep(0.3)
    server.kill()
    pytest.fail("mlflow server did not start within 90 s")


def _steps_in_store(folder: Path) -> int:
    try:
        client = MlflowClient(f"sqlite:///{folder / 'server.db'}")
        runs = client.search_runs([e.experiment_id for e in client.search_experiments()])
        return max((m.step for r in runs for m in client.get_metric_history(r.info.run_id, "return_mean")), default=0)
    except Exception:  # the server is still creating its tables
        return 0


def test_training_outlives_a_server_restart_and_logs_every_step_once(tmp_path):
    port = _free_port()
    server = _start_server(tmp_path, port)
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    env["PYTHONPATH"] = os.pathsep.join([str(Path(__file__).parents[2]), env.get("PYTHONPATH", "")])
    training = subprocess.Popen(
        [sys.executable, "-c", "from qtally.cli.train import main; main()", "env=restock", "engine=gym", f"episodes={EPISODES}",
         f"log_every={LOG_EVERY}", "eval_every=20000", "eval_episodes=100", "rollout_animation=false", "tracking.log_model=false",
         "quiet=true", f"tracking.uri=http://127.0.0.1:{port}"],
        cwd=tmp_path, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    try:
        deadline = time.monotonic() + 180
        while _steps_in_store(tmp_path) < 2000:  # some batches have landed: training is under way
            assert training.poll() is None, training.communicate()
            assert time.monotonic() < deadline
            time.sleep(0.2)
        server.terminate()
        server.wait(timeout=30)
        stopped_at = _steps_in_store(tmp_path)
        time.sleep(4.0)
        assert training.poll() is None, training.communicate()  # the run outlived the server
        server = _start_server(tmp_path, port)
        out, err = training.communicate(timeout=600)
    finally:
        training.kill()
        server.terminate()
        server.wait(timeout=30)
    assert training.returncode == 0, err[-2000:]
    assert stopped_at < EPISODES  # the server really was away mid-run
    client = MlflowClient(f"sqlite:///{tmp_path / 'server.db'}")
    (run,) = client.search_runs([e.experiment_id for e in client.search_experiments()])
    assert run.info.status == "FINISHED"
    for key in ("return_mean", "episode_length_mean", "epsilon", "coverage_sa"):
        counts = Counter(m.step for m in client.get_metric_history(run.info.run_id, key))
        assert sorted(counts) == list(range(LOG_EVERY, EPISODES + 1, LOG_EVERY)), key
        assert set(counts.values()) == {1}, (key, [s for s, c in counts.items() if c > 1][:5])
