"""Interrupting a training run: one line, exit 130, and the run closed as KILLED (never left RUNNING)."""

import os
import signal
import subprocess
import time

from mlflow.tracking import MlflowClient

from .conftest import _console_script


def test_ctrl_c_closes_the_run_as_killed(tmp_path):
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    store = tmp_path / "mlflow.db"
    client = MlflowClient(tracking_uri=f"sqlite:///{store}")  # create the store first: no race over its tables
    experiment_id = client.create_experiment("qtally")
    process = subprocess.Popen(
        _console_script("qtally-train") + ["env=blackjack", "episodes=50000000", "quiet=true"],
        cwd=tmp_path, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    deadline = time.time() + 120
    while time.time() < deadline and not client.search_runs([experiment_id]):  # wait for the run to open
        time.sleep(0.5)
    time.sleep(2.0)  # and for training to be under way
    process.send_signal(signal.SIGINT)
    _, stderr = process.communicate(timeout=120)
    assert process.returncode == 130
    lines = [line for line in stderr.splitlines() if line.strip()]
    # One line: where training stopped, the KILLED status, the checkpoint it left and how to continue.
    assert len(lines) == 1 and lines[0].startswith("qtally-train: error: stopped by SIGINT at episode "), lines
    assert "the run was closed as KILLED; its checkpoint: checkpoints/" in lines[0] and "continue with: qtally-train resume=" in lines[0]
    runs = client.search_runs([experiment_id])
    assert [r.info.status for r in runs] == ["KILLED"]
