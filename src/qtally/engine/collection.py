"""Parallel episode collection inside one run: workers play, the trainer learns.

For simulators whose ``step`` is slow (milliseconds), one run can play its episodes in N
worker processes on this machine (:class:`ProcessCollector`) or on Ray actors
(:mod:`qtally.engine.ray_collection`). Each batch works like this:

1. the trainer sends every worker one snapshot of the acting policy: the Q table and the
   per-state visit counts, as they are after the previous batch;
2. episode ``j`` of the batch (0-based) is played by worker ``j % N``, each worker playing
   its share in order with :class:`~qtally.engine.player.EpisodePlayer`, on its own
   environment and its own random streams;
3. the trainer learns from the episodes in episode order.

So the behaviour probabilities recorded are those of the snapshot actually used, and
off-policy importance sampling stays exact. Worker 0 draws from the trainer's own streams
(acting, starts and the environment's seed of ``seed``); worker ``k >= 1`` from streams
of its own (:func:`worker_streams`). Given the seed, the worker count and the batch size,
the episodes and the Q table are the same on every run, whichever worker finishes first;
one worker with a batch of one is the sequential trainer, bit for bit. Batches never
cross a logging, evaluation or checkpoint boundary, so a run stopped between batches and
resumed plays the same batches.

After each batch every worker reports its streams' state, so a checkpoint holds every
worker's place (:attr:`~qtally.control.trainer_state.TrainerState.worker_streams`). A
worker that dies, raises or takes longer than ``timeout`` seconds for its share ends the
collection with :class:`CollectionFailed` (one line); the trainer then checkpoints the
last whole batch, and the run can be resumed.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import sys
import time
from dataclasses import dataclass
from multiprocessing.connection import wait
from typing import Any

import numpy as np

from ..control.streams import SEED_MODULUS, UniformDraws
from ..envs.factory import EnvironmentSpec, make_environment
from ..errors import QtallyError
from .episodes import GymEpisodes
from .player import EpisodePlayer, Experience

__all__ = [
    "CollectSettings",
    "CollectionFailed",
    "WorkerBlueprint",
    "EpisodeWorker",
    "ProcessCollector",
    "worker_streams",
    "share_of",
    "make_collector",
    "compiled_beside_workers",
    "stream_places",
    "BACKENDS",
]

BACKENDS = ("local", "ray")
EPISODES_PER_WORKER = 8  # the default batch: enough work per snapshot to hide the messages, few enough to act on fresh values


def compiled_beside_workers(collect) -> str:
    """Why ``engine=compiled`` and collection workers (``collect``: its ``workers`` and ``backend``) exclude each other."""
    return (
        f"engine=compiled plays in this process and collect.workers={collect.workers} (backend {collect.backend}) plays in workers: "
        "choose one (the compiled engine is the faster where it applies)"
    )


def stream_places(acting: UniformDraws, starts: UniformDraws, environment_rng: dict | None) -> dict[str, Any]:
    """Where one player's random streams are (JSON-able): what a checkpoint keeps for a worker."""
    return {"acting": acting.state(), "starts": starts.state(), "environment_rng": environment_rng}


@dataclass(frozen=True)
class CollectSettings:
    """The ``collect`` config block: who plays the episodes of one run."""

    workers: int = 1
    batch: int | None = None  # None: 1 with one worker, EPISODES_PER_WORKER per worker otherwise
    backend: str = "local"
    address: str | None = None  # ray: a running cluster; None: a local instance on loopback
    worker_cpus: float = 1.0  # ray: CPUs reserved per worker
    timeout: float = 600.0
    force_workers: bool = False  # one local worker plays in a worker process too (to measure the collection's own cost)

    @property
    def batch_size(self) -> int:
        if self.batch is not None:
            return int(self.batch)
        return 1 if self.workers == 1 else EPISODES_PER_WORKER * self.workers

    @property
    def parallel(self) -> bool:
        """Whether episodes are played outside the trainer's process."""
        return self.workers > 1 or self.backend != "local" or self.force_workers


class CollectionFailed(QtallyError):
    """A worker died, raised or went silent; the message is the one line to print."""

    checkpoint = None  # the trainer's checkpoint of the last whole batch, when it wrote one


@dataclass(frozen=True)
class WorkerBlueprint:
    """Everything a worker needs to build its player (sent once, when it starts)."""

    spec: EnvironmentSpec
    variant: Any
    schedule: Any
    step_cap: int
    seed: int


def worker_streams(seed: int, worker: int) -> tuple[int, UniformDraws, UniformDraws]:
    """``(environment seed, acting draws, start draws)`` of worker ``worker >= 1`` of a run seeded ``seed``.

    Children of the run's seed sequence that :class:`~qtally.control.streams.RandomStreams`
    never uses (it spawns four), so no worker shares a draw with another or with the
    trainer's own streams, which worker 0 uses.

    >>> a, b = worker_streams(7, 1), worker_streams(7, 2)
    >>> a[0] != b[0] and a[1].next() != b[1].next()
    True
    """
    if worker < 1:
        raise ValueError("worker 0 plays with the trainer's own streams")
    sequence = np.random.SeedSequence(int(seed), spawn_key=(3 + int(worker),))
    environment, acting, starts = sequence.spawn(3)
    return (
        int(environment.generate_state(1)[0]) % SEED_MODULUS,
        UniformDraws(np.random.default_rng(acting)),
        UniformDraws(np.random.default_rng(starts)),
    )


