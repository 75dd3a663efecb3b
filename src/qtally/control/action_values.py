"""The Q table and its bookkeeping: visit counts and, for weighted importance sampling, cumulative weights.

Memory is O(|S| |A|) whatever the number of episodes: estimates are updated
incrementally and no list of returns is ever kept.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

__all__ = ["ActionValues"]


@dataclass
class ActionValues:
    """Q(s, a) estimates, how many returns each has absorbed, and cumulative IS weights."""

    q: np.ndarray
    visits: np.ndarray
    cumulative_weights: np.ndarray
    state_visits: np.ndarray

    @classmethod
    def zeros(cls, n_states: int, n_actions: int, initial_value: float = 0.0) -> "ActionValues":
        return cls(
            q=np.full((n_states, n_actions), float(initial_value)),
            visits=np.zeros((n_states, n_actions), dtype=np.int64),
            cumulative_weights=np.zeros((n_states, n_actions)),
            state_visits=np.zeros(n_states, dtype=np.int64),
        )

    @property
    def n_states(self) -> int:
        return self.q.shape[0]

    @property
    def n_actions(self) -> int:
        return self.q.shape[1]

    @cached_property
    def flat(self) -> tuple[memoryview, memoryview, memoryview]:
        """``q``, ``visits`` and ``cumulative_weights`` as flat memoryviews, indexed ``s * n_actions + a``.

        The Python updates read and write single entries; a memoryview does that several
        times faster than numpy's scalar indexing, on the same memory (so the arrays see it).
        """
        return tuple(memoryview(array).cast("B").cast(array.dtype.char) for array in (self.q, self.visits, self.cumulative_weights))

    @cached_property
    def state_visit_counts(self) -> memoryview:
        """``state_visits`` as a memoryview, for the same reason as :attr:`flat`."""
        return memoryview(self.state_visits).cast("B").cast(self.state_visits.dtype.char)

    @cached_property
    def greedy_array(self) -> np.ndarray:
        """The greedy action of every state (lowest index on ties), kept in step with ``q`` by the gym path's updates.

        Built from ``q`` when first asked for; the updates keep it entry by entry
        (:mod:`qtally.control.variants`, :func:`qtally.engine.kernels.update_episode`).
        Whatever writes ``q`` another way calls :meth:`forget_greedy` afterwards.
        """
        return self.q.argmax(axis=1).astype(np.int64)

    @cached_property
    def greedy(self) -> memoryview:
        """:attr:`greedy_array` as a memoryview: acting reads one entry per step, in constant time."""
        array = self.greedy_array
        return memoryview(array).cast("B").cast(array.dtype.char)

    def forget_greedy(self) -> None:
        self.__dict__.pop("greedy", None)
        self.__dict__.pop("greedy_array", None)

    def coverage(self) -> float:
        """Fraction of state-action pairs whose estimate has absorbed at least one return."""
        return float(np.count_nonzero(self.visits)) / self.visits.size

