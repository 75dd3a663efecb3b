"""Observation encoders: an environment's observation <-> a row of the Q table.

Each encoder owns one observation layout, knows how to encode a single observation
and a 2-D batch, how to decode a table index back into the environment's own terms
(so a state can be shown as "player sum 15, dealer 10, no usable ace" instead of
"state 311"), and how to describe itself as plain JSON for the policy artifact.

- :class:`DiscreteEncoder`: ``Discrete(n, start)``.
- :class:`PartsEncoder`: ``Tuple`` of ``Discrete`` parts, or ``MultiDiscrete``; reversible.
- :class:`BinnedBoxEncoder`: ``Box`` through per-dimension equal-width bins; many-to-one.

>>> enc = PartsEncoder(sizes=(32, 11, 2), starts=(0, 0, 0), names=("player_sum", "dealer_card", "usable_ace"))
>>> enc.encode((15, 10, 0))
350
>>> enc.decode(350)
(15, 10, 0)
>>> enc.n_states
704
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import Any, Sequence

import numpy as np
from gymnasium import spaces

__all__ = [
    "DiscreteEncoder",
    "PartsEncoder",
    "BinnedBoxEncoder",
    "EncoderError",
    "encoder_for_space",
    "encoder_from_spec",
]


# Most observations a parts encoder keeps the index of, by the observation's bytes (about
# 100 bytes an entry: 6.5 MB at most), so a long run over a huge table stays bounded.
MEMO_LIMIT = 65536


class EncoderError(ValueError):
    """The observation space cannot be turned into a table index as configured."""


@dataclass(frozen=True)
class DiscreteEncoder:
    """``Discrete(n, start)``: index = observation - start.

    >>> DiscreteEncoder(n=16).encode(5), DiscreteEncoder(n=16).decode(5)
    (5, 5)
    """

    n: int
    start: int = 0
    names: tuple[str, ...] = ("state",)

    @property
    def n_states(self) -> int:
        return self.n

    @property
    def width(self) -> int:
        return 1

    def encode(self, observation: Any) -> int:
        return int(observation) - self.start

    def encode_batch(self, observations: np.ndarray) -> np.ndarray:
        rows = _as_batch(observations, 1)
        index = rows[:, 0].astype(np.int64) - self.start
        _check_range(index, self.n, self.names)
        return index

    def decode(self, index: int) -> int:
        return int(index) + self.start

    def describe(self, index: int) -> str:
        return f"{self.names[0]}={self.decode(index)}"

    def spec(self) -> dict:
        return {"kind": "discrete", "n": self.n, "start": self.start, "names": list(self.names)}


@dataclass(frozen=True)
class PartsEncoder:
    """A tuple of discrete parts, numbered in C order (the last part varies fastest)."""

    sizes: tuple[int, ...]
    starts: tuple[int, ...]
    names: tuple[str, ...]

    @property
    def n_states(self) -> int:
        return int(np.prod(self.sizes))

    @property
    def width(self) -> int:
        return len(self.sizes)

    @cached_property
    def _strides(self) -> tuple[int, ...]:
        strides = np.cumprod((1,) + tuple(self.sizes[:0:-1]))[::-1]
        return tuple(int(x) for x in strides)

    @cached_property
    def fast_encode(self):
        """:meth:`encode` written out for this many parts, as one function: it runs once per step.

        The loop it replaces cost twice as much, and a wrapper around it one call more; the
        ``try`` costs nothing until an observation does not fit. An int64 array (what a
        ``MultiDiscrete`` space gives) lists Python ints already, so it skips the ``int``
        calls. A one-row int64 array already seen in range is looked up by its bytes
        instead (a quarter less than listing and checking it again); at most
        :data:`MEMO_LIMIT` are kept, so a huge table does not grow a huge memo.
        """
        names = [f"p{i}" for i in range(self.width)]
        unpack = ", ".join(names) + ","
        checks = " and ".join(f"0 <= {n} < {size}" for n, size in zip(names, self.sizes)) or "True"
        total = " + ".join(f"{n} * {stride}" for n, stride in zip(names, self._strides)) or "0"
        as_ints = "".join(f"            {n} = int({n})" + (f" - {start}\n" if start else "\n") for n, start in zip(names, self.starts))
        shifted = "".join(f"            {n} -= {start}\n" for n, start in zip(names, self.starts) if start) or "            pass\n"
        source = (
            "def encode(observation):\n"
            "    try:\n"
            "        if observation.__class__ is ndarray and observation.dtype is int64 and observation.ndim == 1:\n"
            "            key = observation.tobytes()\n"
            "            index = known(key)\n"
            "            if index is not None:\n"
            "                return index\n"
            f"            {unpack} = observation.tolist()\n"
            f"{shifted}"
            f"            if {checks}:\n"
            f"                index = {total}\n"
            "                if len(memo) < limit:\n"
            "                    memo[key] = index\n"
            "                return index\n"
            "        else:\n"
            f"            {unpack} = observation.tolist() if observation.__class__ is ndarray else observation\n"
            f"{as_ints}"
            f"            if {checks}:\n"
            f"                return {total}\n"
            "    except (TypeError, ValueError):\n"
            f"        raise EncoderError(f'observation {{observation!r}} does not have {self.width} parts') from None\n"
            "    raise EncoderError(f'observation {observation!r} is outside the table range')\n"
        )
        memo: dict[bytes, int] = {}  # the bytes of an in-range one-row int64 array -> its index
        scope = {"ndarray": np.ndarray, "int64": np.dtype(np.int64), "EncoderError": EncoderError, "memo": memo, "known": memo.get, "limit": MEMO_LIMIT}
        exec(compile(source, f"<qtally parts encoder {self.sizes}>", "exec"), scope)  # source built from integers only
        return scope["encode"]

    def encode(self, observation: Any) -> int:
        return self.fast_encode(observation)

    def encode_batch(self, observations: np.ndarray) -> np.ndarray:
        rows = _as_batch(observations, self.width).astype(np.int64) - np.asarray(self.starts)
        for column, (size, name) in enumerate(zip(self.sizes, self.names)):
            _check_range(rows[:, column], size, (name,))
        return np.ravel_multi_index(rows.T, self.sizes).astype(np.int64)

    def decode(self, index: int) -> tuple[int, ...]:
        parts = np.unravel_index(int(index), self.sizes)
        return tuple(int(p) + s for p, s in zip(parts, self.starts))

    def describe(self, index: int) -> str:
        return ", ".join(f"{n}={v}" for n, v in zip(self.names, self.decode(index)))

    def spec(self) -> dict:
        return {"kind": "parts", "sizes": list(self.sizes), "starts": list(self.starts), "names": list(self.names)}


@dataclass(frozen=True)
class BinnedBoxEncoder:
    """A ``Box`` cut into equal-width bins per dimension between ``low`` and ``high``.

    Values outside ``[low, high]`` fall into the edge bins, which is why unbounded
    dimensions (velocities) need explicit limits in the config.

    >>> enc = BinnedBoxEncoder(low=(0.0, -1.0), high=(1.0, 1.0), bins=(2, 4), names=("x", "v"))
    >>> enc.encode(np.array([0.9, -0.6])), enc.n_states
    (4, 8)
    """

    low: tuple[float, ...]
    high: tuple[float, ...]
    bins: tuple[int, ...]
    names: tuple[str, ...]

    @property
    def n_states(self) -> int:
        return int(np.prod(self.bins))

    @property
    def width(self) -> int:
        return len(self.bins)

    def _bin_indices(self, rows: np.ndarray) -> np.ndarray:
        low, high, bins = np.asarray(self.low), np.asarray(self.high), np.asarray(self.bins)
        scaled = (rows - low) / (high - low) * bins
        return np.clip(np.floor(scaled), 0, bins - 1).astype(np.int64)

    def encode(self, observation: Any) -> int:
        cells = self._bin_indices(np.asarray(observation, dtype=np.float64)[None, :])[0]
        return int(np.ravel_multi_index(tuple(cells), self.bins))

    def encode_batch(self, observations: np.ndarray) -> np.ndarray:
        rows = _as_batch(observations, self.width).astype(np.float64)
        return np.ravel_multi_index(self._bin_indices(rows).T, self.bins).astype(np.int64)

    def decode(self, index: int) -> tuple[float, ...]:
        """The centre of the cell, in the environment's units."""
        cells = np.asarray(np.unravel_index(int(index), self.bins), dtype=np.float64)
        low, high, bins = np.asarray(self.low), np.asarray(self.high), np.asarray(self.bins)
        return tuple(float(v) for v in low + (cells + 0.5) * (high - low) / bins)

    def describe(self, index: int) -> str:
        return ", ".join(f"{n}~{v:.3g}" for n, v in zip(self.names, self.decode(index)))

    def spec(self) -> dict:
        return {"kind": "bins", "low": list(self.low), "high": list(self.high), "bins": list(self.bins), "names": list(self.names)}


