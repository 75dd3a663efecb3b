"""Greedy evaluation on a fixed list of seeds that plays again only what a policy change can alter.

A Gymnasium environment reset with a seed repeats its episode as long as it is given the
same actions (the seeding contract of ``reset(seed=...)``). A deterministic policy's
episode from one seed therefore changes only where the policy changed in a state the
episode acted in. A run evaluates on the same seeds again and again (see
:mod:`qtally.evaluate.rollouts`), and late in training the greedy action changes in few
states, so most evaluation episodes would be played again only to give the same return.
:class:`SeededEvaluation` keeps each episode's acted states and return and, at each
evaluation after the first, plays again only the episodes that acted in a changed state.
The returns are those of playing every episode, bit for bit.

That holds only for an environment that keeps the contract. Before it first keeps a return,
an evaluation plays a few of the episodes it would keep a second time and compares the two
plays; an environment that does not repeat them (it draws from a generator its seed does not
reach, or carries something over from one episode to the next) is then played in full at
that evaluation and every later one, and :attr:`SeededEvaluation.reuse_off_reason` says why.
A run that evaluates once pays nothing for the check.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from ..engine.episodes import GymEpisodes
from ..envs.factory import TabularEnvironment

__all__ = ["REPLAY_CHOICES", "REPEAT_CHECK_EPISODES", "SeededEvaluation"]

REPLAY_CHOICES = ("changed", "all")  # changed: only episodes a policy change can alter; all: every episode, every time
REPEAT_CHECK_EPISODES = 4  # episodes played a second time before the first reuse, to check that the environment repeats them


class SeededEvaluation:
    """Undiscounted returns of a greedy policy from each of ``seeds``, remembered between evaluations.

    ``replay="all"`` plays every episode at every call (nothing is remembered).
    :attr:`played` counts the episodes the last call played, the repeat check's included;
    :attr:`played_total` and :attr:`asked_total` add them up over every call, against the
    episodes asked for (the seeds, once per call).
    """

    def __init__(self, seeds: Sequence[int], step_cap: int, replay: str = "changed"):
        if replay not in REPLAY_CHOICES:
            raise ValueError(f"replay={replay!r} is unknown; choose one of {', '.join(REPLAY_CHOICES)}")
        self.seeds = [int(s) for s in seeds]
        self.step_cap = int(step_cap)
        self.reuse_off_reason: str | None = None if replay == "changed" else "eval_replay=all"
        self.played = self.played_total = self.asked_total = 0
        self._actions: np.ndarray | None = None  # the policy the remembered episodes were played with
        self._acted: list[list[int]] = [[] for _ in self.seeds]  # per seed, the states its episode acted in
        self._returns = np.empty(len(self.seeds))
        self._repeats_checked = False  # whether kept episodes were found to repeat (checked once, before the first reuse)

    def returns(self, environment: TabularEnvironment, actions: np.ndarray) -> np.ndarray:
        """The return of ``actions[state]`` from each seeded reset of ``environment`` (a new array)."""
        actions = np.asarray(actions, dtype=np.int64)
        table = actions.tolist()

        def choose(state: int) -> tuple[int, float]:
            return table[state], 1.0

        episodes = GymEpisodes(environment, self.step_cap)
        every = range(len(self.seeds))
        played = 0
        if self._actions is None or self.reuse_off_reason is not None:
            due = every
        else:
            changed = set(np.flatnonzero(actions != self._actions).tolist())
            acted = self._acted
            due = [i for i in every if not changed.isdisjoint(acted[i])] if changed else []
            if not self._repeats_checked and len(due) < len(self.seeds):
                checked, repeats = self._check_repeats(episodes, choose, [i for i in every if changed.isdisjoint(acted[i])])
                played += checked
                if not repeats:
                    due = every
        for i in due:
            episodes.seed(self.seeds[i])
            episode = episodes.play(choose)
            self._returns[i] = episode.total_reward
            self._acted[i] = episode.states
            played += 1
        self.played = played
        self.played_total += played
        self.asked_total += len(self.seeds)
        self._actions = actions.copy()
        return self._returns.copy()

    def summary(self) -> str:
        """One line on how the evaluations were played, for the run's tags and the terminal."""
        if self.reuse_off_reason is not None:
            return f"every episode played at every evaluation ({self.reuse_off_reason})"
        share = self.played_total / self.asked_total if self.asked_total else 0.0
        return f"episodes played again only where the greedy action changed: {self.played_total} of {self.asked_total} ({share:.0%})"

    def _check_repeats(self, episodes: GymEpisodes, choose, kept: list[int]) -> tuple[int, bool]:
        """Play the first few of the episodes about to be kept and compare: ``(episodes played, whether all repeated)``.

        On a difference reuse is off for good; once they repeat, it is not checked again.
        """
        chosen = kept[:REPEAT_CHECK_EPISODES]
        for i in chosen:
            episodes.seed(self.seeds[i])
            again = episodes.play(choose)
            if again.states != self._acted[i] or again.total_reward != self._returns[i]:
                self.reuse_off_reason = f"the evaluation environment played seed {self.seeds[i]} differently the second time"
                return len(chosen), False
        self._repeats_checked = True
        return len(chosen), True
