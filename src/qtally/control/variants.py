"""The three Monte Carlo control variants, as updates of a Q table from one finished episode.

Each variant answers three questions: how the next episode is played
(``behaviour_epsilon``, ``needs_start_control``), what a state reached at a time-limit cut
is worth to the policy it learns (``tail_value``), and how a played episode changes the
estimates (``update``). All take arrays; the state lives in :class:`ActionValues`.

- ``exploring_starts``: episodes begin from a random state-action pair, then act greedily.
- ``on_policy``: first-visit (or every-visit) control of an epsilon-soft policy.
- ``off_policy``: weighted importance sampling with an epsilon-soft behaviour policy
  and a greedy target; the backward loop stops where the behaviour action leaves the target.
  The target is the greedy policy under qtally's one tie rule (lowest index,
  :mod:`qtally.policy.table_policy`), so pi(a|s) is 1 on the target action and 0 elsewhere.

Step size: ``None`` means the sample average (1/N, or W/C for weighted IS); a number
means a constant step. For off-policy with a constant step the update is
``Q += min(1, step * W) * (G - Q)``, so a large weight cannot overshoot the return.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..policy.table_policy import TablePolicy
from .action_values import ActionValues
from .episodes import EpisodeArrays

__all__ = ["EpisodeArrays", "ExploringStarts", "OnPolicy", "OffPolicy", "make_variant", "VARIANT_NAMES"]


def _first_visit_times(keys: list[int]) -> dict[int, int]:
    first: dict[int, int] = {}
    for t, key in enumerate(keys):
        first.setdefault(key, t)
    return first


@dataclass(frozen=True)
class _EvaluationUpdate:
    """Shared by exploring starts and on-policy: average the returns that follow each visit.

    A plain backward loop, G = r + gamma * G, updating each counted visit as it goes:
    episodes are walked once, and scalar Python beats array calls at these lengths
    (the array form, :func:`~qtally.control.returns.discounted_returns`, computes the
    same returns and is the reference in the tests).
    """

    gamma: float
    first_visit: bool = True
    step_size: float | None = None

    def update(self, values: ActionValues, episode: EpisodeArrays) -> int:
        """Update from an episode's arrays; return how many time steps were used."""
        return self.update_lists(
            values, episode.states.tolist(), episode.actions.tolist(), episode.rewards.tolist(), episode.behaviour_probabilities.tolist(), episode.tail_value
        )

    def update_lists(self, values: ActionValues, states: list, actions: list, rewards: list, probabilities: list, tail_value: float) -> int:
        """The same update from plain lists (what the trainer holds after an episode)."""
        if not states:
            return 0
        n_actions = values.n_actions
        keys = [s * n_actions + a for s, a in zip(states, actions)]
        first = _first_visit_times(keys) if self.first_visit else None
        q, visits, _ = values.flat
        gamma, step_size = self.gamma, self.step_size
        g = tail_value
        for t in range(len(keys) - 1, -1, -1):
            g = gamma * g + rewards[t]
            key = keys[t]
            if first is not None and first[key] != t:
                continue
            visits[key] += 1
            step = 1.0 / visits[key] if step_size is None else step_size
            q[key] += step * (g - q[key])
        return len(keys)


@dataclass(frozen=True)
class ExploringStarts(_EvaluationUpdate):
    """Random start pair, greedy afterwards: epsilon is always 0."""

    name = "exploring_starts"
    needs_start_control = True

    def behaviour_epsilon(self, epsilon: float) -> float:
        return 0.0

    def tail_value(self, q_row: np.ndarray, epsilon: float) -> float:
        """The acting policy is greedy: the best value of the state reached."""
        return float(np.max(q_row))


@dataclass(frozen=True)
class OnPolicy(_EvaluationUpdate):
    """The acting policy and the evaluated policy are the same epsilon-soft policy."""

    name = "on_policy"
    needs_start_control = False

    def behaviour_epsilon(self, epsilon: float) -> float:
        return epsilon

    def tail_value(self, q_row: np.ndarray, epsilon: float) -> float:
        """The learned policy is the epsilon-soft one: ``sum_a pi(a|s) Q(s, a)``, not the max."""
        return TablePolicy(np.asarray(q_row, dtype=float)[None, :]).state_value(0, epsilon)


@dataclass(frozen=True)
class OffPolicy:
    """Weighted importance sampling towards the greedy target policy."""

    gamma: float
    first_visit: bool = False
    step_size: float | None = None

    name = "off_policy"
    needs_start_control = False

    def behaviour_epsilon(self, epsilon: float) -> float:
        return epsilon

    def tail_value(self, q_row: np.ndarray, epsilon: float) -> float:
        """The target policy is greedy: the best value of the state reached."""
        return float(np.max(q_row))

    def update(self, values: ActionValues, episode: EpisodeArrays) -> int:
        """Run the weighted-IS backward loop; return how many time steps were used."""
        return self.update_lists(
            values, episode.states.tolist(), episode.actions.tolist(), episode.rewards.tolist(), episode.behaviour_probabilities.tolist(), episode.tail_value
        )

    def update_lists(self, values: ActionValues, states: list, actions: list, rewards: list, behaviour: list, tail_value: float) -> int:
        """The same update from plain lists (what the trainer holds after an episode)."""
        if not states:
            return 0
        n_actions = values.n_actions
        keys = [s * n_actions + a for s, a in zip(states, actions)]
        first = _first_visit_times(keys) if self.first_visit else None
        q, visits, weights_sum = values.flat
        gamma, step_size = self.gamma, self.step_size
        g = tail_value
        w = 1.0
        used = 0
        for t in range(len(states) - 1, -1, -1):
            key = keys[t]
            g = gamma * g + rewards[t]
            if first is None or first[key] == t:
                weights_sum[key] += w
                visits[key] += 1
                step = w / weights_sum[key] if step_size is None else min(1.0, step_size * w)
                q[key] += step * (g - q[key])
            used += 1
            row_start = key - actions[t]
            row = q[row_start : row_start + n_actions].tolist()
            if actions[t] != row.index(max(row)):  # the greedy target (lowest index on ties) would not take a
                break
            w /= behaviour[t]  # pi(a|s) = 1 for the target action
        return used


VARIANT_NAMES = ("exploring_starts", "on_policy", "off_policy")


def make_variant(name: str, gamma: float, first_visit: bool, step_size: float | None):
    """Build a variant from its config name."""
    classes = {"exploring_starts": ExploringStarts, "on_policy": OnPolicy, "off_policy": OffPolicy}
    try:
        return classes[name](gamma=gamma, first_visit=first_visit, step_size=step_size)
    except KeyError:
        raise ValueError(f"variant.name={name!r} is unknown; choose one of {', '.join(VARIANT_NAMES)}") from None
