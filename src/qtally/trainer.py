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

import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Mapping, Protocol

import numpy as np

from .control.action_values import ActionValues
from .control.streams import evaluation_base, evaluation_seeds, start_pair
from .control.trainer_state import LogWindow, TrainerState
from .control.truncation import TRUNCATION_CHOICES, check_truncation, resolve_step_cap, tail_value
from .engine.episodes import GymEpisodes
from .envs.factory import TabularEnvironment, make_environment
from .evaluate.rollouts import greedy_rollout_returns, summarise_returns
from .policy.artifact import PolicyArtifact
from .policy.table_policy import Fallback, epsilon_greedy_decision, greedy_actions
from .tracking.sink import NullRecorder, Recorder

__all__ = ["TrainingSettings", "TrainingOutcome", "Trainer", "train", "TRUNCATION_CHOICES", "ProgressSink"]

# A probe turns the current Q table into extra metrics at each evaluation
# (for example the exact optimality gap where the environment has a model).
Probe = Callable[[np.ndarray], Mapping[str, float]]


class TrainingStopped(KeyboardInterrupt):
    """Training stopped on request (SIGINT, SIGTERM) between two episodes, after a checkpoint."""

    def __init__(self, episode: int, checkpoint: Path | None):
        super().__init__(f"stopped at episode {episode}")
        self.episode = episode
        self.checkpoint = checkpoint


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


