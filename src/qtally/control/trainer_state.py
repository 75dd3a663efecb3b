"""Everything a training run has learned and drawn so far, as one object that can be saved and restored.

A :class:`TrainerState` holds the tables (Q, visit counts, importance-sampling weights,
per-state visits), the episode counter, the open logging window, the metric history, the
last evaluation, and the state of every random stream, the environment's own included (and each collection
worker's, when a run plays its episodes in parallel).
Restoring it and playing on gives the same table, bit for bit, as never having stopped.

File format ("qtally-trainer-state", version 1): a NumPy ``.npz`` of plain arrays plus
``metadata``, a JSON string with the counters, the window, the history, the stream
states and a SHA-256 checksum of the arrays. It loads with ``allow_pickle=False`` and
is written whole (temporary file, fsync, rename).
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Iterable, Iterator, Mapping, Sequence

import numpy as np

from .action_values import ActionValues
from .streams import RandomStreams

__all__ = ["LogWindow", "MetricSeries", "record_metrics", "window_metric_columns", "TrainerState", "TrainerStateError", "STATE_FORMAT", "STATE_VERSION"]

STATE_FORMAT = "qtally-trainer-state"
STATE_VERSION = 1
_ARRAYS = ("q", "visits", "cumulative_weights", "state_visits")


class TrainerStateError(ValueError):
    """The file is not a usable trainer state (damaged, edited, another format or seed)."""


@dataclass
class LogWindow:
    """Running sums over one logging window: constant memory however long the window."""

    episodes: int = 0
    return_sum: float = 0.0
    length_sum: int = 0
    epsilon_sum: float = 0.0
    truncated: int = 0
    capped: int = 0
    steps_used: int = 0

    def add(self, total_reward: float, length: int, epsilon: float, truncated: bool, capped: bool, steps_used: int) -> None:
        """Count one episode in (the flags are bools, which add as 0 and 1)."""
        self.episodes += 1
        self.return_sum += total_reward
        self.length_sum += length
        self.epsilon_sum += epsilon
        self.truncated += truncated
        self.capped += capped
        self.steps_used += steps_used

    def sums(self) -> np.ndarray:
        """The fields as one float row, in field order (the compiled engine's form of a window)."""
        return np.array([self.episodes, self.return_sum, self.length_sum, self.epsilon_sum, self.truncated, self.capped, self.steps_used], dtype=np.float64)

    def metrics(self) -> dict[str, float]:
        """The window's metrics, as :func:`window_metric_columns` computes them for many."""
        return {name: values[0] for name, values in window_metric_columns(self.sums()[None, :]).items()}


def window_metric_columns(sums: np.ndarray) -> dict[str, list[float]]:
    """The metrics of logging windows, a list per name: ``sums`` holds a window per row, in :class:`LogWindow`'s field order.

    The one definition: :meth:`LogWindow.metrics` is the case of one row. The compiled engine
    closes hundreds of windows per call; one at a time their Python cost about a tenth of
    a run of short episodes.
    """
    episodes = np.maximum(sums[:, 0], 1.0)
    return {
        "return_mean": (sums[:, 1] / episodes).tolist(),
        "episode_length_mean": (sums[:, 2] / episodes).tolist(),
        "epsilon": (sums[:, 3] / episodes).tolist(),
        "truncated_fraction": (sums[:, 4] / episodes).tolist(),
        "step_capped_fraction": (sums[:, 5] / episodes).tolist(),
        "update_steps_fraction": (sums[:, 6] / np.maximum(sums[:, 2], 1.0)).tolist(),
    }


class MetricSeries(Sequence):
    """One metric's history: a sequence of ``(step, value)`` pairs, kept as two columns.

    It reads like the list of pairs it stands for (iteration, indexing, ``len``, equality
    with such a list). Held as two lists, a run's history costs no tuple per value: after a
    few million short episodes a list of pairs held a quarter of a million of them, which
    slowed every garbage collection for the rest of the run.
    """

    __slots__ = ("steps", "values")

    def __init__(self, pairs: Iterable[tuple[int, float]] = ()):
        self.steps: list[int] = []
        self.values: list[float] = []
        self.extend(pairs)

    def append(self, pair: tuple[int, float]) -> None:
        step, value = pair
        self.steps.append(step)
        self.values.append(value)

    def extend(self, pairs: Iterable[tuple[int, float]]) -> None:
        for pair in pairs:
            self.append(pair)

    def extend_columns(self, steps: Sequence[int], values: Sequence[float]) -> None:
        """Add many pairs given as two columns of equal length."""
        if len(steps) != len(values):
            raise ValueError(f"{len(steps)} steps for {len(values)} values")
        self.steps.extend(steps)
        self.values.extend(values)

    def __len__(self) -> int:
        return len(self.steps)

    def __getitem__(self, index):
        if isinstance(index, slice):
            return list(zip(self.steps[index], self.values[index]))
        return self.steps[index], self.values[index]

    def __iter__(self) -> Iterator[tuple[int, float]]:
        return zip(self.steps, self.values)

    def __eq__(self, other) -> bool:
        if isinstance(other, MetricSeries):
            return self.steps == other.steps and self.values == other.values
        if isinstance(other, (list, tuple)):
            return len(other) == len(self) and all(tuple(pair) == mine for pair, mine in zip(other, self))
        return NotImplemented

    __hash__ = None  # mutable

    def __repr__(self) -> str:
        return f"MetricSeries({list(self)!r})"


def record_metrics(history: dict[str, Sequence[tuple[int, float]]], steps: Sequence[int], columns: Mapping[str, Sequence[float]]) -> None:
    """Add metric values given as columns (a list per name, one value per step) to ``history``."""
    for name, values in columns.items():
        series = history.get(name)
        if not isinstance(series, MetricSeries):  # absent, or a plain list of pairs set from outside
            history[name] = series = MetricSeries(series or ())
        series.extend_columns(steps, values)


def _checksum(arrays: dict[str, np.ndarray]) -> str:
    digest = hashlib.sha256()
    for name in _ARRAYS:
        digest.update(np.ascontiguousarray(arrays[name]).tobytes())
    return digest.hexdigest()


@dataclass
class TrainerState:
    """The whole state of a training run between two episodes (module docstring)."""

    values: ActionValues
    streams: RandomStreams
    episode: int = 0
    window: LogWindow = field(default_factory=LogWindow)
    history: dict[str, MetricSeries] = field(default_factory=dict)  # plain lists of pairs are taken too
    final_evaluation: dict[str, float] = field(default_factory=dict)
    environment_rng: dict[str, Any] | None = None
    capped_episodes: int = 0
    # Parallel collection (qtally.engine.collection): where workers 1..N-1 are in their own
    # streams (worker 0 uses ``streams`` and ``environment_rng``); empty for a sequential run.
    worker_streams: list[dict[str, Any]] = field(default_factory=list)

    @classmethod
    def fresh(cls, n_states: int, n_actions: int, seed: int, initial_value: float = 0.0) -> "TrainerState":
        return cls(values=ActionValues.zeros(n_states, n_actions, initial_value), streams=RandomStreams(seed))

    def save(self, path: str | os.PathLike) -> Path:
        """Write the state whole: a crash during the write leaves the previous file intact."""
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        arrays = {name: getattr(self.values, name) for name in _ARRAYS}
        metadata = {
            "format": STATE_FORMAT,
            "format_version": STATE_VERSION,
            "episode": self.episode,
            "window": asdict(self.window),
            "history": {name: [[int(step), float(value)] for step, value in series] for name, series in self.history.items()},
            "final_evaluation": self.final_evaluation,
            "streams": self.streams.state(),
            "environment_rng": self.environment_rng,
            "capped_episodes": self.capped_episodes,
            "worker_streams": self.worker_streams,
            "checksum": _checksum(arrays),
        }
        handle, temporary = tempfile.mkstemp(dir=path.parent, suffix=".npz.partial")
        try:
            with os.fdopen(handle, "wb") as stream:
                np.savez(stream, metadata=np.array(json.dumps(metadata)), **arrays)
                stream.flush()
                os.fsync(stream.fileno())
            os.replace(temporary, path)
        except BaseException:
            Path(temporary).unlink(missing_ok=True)
            raise
        return path

    @classmethod
    def load(cls, path: str | os.PathLike) -> "TrainerState":
        """Read and verify a saved state (no pickle); :class:`TrainerStateError` if it is not one."""
        name = os.fspath(path)
        try:
            with np.load(path, allow_pickle=False) as archive:
                arrays = {key: archive[key] for key in _ARRAYS}
                metadata = json.loads(str(archive["metadata"]))
        except FileNotFoundError:
            raise TrainerStateError(f"trainer state {name!r} does not exist") from None
        except Exception as exc:  # zip, npy or JSON damage of any kind
            raise TrainerStateError(f"{name!r} is not a readable qtally trainer state ({type(exc).__name__})") from None
        if not isinstance(metadata, dict) or metadata.get("format") != STATE_FORMAT:
            raise TrainerStateError(f"{name!r} is not a qtally trainer state")
        if metadata.get("format_version") != STATE_VERSION:
            raise TrainerStateError(f"{name!r} has trainer-state version {metadata.get('format_version')}; this qtally reads {STATE_VERSION}")
        if metadata.get("checksum") != _checksum(arrays):
            raise TrainerStateError(f"{name!r} failed its checksum: the file is damaged or was edited")
        try:
            streams = RandomStreams(int(metadata["streams"]["seed"]))
            streams.restore(metadata["streams"])
            return cls(
                values=ActionValues(**{key: np.array(arrays[key]) for key in _ARRAYS}),
                streams=streams,
                episode=int(metadata["episode"]),
                window=LogWindow(**metadata["window"]),
                history={key: MetricSeries((int(step), float(value)) for step, value in series) for key, series in metadata["history"].items()},
                final_evaluation={key: float(value) for key, value in metadata["final_evaluation"].items()},
                environment_rng=metadata["environment_rng"],
                capped_episodes=int(metadata.get("capped_episodes", 0)),
                worker_streams=list(metadata.get("worker_streams", [])),
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise TrainerStateError(f"{name!r} has an incomplete trainer state ({exc})") from None
