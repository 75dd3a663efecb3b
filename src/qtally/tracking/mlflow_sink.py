"""MLflow as the trainer's sink: metrics queued and sent in batches, files as run artifacts.

One synchronous metric call costs milliseconds on a SQLite store, longer than an
episode, so :class:`MlflowRecorder` queues metrics and sends them when the queue fills
and on ``flush``. On a SQLite store they go straight into MLflow's metric tables
(:class:`~qtally.tracking.sqlite_metrics.SqliteMetricRows`, about a twentieth of
``log_batch``'s cost a value), the whole queue in one transaction, and a full queue
waits until ``send_every`` seconds have passed since the last send, so a fast run pays
for few commits. On any other store, or a SQLite file that module does not recognise,
they go through ``log_batch``, at most ``batch_size`` a call, as soon as a batch is full.

A store that stops answering does not stop training: a batch that cannot be sent stays
queued and is sent, once, at a later flush; a snapshot that cannot be stored is counted
and skipped (the checkpoints keep the whole state locally). :meth:`MlflowRecorder.unsent`
says what is still waiting; the experiment layer turns a store that never came back into
one line naming the local checkpoint, from which ``qtally-train resume=<run id>`` sends
what is missing.
"""

from __future__ import annotations

import time
from itertools import repeat
from pathlib import Path
from typing import Mapping, Sequence

from mlflow.entities import Metric
from mlflow.tracking import MlflowClient

from .sqlite_metrics import MetricRow, SqliteMetricRows

__all__ = ["MlflowRecorder", "SEND_EVERY_SECONDS"]

SEND_EVERY_SECONDS = 2.0


class MlflowRecorder:
    def __init__(self, client: MlflowClient, run_id: str, batch_size: int = 1000, already_logged: set[tuple[str, int]] | None = None,
                 tracking_uri: str | None = None, send_every: float = SEND_EVERY_SECONDS):
        self.client = client
        self.run_id = run_id
        self.batch_size = min(int(batch_size), 1000)
        self._queue: list[MetricRow] = []
        # Where the store is a SQLite file qtally recognises, rows go in directly; else through log_batch.
        self.rows = SqliteMetricRows.open(tracking_uri, run_id) if tracking_uri else None
        # Rows go in one transaction a send, and a commit waits for the disk: a full queue waits
        # for send_every seconds since the last send (or for 50 batches) before it goes.
        self.send_every = float(send_every)
        self._last_send = time.monotonic()
        self.batches_sent = 0
        # A resumed run replays the episodes after its checkpoint: steps the store already holds are not sent twice.
        self.already_logged = already_logged or set()

    def log_metrics(self, metrics: Mapping[str, float], step: int) -> None:
        timestamp = int(time.time() * 1000)
        skip = self.already_logged
        step = int(step)
        self._queue.extend((name, float(value), timestamp, step) for name, value in metrics.items() if (name, step) not in skip)
        if self._send_due():
            self.flush()

    def log_metric_columns(self, steps: Sequence[int], columns: Mapping[str, Sequence[float]]) -> None:
        """Many steps' metrics at once, a column a name (what the trainer's windows give): no dict a step."""
        timestamp = int(time.time() * 1000)
        steps = [int(step) for step in steps]
        skip = self.already_logged
        for name, values in columns.items():
            rows = zip(repeat(name), map(float, values), repeat(timestamp), steps)
            if skip:
                rows = (row for row in rows if (name, row[3]) not in skip)
            self._queue.extend(rows)
        if self._send_due():
            self.flush()

    def _send_due(self) -> bool:
        waiting = len(self._queue)
        if waiting < self.batch_size:
            return False
        if self.rows is None:
            return True
        return waiting >= 50 * self.batch_size or time.monotonic() - self._last_send >= self.send_every

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
        self._last_send = time.monotonic()
        while self._queue:
            # log_batch takes at most 1,000 values a call; the rows go in one transaction.
            chunk = self._queue if self.rows is not None else self._queue[: self.batch_size]
            try:
                if self.rows is not None:
                    self.rows.write(chunk)
                else:
                    self.client.log_batch(self.run_id, metrics=[Metric(key=k, value=v, timestamp=t, step=s) for k, v, t, s in chunk])
            except Exception as exc:
                self.last_error = f"{type(exc).__name__}: {str(exc).splitlines()[0][:200] if str(exc) else ''}"
                return
            self._queue = self._queue[len(chunk) :]
            self.batches_sent += 1

    @property
    def writer(self) -> str:
        """How metric values reach the store, for the run's tags and the benchmark."""
        return "sqlite rows" if self.rows is not None else "log_batch"

    @property
    def unsent(self) -> int:
        """Metric values still waiting for the store."""
        return len(self._queue)
