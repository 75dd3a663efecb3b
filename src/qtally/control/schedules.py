"""Exploration schedules: epsilon as a function of the episode number or the state's visit count.

Every schedule has a ``floor`` below which epsilon never falls, and is a plain function
object: ``schedule(episode, state_visits)`` returns epsilon in [0, 1]. ``episode`` counts
from 1; ``state_visits`` is how often the current state has been visited before (only the
per-state GLIE schedule uses it).

>>> LinearDecay(start=1.0, end=0.0, decay_episodes=10)(6, 0)
0.5
>>> round(ExponentialDecay(start=1.0, rate=0.5, floor=0.01)(3, 0), 3)
0.25
>>> GlieEpisodes(scale=1.0, floor=0.0)(4, 0), GlieVisits(scale=1.0, floor=0.05)(1, 40)
(0.25, 0.05)
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["Constant", "LinearDecay", "ExponentialDecay", "GlieEpisodes", "GlieVisits", "make_schedule", "SCHEDULE_KINDS"]


def _check_unit(name: str, value: float) -> None:
    if not 0.0 <= value <= 1.0:
        raise ValueError(f"schedule.{name}={value} is outside [0, 1]; epsilon values must lie in [0, 1]")


@dataclass(frozen=True)
class Constant:
    """The same epsilon in every episode."""

    epsilon: float
    per_state: bool = False

    def __post_init__(self) -> None:
        _check_unit("epsilon", self.epsilon)

    def __call__(self, episode: int, state_visits: int) -> float:
        return self.epsilon


@dataclass(frozen=True)
class LinearDecay:
    """From ``start`` down to ``end`` in a straight line over ``decay_episodes``, then flat."""

    start: float
    end: float
    decay_episodes: int
    per_state: bool = False

    def __post_init__(self) -> None:
        _check_unit("start", self.start)
        _check_unit("end", self.end)
        if self.decay_episodes < 1:
            raise ValueError(f"schedule.decay_episodes={self.decay_episodes} must be a positive episode count")

    def __call__(self, episode: int, state_visits: int) -> float:
        fraction = min(1.0, (episode - 1) / self.decay_episodes)
        return self.start + (self.end - self.start) * fraction


@dataclass(frozen=True)
class ExponentialDecay:
    """``start * rate ** (episode - 1)``, never below ``floor``."""

    start: float
    rate: float
    floor: float
    per_state: bool = False

    def __post_init__(self) -> None:
        _check_unit("start", self.start)
        _check_unit("floor", self.floor)
        if not 0.0 < self.rate <= 1.0:
            raise ValueError(f"schedule.rate={self.rate} must lie in (0, 1]")

    def __call__(self, episode: int, state_visits: int) -> float:
        return max(self.floor, self.start * math.pow(self.rate, episode - 1))


@dataclass(frozen=True)
class GlieEpisodes:
    """GLIE by episode: ``min(1, scale / k)`` in episode k, never below ``floor``."""

    scale: float
    floor: float
    per_state: bool = False

    def __post_init__(self) -> None:
        _check_unit("floor", self.floor)
        if self.scale <= 0:
            raise ValueError(f"schedule.scale={self.scale} must be positive")

    def __call__(self, episode: int, state_visits: int) -> float:
        return max(self.floor, min(1.0, self.scale / episode))


@dataclass(frozen=True)
class GlieVisits:
    """GLIE by state: ``min(1, scale / (n + 1))`` where n counts earlier visits of the state."""

    scale: float
    floor: float
    per_state: bool = True

    def __post_init__(self) -> None:
        _check_unit("floor", self.floor)
        if self.scale <= 0:
            raise ValueError(f"schedule.scale={self.scale} must be positive")

    def __call__(self, episode: int, state_visits: int) -> float:
        return max(self.floor, min(1.0, self.scale / (state_visits + 1)))


SCHEDULE_KINDS = {
    "constant": Constant,
    "linear": LinearDecay,
    "exponential": ExponentialDecay,
    "glie_episode": GlieEpisodes,
    "glie_visits": GlieVisits,
}


def make_schedule(kind: str, **parameters: float):
    """Build a schedule from its config name and parameters."""
    try:
        cls = SCHEDULE_KINDS[kind]
    except KeyError:
        raise ValueError(f"schedule.kind={kind!r} is unknown; choose one of {', '.join(SCHEDULE_KINDS)}") from None
    return cls(**parameters)
