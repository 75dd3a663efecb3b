"""One training episode played under a fixed acting policy, apart from learning from it.

The trainer's sequential loop and every collection worker (:mod:`qtally.engine.collection`)
play through :meth:`EpisodePlayer.play`, so an episode is the same whoever plays it: the
same draws from the same streams (one acting uniform per decision, one start uniform per
exploring start, the environment's own generator), the same epsilon and the same
recorded behaviour probabilities. The player reads the Q table and the per-state visit
counts it is given and changes neither: the episode's states are what it adds to the
counts, and the learner applies them with the update.

That split is what lets a batch of episodes be played in parallel with one snapshot of
the acting policy and learned from afterwards, in episode order: the probabilities
recorded are those of the snapshot actually used, so off-policy importance sampling
stays exact. Played against the live tables one episode at a time, it is the
sequential trainer.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..control.streams import UniformDraws, start_pair
from ..policy.table_policy import EpsilonGreedyActing, epsilon_greedy_choice
from .episodes import GymEpisodes, PlayedEpisode

__all__ = ["Experience", "EpisodePlayer"]


@dataclass(slots=True)  # plain, not frozen: it is built once per episode on the hot path
class Experience:
    """A played episode plus what the learner needs besides it.

    ``episode``: the episode's number (1-based), which the schedule read; ``decisions``:
    how many actions the policy chose (a forced first action is not one); ``epsilon_sum``:
    the sum of epsilon over those decisions. Every state of ``played.states`` (the
    exploring start's included) adds one to its visit count.
    """

    episode: int
    played: PlayedEpisode
    decisions: int
    epsilon_sum: float


class EpisodePlayer:
    """Plays training episodes of one environment for one variant and schedule."""

    def __init__(self, episodes: GymEpisodes, variant, schedule, start_states: list[Any]):
        self.episodes = episodes
        self.variant = variant
        self.schedule = schedule
        self.start_states = list(start_states)
        self.n_actions = episodes.environment.n_actions
        self.per_state = bool(getattr(schedule, "per_state", False))
        self._start_indices: list[int] | None = None  # table index of each start state, encoded once when first needed
        # a variant whose behaviour epsilon is always 0 (exploring starts) acts greedily whatever the schedule
        self._greedy_only = variant.behaviour_epsilon(1.0) == 0.0
        self._acting: EpsilonGreedyActing | None = None

    def start_indices(self) -> list[int]:
        if self._start_indices is None:
            encode = self.episodes.environment.encoder.encode
            self._start_indices = [encode(o) for o in self.start_states]
        return self._start_indices

    def _per_state_acting(self, state_visits: np.ndarray, episode: int, greedy, next_uniform, start_state: int | None):
        """A chooser whose epsilon follows each state's visits, counting this episode's own, and the list of its epsilons.

        A function of its own, not a closure inside :meth:`play`: the variables a closure
        captures cost every call of the function that holds them, per-state schedule or not.
        """
        behaviour_epsilon, schedule, n_actions = self.variant.behaviour_epsilon, self.schedule, self.n_actions
        epsilons: list[float] = []
        added: dict[int, int] = {} if start_state is None else {start_state: 1}  # this episode's visits so far

        def choose(s: int) -> tuple[int, float]:
            seen = added.get(s, 0)
            epsilon = behaviour_epsilon(schedule(episode, int(state_visits[s]) + seen))
            added[s] = seen + 1
            epsilons.append(epsilon)
            return epsilon_greedy_choice(greedy[s], n_actions, epsilon, next_uniform())

        return choose, epsilons

    def play(self, q: np.ndarray, state_visits: np.ndarray, episode: int, acting: UniformDraws, starts: UniformDraws, greedy: list[int] | None = None) -> Experience:
        """Episode number ``episode``, acting on ``q`` and ``state_visits`` as they are (neither is changed).

        ``greedy``: the greedy action of each row of ``q`` (lowest index on ties), when the
        caller keeps it (:attr:`ActionValues.greedy`); else it is read off ``q`` here.
        Kept lean, since it runs for every step: epsilon is computed once per episode
        unless the schedule depends on the state, and acting is a list lookup and one
        uniform. The compiled kernel draws the same way (:mod:`qtally.engine.kernels`).
        """
        variant, schedule, n_actions = self.variant, self.schedule, self.n_actions
        if greedy is None:
            greedy = q.argmax(axis=1).tolist()
        next_uniform = acting.draw  # taken each episode: a checkpoint's restore between episodes makes a new one

        start_observation = first_action = None
        start_state = None
        if variant.needs_start_control:
            index, first_action = start_pair(starts.draw(), len(self.start_states), n_actions)
            start_observation = self.start_states[index]
            start_state = (self._start_indices or self.start_indices())[index]

        if self.per_state:
            choose, epsilons = self._per_state_acting(state_visits, episode, greedy, next_uniform, start_state)
        else:  # one epsilon for the whole episode (0 for a variant that acts greedily)
            epsilon = 0.0 if self._greedy_only else variant.behaviour_epsilon(schedule(episode, 0))
            choose = self._acting
            if choose is None or choose.epsilon != epsilon or choose.greedy is not greedy or choose.next_uniform is not next_uniform:
                choose = self._acting = EpsilonGreedyActing(greedy, epsilon, n_actions, next_uniform)  # kept while nothing changes

        played = self.episodes.play(choose, start_observation=start_observation, first_action=first_action)
        # Every state the episode acted in is a visit, the exploring start's included; only
        # a forced first action is not a decision of the policy.
        decisions = len(played.states) - (start_state is not None)
        epsilon_sum = 0.0
        if self.per_state:
            for e in epsilons:
                epsilon_sum += e
        elif epsilon:
            for _ in range(decisions):  # the same running sum as a per-decision schedule and the kernel
                epsilon_sum += epsilon
        return Experience(episode, played, decisions, epsilon_sum)  # positional: once per episode
