"""The training loop: play episodes, update the Q table, measure, and write to a sink.

This module wires the core (:mod:`qtally.control`) to the episode source
(:mod:`qtally.engine.episodes`) and a :class:`~qtally.tracking.sink.Recorder`; it imports
neither MLflow nor Hydra. Everything the loop knows lives in one
:class:`~qtally.control.trainer_state.TrainerState`, which can be saved and restored.

Random streams (:mod:`qtally.control.streams`): ``seed`` is split into independent streams
for the training environment, the acting policy (one uniform per decision), exploring
starts and the evaluation seeds. Evaluation plays on a private environment of its own,
so how often a run evaluates never changes its Q table. Same settings and seed give the
same Q table bit for bit.

Time limits and the step cap: see :mod:`qtally.control.truncation`. A bootstrapped tail
is the value of the state reached *under the policy the variant learns* (the epsilon-soft
policy for on-policy control, the greedy one otherwise).
"""

from __future__ import annotations

import itertools
import tempfile
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Mapping, Protocol

import numpy as np

from .control.action_values import ActionValues
from .control.streams import evaluation_base, evaluation_seeds
from .control.trainer_state import LogWindow, MetricSeries, TrainerState, record_metrics, window_metric_columns
from .control.truncation import TRUNCATION_CHOICES, check_truncation, resolve_step_cap, tail_value
from .engine.collection import CollectionFailed, CollectSettings, WorkerBlueprint, compiled_beside_workers, make_collector, stream_places
from .engine.compiled_update import COMPILED_FROM, CompiledUpdate
from .engine.episodes import GymEpisodes
from .engine.player import EpisodePlayer, Experience
from .envs.factory import TabularEnvironment, make_environment
from .evaluate.rollouts import summarise_returns
from .evaluate.seeded_evaluation import SeededEvaluation
from .policy.artifact import PolicyArtifact
from .policy.table_policy import Fallback, greedy_actions
from .tracking.sink import NullRecorder, Recorder, log_metric_columns

if TYPE_CHECKING:
    from .engine.compiled import ClosedWindows

__all__ = ["TrainingSettings", "TrainingOutcome", "Trainer", "train", "TRUNCATION_CHOICES", "ProgressSink"]

# A probe turns the current Q table into extra metrics at each evaluation
# (for example the exact optimality gap where the environment has a model).
Probe = Callable[[np.ndarray], Mapping[str, float]]

# Episodes of one compiled-engine span at most (whole logging windows; at least one): a call
# costs about 20 microseconds of Python, and a stop request or the progress bar waits for a span.
_SPAN_EPISODES = 10_000


class TrainingStopped(KeyboardInterrupt):
    """Training stopped on request (SIGINT, SIGTERM) between two episodes, after a checkpoint."""

    def __init__(self, episode: int, checkpoint: Path | None):
        super().__init__(f"stopped at episode {episode}")
        self.episode = episode
        self.checkpoint = checkpoint


AUTO_LOG_WINDOWS = 500  # log_every=auto: the most logging windows a run sends


