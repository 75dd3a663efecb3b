"""The README walkthrough (scripts/walkthrough.sh) runs top to bottom, in a shortened form."""

import os
import subprocess
from pathlib import Path

from mlflow.tracking import MlflowClient

SCRIPT = Path(__file__).resolve().parents[2] / "scripts" / "walkthrough.sh"


def test_walkthrough_runs_in_short_form(tmp_path):
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    env.update(WALKTHROUGH_EPISODES="150", WALKTHROUGH_EVAL_EPISODES="10", WALKTHROUGH_PREDICTION_EPISODES="200", WALKTHROUGH_SWEEP_EPISODES="100", WALKTHROUGH_SEEDS="0,1")
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
    children = [r for r in runs if r.data.tags.get("qtally.role") == "job"]
    parents = [r for r in runs if r.data.tags.get("qtally.role") == "sweep"]
    assert sorted((r.data.tags["schedule"], r.data.tags["seed"]) for r in children) == [("constant", "0"), ("constant", "1"), ("glie_visits", "0"), ("glie_visits", "1")]
    assert len(parents) == 1 and all(r.data.tags["mlflow.parentRunId"] == parents[0].info.run_id for r in children)
    assert all(r.info.status == "FINISHED" for r in runs)
    # The comparison step ranked both schedules and logged its report to the sweep's parent.
    assert "comparison of sweep" in result.stdout and "schedule=glie_visits" in result.stdout
    logged = {a.path for a in client.list_artifacts(parents[0].info.run_id, "comparison")}
    assert "comparison/comparison.md" in logged
