"""What an episode cut short contributes, and the step cap that makes sure every episode is cut at all.

An episode cut by a time limit (the environment's own, or qtally's step cap) has no true
Monte Carlo return. ``truncation`` says what to do with it:

- ``as_terminal`` (default): treat the cut as the end, the return after it is 0. Biased,
  but a policy that walks in circles pays for every step it wasted, which is what teaches
  it to stop.
- ``bootstrap``: seed the return at the cut with the current estimate of the state reached,
  the value of the policy being learned there (the partial-episode bootstrap of Pardo et al.
  2018, "Time Limits in Reinforcement Learning"). The better estimate once values are
  realistic; from an optimistic all-zero table it praises loops (on CliffWalking a looping
  policy survived 5000 episodes under ``bootstrap`` and was gone under ``as_terminal``).
- ``discard``: leave the episode out of the update (unbiased, but a policy that never
  finishes an episode then never learns).

Step cap: an environment without a time limit and a policy that loops would run forever,
so every episode is cut after ``step_cap`` steps (``env.step_cap``; by default
:func:`default_step_cap`) and the cut counts as a truncation.

>>> tail_value("bootstrap", truncated=True, bootstrap_value=lambda: 2.5)
2.5
>>> tail_value("discard", truncated=True, bootstrap_value=lambda: 2.5) is None
True
>>> tail_value("discard", truncated=False, bootstrap_value=lambda: 2.5)
0.0
>>> default_step_cap(16), default_step_cap(704)
(1000, 7040)
"""

from __future__ import annotations

from typing import Callable

__all__ = ["TRUNCATION_CHOICES", "check_truncation", "tail_value", "default_step_cap", "resolve_step_cap"]

TRUNCATION_CHOICES = ("as_terminal", "bootstrap", "discard")


def check_truncation(rule: str, key: str = "env.truncation") -> str:
    if rule not in TRUNCATION_CHOICES:
        raise ValueError(f"{key}={rule!r} is unknown; choose one of {', '.join(TRUNCATION_CHOICES)}")
    return rule


def tail_value(rule: str, *, truncated: bool, bootstrap_value: Callable[[], float]) -> float | None:
    """The value the return is seeded with after the last reward; ``None`` means leave the episode out."""
    if not truncated or rule == "as_terminal":
        return 0.0
    if rule == "bootstrap":
        return float(bootstrap_value())
    return None


def default_step_cap(n_states: int) -> int:
    """Ten steps per table state, at least 1000, at most a million.

    An episode that long has passed through every state ten times over on average: it is
    looping, not travelling (a rule of thumb, common practice, no source). The floor keeps
    tiny tables from cutting honest wandering; the ceiling bounds the time of one episode.
    """
    return int(min(max(1_000, 10 * int(n_states)), 1_000_000))


def resolve_step_cap(configured: int | None, n_states: int) -> int:
    """``env.step_cap`` if set (a positive count), else the default for the table size."""
    if configured is None:
        return default_step_cap(n_states)
    if int(configured) < 1:
        raise ValueError(f"env.step_cap={configured} must be a positive number of steps, or null for the default")
    return int(configured)
