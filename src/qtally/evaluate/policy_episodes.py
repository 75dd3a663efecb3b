"""Play a fixed policy's episodes into a prediction estimator.

The episodes come from the same source as training's (:class:`~qtally.engine.episodes.GymEpisodes`),
with the same random streams (:class:`~qtally.control.streams.RandomStreams`: the acting
stream supplies one uniform per decision, the starts stream the chosen starts), the same
step cap and the same truncation rules (:mod:`qtally.control.truncation`). A bootstrapped
tail is the estimator's value of the state reached *as of every episode added so far*.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol, Sequence

import numpy as np

from ..control.streams import RandomStreams, start_pair
from ..control.truncation import check_truncation, resolve_step_cap, tail_value
from ..engine.episodes import GymEpisodes
from ..policy.table_policy import sample_action
from .rollouts import summarise_returns

__all__ = ["Estimator", "PlayedSummary", "play_prediction_episodes", "table_chooser"]


class Estimator(Protocol):
    def add_episode(self, states, actions, rewards, *, tail_value: float = 0.0, forced_first_action: bool = False) -> None: ...

    def value_of(self, state: int) -> float: ...


class ProgressSink(Protocol):
    def update(self, episodes: int, status: dict) -> None: ...


@dataclass(frozen=True)
class PlayedSummary:
    """How the episodes went (undiscounted return per episode; time-limit and step-cap cuts)."""

    episodes: int
    return_mean: float
    return_standard_error: float
    truncated: int
    discarded: int
    steps: int
    capped: int = 0
    start_value_mean: float = float("nan")  # mean discounted return from the first step: V(start) when played on-policy
    start_value_ci95: float = float("nan")  # half-width of its Student-t 95% interval


def table_chooser(policy: np.ndarray, next_uniform) -> Any:
    """``choose(state) -> (action, probability)`` drawing from the rows of ``policy``, one uniform a decision."""
    policy = np.asarray(policy, dtype=np.float64)
    cumulative_rows = np.cumsum(policy, axis=1).tolist()
    policy_rows = policy.tolist()

    def choose(state: int) -> tuple[int, float]:
        return sample_action(cumulative_rows[state], policy_rows[state], next_uniform())

    return choose


def play_prediction_episodes(
    environment,
    policy: np.ndarray,
    estimator: Estimator,
    episodes: int,
    *,
    seed: int = 0,
    start_observation: Any = None,
    start_action: int | None = None,
    start_states: Sequence[Any] | None = None,
    random_first_action: bool = False,
    truncation: str = "as_terminal",
    step_cap: int | None = None,
    progress: ProgressSink | None = None,
    report_every: int = 500,
) -> PlayedSummary:
    """Play ``episodes`` episodes of ``policy`` (an ``(S, A)`` array) and add each to ``estimator``.

    Starts: by default the environment's own reset. ``start_observation`` (and optionally
    ``start_action``) fixes the start of every episode through ``environment.start_control``;
    ``start_states`` instead draws each start uniformly from the given observations
    (exploring-style), with a uniform first action too if ``random_first_action``.
    """
    check_truncation(truncation)
    policy = np.asarray(policy, dtype=np.float64)
    if policy.shape != (environment.n_states, environment.n_actions):
        raise ValueError(f"policy has shape {policy.shape}, environment needs {(environment.n_states, environment.n_actions)}")
    needs_start = start_observation is not None or start_states is not None
    if needs_start and environment.start_control is None:
        raise ValueError(f"{environment.spec.id!r} cannot be started in a chosen state")
    streams = RandomStreams(seed)
    source = GymEpisodes(environment, resolve_step_cap(step_cap, environment.n_states))
    source.seed(streams.env_seed)
    choose = table_chooser(policy, streams.acting.next)
    starts = list(start_states) if start_states is not None else None
    total_returns = np.zeros(episodes)
    start_returns = np.zeros(episodes)
    gamma = float(getattr(estimator, "gamma", 1.0))
    truncated = discarded = steps = capped = 0
    for episode in range(episodes):
        observation, first_action = start_observation, start_action
        if starts is not None:
            index, action = start_pair(streams.starts.next(), len(starts), environment.n_actions if random_first_action else 1)
            observation = starts[index]
            if random_first_action:
                first_action = action
        played = source.play(choose, start_observation=observation, first_action=first_action)
        arrays = played.arrays
        total_returns[episode] = played.total_reward
        start_returns[episode] = float(np.dot(gamma ** np.arange(arrays.length), arrays.rewards)) if gamma < 1.0 else played.total_reward
        steps += arrays.length
        truncated += int(played.truncated)
        capped += int(played.capped)
        tail = tail_value(truncation, truncated=played.truncated, bootstrap_value=lambda: estimator.value_of(played.final_state))
        if tail is None:
            discarded += 1
        else:
            estimator.add_episode(arrays.states, arrays.actions, arrays.rewards, tail_value=tail, forced_first_action=first_action is not None)
        if progress is not None and ((episode + 1) % report_every == 0 or episode + 1 == episodes):
            recent = total_returns[max(0, episode + 1 - report_every) : episode + 1]
            progress.update(episode + 1, {"return_mean": float(recent.mean())})
    n = max(episodes, 1)
    se = float(total_returns.std(ddof=1) / np.sqrt(n)) if episodes >= 2 else float("nan")
    start = summarise_returns(start_returns)
    return PlayedSummary(
        episodes=episodes,
        return_mean=float(total_returns.mean()) if episodes else float("nan"),
        return_standard_error=se,
        truncated=truncated,
        discarded=discarded,
        steps=steps,
        capped=capped,
        start_value_mean=start.mean,
        start_value_ci95=start.ci95,
    )
