"""The gym path's update of a long episode, run by the compiled engine's own code.

The variants' Python loops (:mod:`qtally.control.variants`) cost about half a microsecond
per step; :func:`qtally.engine.kernels.update_played`, the update the compiled engine
runs, costs a couple of microseconds per call (handing the lists over) and little per
step, and counts the episode's state visits on the way. The trainer takes it for
episodes of at least :data:`COMPILED_FROM` steps and the Python loop for shorter ones. Both do the same sums in the same order, so the choice
never changes a float of the Q table (the tests hold them equal).

Loading numba and the kernels costs about 1.5 s in a process that has not loaded them,
which the saving repays only after millions of steps: a run takes the compiled update
when numba is loaded already (the compiled engine, exact evaluation) or when the steps
left are at least :data:`REPAYS_LOADING` (:meth:`CompiledUpdate.load_if_it_pays`).
"""

from __future__ import annotations

import sys
from array import array
from importlib.util import find_spec

import numpy as np

from ..control.action_values import ActionValues
from ..control.variants import ExploringStarts, OffPolicy, OnPolicy

__all__ = ["COMPILED_FROM", "REPAYS_LOADING", "CompiledUpdate"]

# Episodes this long or longer go to the compiled update: measured on restocking seasons, the
# Python loop costs about 0.4 + 0.4 n microseconds for n steps before counting the visits
# (about 0.1 n more), the compiled one 1.3 + 0.06 n with them (a tie at 2 steps).
COMPILED_FROM = 3
# Steps left that repay loading numba and the kernels in a fresh process (about 1.5 s at
# about 0.4 microseconds saved per step, measured on this project's machines).
REPAYS_LOADING = 4_000_000


class CompiledUpdate:
    """``update_lists`` of one variant (same arguments, same result) in compiled code.

    numba is loaded by :meth:`load_if_it_pays`, not before: a run whose episodes are all
    short (Blackjack hands) or few never pays for it. :attr:`available` is false where
    numba is missing or the variant is not one of the kernel's; the Python loop then does
    every update.
    """

    def __init__(self, variant):
        self.variant = variant
        self._update = None
        self._bound = None  # (q, greedy, counts, visits, weights, entry point): see _bind
        self._first_time: np.ndarray | None = None  # scratch of one entry per pair, -1 between calls
        self._first_time_of: np.ndarray | None = None  # the Q table it was made for
        self._counters = np.zeros(2, dtype=np.int64)  # the kernel's coverage count; unused here
        self._unread = array("d")  # what stands for the behaviour probabilities where nothing reads them
        # numba found (not imported: kernels load at the first update), and a variant whose update
        # the kernel has: a subclass may have changed it, so only the three classes themselves.
        self.available = find_spec("numba") is not None and type(variant) in (ExploringStarts, OnPolicy, OffPolicy)

    @property
    def ready(self) -> bool:
        return self._update is not None

    def load_if_it_pays(self, steps_left: int) -> bool:
        """Load the kernels if numba is loaded already or ``steps_left`` repay loading it; return :attr:`ready`."""
        if self._update is None and self.available and ("numba" in sys.modules or steps_left >= REPAYS_LOADING):
            self._load()
        return self._update is not None

    def _load(self) -> None:
        from . import kernels
        from .compiled import step_size_code, variant_code

        variant = self.variant
        self._code = variant_code(variant)
        self._weighted = self._code == kernels.OFF_POLICY  # only importance sampling reads the behaviour probabilities
        self._first_visit = bool(variant.first_visit)
        self._gamma = float(variant.gamma)
        self._step_size = step_size_code(variant)
        self._update = kernels.update_played
        self._bound = None

    def update_lists(self, values: ActionValues, states: list, actions: list, rewards: list, probabilities: list, tail_value: float, *, count_visits: bool = False) -> int:
        """The variant's ``update_lists``; ``count_visits`` also adds each step's state to ``values.state_visits``.

        The lists go over as ``array.array`` buffers (states and actions as one), built in
        about half the time of numpy arrays (``np.fromiter``) and unboxed as fast. The call
        goes straight to the compiled code for these argument types (:meth:`_bind`), past
        numba's per-call typing of all fifteen arguments, which costs more for a buffer
        than for an array.
        """
        if self._update is None:
            self._load()
        q = values.q
        if q is not self._first_time_of:  # a new table (a restored state): scratch of its size
            self._first_time, self._first_time_of = np.full(q.size, -1, dtype=np.int64), q
        greedy = values.greedy_array
        counts = values.state_visits if count_visits else None
        args = (
            q, values.visits, values.cumulative_weights, greedy, counts,
            array("q", states + actions), array("d", rewards),
            array("d", probabilities) if self._weighted else self._unread,
            float(tail_value), self._code, self._first_visit, self._gamma, self._step_size, self._first_time, self._counters,
        )
        bound = self._bound
        if bound is not None and q is bound[0] and greedy is bound[1] and counts is bound[2] and values.visits is bound[3] and values.cumulative_weights is bound[4]:
            return bound[5](*args)
        return self._bind(args)

    def _bind(self, args: tuple) -> int:
        """Run the update through numba's dispatcher, then keep its compiled entry point for these arrays.

        Every other argument is made here with fixed types, so while the tables are the same
        arrays the types are the same and the entry point is the one numba would pick; a new
        table binds again. Where numba keeps no entry point for them, the dispatcher stays.
        """
        used = self._update(*args)
        dispatcher = self._update
        try:
            entry = dispatcher.overloads[tuple(dispatcher.typeof_pyval(a) for a in args)].entry_point
        except (AttributeError, KeyError):  # numba moved its internals: the dispatcher does every call
            entry = dispatcher
        self._bound = (args[0], args[3], args[4], args[1], args[2], entry)
        return used
