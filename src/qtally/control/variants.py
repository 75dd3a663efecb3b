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


def _backward_update(values: ActionValues, states: list, actions: list, rewards: list, behaviour: list, tail_value: float,
                     gamma: float, first_visit: bool, step_size: float | None, weighted: bool) -> int:
    """Both updates' backward loop over one episode's lists; returns how many time steps were used.

    ``G = r + gamma * G`` from the last step back, each counted visit updated as it goes:
    scalar Python on flat memoryviews beats array calls at these lengths (the array form,
    :func:`~qtally.control.returns.discounted_returns`, is the reference in the tests).
    ``weighted``: the off-policy update, with step ``W / C`` (or ``min(1, step * W)``),
    stopped after the first step whose action the greedy target would not take.
    The greedy actions (:attr:`ActionValues.greedy`) are kept in step here, inline: this runs
    for every step of every episode, and a call per update cost a tenth of the loop. The
    trainer hands long episodes to the compiled engine's update instead
    (:mod:`qtally.engine.compiled_update`), which does the same sums in the same order.
    """
    last = len(states) - 1
    if last < 0:
        return 0
    n_actions = values.q.shape[1]
    first = None
    # First visits need the earliest time of each pair, but only when some state comes back
    # (a set of the states is a C loop; most episodes of a day counter or a growing sum never repeat one).
    if first_visit and last and len(set(states)) <= last:
        keys = [s * n_actions + a for s, a in zip(states, actions)]
        # Filled from the end, so each key keeps the earliest time it occurs.
        first = dict(zip(reversed(keys), range(last, -1, -1)))
    q, visits, weights_sum = values.flat
    greedy = values.greedy
    g = tail_value
    w = 1.0
    for t in range(last, -1, -1):
        g = gamma * g + rewards[t]
        state = states[t]
        action = actions[t]
        key = state * n_actions + action
        if first is None or first[key] == t:
            visits[key] += 1
            if weighted:
                weights_sum[key] += w
                step = w / weights_sum[key] if step_size is None else min(1.0, step_size * w)
            else:
                step = 1.0 / visits[key] if step_size is None else step_size
            old = q[key]
            q[key] = new = old + step * (g - old)
            # Keep greedy[state] the lowest-index best action; the row is read again only when
            # the greedy action's own value drops.
            best = greedy[state]
            if action == best:
                if new < old:
                    row_start = key - action
                    row = q[row_start : row_start + n_actions].tolist()
                    greedy[state] = row.index(max(row))
            else:
                incumbent = q[key - action + best]
                if new > incumbent or (new == incumbent and action < best):
                    greedy[state] = action
        if weighted:
            if action != greedy[state]:  # the greedy target (lowest index on ties) would not take it
                return last - t + 1
            w /= behaviour[t]  # pi(a|s) = 1 for the target action
    return last + 1


class _ArrayUpdate:
    """``update`` from an episode's arrays, through the subclass's ``update_lists``."""

    def update(self, values: ActionValues, episode: EpisodeArrays) -> int:
        """Update from an episode's arrays; return how many time steps were used."""
        return self.update_lists(
            values, episode.states.tolist(), episode.actions.tolist(), episode.rewards.tolist(), episode.behaviour_probabilities.tolist(), episode.tail_value
        )


@dataclass(frozen=True)
class _EvaluationUpdate(_ArrayUpdate):
    """Shared by exploring starts and on-policy: average the returns that follow each visit.

    A plain backward loop, G = r + gamma * G, updating each counted visit as it goes:
    episodes are walked once, and scalar Python beats array calls at these lengths
    (the array form, :func:`~qtally.control.returns.discounted_returns`, computes the
    same returns and is the reference in the tests).
    """

    gamma: float
    first_visit: bool = True
    step_size: float | None = None

    def update_lists(self, values: ActionValues, states: list, actions: list, rewards: list, probabilities: list, tail_value: float) -> int:
        """The same update from plain lists (what the trainer holds after an episode)."""
        return _backward_update(values, states, actions, rewards, probabilities, tail_value, self.gamma, self.first_visit, self.step_size, False)


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
class OffPolicy(_ArrayUpdate):
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

    def update_lists(self, values: ActionValues, states: list, actions: list, rewards: list, behaviour: list, tail_value: float) -> int:
        """The same update from plain lists (what the trainer holds after an episode)."""
        return _backward_update(values, states, actions, rewards, behaviour, tail_value, self.gamma, self.first_visit, self.step_size, True)


VARIANT_NAMES = ("exploring_starts", "on_policy", "off_policy")


def make_variant(name: str, gamma: float, first_visit: bool, step_size: float | None):
    """Build a variant from its config name."""
    classes = {"exploring_starts": ExploringStarts, "on_policy": OnPolicy, "off_policy": OffPolicy}
    try:
        return classes[name](gamma=gamma, first_visit=first_visit, step_size=step_size)
    except KeyError:
        raise ValueError(f"variant.name={name!r} is unknown; choose one of {', '.join(VARIANT_NAMES)}") from None
