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
SWEEP_EPISODES="${WALKTHROUGH_SWEEP_EPISODES:-5000}"
SEEDS="${WALKTHROUGH_SEEDS:-0,1,2,3,4}"
PREDICTION_EPISODES="${WALKTHROUGH_PREDICTION_EPISODES:-20000}"
EVAL_EVERY=$(( EPISODES / 3 > 0 ? EPISODES / 3 : 1 ))
# The restocking config evaluates on 3,000 seasons; the shortened test form asks for fewer.
EVAL=()
if [[ -n "${WALKTHROUGH_EVAL_EPISODES:-}" ]]; then EVAL=(eval_episodes="$WALKTHROUGH_EVAL_EPISODES"); fi

echo "== 1. Train each variant on the restocking simulator (${EPISODES} seasons each)"
for variant in exploring_starts on_policy off_policy; do
  qtally-train env=restock variant="$variant" episodes="$EPISODES" \
    schedule=constant schedule.epsilon=0.2 eval_every="$EVAL_EVERY" "${EVAL[@]}" \
    tracking.experiment=restock-walkthrough quiet=true > "run_${variant}.id"
  echo "$variant: run $(cat "run_${variant}.id")"
done

echo "== 2. Sweep two epsilon schedules across seeds ${SEEDS}: one parent run, a child run per job"
qtally-train -m env=restock variant=on_policy episodes="$SWEEP_EPISODES" eval_every=$(( SWEEP_EPISODES / 5 > 0 ? SWEEP_EPISODES / 5 : 1 )) "${EVAL[@]}" \
  schedule=constant,glie_visits seed="$SEEDS" rollout_animation=false tracking.experiment=restock-sweep quiet=true

echo "== 3. Compare the schedules across seeds: which is better, and is the difference real?"
qtally-compare sweep=latest experiment=restock-sweep

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
