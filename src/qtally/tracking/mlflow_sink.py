"""MLflow as the trainer's sink: metrics queued and sent in batches, files as run artifacts.

One synchronous metric call costs milliseconds on a SQLite store, longer than an
episode, so :class:`MlflowRecorder` queues metrics and sends them with
``log_batch`` (at most ``batch_size`` per call) when the queue fills and on ``flush``.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Mapping

from mlflow.entities import Metric
from mlflow.tracking import MlflowClient

__all__ = ["MlflowRecorder"]


class MlflowRecorder:
    def __init__(self, client: MlflowClient, run_id: str, batch_size: int = 1000, already_logged: set[tuple[str, int]] | None = None):
        self.client = client
        self.run_id = run_id
        self.batch_size = min(int(batch_size), 1000)
        self._queue: list[Metric] = []
        self.batches_sent = 0
        # A resumed run replays the episodes after its checkpoint: steps the store already holds are not sent twice.
        self.already_logged = already_logged or set()

    def log_metrics(self, metrics: Mapping[str, float], step: int) -> None:
        timestamp = int(time.time() * 1000)
        skip = self.already_logged
        self._queue.extend(
            Metric(key=name, value=float(value), timestamp=timestamp, step=int(step)) for name, value in metrics.items() if (name, int(step)) not in skip
        )
        if len(self._queue) >= self.batch_size:
            self.flush()

    def log_file(self, local_path: Path, artifact_dir: str | None = None) -> None:
        self.client.log_artifact(self.run_id, str(local_path), artifact_dir)

    def flush(self) -> None:
        while self._queue:
            chunk, self._queue = self._queue[: self.batch_size], self._queue[self.batch_size :]
            self.client.log_batch(self.run_id, metrics=chunk)
            self.batches_sent += 1
