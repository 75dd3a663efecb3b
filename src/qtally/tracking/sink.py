"""The sink the trainer writes to. The trainer never imports MLflow; it calls a :class:`Recorder`.

:class:`NullRecorder` drops everything (benchmarks, quick experiments);
:class:`MemoryRecorder` keeps everything in lists (tests);
:class:`qtally.tracking.mlflow_sink.MlflowRecorder` batches into an MLflow run.
"""

from __future__ import annotations

from pathlib import Path
from typing import Mapping, Protocol, Sequence

__all__ = ["Recorder", "NullRecorder", "MemoryRecorder", "log_metric_columns"]


class Recorder(Protocol):
    def log_metrics(self, metrics: Mapping[str, float], step: int) -> None:
        """Queue metrics for one step (the episode number); a sink may send them later in a batch."""

    def log_file(self, local_path: Path, artifact_dir: str | None = None) -> None:
        """Store a finished file (policy snapshot, picture, table) with the run."""

    def flush(self) -> None:
        """Send whatever is queued."""


def log_metric_columns(recorder: Recorder, steps: Sequence[int], columns: Mapping[str, Sequence[float]]) -> None:
    """Metrics of many steps at once (a list of values per name, one per step), as ``log_metrics`` step by step would queue them.

    A recorder with a ``log_metric_columns`` method of its own takes them whole.
    """
    own = getattr(recorder, "log_metric_columns", None)
    if own is not None:
        own(steps, columns)
        return
    names = list(columns)
    for step, row in zip(steps, zip(*columns.values())):
        recorder.log_metrics(dict(zip(names, row)), step)


class NullRecorder:
    def log_metrics(self, metrics: Mapping[str, float], step: int) -> None:
        pass

    def log_metric_columns(self, steps: Sequence[int], columns: Mapping[str, Sequence[float]]) -> None:
        pass

    def log_file(self, local_path: Path, artifact_dir: str | None = None) -> None:
        pass

    def flush(self) -> None:
        pass


class MemoryRecorder:
    def __init__(self) -> None:
        self.metrics: list[tuple[int, dict[str, float]]] = []
        self.files: list[tuple[str, str | None]] = []

    def log_metrics(self, metrics: Mapping[str, float], step: int) -> None:
        self.metrics.append((step, dict(metrics)))

    def log_file(self, local_path: Path, artifact_dir: str | None = None) -> None:
        self.files.append((Path(local_path).name, artifact_dir))

    def flush(self) -> None:
        pass

    def series(self, name: str) -> list[tuple[int, float]]:
        return [(step, values[name]) for step, values in self.metrics if name in values]