@dataclass
class TrainingOutcome:
    values: ActionValues
    artifact: PolicyArtifact
    history: dict[str, list[tuple[int, float]]] = field(default_factory=dict)
    final_evaluation: dict[str, float] = field(default_factory=dict)
    capped_episodes: int = 0
    step_cap: int = 0
    engine: str = "gym"
    engine_reason: str = ""
    compile_seconds: float = 0.0


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
        self._per_state_schedule = bool(getattr(schedule, "per_state", False))
        self.stop_requested = False
        self.step_cap = resolve_step_cap(settings.step_cap, environment.n_states)
        self.start_states = list(environment.start_control.start_states()) if variant.needs_start_control else []
        self.engine, self.engine_reason, self.episodes = choose_engine(settings.engine, environment, variant, schedule, self.step_cap, self.start_states)
        self._evaluation_environment = evaluation_environment
        self.state = state or TrainerState.fresh(environment.n_states, environment.n_actions, settings.seed, settings.initial_value)
        if self.state.values.q.shape != (environment.n_states, environment.n_actions):
            raise ValueError(f"the trainer state holds a {self.state.values.q.shape} table; this environment needs {(environment.n_states, environment.n_actions)}")
        if self.state.environment_rng is not None:
            self.episodes.restore_rng_state(self.state.environment_rng)
        elif self.state.episode == 0:
            self.episodes.seed(self.state.streams.env_seed)
        self.eval_seeds = evaluation_seeds(evaluation_base(settings.seed, settings.eval_seed), settings.eval_episodes)

    # ------------------------------------------------------------ pieces

    def snapshot(self) -> PolicyArtifact:
        values = self.state.values
        return PolicyArtifact.from_q(values.q, values.visits, self.environment.signature(), fallback=self.fallback, episode=self.state.episode, **self.facts)

    def _log(self, metrics: Mapping[str, float], step: int) -> None:
        self.recorder.log_metrics(metrics, step)
        for name, value in metrics.items():
            self.state.history.setdefault(name, []).append((step, float(value)))

    def evaluate(self) -> dict[str, float]:
        """Greedy rollouts on the private evaluation environment and fixed seeds, plus every probe."""
        if self._evaluation_environment is None:
            self._evaluation_environment = make_environment(self.environment.spec)
            self._owns_evaluation_environment = True
        q = self.state.values.q
        returns = greedy_rollout_returns(self._evaluation_environment, greedy_actions(q), self.eval_seeds, self.step_cap)
        summary = summarise_returns(returns)
        metrics = {"eval_return_mean": summary.mean, "eval_return_ci95": summary.ci95}
        for probe in self.probes:
            metrics.update(probe(q))
        self._log(metrics, self.state.episode)
        self.state.final_evaluation = metrics
        return metrics

    def play_and_learn(self) -> None:
        """One episode on the gym path: choose a start, play it, update the table, add it to the window.

        Kept lean, since it runs for every step: epsilon is computed once per episode unless
        the schedule depends on the state, the greedy action comes from the row as a list,
        and the update reads the episode's lists. The compiled kernel does the same sums in
        the same order (:mod:`qtally.engine.kernels`).
        """
        state, variant, schedule = self.state, self.variant, self.schedule
        values = state.values
        q, state_visits = values.q, values.state_visits
        state.episode += 1
        episode = state.episode
        next_uniform = state.streams.acting.next
        n_actions = self.environment.n_actions
        decisions = 0
        epsilon_sum = 0.0

        if self._per_state_schedule:
            behaviour_epsilon = variant.behaviour_epsilon
            epsilons: list[float] = []

            def choose(s: int) -> tuple[int, float]:
                epsilon = behaviour_epsilon(schedule(episode, int(state_visits[s])))
                epsilons.append(epsilon)
                state_visits[s] += 1
                return epsilon_greedy_decision(q[s].tolist(), epsilon, next_uniform())
        else:
            epsilon = variant.behaviour_epsilon(schedule(episode, 0))
            epsilons = None
            visited: list[int] = []
            remember = visited.append
            explore = epsilon / n_actions
            exploit = explore + (1.0 - epsilon)

            def choose(s: int) -> tuple[int, float]:
                remember(s)
                row = q[s].tolist()
                greedy = row.index(max(row))
                u = next_uniform()
                if u < epsilon:
                    action = min(int(u / epsilon * n_actions), n_actions - 1)
                    return action, (exploit if action == greedy else explore)
                return greedy, exploit

        start_observation = first_action = None
        if variant.needs_start_control:
            index, first_action = start_pair(state.streams.starts.next(), len(self.start_states), n_actions)
            start_observation = self.start_states[index]
            state_visits[self.environment.encoder.encode(start_observation)] += 1
        played = self.episodes.play(choose, start_observation=start_observation, first_action=first_action)
        if epsilons is None:
            for s in visited:  # counted after the episode: nothing in it depends on the count
                state_visits[s] += 1
            decisions = len(visited)
            for _ in range(decisions):  # the same running sum as a per-decision schedule and the kernel
                epsilon_sum += epsilon
        else:
            decisions = len(epsilons)
            for e in epsilons:
                epsilon_sum += e

        tail = 0.0
        if played.truncated and self.settings.truncation != "as_terminal":
            def bootstrap_value() -> float:
                final = played.final_state
                epsilon_final = variant.behaviour_epsilon(schedule(episode, int(state_visits[final])))
                return variant.tail_value(q[final], epsilon_final)

            tail = tail_value(self.settings.truncation, truncated=True, bootstrap_value=bootstrap_value)
        used = 0
        if tail is not None:
            used = variant.update_lists(values, played.states, played.actions, played.rewards, played.probabilities, tail)
        state.capped_episodes += played.capped
        state.window.add(played.total_reward, played.length, epsilon_sum / decisions if decisions else 0.0, played.truncated, played.capped, used)

    def request_stop(self, reason: str = "a stop request") -> None:
        """Stop after the episode being played: checkpoint, then raise :class:`TrainingStopped` (safe from a signal handler)."""
        self.stop_requested = True
        self.stop_reason = reason

    def _write_checkpoint(self) -> Path | None:
        if self.checkpoint is None:
            return None
        self.recorder.flush()  # what the checkpoint says was logged must be in the store
        self.state.environment_rng = self.episodes.rng_state()
        return self.checkpoint(self)

    def _next_boundary(self, stop: int) -> int:
        """The next episode after which something is logged, evaluated or saved (or ``stop``)."""
        episode, settings = self.state.episode, self.settings
        boundary = min(stop, (episode // settings.log_every + 1) * settings.log_every)
        for every in (settings.eval_every, settings.snapshot_every, settings.checkpoint_every):
            if every:
                boundary = min(boundary, (episode // every + 1) * every)
        return boundary

    def _play_until(self, episode: int) -> None:
        """Play and learn every episode up to ``episode``, through the engine this trainer chose."""
        if self.engine == "compiled":
            self.episodes.learn(self.state, self.variant, self.schedule, self.settings.truncation, episode - self.state.episode)
            return
        while self.state.episode < episode and not self.stop_requested:
            self.play_and_learn()

    def save_state(self, path) -> Path:
        """Write the whole state between two episodes, the environment's generator included."""
        self.state.environment_rng = self.episodes.rng_state()
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
            while state.episode < stop:
                self._play_until(self._next_boundary(stop))
                episode = state.episode
                last = episode == settings.episodes
                if episode % settings.log_every == 0 or last:
                    metrics = state.window.metrics()
                    metrics["coverage_sa"] = state.values.coverage()
                    self._log(metrics, episode)
                    if self.progress is not None:
                        self.progress.update(episode, metrics)
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
            state.environment_rng = self.episodes.rng_state()
            self.recorder.flush()
        finally:
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