def share_of(worker: int, workers: int, first_episode: int, count: int) -> list[int]:
    """The episode numbers worker ``worker`` plays in a batch: every ``workers``-th, from its own.

    >>> share_of(0, 3, 11, 7), share_of(2, 3, 11, 7)
    ([11, 14, 17], [13, 16])
    """
    return list(range(first_episode + worker, first_episode + count, workers))


class EpisodeWorker:
    """One worker: its own environment and streams, playing the episodes it is given.

    ``saved``: the state this worker reported last (from a checkpoint), else it starts
    where a fresh run starts. The same class runs in a process and as a Ray actor.
    """

    def __init__(self, blueprint: WorkerBlueprint, index: int, saved: dict[str, Any] | None = None):
        from ..control.streams import RandomStreams

        self.index = int(index)
        environment = make_environment(blueprint.spec)
        starts = list(environment.start_control.start_states()) if blueprint.variant.needs_start_control else []
        self.episodes = GymEpisodes(environment, blueprint.step_cap)
        self.player = EpisodePlayer(self.episodes, blueprint.variant, blueprint.schedule, starts)
        if self.index == 0:
            own = RandomStreams(blueprint.seed)
            env_seed, self.acting, self.starts = own.env_seed, own.acting, own.starts
        else:
            env_seed, self.acting, self.starts = worker_streams(blueprint.seed, self.index)
        if saved is None:
            self.episodes.seed(env_seed)
        else:
            self.acting.restore(saved["acting"])
            self.starts.restore(saved["starts"])
            if saved.get("environment_rng") is not None:
                self.episodes.restore_rng_state(saved["environment_rng"])
            else:
                self.episodes.seed(env_seed)

    def state(self) -> dict[str, Any]:
        """Where this worker's streams are (JSON-able): what a checkpoint keeps for it."""
        return stream_places(self.acting, self.starts, self.episodes.rng_state())

    def play(self, q: np.ndarray, state_visits: np.ndarray, episodes: list[int]) -> tuple[list[Experience], dict[str, Any], float]:
        """Play ``episodes`` in order on this snapshot: ``(experiences, state afterwards, seconds busy)``."""
        began = time.perf_counter()
        greedy = q.argmax(axis=1).tolist()  # once per snapshot, not per episode
        played = [self.player.play(q, state_visits, episode, self.acting, self.starts, greedy) for episode in episodes]
        return played, self.state(), time.perf_counter() - began

    def close(self) -> None:
        self.episodes.environment.close()


class WorkerRates:
    """Episodes per second of busy time, per worker, over one logging window."""

    def __init__(self, workers: int):
        self.workers = workers
        self._start_window()

    def _start_window(self) -> None:
        self.episodes = [0] * self.workers
        self.seconds = [0.0] * self.workers

    def add(self, worker: int, episodes: int, seconds: float) -> None:
        self.episodes[worker] += episodes
        self.seconds[worker] += seconds

    def metrics(self) -> dict[str, float]:
        """``collect_rate_w<k>`` for each worker that played in the window; the window starts again."""
        out = {f"collect_rate_w{k}": n / s for k, (n, s) in enumerate(zip(self.episodes, self.seconds)) if n and s > 0}
        self._start_window()
        return out


class Collector:
    """What the trainer asks of a backend; subclasses say how workers are reached."""

    def __init__(self, settings: CollectSettings, saved: list[dict[str, Any] | None]):
        self.settings = settings
        self.workers = settings.workers
        self.latest: list[dict[str, Any] | None] = list(saved)  # every worker's stream state after the last whole batch
        self.rates = WorkerRates(self.workers)

    def collect(self, q: np.ndarray, state_visits: np.ndarray, first_episode: int, count: int) -> list[Experience]:
        """Episodes ``first_episode .. first_episode + count - 1``, played on this snapshot, in order."""
        shares = {k: share_of(k, self.workers, first_episode, count) for k in range(self.workers)}
        shares = {k: share for k, share in shares.items() if share}
        replies = self._play(q, state_visits, shares)
        ordered: list[Experience | None] = [None] * count
        for k, (experiences, state, seconds) in replies.items():
            self.latest[k] = state
            self.rates.add(k, len(experiences), seconds)
            for experience in experiences:
                ordered[experience.episode - first_episode] = experience
        return ordered  # type: ignore[return-value]

    def _play(self, q, state_visits, shares: dict[int, list[int]]) -> dict[int, tuple[list[Experience], dict, float]]:
        raise NotImplementedError

    def close(self) -> None:
        """Stop every worker (idempotent)."""


