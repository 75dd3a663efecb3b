"""The tabular model an environment may expose, as arrays.

A :class:`TabularModel` is what exact dynamic programming needs: transition
probabilities, expected immediate rewards, which states are terminal, and the
start distribution. State indices are the same table indices the observation
encoders produce (see :mod:`qtally.envs.encoders`), so a Q table learned from
episodes and a value computed from the model line up entry for entry.

A custom environment exposes its model by implementing :class:`ModelSource`
(a ``tabular_model()`` method). Gymnasium's toy-text environments expose a
``P`` table, which :func:`qtally.envs.model_extraction.model_from_p_table` turns into a
:class:`TabularModel`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol, runtime_checkable

import numpy as np
import scipy.sparse as sp

__all__ = ["TabularModel", "ModelSource", "NoModelError"]


class NoModelError(RuntimeError):
    """The environment does not expose a transition model."""


@dataclass(frozen=True)
class TabularModel:
    """A finite episodic MDP in array form.

    transitions: sparse ``(n_states * n_actions, n_states)`` array; row ``s * n_actions + a``
        holds ``P(s' | s, a)``. Rows of terminal states are all zero (absorbing, value 0).
    rewards: ``(n_states, n_actions)`` expected immediate reward ``r(s, a)``.
    terminal: ``(n_states,)`` bool, states whose value is 0 by definition.
    start_distribution: ``(n_states,)`` probabilities of the first state of an episode.
    """

    transitions: sp.csr_array
    rewards: np.ndarray
    terminal: np.ndarray
    start_distribution: np.ndarray

    @property
    def n_states(self) -> int:
        return int(self.rewards.shape[0])

    @property
    def n_actions(self) -> int:
        return int(self.rewards.shape[1])


@runtime_checkable
class ModelSource(Protocol):
    """Implemented by a custom environment that can state its own dynamics."""

    def tabular_model(self) -> TabularModel:
        """Return the model, with state indices as the observation encoder numbers them."""
        ...
