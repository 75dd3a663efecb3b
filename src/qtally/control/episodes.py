"""One played episode as arrays: the unit every learner, estimator and summary consumes."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["EpisodeArrays"]


@dataclass(frozen=True)
class EpisodeArrays:
    """One played episode: states and actions as table indices, the rewards that followed.

    ``behaviour_probabilities[t]`` is the probability the acting policy gave ``actions[t]``;
    ``tail_value`` is what the return is seeded with after the last reward (0 when the
    episode terminated; a bootstrap estimate when a time limit cut it short).
    """

    states: np.ndarray
    actions: np.ndarray
    rewards: np.ndarray
    behaviour_probabilities: np.ndarray
    tail_value: float = 0.0

    @property
    def length(self) -> int:
        return int(self.states.shape[0])

    def with_tail(self, tail_value: float) -> "EpisodeArrays":
        return EpisodeArrays(self.states, self.actions, self.rewards, self.behaviour_probabilities, float(tail_value))
