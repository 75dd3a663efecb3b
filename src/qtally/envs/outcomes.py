"""An environment's dynamics as it samples them: every outcome in its own order, with its own reward.

A :class:`~qtally.envs.model.TabularModel` is what exact dynamic programming needs: merged
transition probabilities and *expected* rewards. That is not enough to replay an
environment: two outcomes of one state-action pair may lead to the same next state with
different rewards, and their order decides which uniform picks which. An
:class:`OutcomeTable` keeps what sampling needs, so a compiled engine can play the same
episodes as the environment itself.

Transition draw protocol (shared by the environments that have a table and by
:mod:`qtally.engine.compiled`): the environment's generator gives **one uniform per
reset** and **one uniform per step**. A reset picks its start with its uniform ``u`` over
``start_states``; a step picks among the pair's outcomes. Both pick the first outcome
whose running sum of probabilities (added in the listed order) exceeds ``u``, and the
first outcome when none does (rounding). That is Gymnasium's toy-text
``categorical_sample``, so FrozenLake, CliffWalking and Taxi already follow it, and so does
the restocking simulator. A reset followed by start control (exploring starts) still
spends its uniform: the reset is made, then the state is set.

>>> table = OutcomeTable.from_p_table({0: {0: [(0.5, 0, -1.0, False), (0.5, 1, 1.0, True)]}, 1: {0: [(1.0, 1, 0.0, True)]}},
...                                   n_states=2, n_actions=1, start_states=[0], start_probabilities=[1.0])
>>> pick_outcome(table.probabilities[:2], 0.7), pick_outcome(table.probabilities[:2], 0.2)
(1, 0)
>>> table.to_model().rewards[:, 0].tolist()
[0.0, 0.0]
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
import scipy.sparse as sp

from .model import TabularModel

__all__ = ["OutcomeTable", "pick_outcome", "OutcomeSource"]


def pick_outcome(probabilities: Sequence[float], u: float) -> int:
    """The protocol's pick: the first index whose running sum exceeds ``u``; 0 if none does."""
    total = 0.0
    for k, p in enumerate(probabilities):
        total += p
        if total > u:
            return k
    return 0


