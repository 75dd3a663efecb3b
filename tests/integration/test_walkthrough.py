"""The README walkthrough (scripts/walkthrough.sh) runs top to bottom, in a shortened form."""

import os
import subprocess
from pathlib import Path

from mlflow.tracking import MlflowClient

SCRIPT = Path(__file__).resolve().parents[2] / "scripts" / "walkthrough.sh"


def test_walkthrough_runs_in_short_form(tmp_path):
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    env.update(WALKTHROUGH_EPISODES="150", WALKTHROUGH_EVAL_EPISODES="10", WALKTHROUGH_PREDICTION_EPISODES="200")
    result = subprocess.run(["bash", str(SCRIPT)], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=900)
    assert result.returncode == 0, result.stderr[-3000:]
    for heading in ("== 1.", "== 2.", "== 3.", "== 4.", "== 5.", "== 6."):
        assert heading in result.stdout
    assert "mlflow ui --backend-store-uri sqlite:///mlflow.db --host 127.0.0.1" in result.stdout
    for picture in ("learning_curve.png", "learned_policy_map.png", "optimal_policy_map.png", "rollout.gif"):
        assert (tmp_path / "walkthrough-pictures" / "plots" / picture).exists(), picture
    client = MlflowClient(tracking_uri=f"sqlite:///{tmp_path / 'mlflow.db'}")
    sweep = client.get_experiment_by_name("restock-sweep")
    runs = client.search_runs([sweep.experiment_id])
    assert sorted((r.data.tags["schedule"], r.data.tags["seed"]) for r in runs) == [("constant", "0"), ("constant", "1"), ("glie_visits", "0"), ("glie_visits", "1")]
    assert all(r.info.status == "FINISHED" for r in runs)
