"""MLflow as the trainer's sink: metrics queued and sent in batches, files as run artifacts.

One synchronous metric call costs milliseconds on a SQLite store, longer than an
episode, so :class:`MlflowRecorder` queues metrics and sends them with
``log_batch`` (at most ``batch_size`` per call) when the queue fills and on ``flush``.

A store that stops answering does not stop training: a batch that cannot be sent stays
queued and is sent, once, at a later flush; a snapshot that cannot be stored is counted
and skipped (the checkpoints keep the whole state locally). :meth:`MlflowRecorder.unsent`
says what is still waiting; the experiment layer turns a store that never came back into
one line naming the local checkpoint, from which ``qtally-train resume=<run id>`` sends
what is missing.
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
        try:
            self.client.log_artifact(self.run_id, str(local_path), artifact_dir)
        except Exception as exc:  # the store is away: the file is a snapshot, the checkpoints hold the state
            self.files_lost += 1
            self.last_error = f"{type(exc).__name__}: {str(exc).splitlines()[0][:200] if str(exc) else ''}"

    files_lost = 0
    last_error = ""

    def flush(self) -> None:
        """Send the queue in batches; a batch the store refuses stays queued for the next flush."""
        while self._queue:
            chunk = self._queue[: self.batch_size]
            try:
                self.client.log_batch(self.run_id, metrics=chunk)
            except Exception as exc:
                self.last_error = f"{type(exc).__name__}: {str(exc).splitlines()[0][:200] if str(exc) else ''}"
                return
            self._queue = self._queue[len(chunk) :]
            self.batches_sent += 1

    @property
    def unsent(self) -> int:
        """Metric values still waiting for the store."""
        return len(self._queue)