@dataclass(frozen=True)
class OutcomeTable:
    """Outcomes of every state-action pair in the environment's own order (module docstring).

    Row ``r = s * n_actions + a`` owns entries ``offsets[r]:offsets[r + 1]`` of
    ``next_states``, ``probabilities``, ``rewards`` and ``terminated``. Rows of states
    where no episode acts (terminal states) may be empty.
    """

    n_states: int
    n_actions: int
    offsets: np.ndarray
    next_states: np.ndarray
    probabilities: np.ndarray
    rewards: np.ndarray
    terminated: np.ndarray
    start_states: np.ndarray
    start_probabilities: np.ndarray
    opening_rewards: np.ndarray | None = None

    def __post_init__(self) -> None:
        rows = self.n_states * self.n_actions
        if self.offsets.shape != (rows + 1,) or self.offsets[0] != 0 or np.any(np.diff(self.offsets) < 0):
            raise ValueError("offsets must rise from 0, one entry per state-action row plus one")
        k = int(self.offsets[-1])
        for name in ("next_states", "probabilities", "rewards", "terminated"):
            if getattr(self, name).shape != (k,):
                raise ValueError(f"{name} must hold one entry per outcome ({k})")
        if k and (self.next_states.min() < 0 or self.next_states.max() >= self.n_states):
            raise ValueError("an outcome leads outside the table's states")
        if self.start_states.shape != self.start_probabilities.shape or not np.isclose(self.start_probabilities.sum(), 1.0):
            raise ValueError("start_states need one probability each, summing to 1")
        if self.opening_rewards is not None and self.opening_rewards.shape != (k,):
            raise ValueError(f"opening_rewards must hold one reward per outcome ({k})")

    @property
    def first_step_rewards(self) -> np.ndarray:
        """What each outcome pays on an episode's first step: ``opening_rewards`` where given, else ``rewards``.

        A game whose opening hand is special but looks like a later one (Blackjack's natural)
        pays differently there; every later step pays ``rewards``.
        """
        return self.rewards if self.opening_rewards is None else self.opening_rewards

    @classmethod
    def from_rows(
        cls,
        n_states: int,
        n_actions: int,
        rows: Mapping[tuple[int, int], Sequence[tuple[float, int, float, bool]]],
        start_states: Sequence[int],
        start_probabilities: Sequence[float],
        opening_rewards: Mapping[tuple[int, int], Sequence[float]] | None = None,
    ) -> "OutcomeTable":
        """From ``{(s, a): [(probability, next_state, reward, terminated), ...]}`` in sampling order.

        ``opening_rewards`` replaces, for the rows it names, each outcome's reward on an
        episode's first step (one reward per outcome, same order).
        """
        offsets = np.zeros(n_states * n_actions + 1, dtype=np.int64)
        entries: list[tuple[float, int, float, bool]] = []
        opening: list[float] = []
        for r in range(n_states * n_actions):
            row = rows.get(divmod(r, n_actions), ())
            entries.extend(row)
            replaced = (opening_rewards or {}).get(divmod(r, n_actions))
            if replaced is not None and len(replaced) != len(row):
                raise ValueError(f"opening_rewards for row {divmod(r, n_actions)} need one reward per outcome ({len(row)})")
            opening.extend(replaced if replaced is not None else [outcome[2] for outcome in row])
            offsets[r + 1] = len(entries)
        columns = list(zip(*entries)) if entries else [(), (), (), ()]
        return cls(
            n_states=int(n_states),
            n_actions=int(n_actions),
            offsets=offsets,
            probabilities=np.asarray(columns[0], dtype=np.float64),
            next_states=np.asarray(columns[1], dtype=np.int64),
            rewards=np.asarray(columns[2], dtype=np.float64),
            terminated=np.asarray(columns[3], dtype=bool),
            start_states=np.asarray(start_states, dtype=np.int64),
            start_probabilities=np.asarray(start_probabilities, dtype=np.float64),
            opening_rewards=np.asarray(opening, dtype=np.float64) if opening_rewards else None,
        )

    @classmethod
    def from_p_table(cls, P, n_states: int, n_actions: int, start_states, start_probabilities, first_state: int = 0) -> "OutcomeTable":
        """A toy-text ``P[s][a] = [(prob, next, reward, terminated), ...]`` table, order kept."""
        rows = {
            (int(s) - first_state, int(a)): [(float(p), int(n) - first_state, float(r), bool(t)) for p, n, r, t in outcomes]
            for s, by_action in P.items()
            for a, outcomes in by_action.items()
        }
        return cls.from_rows(n_states, n_actions, rows, start_states, start_probabilities)

    def terminal_states(self) -> np.ndarray:
        """Bool ``(S,)``: states some outcome enters with ``terminated``, and states with no outcomes at all.

        A state where no action leads anywhere is a dead end: nothing more happens, value 0.
        """
        terminal = np.zeros(self.n_states, dtype=bool)
        terminal[self.next_states[self.terminated]] = True
        counts = np.diff(self.offsets).reshape(self.n_states, self.n_actions)
        terminal |= counts.sum(axis=1) == 0
        return terminal

    def to_model(self) -> TabularModel:
        """The merged model exact dynamic programming uses (terminal rows dropped, duplicates summed)."""
        n_rows = self.n_states * self.n_actions
        row_of = np.repeat(np.arange(n_rows), np.diff(self.offsets))
        terminal = self.terminal_states()
        keep = ~terminal[row_of // self.n_actions]
        transitions = sp.csr_array(
            (self.probabilities[keep], (row_of[keep], self.next_states[keep])), shape=(n_rows, self.n_states)
        )
        transitions.sum_duplicates()
        transitions.eliminate_zeros()
        rewards = np.bincount(row_of[keep], weights=(self.probabilities * self.rewards)[keep], minlength=n_rows)
        start = np.zeros(self.n_states)
        np.add.at(start, self.start_states, self.start_probabilities)
        return TabularModel(
            transitions=transitions,
            rewards=rewards.reshape(self.n_states, self.n_actions),
            terminal=terminal,
            start_distribution=start,
        )


class OutcomeSource:
    """Implemented (``outcome_table()``) by an environment that can list its outcomes in sampling order."""

    def outcome_table(self) -> OutcomeTable:  # pragma: no cover - protocol
        raise NotImplementedError
