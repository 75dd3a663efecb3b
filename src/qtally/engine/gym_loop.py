"""Play one episode through the Gymnasium API and return it as arrays.

This is the general engine: it works with any environment, at the cost of one Python
``step`` call per time step. It knows nothing about learning: a ``choose`` function
maps a table index to ``(action, probability)``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from ..control.variants import EpisodeArrays
from ..envs.factory import TabularEnvironment

__all__ = ["PlayedEpisode", "play_episode"]

Chooser = Callable[[int], tuple[int, float]]


@dataclass(frozen=True)
class PlayedEpisode:
    """The episode's arrays plus how it ended."""

    arrays: EpisodeArrays
    total_reward: float
    terminated: bool
    truncated: bool
    final_state: int


def play_episode(
    environment: TabularEnvironment,
    choose: Chooser,
    *,
    seed: int | None = None,
    start_observation: Any = None,
    first_action: int | None = None,
) -> PlayedEpisode:
    """Run ``choose`` from a reset (or from ``start_observation`` via start control) to the end.

    ``seed`` goes to ``reset`` (pass it once per environment to seed its generator, then None);
    ``first_action``, with probability 1, is how exploring starts force the start pair.
    """
    env, encode = environment.env, environment.encoder.encode
    if start_observation is not None:
        if seed is not None:
            env.reset(seed=seed)
        observation, _ = environment.start_control.reset_to(start_observation)
    else:
        observation, _ = env.reset(seed=seed)
    states: list[int] = []
    actions: list[int] = []
    rewards: list[float] = []
    probabilities: list[float] = []
    terminated = truncated = False
    state = encode(observation)
    while True:
        if first_action is not None and not states:
            action, probability = int(first_action), 1.0
        else:
            action, probability = choose(state)
        observation, reward, terminated, truncated, _ = env.step(action)
        states.append(state)
        actions.append(action)
        rewards.append(float(reward))
        probabilities.append(probability)
        state = encode(observation)
        if terminated or truncated:
            break
    arrays = EpisodeArrays(
        states=np.asarray(states, dtype=np.int64),
        actions=np.asarray(actions, dtype=np.int64),
        rewards=np.asarray(rewards, dtype=np.float64),
        behaviour_probabilities=np.asarray(probabilities, dtype=np.float64),
    )
    return PlayedEpisode(arrays=arrays, total_reward=float(np.sum(arrays.rewards)), terminated=bool(terminated), truncated=bool(truncated and not terminated), final_state=state)
