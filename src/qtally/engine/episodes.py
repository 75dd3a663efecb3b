"""The episode source: plays a policy in an environment and hands back each episode as arrays.

Training, prediction and rollouts all play their episodes here, so the start rules, the
step cap and the seeding of the environment are the same for every command. This is the
general source: it works with any Gymnasium environment, at the cost of one Python ``step``
call per time step. It knows nothing about learning: a ``choose`` function maps a table
index to ``(action, probability)`` (see :mod:`qtally.policy.table_policy` for the draw protocol).

Seeding: the environment's own generator is seeded once, at the first reset after
:meth:`GymEpisodes.seed`; later episodes continue its stream. :meth:`GymEpisodes.rng_state`
and :meth:`GymEpisodes.restore_rng_state` capture and restore that stream between episodes.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from ..control.episodes import EpisodeArrays
from ..envs.factory import TabularEnvironment

__all__ = ["PlayedEpisode", "GymEpisodes", "Chooser"]

Chooser = Callable[[int], tuple[int, float]]


@dataclass(frozen=True)
class PlayedEpisode:
    """The episode's arrays plus how it ended.

    ``truncated``: cut by a time limit or by the step cap (then ``capped`` is also true).
    """

    arrays: EpisodeArrays
    total_reward: float
    terminated: bool
    truncated: bool
    capped: bool
    final_state: int


class GymEpisodes:
    """Episodes of one :class:`TabularEnvironment`, played one at a time through the Gymnasium API."""

    def __init__(self, environment: TabularEnvironment, step_cap: int):
        if step_cap < 1:
            raise ValueError(f"step_cap={step_cap} must be a positive number of steps")
        self.environment = environment
        self.step_cap = int(step_cap)
        self._pending_seed: int | None = None

    def seed(self, seed: int | None) -> None:
        """Seed the environment's generator at the next reset (``None``: leave it as it is)."""
        self._pending_seed = None if seed is None else int(seed)

    def rng_state(self) -> dict[str, Any]:
        """The environment generator's state between episodes (JSON-able), for checkpoints."""
        generator = self.environment.env.unwrapped.np_random
        return {"pending_seed": self._pending_seed, "bit_generator": generator.bit_generator.state}

    def restore_rng_state(self, state: dict[str, Any]) -> None:
        self._pending_seed = state["pending_seed"]
        if self._pending_seed is None:
            generator = self.environment.env.unwrapped.np_random  # creates it if the env never reset
            generator.bit_generator.state = state["bit_generator"]

    def play(self, choose: Chooser, *, start_observation: Any = None, first_action: int | None = None) -> PlayedEpisode:
        """Run ``choose`` from a reset (or from ``start_observation`` via start control) to the end or the cap.

        ``first_action`` forces the first action with probability 1 (exploring starts, chosen starts).
        """
        environment = self.environment
        env, encode = environment.env, environment.encoder.encode
        seed, self._pending_seed = self._pending_seed, None
        if start_observation is not None:
            observation, _ = environment.start_control.reset_to(start_observation, seed=seed)
        else:
            observation, _ = env.reset(seed=seed)
        states: list[int] = []
        actions: list[int] = []
        rewards: list[float] = []
        probabilities: list[float] = []
        terminated = truncated = capped = False
        state = encode(observation)
        step = env.step
        cap = self.step_cap
        while True:
            if first_action is not None and not states:
                action, probability = int(first_action), 1.0
            else:
                action, probability = choose(state)
            observation, reward, terminated, truncated, _ = step(action)
            states.append(state)
            actions.append(action)
            rewards.append(float(reward))
            probabilities.append(probability)
            state = encode(observation)
            if terminated or truncated:
                break
            if len(states) >= cap:
                truncated = capped = True
                break
        arrays = EpisodeArrays(
            states=np.asarray(states, dtype=np.int64),
            actions=np.asarray(actions, dtype=np.int64),
            rewards=np.asarray(rewards, dtype=np.float64),
            behaviour_probabilities=np.asarray(probabilities, dtype=np.float64),
        )
        return PlayedEpisode(
            arrays=arrays,
            total_reward=float(sum(rewards)),
            terminated=bool(terminated),
            truncated=bool(truncated and not terminated),
            capped=capped,
            final_state=state,
        )
