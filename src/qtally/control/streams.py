"""Random streams: one seed split into independent streams, shared by training, prediction and rollouts.

``seed`` is split by :class:`numpy.random.SeedSequence` into four independent children:

- ``env_seed``: the seed of the environment's own generator (passed to its first ``reset``);
- ``acting``: the uniforms behind every decision of the acting policy, one per decision
  (the draw protocol of :mod:`qtally.policy.table_policy`), read through :class:`UniformDraws`;
- ``starts``: the state-action pairs of exploring starts (or prediction's chosen starts),
  one uniform per start read through :class:`UniformDraws` (:func:`start_pair`);
- ``evaluation``: the base of the fixed evaluation seeds.

So changing how often a run evaluates cannot shift a single training draw, and the whole
state of every stream fits in a JSON object (:meth:`RandomStreams.state`), which is what a
checkpoint needs.

>>> a, b = RandomStreams(7), RandomStreams(7)
>>> [a.acting.next() for _ in range(3)] == [b.acting.next() for _ in range(3)]
True
>>> evaluation_seeds(RandomStreams(7).evaluation_base, 3).tolist() == evaluation_seeds(RandomStreams(7).evaluation_base, 3).tolist()
True
"""

from __future__ import annotations

from itertools import chain
from operator import length_hint
from typing import Any, Callable, Iterator

import numpy as np

__all__ = ["RandomStreams", "UniformDraws", "start_pair", "evaluation_base", "evaluation_seeds", "rollout_seeds", "SEED_MODULUS", "ROLLOUT_SEED_FLOOR"]

SEED_MODULUS = 2**31 - 1  # seeds handed to environments stay in the 31-bit range every library accepts
ROLLOUT_SEED_FLOOR = 2**31  # rollout seeds start here, above every training and evaluation seed
_BLOCK = 1024


class UniformDraws:
    """Uniforms in [0, 1) from a generator, drawn in blocks but read one at a time or as a window.

    A block of ``Generator.random(n)`` holds exactly the numbers that ``n`` single calls
    would give, so the block size never changes the stream; it only saves the per-call
    cost. :meth:`next` serves the gym path one number at a time, and :attr:`draw` does the
    same as a C-level call (a list iterator's, chained over blocks), for loops that run
    once per step: it stays valid until :meth:`window`, :meth:`advance` or :meth:`restore`
    moves the stream, and a stale one raises at its block's end. :meth:`window` and
    :meth:`advance` serve compiled code, which reads many at once and says how many it used.
    The state is the generator's state where the block began plus the position in it.
    """

    def __init__(self, generator: np.random.Generator):
        self.generator = generator
        self._rebase(0, _BLOCK)

    def _refill(self, skip: int, size: int) -> None:
        """Fill a fresh block of ``size`` numbers ``skip`` numbers after the current block's start."""
        if skip:  # the generator is at the block start (see callers); move it past the numbers read
            bit_generator = self.generator.bit_generator
            if isinstance(bit_generator, np.random.PCG64):
                bit_generator.advance(skip)  # one 64-bit draw per double: exact, and no array of skip numbers
            else:
                for start in range(0, skip, _BLOCK):
                    self.generator.random(min(_BLOCK, skip - start))
        self._block_start_state = self.generator.bit_generator.state
        array = getattr(self, "_array", None)
        if array is not None and array.shape[0] == size:
            self.generator.random(out=array)  # refilled in place: a long run never allocates another block
        else:
            self._array = self.generator.random(size)

    def _rebase(self, skip: int, size: int) -> None:
        self._refill(skip, size)
        self._read_from(0)

    def _read_from(self, position: int) -> None:
        """Read on from ``position`` of the current block, through a fresh :attr:`draw`."""
        self._base = position  # where the reader's list starts in the block
        self._reader: Iterator[float] | None = None
        self._reader_length = 0
        self.draw: Callable[[], float] = chain.from_iterable(self._readers()).__next__

    def _readers(self) -> Iterator[Iterator[float]]:
        """The block's unread numbers as a list iterator, then each next block's, for :attr:`draw`."""
        draw = self.draw
        while True:
            if self._base >= self._array.shape[0]:
                self.generator.bit_generator.state = self._block_start_state
                self._refill(self._base, _BLOCK)
                self._base = 0
            items = self._array[self._base :].tolist()
            self._reader, self._reader_length = iter(items), len(items)
            yield self._reader
            if self.draw is not draw:
                raise RuntimeError("this draw function is stale: the stream was moved since it was taken; take stream.draw again")
            self._base += self._reader_length
            self._reader = None

    @property
    def _position(self) -> int:
        """How many numbers of the current block have been read."""
        reader = self._reader
        return self._base if reader is None else self._base + self._reader_length - length_hint(reader)

    def _restart_here(self, size: int) -> None:
        position = self._position
        self.generator.bit_generator.state = self._block_start_state
        self._rebase(position, size)

    def next(self) -> float:
        """The next uniform (hot loops call :attr:`draw` itself: one Python call fewer per number)."""
        return self.draw()

    def window(self, n: int, block: int = _BLOCK) -> np.ndarray:
        """Every uniform left in the current block, at least ``n``, without consuming them.

        With fewer than ``n`` left, a new block of ``max(n, block)`` starts where the reading
        is. Call :meth:`advance` with the count used. The whole rest of the block is handed
        over, not just ``n``: a caller that uses a few hundred numbers per call (the compiled
        engine between two logging steps) would otherwise refill a large block every call.
        """
        if self._array.shape[0] - self._position < n:
            self._restart_here(max(int(n), int(block)))
        return self._array[self._position :]

    def advance(self, used: int) -> None:
        position = self._position
        if not 0 <= used <= self._array.shape[0] - position:
            raise ValueError(f"cannot consume {used} uniforms: {self._array.shape[0] - position} are left in the window")
        self._read_from(position + int(used))

    def generator_state_here(self) -> dict[str, Any]:
        """The bit generator's state as if exactly the numbers read so far had been drawn one by one."""
        scratch = UniformDraws.__new__(UniformDraws)
        scratch.generator = np.random.Generator(type(self.generator.bit_generator)())
        scratch.generator.bit_generator.state = self._block_start_state
        scratch._rebase(self._position, 0)
        return scratch._block_start_state

    def state(self) -> dict[str, Any]:
        return {"block_start": self._block_start_state, "position": self._position}

    def restore(self, state: dict[str, Any]) -> None:
        self.generator.bit_generator.state = state["block_start"]
        self._rebase(int(state["position"]), _BLOCK)


