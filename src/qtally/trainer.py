"""The training loop: play episodes, update the Q table, measure, and write to a sink.

This module wires the core (:mod:`qtally.control`) to an episode engine and a
:class:`~qtally.tracking.sink.Recorder`; it imports neither MLflow nor Hydra.

Random streams: ``seed`` is split by :class:`numpy.random.SeedSequence` into
independent streams for the training environment, the behaviour policy, the choice of
exploring starts and the evaluation seeds. Same settings and seed give the same Q
table bit for bit.

Time limits: an episode cut short by a time limit has no true Monte Carlo return.
``truncation`` says what to do with it: ``as_terminal`` (default) treats the cut as the
end (return 0 afterwards: biased, but a policy that walks in circles is charged for every
step it wasted, which is what breaks the loop); ``bootstrap`` seeds the return at the cut
with the current greedy value of the state reached (the partial-episode bootstrap of
Pardo et al. 2018, "Time Limits in Reinforcement Learning"), the better estimate once
values are realistic, but with an optimistic table (zeros where every step costs) it
praises loops: on CliffWalking it kept a looping policy for 5000 episodes where
``as_terminal`` learned a short path; ``discard`` drops the episode from the update
(unbiased, but a policy that never ends an episode then never learns).
"""

from __future__ import annotations

import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Mapping, Protocol

import numpy as np

from .control.acting import epsilon_greedy_action
from .control.action_values import ActionValues, greedy_actions
from .control.variants import EpisodeArrays
from .engine.gym_loop import play_episode
from .envs.factory import TabularEnvironment
from .evaluate.rollouts import greedy_rollout_returns, summarise_returns
from .policy.artifact import PolicyArtifact
from .tracking.sink import NullRecorder, Recorder

__all__ = ["TrainingSettings", "TrainingOutcome", "train", "TRUNCATION_CHOICES", "ProgressSink"]

TRUNCATION_CHOICES = ("bootstrap", "as_terminal", "discard")

# A probe turns the current Q table into extra metrics at each evaluation
# (for example the exact optimality gap where the environment has a model).
Probe = Callable[[np.ndarray], Mapping[str, float]]


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


@dataclass
class TrainingOutcome:
    values: ActionValues
    artifact: PolicyArtifact
    history: dict[str, list[tuple[int, float]]] = field(default_factory=dict)
    final_evaluation: dict[str, float] = field(default_factory=dict)


@dataclass
class _Window:
    """Running sums over one logging window: constant memory however long the window."""

    episodes: int = 0
    return_sum: float = 0.0
    length_sum: int = 0
    epsilon_sum: float = 0.0
    truncated: int = 0
    steps_used: int = 0

    def add(self, total_reward: float, length: int, epsilon: float, truncated: bool, steps_used: int) -> None:
        self.episodes += 1
        self.return_sum += total_reward
        self.length_sum += length
        self.epsilon_sum += epsilon
        self.truncated += int(truncated)
        self.steps_used += steps_used

    def metrics(self) -> dict[str, float]:
        n = max(self.episodes, 1)
        return {
            "return_mean": self.return_sum / n,
            "episode_length_mean": self.length_sum / n,
            "epsilon": self.epsilon_sum / n,
            "truncated_fraction": self.truncated / n,
            "update_steps_fraction": self.steps_used / max(self.length_sum, 1),
        }


def _streams(seed: int) -> dict[str, np.random.Generator | int]:
    env_seq, behaviour_seq, start_seq, eval_seq = np.random.SeedSequence(seed).spawn(4)
    return {
        "env_seed": int(env_seq.generate_state(1)[0]),
        "behaviour": np.random.default_rng(behaviour_seq),
        "starts": np.random.default_rng(start_seq),
        "eval_seed": int(eval_seq.generate_state(1)[0]),
    }


def evaluation_seeds(seed: int, n: int) -> np.ndarray:
    """The fixed evaluation seeds of a run: the same at every evaluation."""
    base = _streams(seed)["eval_seed"]
    return (base + np.arange(n, dtype=np.int64)) % (2**31 - 1)