def _serve(connection, blueprint: WorkerBlueprint, index: int, saved: dict[str, Any] | None) -> None:
    """A worker process: build the worker, then play what the trainer sends until it says stop."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C reaches the whole group: the trainer decides when to stop
    try:
        worker = EpisodeWorker(blueprint, index, saved)
    except BaseException as exc:  # noqa: BLE001 - reported to the trainer as one line
        connection.send(("error", _one_line(exc)))
        return
    connection.send(("ready", None))
    try:
        while True:
            try:
                message = connection.recv()
            except EOFError:  # the trainer went away
                return
            if message[0] == "stop":
                worker.close()
                os._exit(0)  # nothing to tear down that matters: an interpreter's full exit costs the trainer a wait
            _, q, state_visits, episodes = message
            try:
                connection.send(("played", worker.play(q, state_visits, episodes)))
            except BaseException as exc:  # noqa: BLE001 - the simulator's own error, as one line
                connection.send(("error", _one_line(exc)))
                return
    finally:
        worker.close()


def _one_line(exc: BaseException) -> str:
    from ..errors import first_line

    return f"{type(exc).__name__}: {first_line(exc)}" if not isinstance(exc, QtallyError) else str(exc)


def _start_lean(process) -> None:
    """Start a spawned worker without the caller's main script and start method.

    ``spawn`` tells the child to run the caller's ``__main__`` first (a script without an
    ``if __name__ == "__main__"`` guard would then train again, recursively) and to set the
    caller's start method (inside a joblib/loky sweep job that is ``loky``, which a plain
    child cannot set). A worker needs neither: it imports qtally and the environment's
    module by name. Both entries are left out of what the child is told, for this start only.
    """
    from multiprocessing import spawn

    prepare = spawn.get_preparation_data

    def lean(name):
        data = prepare(name)
        for key in ("init_main_from_path", "init_main_from_name", "start_method"):
            data.pop(key, None)
        return data

    spawn.get_preparation_data = lean
    try:
        process.start()
    finally:
        spawn.get_preparation_data = prepare


class ProcessCollector(Collector):
    """Workers as processes on this machine (started fresh, ``spawn``, so no thread or lock of the trainer is copied)."""

    def __init__(self, settings: CollectSettings, blueprint: WorkerBlueprint, saved: list[dict[str, Any] | None]):
        super().__init__(settings, saved)
        context = multiprocessing.get_context("spawn")
        self.processes = []
        self.connections = []
        try:
            for k in range(self.workers):
                parent, child = context.Pipe()
                process = context.Process(target=_serve, args=(child, blueprint, k, saved[k]), name=f"qtally-collect-{k}", daemon=True)
                _start_lean(process)
                child.close()
                self.processes.append(process)
                self.connections.append(parent)
            for k in range(self.workers):
                kind, detail = self._receive(k, "starting")
                if kind == "error":
                    raise CollectionFailed(f"collection worker {k} could not start: {detail}")
        except BaseException:
            self.close()
            raise

    def _receive(self, k: int, doing: str):
        connection, process = self.connections[k], self.processes[k]
        deadline = time.monotonic() + self.settings.timeout
        while True:
            left = deadline - time.monotonic()
            if left <= 0:
                raise CollectionFailed(
                    f"collection worker {k} (pid {process.pid}) sent nothing for {self.settings.timeout:g} s while {doing}; "
                    "raise collect.timeout for a simulator this slow"
                )
            ready = wait([connection, process.sentinel], timeout=min(left, 1.0))
            if connection in ready:
                try:
                    return connection.recv()
                except (EOFError, OSError):
                    pass  # the process is gone: reported below
            elif process.sentinel not in ready:
                continue
            process.join(timeout=5)
            code = process.exitcode
            how = f"was killed by signal {-code}" if code is not None and code < 0 else f"exited with code {code}"
            raise CollectionFailed(f"collection worker {k} (pid {process.pid}) {how} while {doing}")

    def _play(self, q, state_visits, shares):
        for k, share in shares.items():
            try:
                self.connections[k].send(("play", q, state_visits, share))
            except (BrokenPipeError, OSError):
                pass  # the process is gone: _receive names how
        replies = {}
        for k, share in shares.items():
            kind, detail = self._receive(k, f"playing episodes {share[0]}-{share[-1]}")
            if kind == "error":
                raise CollectionFailed(f"collection worker {k} failed while playing episodes {share[0]}-{share[-1]}: {detail}")
            replies[k] = detail
        return replies

    def close(self) -> None:
        for connection in self.connections:
            try:
                connection.send(("stop",))
            except (BrokenPipeError, OSError):
                pass
        for process in self.processes:
            process.join(timeout=2)
            if process.is_alive():
                process.kill()
                process.join(timeout=5)
        for connection in self.connections:
            connection.close()
        self.processes, self.connections = [], []


def make_collector(settings: CollectSettings, blueprint: WorkerBlueprint, saved: list[dict[str, Any] | None]) -> Collector:
    """Start the workers ``settings`` asks for, each from its ``saved`` state (``None``: fresh)."""
    if settings.backend == "ray":
        from .ray_collection import RayCollector

        return RayCollector(settings, blueprint, saved)
    if settings.backend != "local":
        raise QtallyError(f"collect.backend={settings.backend!r} is unknown; choose one of {', '.join(BACKENDS)}")
    return ProcessCollector(settings, blueprint, saved)