def start_pair(u: float, n_starts: int, n_actions: int) -> tuple[int, int]:
    """A start and a first action from one uniform, each uniform over its range.

    ``floor(u * n_starts * n_actions)`` indexes the pairs in order (start major), so a
    compiled engine that reads the same uniform picks the same pair.

    >>> start_pair(0.0, 3, 2), start_pair(0.5, 3, 2), start_pair(0.999, 3, 2)
    ((0, 0), (1, 1), (2, 1))
    """
    pairs = n_starts * n_actions
    return divmod(min(int(u * pairs), pairs - 1), n_actions)


def evaluation_base(seed: int, eval_seed: int | None = None) -> int:
    """Where a run's evaluation seeds start: the evaluation stream of ``eval_seed`` if given, else of ``seed``.

    A sweep gives every run the same ``eval_seed``, so all its runs are evaluated on the
    same episodes whatever their training seed.
    """
    return RandomStreams(seed if eval_seed is None else eval_seed).evaluation_base


def evaluation_seeds(base: int, n: int) -> np.ndarray:
    """The ``n`` fixed evaluation seeds that start at ``base``: the same at every evaluation of a run."""
    return (int(base) + np.arange(n, dtype=np.int64)) % SEED_MODULUS


def rollout_seeds(base: int, n: int) -> np.ndarray:
    """The ``n`` environment seeds of a rollout: all in [2**31, 2**32), so disjoint from training and evaluation.

    Every seed training and evaluation hand to an environment (``env_seed``, the
    evaluation seeds) is reduced modulo ``SEED_MODULUS = 2**31 - 1``, so it is below
    2**31 - 1; a rollout therefore never replays an episode the policy was trained or
    selected on. ``base`` (any non-negative integer) picks where the block starts.

    >>> seeds = rollout_seeds(7, 3)
    >>> seeds.tolist() == [2**31 + 7, 2**31 + 8, 2**31 + 9]
    True
    >>> bool(rollout_seeds(2**31 - 1, 2).min() >= 2**31) and bool(rollout_seeds(2**31 - 1, 2).max() < 2**32)
    True
    """
    if int(base) < 0:
        raise ValueError(f"seed={base} must be a non-negative integer")
    return ROLLOUT_SEED_FLOOR + (int(base) + np.arange(n, dtype=np.int64)) % ROLLOUT_SEED_FLOOR


class RandomStreams:
    """The independent streams of one seed (module docstring)."""

    def __init__(self, seed: int):
        env_sequence, acting_sequence, start_sequence, evaluation_sequence = np.random.SeedSequence(int(seed)).spawn(4)
        self.seed = int(seed)
        self.env_seed = int(env_sequence.generate_state(1)[0]) % SEED_MODULUS
        self.acting = UniformDraws(np.random.default_rng(acting_sequence))
        self.starts = UniformDraws(np.random.default_rng(start_sequence))
        self.evaluation_base = int(evaluation_sequence.generate_state(1)[0]) % SEED_MODULUS

    def state(self) -> dict[str, Any]:
        """Everything needed to continue every stream exactly where it is (JSON-able)."""
        return {"seed": self.seed, "acting": self.acting.state(), "starts": self.starts.state()}

    def restore(self, state: dict[str, Any]) -> None:
        if int(state["seed"]) != self.seed:
            raise ValueError(f"these streams belong to seed {state['seed']}, not {self.seed}")
        self.acting.restore(state["acting"])
        self.starts.restore(state["starts"])
