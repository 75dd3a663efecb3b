"""Returns of an episode and which time steps count as visits.

>>> discounted_returns(np.array([1.0, 0.0, 2.0]), gamma=0.5)
array([1.5, 1. , 2. ])
>>> first_visit_mask(np.array([3, 5, 3, 7, 5]))
array([ True,  True, False,  True, False])
"""

from __future__ import annotations

import numpy as np
from scipy.signal import lfilter

__all__ = ["discounted_returns", "first_visit_mask", "visit_mask"]


def discounted_returns(rewards: np.ndarray, gamma: float, tail_value: float = 0.0) -> np.ndarray:
    """G_t = r_t + gamma * G_{t+1}, with G_T = ``tail_value`` (0 for a terminated episode).

    The backward recursion is a first-order linear filter run over the reversed rewards,
    so the whole episode is done in one array call.
    """
    rewards = np.asarray(rewards, dtype=np.float64)
    if rewards.size == 0:
        return rewards.copy()
    reversed_rewards = rewards[::-1].copy()
    reversed_rewards[0] += gamma * tail_value
    return lfilter([1.0], [1.0, -gamma], reversed_rewards)[::-1].copy()


def first_visit_mask(keys: np.ndarray) -> np.ndarray:
    """True at the first time step each key (a state, or a state-action pair) occurs."""
    keys = np.asarray(keys)
    mask = np.zeros(keys.shape[0], dtype=bool)
    if keys.size:
        _, first = np.unique(keys, return_index=True)
        mask[first] = True
    return mask


def visit_mask(keys: np.ndarray, first_visit: bool) -> np.ndarray:
    """The time steps whose returns update an estimate: first visits only, or every visit."""
    return first_visit_mask(keys) if first_visit else np.ones(np.asarray(keys).shape[0], dtype=bool)
