"""Exploring-start support for the bundled environments, and the lookup that finds it.

:func:`start_control_for` returns an object implementing
:class:`~qtally.envs.start_control.StartControl` for an environment, or ``None`` when
its start cannot be set. It first asks the environment itself (a custom environment
implements ``start_states()`` and ``reset_to()``), then the adapters here, which know
the internals of Gymnasium's FrozenLake, CliffWalking, Taxi and Blackjack.

Every ``reset_to`` first calls the wrapped environment's ``reset()`` so wrappers (the
time limit, for one) start a fresh episode, then moves the core into the chosen state.
"""

from __future__ import annotations

from typing import Any, Sequence

import gymnasium as gym
import numpy as np

from .start_control import StartControl

__all__ = ["start_control_for", "BLACKJACK_START_SUMS"]

# Player sums an exploring start may pick in Blackjack: below 12 hitting can never bust,
# so those states carry no decision (the convention of Sutton & Barto 2018, Example 5.3).
BLACKJACK_START_SUMS = range(12, 22)


class _DelegatingStart:
    """The environment's own StartControl, reached through the wrapper stack."""

    def __init__(self, env: gym.Env):
        self.env = env
        self.core = env.unwrapped

    def start_states(self) -> Sequence[Any]:
        return list(self.core.start_states())

    def reset_to(self, observation: Any) -> tuple[Any, dict]:
        self.env.reset()
        return self.core.reset_to(observation)


class _GridStart:
    """Toy-text grids whose whole state is the integer ``s``."""

    def __init__(self, env: gym.Env, states: Sequence[int]):
        self.env = env
        self.core = env.unwrapped
        self._states = [int(s) for s in states]

    def start_states(self) -> Sequence[int]:
        return self._states

    def reset_to(self, observation: Any) -> tuple[int, dict]:
        _, info = self.env.reset()
        self.core.s = int(observation)
        self.core.lastaction = None
        return int(observation), info


class _BlackjackStart:
    """Deal the player a hand with the chosen sum and ace status; the dealer's hidden card is drawn."""

    def __init__(self, env: gym.Env):
        self.env = env
        self.core = env.unwrapped

    def start_states(self) -> Sequence[tuple[int, int, int]]:
        return [(p, d, u) for p in BLACKJACK_START_SUMS for d in range(1, 11) for u in (0, 1)]

    def reset_to(self, observation: Any) -> tuple[tuple[int, int, int], dict]:
        from gymnasium.envs.toy_text.blackjack import draw_card

        player_sum, dealer_card, usable_ace = (int(v) for v in observation)
        _, info = self.env.reset()
        if usable_ace:
            self.core.player = [1, player_sum - 11]
        elif player_sum <= 20:
            self.core.player = [10, player_sum - 10]
        else:
            self.core.player = [10, 9, 2]
        self.core.dealer = [dealer_card, draw_card(self.core.np_random)]
        return self.core._get_obs(), info


def _frozen_lake_states(core) -> list[int]:
    desc = np.asarray(core.desc).astype(str).ravel()
    return [i for i, cell in enumerate(desc) if cell not in ("H", "G")]


def _cliff_states(core) -> list[int]:
    goal = core.observation_space.n - 1
    return [i for i in range(core.observation_space.n) if not core._cliff.ravel()[i] and i != goal]


def _taxi_states(core) -> list[int]:
    # After a successful drop-off the passenger sits at the destination: those states end the episode.
    return [s for s in range(core.observation_space.n) if (lambda r, c, p, d: p != d)(*core.decode(s))]


def start_control_for(env: gym.Env) -> StartControl | None:
    """How to start this environment in a chosen state, or None if it cannot be done."""
    core = env.unwrapped
    if isinstance(core, StartControl):
        return _DelegatingStart(env)
    name = type(core).__name__
    if name == "FrozenLakeEnv":
        return _GridStart(env, _frozen_lake_states(core))
    if name == "CliffWalkingEnv":
        return _GridStart(env, _cliff_states(core))
    if name == "TaxiEnv":
        return _GridStart(env, _taxi_states(core))
    if name == "BlackjackEnv":
        return _BlackjackStart(env)
    return None
