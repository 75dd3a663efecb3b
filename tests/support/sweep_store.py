"""Build a sweep in an MLflow store by hand: a parent run and tagged children with chosen metric histories.

The tags follow :mod:`qtally.tracking.sweep_tags`; the numbers are invented for the tests.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Mapping, Sequence

from mlflow.entities import Metric
from mlflow.tracking import MlflowClient

from qtally.tracking.sweep_tags import GROUP_LABEL_TAG, GROUP_TAG, PARENT_TAG, ROLE_TAG, SWEEP_TAG, group_key


def client_for(tmp_path) -> tuple[MlflowClient, str]:
    uri = f"sqlite:///{tmp_path / 'mlflow.db'}"
    return MlflowClient(tracking_uri=uri), uri


def make_parent(client: MlflowClient, experiment: str = "qtally", status: str = "FINISHED") -> str:
    """A sweep's parent run; a new experiment keeps its artifacts beside the store, not in the working directory."""
    existing = client.get_experiment_by_name(experiment)
    if existing:
        experiment_id = existing.experiment_id
    else:
        store_file = Path(client.tracking_uri.removeprefix("sqlite:///"))
        experiment_id = client.create_experiment(experiment, artifact_location=(store_file.parent / "artifacts" / experiment).as_uri())
    run = client.create_run(experiment_id, run_name="sweep", tags={ROLE_TAG: "sweep"})
    if status != "RUNNING":
        client.set_terminated(run.info.run_id, status)
    return run.info.run_id


def add_child(
    client: MlflowClient,
    parent_id: str,
    config: Mapping[str, str],
    seed: int,
    curves: Mapping[str, Sequence[tuple[int, float]]],
    status: str = "FINISHED",
) -> str:
    """One job of the sweep: tags as the sweep writes them, metric histories as (episode, value)."""
    experiment_id = client.get_run(parent_id).info.experiment_id
    label = " ".join(f"{k}={v}" for k, v in sorted(config.items()))
    tags = {
        PARENT_TAG: parent_id,
        SWEEP_TAG: parent_id,
        GROUP_TAG: group_key(config),
        GROUP_LABEL_TAG: label,
        ROLE_TAG: "job",
        "seed": str(seed),
        "env": "qtally.envs.restock:RestockEnv",
        **{k: str(v) for k, v in config.items()},
    }
    run = client.create_run(experiment_id, run_name=f"{label} seed={seed}", tags=tags)
    now = int(time.time() * 1000)
    metrics = [Metric(key, float(value), now + i, int(step)) for key, points in curves.items() for i, (step, value) in enumerate(points)]
    if metrics:
        client.log_batch(run.info.run_id, metrics=metrics)
    if status != "RUNNING":
        client.set_terminated(run.info.run_id, status)
    return run.info.run_id