def logging_window(log_every: int | str, episodes: int) -> int:
    """Episodes per logging window; ``"auto"``: 100, or on a long run the first 1, 2 or 5 times a power of ten that keeps it to 500 windows.

    Each window sends seven metric values, about 8 microseconds each into a SQLite store
    (``scripts/bench.py``); on the main job's 100,000 episodes, about a second of compiled
    training, 1,000 windows cost about 6% of the run and 500 windows about 3%, and a
    500-point curve shows everything a 1,000-point one does at a chart's width.
    """
    if log_every != "auto":
        return int(log_every)
    needed = -(-int(episodes) // AUTO_LOG_WINDOWS)  # ceil
    for power in itertools.count(2):  # 100, 200, 500, 1000, 2000, ...
        for lead in (1, 2, 5):
            if lead * 10**power >= needed:
                return lead * 10**power


class ProgressSink(Protocol):
    def update(self, episodes: int, status: Mapping[str, float]) -> None: ...


@dataclass(frozen=True)
class TrainingSettings:
    episodes: int
    seed: int = 0
    log_every: int = 100
    eval_every: int = 1000
    eval_episodes: int = 100
    snapshot_every: int = 0
    truncation: str = "as_terminal"
    initial_value: float = 0.0
    step_cap: int | None = None  # None: derived from the table size (control/truncation.py)
    engine: str = "auto"  # auto | gym | compiled (qtally.engine.compiled)
    checkpoint_every: int = 0  # 0: checkpoints only when stopped (and at the end, if a checkpoint hook is given)
    eval_seed: int | None = None  # None: the evaluation stream of ``seed``; a number: shared by every run that names it
    eval_replay: str = "changed"  # changed: an evaluation plays again only episodes a policy change can alter | all (qtally.evaluate.seeded_evaluation)
    collect: CollectSettings = field(default_factory=CollectSettings)  # who plays the episodes (qtally.engine.collection)


@dataclass
class TrainingOutcome:
    values: ActionValues
    artifact: PolicyArtifact
    history: dict[str, MetricSeries] = field(default_factory=dict)  # each a sequence of (step, value) pairs
    final_evaluation: dict[str, float] = field(default_factory=dict)
    capped_episodes: int = 0
    step_cap: int = 0
    engine: str = "gym"
    engine_reason: str = ""
    compile_seconds: float = 0.0
    evaluation_note: str = ""  # how the evaluations were played (SeededEvaluation.summary)


class Trainer:
    """Monte Carlo control over one environment, from a fresh or a restored :class:`TrainerState`."""

    def __init__(
        self,
        environment: TabularEnvironment,
        variant,
        schedule,
        settings: TrainingSettings,
        *,
        recorder: Recorder | None = None,
        evaluation_environment: TabularEnvironment | None = None,
        probes: tuple[Probe, ...] = (),
        progress: ProgressSink | None = None,
        facts: Mapping[str, object] | None = None,
        state: TrainerState | None = None,
        fallback: Fallback | None = None,
        checkpoint: Callable[["Trainer"], Path | None] | None = None,
    ):
        check_truncation(settings.truncation)
        self.environment = environment
        self.variant = variant
        self.schedule = schedule
        self.settings = settings
        self.recorder = recorder or NullRecorder()
        self.probes = tuple(probes)
        self.progress = progress
        self.facts = dict(facts or {})
        self.fallback = fallback  # what snapshots and the final policy do in states training never reached
        self.checkpoint = checkpoint  # writes the state somewhere safe (the experiment layer: a file and a run artifact)
        self.stop_requested = False
        self.step_cap = resolve_step_cap(settings.step_cap, environment.n_states)
        self.start_states = list(environment.start_control.start_states()) if variant.needs_start_control else []
        requested = settings.engine
        if settings.collect.parallel:
            if requested == "compiled":
                raise ValueError(compiled_beside_workers(settings.collect))
            requested = "gym"
        self.engine, self.engine_reason, self.episodes = choose_engine(requested, environment, variant, schedule, self.step_cap, self.start_states)
        if settings.collect.parallel:
            where = f"Ray actors at {settings.collect.address}" if settings.collect.address else ("Ray actors on a local instance" if settings.collect.backend == "ray" else "processes")
            self.engine_reason = f"{settings.collect.workers} collection workers ({where}), batches of {settings.collect.batch_size} episodes"
        self._collector = None
        self._evaluation_environment = evaluation_environment
        self.state = state or TrainerState.fresh(environment.n_states, environment.n_actions, settings.seed, settings.initial_value)
        if self.state.values.q.shape != (environment.n_states, environment.n_actions):
            raise ValueError(f"the trainer state holds a {self.state.values.q.shape} table; this environment needs {(environment.n_states, environment.n_actions)}")
        if self.state.environment_rng is not None:
            self.episodes.restore_rng_state(self.state.environment_rng)
        elif self.state.episode == 0:
            self.episodes.seed(self.state.streams.env_seed)
        self.player = EpisodePlayer(self.episodes, variant, schedule, self.start_states) if self.engine == "gym" else None
        # Long episodes are learned from by the compiled engine's update (same floats, fewer
        # microseconds) once numba is loaded or the steps left repay loading it; None: the
        # variant's Python loop learns from every episode.
        self.long_episode_update: CompiledUpdate | None = CompiledUpdate(variant) if self.engine == "gym" else None
        self.eval_seeds = evaluation_seeds(evaluation_base(settings.seed, settings.eval_seed), settings.eval_episodes)
        self.evaluation = SeededEvaluation(self.eval_seeds, self.step_cap, settings.eval_replay)

    # ------------------------------------------------------------ pieces

    def snapshot(self) -> PolicyArtifact:
        values = self.state.values
        return PolicyArtifact.from_q(values.q, values.visits, self.environment.signature(), fallback=self.fallback, episode=self.state.episode, **self.facts)

    def _log_window(self, window: LogWindow, coverage: float, episode: int) -> None:
        """One logging window's metrics at ``episode``, to the sink, the history and the progress bar."""
        metrics = window.metrics()
        metrics["coverage_sa"] = coverage
        self._log(metrics, episode)
        if self._collector is not None:  # timings: recorded, but not part of the state's history
            self.recorder.log_metrics(self._collector.rates.metrics(), episode)
        if self.progress is not None:
            self.progress.update(episode, metrics)

    def _log_closed_windows(self, closed: ClosedWindows) -> None:
        """The windows the compiled engine closed inside a span, logged column by column (the same metrics as :meth:`_log_window` one at a time)."""
        if not closed.episodes:
            return
        columns = window_metric_columns(closed.sums)
        columns["coverage_sa"] = closed.coverage.tolist()
        steps = closed.episodes
        log_metric_columns(self.recorder, steps, columns)
        record_metrics(self.state.history, steps, columns)
        if self.progress is not None:
            self.progress.update(steps[-1], {name: values[-1] for name, values in columns.items()})

    def _log(self, metrics: Mapping[str, float], step: int) -> None:
        self.recorder.log_metrics(metrics, step)
        record_metrics(self.state.history, (step,), {name: (float(value),) for name, value in metrics.items()})

    def evaluate(self) -> dict[str, float]:
        """Greedy rollouts on the private evaluation environment and fixed seeds, plus every probe.

        Only the episodes a change of the greedy policy can alter are played again
        (:mod:`qtally.evaluate.seeded_evaluation`): the returns are those of playing them all.
        """
        if self._evaluation_environment is None:
            self._evaluation_environment = make_environment(self.environment.spec)
            self._owns_evaluation_environment = True
        q = self.state.values.q
        returns = self.evaluation.returns(self._evaluation_environment, greedy_actions(q))
        summary = summarise_returns(returns)
        metrics = {"eval_return_mean": summary.mean, "eval_return_ci95": summary.ci95}
        for probe in self.probes:
            metrics.update(probe(q))
        self._log(metrics, self.state.episode)
        self.state.final_evaluation = metrics
        return metrics

    def play_and_learn(self) -> None:
        """One episode on the gym path: played against the live tables, then learned from."""
        state = self.state
        streams = state.streams
        values = state.values
        self.learn(self.player.play(values.q, values.state_visits, state.episode + 1, streams.acting, streams.starts, values.greedy))

    def learn(self, experience: Experience) -> None:
        """Update the tables from the next episode, played by this trainer or by a collection worker.

        Episodes must come in order (``experience.episode`` is the next one). The update
        reads the episode's lists; the compiled kernel does the same sums in the same order
        (:mod:`qtally.engine.kernels`).
        """
        state, variant = self.state, self.variant
        if experience.episode != state.episode + 1:
            raise ValueError(f"episode {experience.episode} arrived where episode {state.episode + 1} was due")
        state.episode = episode = experience.episode
        values = state.values
        played = experience.played
        states = played.states
        length = len(states)
        counted = False  # whether the episode's states are in the visit counts yet
        tail = 0.0
        if played.truncated and self.settings.truncation != "as_terminal":
            self._count_visits(states)  # the bootstrap's epsilon reads the counts with this episode in
            counted = True
            tail = tail_value(self.settings.truncation, truncated=True, bootstrap_value=partial(self._bootstrap_value, played.final_state, episode))  # no closure: its cells cost every call
        used = 0
        if tail is not None:
            compiled = self._compiled_update_for(length, episode)
            if compiled is None:
                used = variant.update_lists(values, states, played.actions, played.rewards, played.probabilities, tail)
            else:  # the compiled update also counts the visits, in a microsecond less than a Python loop
                used = compiled.update_lists(values, states, played.actions, played.rewards, played.probabilities, tail, count_visits=not counted)
                counted = True
        if not counted:
            self._count_visits(states)
        state.capped_episodes += played.capped
        decisions = experience.decisions
        state.window.add(played.total_reward, length, experience.epsilon_sum / decisions if decisions else 0.0, played.truncated, played.capped, used)

    def _compiled_update_for(self, length: int, episode: int) -> CompiledUpdate | None:
        """The compiled update for an episode of ``length`` steps, or None: the variant's Python loop learns from it."""
        compiled = self.long_episode_update
        if compiled is None or length < COMPILED_FROM:
            return None
        if compiled.ready or compiled.load_if_it_pays((self.settings.episodes - episode) * length):
            return compiled
        self.long_episode_update = None  # decided once: too few steps left to repay loading numba
        return None

    def _bootstrap_value(self, final: int, episode: int) -> float:
        """The value of the state a truncated episode reached, under the policy the variant learns."""
        values, variant = self.state.values, self.variant
        epsilon_final = variant.behaviour_epsilon(self.schedule(episode, int(values.state_visits[final])))
        return variant.tail_value(values.q[final], epsilon_final)

    def _count_visits(self, states: list[int]) -> None:
        counts = self.state.values.state_visit_counts
        for s in states:
            counts[s] += 1

    def request_stop(self, reason: str = "a stop request") -> None:
        """Stop after the episode being played: checkpoint, then raise :class:`TrainingStopped` (safe from a signal handler)."""
        self.stop_requested = True
        self.stop_reason = reason

    def _write_checkpoint(self) -> Path | None:
        if self.checkpoint is None:
            return None
        self.recorder.flush()  # what the checkpoint says was logged must be in the store
        self._capture_streams()
        return self.checkpoint(self)

    def _capture_streams(self) -> None:
        """Put every random stream's current place into the state (the workers' ones after their last whole batch)."""
        collector = self._collector
        if collector is None:
            if not self.settings.collect.parallel:  # else the workers' places were captured when they stopped
                self.state.environment_rng = self.episodes.rng_state()
            return
        own = collector.latest[0]
        if own is not None:
            self.state.streams.acting.restore(own["acting"])
            self.state.streams.starts.restore(own["starts"])
            self.state.environment_rng = own["environment_rng"]
        self.state.worker_streams = list(collector.latest[1:])

    def start_workers(self) -> None:
        """Start the collection workers, each where the state says it is (:meth:`run` does it when needed).

        Call it before :meth:`run` to keep the workers' start-up out of a timing.
        """
        if not self.settings.collect.parallel or self._collector is not None:
            return
        state, collect = self.state, self.settings.collect
        own = None
        if state.episode > 0 or state.environment_rng is not None:
            own = stream_places(state.streams.acting, state.streams.starts, state.environment_rng)
        others = list(state.worker_streams) + [None] * (collect.workers - 1 - len(state.worker_streams))
        blueprint = WorkerBlueprint(spec=self.environment.spec, variant=self.variant, schedule=self.schedule, step_cap=self.step_cap, seed=state.streams.seed)
        self._collector = make_collector(collect, blueprint, [own, *others[: collect.workers - 1]])

    def _next_boundary(self, stop: int) -> int:
        """The next episode after which something is logged, evaluated or saved (or ``stop``).

        The compiled engine closes logging windows itself (:meth:`CompiledEpisodes.learn`),
        so for it a span runs over whole windows up to about ``_SPAN_EPISODES`` episodes:
        one kernel call per span, where a call per window of 100 short episodes cost about
        a quarter of the run in the Python around it. A stop request waits for the span's end.
        """
        episode, settings = self.state.episode, self.settings
        log_every = settings.log_every
        if self.engine == "compiled":
            log_every *= max(1, _SPAN_EPISODES // log_every)
        boundary = min(stop, (episode // log_every + 1) * log_every)
        for every in (settings.eval_every, settings.snapshot_every, settings.checkpoint_every):
            if every:
                boundary = min(boundary, (episode // every + 1) * every)
        return boundary

    def _play_until(self, episode: int) -> ClosedWindows | None:
        """Play and learn every episode up to ``episode``, through the engine this trainer chose.

        Returns the logging windows closed before ``episode`` (only the compiled engine
        closes any, None elsewhere: on the gym path every span ends on a logging boundary).
        """
        if self._collector is not None:  # batches on one snapshot each, learned from in episode order
            batch, values = self.settings.collect.batch_size, self.state.values
            while self.state.episode < episode and not self.stop_requested:
                count = min(batch, episode - self.state.episode)
                for experience in self._collector.collect(values.q, values.state_visits, self.state.episode + 1, count):
                    self.learn(experience)
            return None
        if self.engine == "compiled":
            return self.episodes.learn(self.state, self.variant, self.schedule, self.settings.truncation, episode - self.state.episode, self.settings.log_every)
        # play_and_learn, with the lookups hoisted out of the loop: on short episodes (a
        # Blackjack hand is one or two steps) the per-episode glue is a fair share of the time.
        state, play, learn = self.state, self.player.play, self.learn
        values, acting, starts = state.values, state.streams.acting, state.streams.starts
        q, state_visits, greedy = values.q, values.state_visits, values.greedy
        while state.episode < episode and not self.stop_requested:
            learn(play(q, state_visits, state.episode + 1, acting, starts, greedy))
        return None

    def save_state(self, path) -> Path:
        """Write the whole state between two episodes, the environment's generator included."""
        self._capture_streams()
        return self.state.save(path)

    # ------------------------------------------------------------ the loop

    def run(self, pause_at: int | None = None) -> TrainingOutcome:
        """Play until ``settings.episodes``, logging, evaluating and snapshotting on the way.

        ``pause_at`` stops earlier, between two episodes, as a checkpoint does: the run is
        not over, so nothing is logged as final, and :meth:`save_state` can be called.
        """
        settings, state = self.settings, self.state
        stop = settings.episodes if pause_at is None else min(int(pause_at), settings.episodes)
        snapshot_dir = Path(tempfile.mkdtemp(prefix="qtally-snapshots-"))
        try:
            self.start_workers()
            while state.episode < stop:
                closed = self._play_until(self._next_boundary(stop))
                if closed is not None:  # windows the compiled engine closed on the way
                    self._log_closed_windows(closed)
                episode = state.episode
                last = episode == settings.episodes
                if episode % settings.log_every == 0 or last:
                    self._log_window(state.window, state.values.coverage(), episode)
                    state.window = LogWindow()
                if (settings.eval_every and episode % settings.eval_every == 0) or last:
                    self.evaluate()
                if settings.snapshot_every and episode % settings.snapshot_every == 0 and not last:
                    path = self.snapshot().save(snapshot_dir / f"policy-{episode:09d}.npz")
                    self.recorder.log_file(path, "snapshots")
                    path.unlink()
                # A stop is honoured after this boundary's logging and evaluation, so a resumed run
                # never misses them (the compiled engine always stops on a boundary).
                if self.stop_requested and not last:
                    raise TrainingStopped(episode, self._write_checkpoint())
                if settings.checkpoint_every and (episode % settings.checkpoint_every == 0 or last):
                    self._write_checkpoint()
            self._capture_streams()
            self.recorder.flush()
        except CollectionFailed as failure:  # the last whole batch is kept, so the run can be resumed
            failure.checkpoint = self._write_checkpoint()
            raise
        finally:
            if self._collector is not None:  # its streams' places stay in the state; run() starts it again
                self._capture_streams()
                self._collector.close()
                self._collector = None
            if getattr(self, "_owns_evaluation_environment", False):
                self._evaluation_environment.close()
                self._evaluation_environment = None
                self._owns_evaluation_environment = False
            for leftover in snapshot_dir.glob("*"):
                leftover.unlink()
            snapshot_dir.rmdir()
        return TrainingOutcome(
            values=state.values,
            artifact=self.snapshot(),
            history=state.history,
            final_evaluation=state.final_evaluation,
            capped_episodes=state.capped_episodes,
            step_cap=self.step_cap,
            engine=self.engine,
            engine_reason=self.engine_reason,
            compile_seconds=getattr(self.episodes, "compile_seconds", 0.0),
            evaluation_note=self.evaluation.summary(),
        )


def choose_engine(requested: str, environment: TabularEnvironment, variant, schedule, step_cap: int, start_states: list):
    """``(engine, reason, episode source)``: the compiled engine where it can run and was not refused.

    ``auto`` takes it when the environment lists its outcomes and numba is installed;
    ``compiled`` insists (a one-line :class:`EngineUnavailable` otherwise); ``gym`` never.
    """
    from .engine.compiled import ENGINE_CHOICES, CompiledEpisodes, EngineUnavailable, schedule_code, time_limit_of, variant_code
    from .envs.model import NoModelError
    from .envs.model_extraction import outcomes_of

    if requested not in ENGINE_CHOICES:
        raise ValueError(f"engine={requested!r} is unknown; choose one of {', '.join(ENGINE_CHOICES)}")
    gym_source = GymEpisodes(environment, step_cap)
    if requested == "gym":
        return "gym", "engine=gym asked for", gym_source
    try:
        import numba  # noqa: F401
    except ImportError:
        reason = "numba is not installed (pip install numba)"
        if requested == "compiled":
            raise EngineUnavailable(f"engine=compiled: {reason}; or use engine=gym") from None
        return "gym", reason, gym_source
    try:
        table = outcomes_of(environment.env)
        if table.n_states != environment.n_states or table.n_actions != environment.n_actions:
            raise EngineUnavailable(f"its outcome table is {table.n_states}x{table.n_actions}, the Q table {environment.n_states}x{environment.n_actions}")
        variant_code(variant)
        schedule_code(schedule)
    except (NoModelError, EngineUnavailable) as exc:
        if requested == "compiled":
            raise EngineUnavailable(f"engine=compiled cannot run {environment.spec.id}: {exc}; use engine=gym") from None
        return "gym", str(exc), gym_source
    encode = environment.encoder.encode
    starts = np.array([encode(o) for o in start_states], dtype=np.int64)
    source = CompiledEpisodes(table, step_cap, time_limit_of(environment.env), starts)
    return "compiled", f"{environment.spec.id} lists its outcomes ({table.n_states} states)", source


def train(
    environment: TabularEnvironment,
    variant,
    schedule,
    settings: TrainingSettings,
    **options,
) -> TrainingOutcome:
    """Run Monte Carlo control for ``settings.episodes`` episodes; return the table and the final policy.

    ``options`` are :class:`Trainer`'s keyword arguments (recorder, evaluation_environment,
    probes, progress, facts, state, fallback).
    """
    return Trainer(environment, variant, schedule, settings, **options).run()
