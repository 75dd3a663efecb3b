"""Benchmark (not a test): what recording a training run in MLflow costs.

One training run (the same environment, variant, schedule and seed every time) is timed
with four sinks, side by side, against one SQLite MLflow store in a temporary directory
that is deleted afterwards:

  (a) per-episode  one synchronous ``MlflowClient.log_metric`` call per episode
                   (``log_every=1``; only the episode's return is sent, the cheapest
                   per-episode scheme there is);
  (b) batched      qtally's ``MlflowRecorder``: window aggregates every ``--log-every``
                   episodes, queued and sent with ``log_batch``;
  (b1) batched/1   ``MlflowRecorder`` with ``log_every=1``: every episode's metrics,
                   still sent with ``log_batch`` (separates batching from windowing);
  (c) null         ``NullRecorder``: training alone.

Run it from the repository root, e.g.::

    python scripts/bench_logging.py --episodes 5000
    python scripts/bench_logging.py --env restock --episodes 2000

Nothing is written outside the temporary directory.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
import tempfile
import time
import warnings
from pathlib import Path
from typing import Mapping

ENV_CHOICES = ("frozen_lake_4x4", "restock", "blackjack")


class PerEpisodeRecorder:
    """One synchronous ``log_metric`` call for each episode's return; everything else dropped."""

    def __init__(self, client, run_id: str):
        self.client = client
        self.run_id = run_id
        self.calls = 0

    def log_metrics(self, metrics: Mapping[str, float], step: int) -> None:
        if "return_mean" in metrics:
            self.client.log_metric(self.run_id, "episode_return", float(metrics["return_mean"]), step=int(step))
            self.calls += 1

    def log_file(self, local_path, artifact_dir=None) -> None:
        pass

    def flush(self) -> None:
        pass


from qtally.experiment import bundled_environment_spec

def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Time one training run with per-episode, batched and no MLflow logging.")
    parser.add_argument("--episodes", type=int, default=5000, help="episodes of the training run (default 5000)")
    parser.add_argument("--env", choices=ENV_CHOICES, default="frozen_lake_4x4", help="shipped env config (default frozen_lake_4x4)")
    parser.add_argument("--variant", default="on_policy", help="exploring_starts, on_policy or off_policy (default on_policy)")
    parser.add_argument("--log-every", type=int, default=100, help="window of the batched sink, in episodes (default 100)")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    if args.episodes < 1 or args.log_every < 1:
        parser.error("--episodes and --log-every must be positive")

    warnings.filterwarnings("ignore")
    logging.getLogger("mlflow").setLevel(logging.WARNING)  # no store-migration chatter in the table
    os.environ.setdefault("MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR", "false")
    import mlflow
    from mlflow.tracking import MlflowClient

    from qtally.control.schedules import Constant
    from qtally.control.variants import make_variant
    from qtally.envs.factory import make_environment
    from qtally.tracking.mlflow_sink import MlflowRecorder
    from qtally.tracking.sink import NullRecorder
    from qtally.trainer import TrainingSettings, train

    spec, truncation = bundled_environment_spec(args.env)
    gamma = 1.0
    variant = make_variant(args.variant, gamma, args.variant != "off_policy", None)
    schedule = Constant(0.1)

    with tempfile.TemporaryDirectory(prefix="qtally-bench-logging-") as scratch:
        uri = f"sqlite:///{Path(scratch) / 'mlflow.db'}"
        mlflow.set_tracking_uri(uri)
        client = MlflowClient(tracking_uri=uri)
        experiment_id = client.create_experiment("bench_logging", artifact_location=(Path(scratch) / "artifacts").as_uri())
        client.create_run(experiment_id)  # pays the store's one-time schema setup before anything is timed

        def timed(label: str, make_recorder, log_every: int):
            run = client.create_run(experiment_id, run_name=label)
            recorder = make_recorder(run.info.run_id)
            environment = make_environment(spec)
            settings = TrainingSettings(
                episodes=args.episodes, seed=args.seed, log_every=log_every, eval_every=0, eval_episodes=20, truncation=truncation
            )
            start = time.perf_counter()
            outcome = train(environment, variant, schedule, settings, recorder=recorder)
            seconds = time.perf_counter() - start
            environment.close()
            client.set_terminated(run.info.run_id)
            stored = sum(len(client.get_metric_history(run.info.run_id, key)) for key in client.get_run(run.info.run_id).data.metrics)
            return {"label": label, "seconds": seconds, "stored": stored, "q_sum": float(outcome.values.q.sum())}

        rows = [
            timed("(a) per-episode log_metric", lambda run_id: PerEpisodeRecorder(client, run_id), 1),
            timed(f"(b) MlflowRecorder, log_every={args.log_every}", lambda run_id: MlflowRecorder(client, run_id), args.log_every),
            timed("(b1) MlflowRecorder, log_every=1", lambda run_id: MlflowRecorder(client, run_id), 1),
            timed("(c) NullRecorder", lambda run_id: NullRecorder(), args.log_every),
        ]

    # The same seed gives the same table whatever the sink: the sinks only observe.
    same = len({round(row["q_sum"], 9) for row in rows}) == 1
    print(f"{args.env}, {args.variant}, {args.episodes} episodes, SQLite store in a temporary directory")
    print(f"{'sink':38s} {'seconds':>9s} {'episodes/s':>11s} {'values stored':>14s}")
    for row in rows:
        print(f"{row['label']:38s} {row['seconds']:9.3f} {args.episodes / row['seconds']:11.0f} {row['stored']:14d}")
    a, b, b1, c = (row["seconds"] for row in rows)
    print(f"(a)/(b)  = {a / b:6.2f}   per-episode synchronous calls vs batched windows")
    print(f"(b1)/(b) = {b1 / b:6.2f}   batched every episode vs batched windows")
    print(f"(b)/(c)  = {b / c:6.2f}   batched windows vs no recording")
    print(f"identical Q tables across sinks: {'yes' if same else 'NO'}")
    return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