Encoder = DiscreteEncoder | PartsEncoder | BinnedBoxEncoder


def _as_batch(observations: Any, width: int) -> np.ndarray:
    """A 2-D batch from an array, a list of lists or a DataFrame (one row per observation)."""
    rows = np.asarray(getattr(observations, "values", observations))
    if rows.ndim == 1 and width == 1:
        rows = rows[:, None]
    if rows.ndim != 2 or rows.shape[1] != width:
        raise EncoderError(f"expected a 2-D batch with {width} column(s), one row per observation; got shape {rows.shape}")
    return rows


def _check_range(index: np.ndarray, size: int, names: Sequence[str]) -> None:
    if index.size and (index.min() < 0 or index.max() >= size):
        raise EncoderError(f"observation part {names[0]!r} out of range: table has {size} values")


def _part_names(n: int, names: Sequence[str] | None, prefix: str) -> tuple[str, ...]:
    if names:
        if len(names) != n:
            raise EncoderError(f"observation_names has {len(names)} names but the observation has {n} parts")
        return tuple(str(x) for x in names)
    return tuple(f"{prefix}{i}" for i in range(n))


def encoder_for_space(
    space: spaces.Space,
    *,
    names: Sequence[str] | None = None,
    bins: Sequence[int] | None = None,
    low: Sequence[float] | None = None,
    high: Sequence[float] | None = None,
) -> Encoder:
    """Choose the encoder for an observation space; refuse layouts a table cannot hold."""
    if isinstance(space, spaces.Discrete):
        return DiscreteEncoder(n=int(space.n), start=int(space.start), names=_part_names(1, names, "state") if names else ("state",))
    if isinstance(space, spaces.MultiDiscrete):
        if space.nvec.ndim != 1:
            raise EncoderError("MultiDiscrete observations must be one-dimensional")
        sizes = tuple(int(n) for n in space.nvec)
        starts = tuple(int(s) for s in np.broadcast_to(space.start, space.nvec.shape))
        return PartsEncoder(sizes=sizes, starts=starts, names=_part_names(len(sizes), names, "part"))
    if isinstance(space, spaces.Tuple):
        if not all(isinstance(part, spaces.Discrete) for part in space.spaces):
            raise EncoderError("Tuple observations must consist of Discrete parts only")
        sizes = tuple(int(p.n) for p in space.spaces)
        starts = tuple(int(p.start) for p in space.spaces)
        return PartsEncoder(sizes=sizes, starts=starts, names=_part_names(len(sizes), names, "part"))
    if isinstance(space, spaces.Box):
        shape = space.shape
        if len(shape) != 1:
            raise EncoderError(f"Box observations must be a flat vector, got shape {shape}")
        if bins is None:
            raise EncoderError(
                f"Box observations need binning: set env.bins (one count per dimension, {shape[0]} here) "
                "and, for unbounded dimensions, env.low and env.high"
            )
        n = shape[0]
        bins_t = tuple(int(b) for b in bins)
        if len(bins_t) != n or min(bins_t) < 1:
            raise EncoderError(f"env.bins needs {n} positive counts, got {list(bins)}")
        low_t = tuple(float(v) for v in (low if low is not None else space.low))
        high_t = tuple(float(v) for v in (high if high is not None else space.high))
        if len(low_t) != n or len(high_t) != n:
            raise EncoderError(f"env.low and env.high need {n} values each")
        if not all(np.isfinite(low_t)) or not all(np.isfinite(high_t)):
            raise EncoderError("Box observations have unbounded dimensions: set finite env.low and env.high for binning")
        if any(h <= l for l, h in zip(low_t, high_t)):
            raise EncoderError("env.high must exceed env.low in every dimension")
        return BinnedBoxEncoder(low=low_t, high=high_t, bins=bins_t, names=_part_names(n, names, "x"))
    raise EncoderError(f"observation space {type(space).__name__} cannot be encoded into a table index")


def encoder_from_spec(spec: dict) -> Encoder:
    """Rebuild an encoder from :meth:`spec` output (as stored in a policy artifact)."""
    kind = spec.get("kind")
    names = tuple(spec.get("names", ()))
    if kind == "discrete":
        return DiscreteEncoder(n=int(spec["n"]), start=int(spec["start"]), names=names or ("state",))
    if kind == "parts":
        return PartsEncoder(sizes=tuple(spec["sizes"]), starts=tuple(spec["starts"]), names=names)
    if kind == "bins":
        return BinnedBoxEncoder(low=tuple(spec["low"]), high=tuple(spec["high"]), bins=tuple(spec["bins"]), names=names)
    raise EncoderError(f"unknown encoder kind {kind!r}")
