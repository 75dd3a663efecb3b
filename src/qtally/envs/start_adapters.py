"""Exploring-start support for the bundled environments, and the lookup that finds it.

:func:`start_control_for` returns an object implementing
:class:`~qtally.envs.start_control.StartControl` for an environment, or ``None`` when
its start cannot be set. It first asks the environment itself (a custom environment
implements ``start_states()`` and ``reset_to()``), then the adapters here, which know
the internals of Gymnasium's FrozenLake, CliffWalking, Taxi and Blackjack.

Every ``reset_to`` first calls the wrapped environment's ``reset()`` (with ``seed`` when
the episode source seeds this episode) so wrappers (the time limit, for one) start a fresh
episode, then moves the core into the chosen state. So a start spends exactly one reset.
"""

from __future__ import annotations

from typing import Any, Sequence

import gymnasium as gym
import numpy as np

from .start_control import StartControl

__all__ = ["start_control_for", "blackjack_start_states", "blackjack_start_hand"]


class _DelegatingStart:
    """The environment's own StartControl, reached through the wrapper stack."""

    def __init__(self, env: gym.Env):
        self.env = env
        self.core = env.unwrapped

    def start_states(self) -> Sequence[Any]:
        return list(self.core.start_states())

    def reset_to(self, observation: Any, seed: int | None = None) -> tuple[Any, dict]:
        self.env.reset(seed=seed)
        return self.core.reset_to(observation)


class _GridStart:
    """Toy-text grids whose whole state is the integer ``s``."""

    def __init__(self, env: gym.Env, states: Sequence[int]):
        self.env = env
        self.core = env.unwrapped
        self._states = [int(s) for s in states]

    def start_states(self) -> Sequence[int]:
        return self._states

    def reset_to(self, observation: Any, seed: int | None = None) -> tuple[int, dict]:
        _, info = self.env.reset(seed=seed)
        self.core.s = int(observation)
        self.core.lastaction = None
        return int(observation), info


def blackjack_start_states() -> list[tuple[int, int, int]]:
    """Every observation at which a Blackjack player acts: ``(player_sum, dealer_card, usable_ace)``.

    Hard sums 4..21 (4 is the lowest two-card hand, 2 + 2) and soft sums 12..21 (an ace
    counted as 11 makes at least 12), against each dealer card 1..10. Sums below 12 carry a
    decision too: the game lets the player stick there, and a table that never saw them
    would act on its initial values. The textbook's exploring starts skip them (Sutton &
    Barto 2018, Example 5.3) only because hitting is plainly right there; a learner must
    find that out, so every state the game can reach is a start.

    >>> starts = blackjack_start_states()
    >>> len(starts), starts[0], (21, 10, 1) in starts, (11, 1, 1) in starts
    (280, (4, 1, 0), True, False)
    """
    hard = [(p, d, 0) for p in range(4, 22) for d in range(1, 11)]
    soft = [(p, d, 1) for p in range(12, 22) for d in range(1, 11)]
    return hard + soft


def blackjack_start_hand(player_sum: int, usable_ace: int) -> list[int]:
    """A hand of cards (1 = ace, 10 = ten or face) with this sum and ace status.

    Wherever two cards can make the observation, the hand has two cards, as a fresh deal
    has: the start is then a hand the game's own deal produces. So a soft 21 is the natural
    ``[1, 10]``, which under ``sab=True`` wins unless the dealer also has one; that is what
    every soft 21 seen at the start of a real episode is. (A soft 21 reached by hitting,
    like ``[1, 5, 5]``, only draws when the dealer makes 21; both stick, so the policy is
    the same either way, and only the start-state estimate of Q(21, d, 1) leans on the
    choice.) Hard 21 cannot be dealt in two cards, so it is ``[10, 9, 2]``, as by hitting.
    Other hard hands never hold an ace, whose future depends only on the sum.

    >>> [blackjack_start_hand(p, 0) for p in (4, 11, 12, 20, 21)]
    [[2, 2], [9, 2], [10, 2], [10, 10], [10, 9, 2]]
    >>> [blackjack_start_hand(p, 1) for p in (12, 16, 21)]
    [[1, 1], [1, 5], [1, 10]]
    """
    if usable_ace:
        if not 12 <= player_sum <= 21:
            raise ValueError(f"a usable ace makes a sum of 12..21, got {player_sum}")
        return [1, player_sum - 11]
    if not 4 <= player_sum <= 21:
        raise ValueError(f"a hand without a usable ace sums to 4..21 before it busts, got {player_sum}")
    if player_sum == 21:
        return [10, 9, 2]
    high = min(10, player_sum - 2)
    return [high, player_sum - high]


class _BlackjackStart:
    """Deal the player a hand with the chosen sum and ace status; the dealer's hidden card is drawn."""

    def __init__(self, env: gym.Env):
        self.env = env
        self.core = env.unwrapped

    def start_states(self) -> Sequence[tuple[int, int, int]]:
        return blackjack_start_states()

    def reset_to(self, observation: Any, seed: int | None = None) -> tuple[tuple[int, int, int], dict]:
        from gymnasium.envs.toy_text.blackjack import draw_card

        player_sum, dealer_card, usable_ace = (int(v) for v in observation)
        if not 1 <= dealer_card <= 10:
            raise ValueError(f"the dealer's card is 1..10 (1 is an ace), got {dealer_card}")
        hand = blackjack_start_hand(player_sum, usable_ace)
        _, info = self.env.reset(seed=seed)
        self.core.player = hand
        self.core.dealer = [dealer_card, draw_card(self.core.np_random)]
        # Keep the rendered face-up card in step with the dealer's card (the suit stays as dealt).
        self.core.dealer_top_card_value_str = "A" if dealer_card == 1 else ("K" if dealer_card == 10 else str(dealer_card))
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