def train(
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
) -> TrainingOutcome:
    """Run Monte Carlo control for ``settings.episodes`` episodes; return the table and the final policy."""
    if settings.truncation not in TRUNCATION_CHOICES:
        raise ValueError(f"truncation={settings.truncation!r}; choose one of {', '.join(TRUNCATION_CHOICES)}")
    recorder = recorder or NullRecorder()
    streams = _streams(settings.seed)
    behaviour_rng: np.random.Generator = streams["behaviour"]
    starts_rng: np.random.Generator = streams["starts"]
    values = ActionValues.zeros(environment.n_states, environment.n_actions, settings.initial_value)
    q, state_visits = values.q, values.state_visits
    start_states = list(environment.start_control.start_states()) if variant.needs_start_control else []
    eval_seeds = evaluation_seeds(settings.seed, settings.eval_episodes)
    eval_env = evaluation_environment or environment
    history: dict[str, list[tuple[int, float]]] = {}
    facts = dict(facts or {})

    window = _Window()
    episode = 0

    def choose(state: int) -> tuple[int, float]:
        nonlocal epsilon_sum, epsilon_count
        epsilon = variant.behaviour_epsilon(schedule(episode, int(state_visits[state])))
        epsilon_sum += epsilon
        epsilon_count += 1
        state_visits[state] += 1
        return epsilon_greedy_action(q[state], epsilon, behaviour_rng)

    def snapshot() -> PolicyArtifact:
        return PolicyArtifact.from_q(q, values.visits, environment.signature(), episode=episode, **facts)

    def log(metrics: Mapping[str, float], step: int) -> None:
        recorder.log_metrics(metrics, step)
        for name, value in metrics.items():
            history.setdefault(name, []).append((step, float(value)))

    def evaluate() -> dict[str, float]:
        returns = greedy_rollout_returns(eval_env, greedy_actions(q), eval_seeds)
        summary = summarise_returns(returns)
        metrics = {"eval_return_mean": summary.mean, "eval_return_ci95": summary.ci95}
        for probe in probes:
            metrics.update(probe(q))
        log(metrics, episode)
        return metrics

    snapshot_dir = Path(tempfile.mkdtemp(prefix="qtally-snapshots-"))
    final_evaluation: dict[str, float] = {}
    for episode in range(1, settings.episodes + 1):
        epsilon_sum, epsilon_count = 0.0, 0
        start_observation = first_action = None
        if variant.needs_start_control:
            start_observation = start_states[int(starts_rng.integers(len(start_states)))]
            first_action = int(starts_rng.integers(environment.n_actions))
            state_visits[environment.encoder.encode(start_observation)] += 1
        played = play_episode(
            environment,
            choose,
            seed=streams["env_seed"] if episode == 1 else None,
            start_observation=start_observation,
            first_action=first_action,
        )
        arrays = played.arrays
        update = True
        if played.truncated:
            if settings.truncation == "discard":
                update = False
            elif settings.truncation == "bootstrap":
                arrays = EpisodeArrays(arrays.states, arrays.actions, arrays.rewards, arrays.behaviour_probabilities, tail_value=float(q[played.final_state].max()))
        used = 0
        if update:
            used = variant.update(values, arrays)
            used = arrays.length if used is None else used
        window.add(played.total_reward, arrays.length, epsilon_sum / epsilon_count if epsilon_count else 0.0, played.truncated, used)

        if episode % settings.log_every == 0 or episode == settings.episodes:
            metrics = window.metrics()
            metrics["coverage_sa"] = values.coverage()
            log(metrics, episode)
            if progress is not None:
                progress.update(episode, metrics)
            window = _Window()
        if (settings.eval_every and episode % settings.eval_every == 0) or episode == settings.episodes:
            final_evaluation = evaluate()
        if settings.snapshot_every and episode % settings.snapshot_every == 0 and episode != settings.episodes:
            path = snapshot().save(snapshot_dir / f"policy-{episode:09d}.npz")
            recorder.log_file(path, "snapshots")
            path.unlink()
    artifact = snapshot()
    recorder.flush()
    return TrainingOutcome(values=values, artifact=artifact, history=history, final_evaluation=final_evaluation)
