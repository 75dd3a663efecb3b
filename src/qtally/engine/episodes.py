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
from functools import cached_property
from typing import Any, Callable

import gymnasium as gym
import numpy as np

from ..control.episodes import EpisodeArrays
from ..envs.encoders import DiscreteEncoder
from ..envs.factory import TabularEnvironment
from ..policy.table_policy import EpsilonGreedyActing

__all__ = ["PlayedEpisode", "GymEpisodes", "Chooser"]

# Wrappers that only keep books qtally keeps itself: the time limit (counted here, see
# GymEpisodes.play), the reset-before-step check (play always resets first) and the API
# checker (disabled at make). Stepping past them saves a Python call per layer and step.
_BOOKKEEPING = ("TimeLimit", "OrderEnforcing", "PassiveEnvChecker")


def _bookkeeping_free(env) -> tuple[Any, int]:
    """``(what to step, time limit)``: the core env when only bookkeeping wrappers sit on it, else ``env``.

    The time limit is the ``TimeLimit`` wrapper's (0 when there is none, or when ``env``
    is stepped as it is and its own wrapper counts).
    """
    layer, limit = env, 0
    while isinstance(layer, gym.Wrapper):
        if type(layer).__name__ not in _BOOKKEEPING:
            return env, 0
        if type(layer).__name__ == "TimeLimit":
            limit = int(layer._max_episode_steps)
        layer = layer.env
    return layer, limit

Chooser = Callable[[int], tuple[int, float]]


@dataclass  # not frozen: a frozen dataclass pays object.__setattr__ per field, once per episode
class PlayedEpisode:
    """The episode as plain lists plus how it ended; :attr:`arrays` gives the numpy form.

    ``truncated``: cut by a time limit or by the step cap (then ``capped`` is also true).
    The lists are what the trainer's update reads (one conversion fewer per episode);
    estimators and reports take :attr:`arrays`.
    """

    states: list[int]
    actions: list[int]
    rewards: list[float]
    probabilities: list[float]
    total_reward: float
    terminated: bool
    truncated: bool
    capped: bool
    final_state: int

    @property
    def length(self) -> int:
        return len(self.states)

    @cached_property
    def arrays(self) -> EpisodeArrays:
        return EpisodeArrays(
            states=np.asarray(self.states, dtype=np.int64),
            actions=np.asarray(self.actions, dtype=np.int64),
            rewards=np.asarray(self.rewards, dtype=np.float64),
            behaviour_probabilities=np.asarray(self.probabilities, dtype=np.float64),
        )


class GymEpisodes:
    """Episodes of one :class:`TabularEnvironment`, played one at a time through the Gymnasium API."""

    def __init__(self, environment: TabularEnvironment, step_cap: int):
        if step_cap < 1:
            raise ValueError(f"step_cap={step_cap} must be a positive number of steps")
        self.environment = environment
        self.step_cap = int(step_cap)
        self._pending_seed: int | None = None
        self._core, self._time_limit = _bookkeeping_free(environment.env)
        # The time limit (as TimeLimit counts it) comes before the step cap when it is the shorter.
        self._cap = self.step_cap if not self._time_limit else min(self.step_cap, self._time_limit)
        self._limit_first = bool(self._time_limit) and self._time_limit <= self.step_cap
        encoder = environment.encoder
        # A Discrete space numbered from 0 encodes as int itself, and a tuple of parts through
        # its written-out function: one call fewer per step either way.
        self._encode = int if isinstance(encoder, DiscreteEncoder) and encoder.start == 0 else getattr(encoder, "fast_encode", encoder.encode)

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
        encode = self._encode
        seed, self._pending_seed = self._pending_seed, None
        if start_observation is not None:
            observation, _ = environment.start_control.reset_to(start_observation, seed=seed)
        elif seed is None:
            observation, _ = self._core.reset()  # steps skip the bookkeeping wrappers (below), so an unseeded reset can too
        else:
            observation, _ = environment.env.reset(seed=seed)
        states: list[int] = []
        actions: list[int] = []
        rewards: list[float] = []
        probabilities: list[float] = []
        add_state, add_action, add_reward, add_probability = states.append, actions.append, rewards.append, probabilities.append
        terminated = truncated = capped = False
        state = encode(observation)
        step = self._core.step  # past the bookkeeping wrappers (_BOOKKEEPING): play counts the limit itself
        cap = self._cap
        length = 0
        # EpsilonGreedyActing's own lines, run here instead of called: one call fewer per step.
        # Its probabilities are written once the episode is over: each step's is the greedy
        # one except where an exploring draw picked another action (listed in ``explored``).
        inline = choose.__class__ is EpsilonGreedyActing
        if inline:
            greedy, epsilon, n_actions, next_uniform = choose.greedy, choose.epsilon, choose.n_actions, choose.next_uniform
            explored: list[int] = []
            add_explored = explored.append
        # The first action outside the loop, the others at the loop's end: no test for a forced one per step.
        action, probability = (int(first_action), 1.0) if first_action is not None else choose(state)
        add_probability(probability)
        while True:
            observation, reward, terminated, truncated, _ = step(action)
            add_state(state)
            add_action(action)
            add_reward(float(reward))
            length += 1
            state = encode(observation)
            if terminated or truncated:
                break
            if length >= cap:
                truncated = True
                capped = not self._limit_first
                break
            if inline:
                u = next_uniform()
                if u < epsilon:
                    action = min(int(u / epsilon * n_actions), n_actions - 1)
                    if action != greedy[state]:
                        add_explored(length)
                else:
                    action = greedy[state]
            else:
                action, probability = choose(state)
                add_probability(probability)
        if inline:  # the first step's probability as chosen, every other the greedy one but where explored
            probabilities += [choose.exploit] * (length - 1)
            for k in explored:
                probabilities[k] = choose.explore
        # Positional: keyword construction costs three times as much, once per episode.
        return PlayedEpisode(states, actions, rewards, probabilities, float(sum(rewards)), bool(terminated), bool(truncated and not terminated), capped, state)
