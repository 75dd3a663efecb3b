#!/usr/bin/env bash
# The restocking walkthrough of the README, top to bottom, in the current directory.
#
#   bash scripts/walkthrough.sh                 # the full walkthrough (a few minutes)
#   WALKTHROUGH_EPISODES=300 bash scripts/walkthrough.sh   # the shortened form the tests run
#
# Every figure in the scenario is invented. The store is sqlite:///mlflow.db here unless
# MLFLOW_TRACKING_URI says otherwise.
set -euo pipefail
export MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR=false

EPISODES="${WALKTHROUGH_EPISODES:-15000}"
EVAL_EPISODES="${WALKTHROUGH_EVAL_EPISODES:-200}"
PREDICTION_EPISODES="${WALKTHROUGH_PREDICTION_EPISODES:-20000}"
EVAL_EVERY=$(( EPISODES / 3 > 0 ? EPISODES / 3 : 1 ))

echo "== 1. Train each variant on the restocking simulator (${EPISODES} episodes each)"
for variant in exploring_starts on_policy off_policy; do
  qtally-train env=restock variant="$variant" episodes="$EPISODES" gamma=1.0 \
    schedule=constant schedule.epsilon=0.2 eval_every="$EVAL_EVERY" eval_episodes="$EVAL_EPISODES" \
    tracking.experiment=restock-walkthrough quiet=true > "run_${variant}.id"
  echo "$variant: run $(cat "run_${variant}.id")"
done

echo "== 2. Sweep epsilon schedules across seeds (Hydra multirun, one MLflow run per job)"
qtally-train -m env=restock variant=on_policy gamma=1.0 episodes="$EPISODES" eval_every=0 eval_episodes="$EVAL_EPISODES" \
  schedule=constant,glie_visits seed=0,1 tracking.experiment=restock-sweep quiet=true

echo "== 3. Compare: the runs side by side, best first"
python - <<'PY'
import mlflow, os
mlflow.set_tracking_uri(os.environ.get("MLFLOW_TRACKING_URI", "sqlite:///mlflow.db"))
runs = mlflow.search_runs(experiment_names=["restock-walkthrough", "restock-sweep"], order_by=["metrics.eval_return_mean DESC"])
columns = ["tags.variant", "tags.schedule", "tags.seed", "metrics.eval_return_mean", "metrics.eval_return_ci95", "metrics.optimality_gap"]
print(runs[columns].rename(columns=lambda c: c.split(".", 1)[1]).to_string(index=False, float_format=lambda x: f"{x:.2f}"))
PY

echo "== 4. Evaluate the exploring-starts policy by Monte Carlo prediction, against the exact values"
qtally-evaluate env=restock policy.source=run policy.run_id="$(cat run_exploring_starts.id)" \
  episodes="$PREDICTION_EPISODES" gamma=1.0 estimate=v tracking.experiment=restock-walkthrough

echo "== 5. The pictures of the first run"
python - <<'PY'
import mlflow, os
mlflow.set_tracking_uri(os.environ.get("MLFLOW_TRACKING_URI", "sqlite:///mlflow.db"))
run_id = open("run_exploring_starts.id").read().strip()
local = mlflow.artifacts.download_artifacts(run_id=run_id, artifact_path="plots", dst_path="walkthrough-pictures")
for name in sorted(os.listdir(local)):
    print(os.path.join("walkthrough-pictures", "plots", name))
PY

echo "== 6. Open the tracking UI on this store (loopback only):"
echo "   mlflow ui --backend-store-uri ${MLFLOW_TRACKING_URI:-sqlite:///mlflow.db} --host 127.0.0.1 --port 5000"
