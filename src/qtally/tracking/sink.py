"""The sink the trainer writes to. The trainer never imports MLflow; it calls a :class:`Recorder`.

:class:`NullRecorder` drops everything (benchmarks, quick experiments);
:class:`MemoryRecorder` keeps everything in lists (tests);
:class:`qtally.tracking.mlflow_sink.MlflowRecorder` batches into an MLflow run.
"""

from __future__ import annotations

from pathlib import Path
from typing import Mapping, Protocol

__all__ = ["Recorder", "NullRecorder", "MemoryRecorder"]


class Recorder(Protocol):
    def log_metrics(self, metrics: Mapping[str, float], step: int) -> None:
        """Queue metrics for one step (the episode number); a sink may send them later in a batch."""

    def log_file(self, local_path: Path, artifact_dir: str | None = None) -> None:
        """Store a finished file (policy snapshot, picture, table) with the run."""

    def flush(self) -> None:
        """Send whatever is queued."""


class NullRecorder:
    def log_metrics(self, metrics: Mapping[str, float], step: int) -> None:
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
