"""The policy a Q table stands for: one tie rule, one draw protocol, used by every command.

Training acts with it, the off-policy target is it, evaluation and exact evaluation
measure it, the policy file and the pyfunc model store it, and the pictures draw it. So
"the epsilon-soft policy of Q" means the same thing everywhere.

Tie rule: among actions of equal value the **lowest index** is the greedy one (as
``numpy.argmax``). It is deterministic, so a served policy always answers the same, an
exact evaluation needs no tie bookkeeping, and every decision consumes the same number
of random numbers. (A fresh all-zero row therefore prefers action 0; epsilon exploration,
exploring starts and, for deployment, the unvisited-state fallback deal with that.)

Draw protocol: every decision of an epsilon-soft policy consumes **exactly one uniform**
``u`` in [0, 1) from the acting stream, whatever the data: if ``u < epsilon`` the action is
``floor(u / epsilon * |A|)`` (uniform over all actions), otherwise the greedy action. A
probability table is sampled by inverse transform with one uniform as well
(:func:`sample_action`). A compiled engine that replays the same uniforms makes the same
choices.

>>> q = np.array([[0.0, 2.0, 2.0], [1.0, 0.0, 0.0]])
>>> greedy_actions(q).tolist()
[1, 0]
>>> epsilon_soft_probabilities(q, 0.3).round(2).tolist()
[[0.1, 0.8, 0.1], [0.8, 0.1, 0.1]]
>>> a, p = epsilon_greedy_decision(q[0].tolist(), 0.3, 0.05)   # u < epsilon: explore, floor(0.05 / 0.3 * 3) = 0
>>> a, round(p, 6)
(0, 0.1)
>>> a, p = epsilon_greedy_decision(q[0].tolist(), 0.3, 0.50)   # u >= epsilon: greedy, ties to the lowest index
>>> a, round(p, 6)
(1, 0.8)

Unvisited states: a state where no action ever absorbed a return has no learned action
(its row is still the initial value, so the tie rule would pick action 0 for no reason).
:meth:`TablePolicy.act` never answers there silently: it follows the declared
:class:`Fallback`, a uniformly random action (one uniform per decision, like exploration:
``floor(u * |A|)``), a fixed action, or a refusal (:class:`UnvisitedStateError`).

>>> policy = TablePolicy(q, visits=np.array([[1, 2, 0], [0, 0, 0]]), fallback=Fallback("action", 2))
>>> policy.act(np.array([0, 1])).tolist(), policy.visited_share
([1, 2], 0.5)
>>> TablePolicy(q, visits=np.array([[1, 2, 0], [0, 0, 0]])).act(np.array([0, 1]), uniforms=np.array([0.9, 0.5])).tolist()
[1, 1]
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

__all__ = [
    "TIE_RULE",
    "greedy_actions",
    "epsilon_soft_probabilities",
    "EpsilonGreedyActing",
    "deterministic_probabilities",
    "epsilon_greedy_decision",
    "epsilon_greedy_choice",
    "sample_action",
    "TablePolicy",
    "Fallback",
    "FALLBACK_RULES",
    "UnvisitedStateError",
]

TIE_RULE = "lowest index"
FALLBACK_RULES = ("uniform", "action", "refuse")


class UnvisitedStateError(ValueError):
    """A policy with the ``refuse`` fallback was asked to act in a state training never reached."""


@dataclass(frozen=True)
class Fallback:
    """What a learned table does in a state training never reached.

    ``uniform``: a uniformly random action, one uniform per decision (``floor(u * |A|)``);
    ``action``: always ``action``; ``refuse``: raise :class:`UnvisitedStateError`.
    Stored in the policy file and the pyfunc model as ``{"rule": ..., "action": ...}``.
    """

    rule: str = "uniform"
    action: int | None = None

    def __post_init__(self) -> None:
        if self.rule not in FALLBACK_RULES:
            raise ValueError(f"policy_fallback.rule={self.rule!r} is not one of {', '.join(FALLBACK_RULES)}")
        if self.rule == "action":
            if self.action is None or isinstance(self.action, bool) or int(self.action) != self.action or self.action < 0:
                raise ValueError(f"policy_fallback.action={self.action!r}: rule 'action' needs a non-negative action index")
            object.__setattr__(self, "action", int(self.action))
        elif self.action is not None:
            raise ValueError(f"policy_fallback.action={self.action!r} is only used with policy_fallback.rule=action, not {self.rule!r}")

    def check_actions(self, n_actions: int) -> None:
        """Refuse a fixed action the environment does not have."""
        if self.rule == "action" and not self.action < n_actions:
            raise ValueError(f"policy_fallback.action={self.action} is not an action here: allowed 0..{n_actions - 1}")

    def to_dict(self) -> dict:
        return {"rule": self.rule, "action": self.action}

    @classmethod
    def from_dict(cls, data: dict | None) -> "Fallback":
        data = data or {}
        return cls(rule=data.get("rule", "uniform"), action=data.get("action"))


def greedy_actions(q: np.ndarray, atol: float = 0.0) -> np.ndarray:
    """Per state, the greedy action of a Q table: the lowest index within ``atol`` of the best.

    ``atol`` > 0 treats values closer than a numerical tolerance as tied (exact dynamic
    programming uses its convergence tolerance); training and artifacts use 0.

    >>> greedy_actions(np.array([[1.0, 2.0, 2.0], [0.0, 0.0, -1.0]]), atol=1.5).tolist()
    [0, 0]
    """
    q = np.asarray(q, dtype=float)
    if atol == 0.0:
        return np.argmax(q, axis=1)
    return np.argmax(q >= q.max(axis=1, keepdims=True) - atol, axis=1)


def deterministic_probabilities(actions: np.ndarray, n_actions: int) -> np.ndarray:
    """One-hot ``(S, A)`` table of one action per state.

    >>> deterministic_probabilities(np.array([2, 0]), 3).tolist()
    [[0.0, 0.0, 1.0], [1.0, 0.0, 0.0]]
    """
    actions = np.asarray(actions, dtype=np.int64)
    probabilities = np.zeros((actions.shape[0], n_actions))
    probabilities[np.arange(actions.shape[0]), actions] = 1.0
    return probabilities


def epsilon_soft_probabilities(q: np.ndarray, epsilon: float | np.ndarray) -> np.ndarray:
    """``epsilon / |A|`` on every action plus ``1 - epsilon`` on the greedy one.

    ``epsilon`` may be one number or one per state (a per-state schedule).
    """
    q = np.asarray(q, dtype=float)
    epsilon = np.broadcast_to(np.asarray(epsilon, dtype=float), (q.shape[0],))
    if ((epsilon < 0.0) | (epsilon > 1.0)).any():
        raise ValueError(f"epsilon must be in [0, 1], got {epsilon.min()}..{epsilon.max()}")
    probabilities = np.repeat((epsilon / q.shape[1])[:, None], q.shape[1], axis=1)
    probabilities[np.arange(q.shape[0]), greedy_actions(q)] += 1.0 - epsilon
    return probabilities


def epsilon_greedy_decision(q_row: list[float], epsilon: float, u: float) -> tuple[int, float]:
    """The action of the epsilon-soft policy of one Q row for the uniform ``u``, and its probability.

    Plain Python on a list: this runs once per time step.
    """
    return epsilon_greedy_choice(q_row.index(max(q_row)), len(q_row), epsilon, u)


def epsilon_greedy_choice(greedy: int, n_actions: int, epsilon: float, u: float) -> tuple[int, float]:
    """:func:`epsilon_greedy_decision` when the row's greedy action is already known."""
    if u < epsilon:
        action = min(int(u / epsilon * n_actions), n_actions - 1)
    else:
        action = greedy
    return action, epsilon / n_actions + ((1.0 - epsilon) if action == greedy else 0.0)


class EpsilonGreedyActing:
    """Epsilon-greedy acting on a kept greedy list with one epsilon for the whole episode.

    A chooser (``acting(state) -> (action, probability)``) under the draw protocol above,
    the same choice as :func:`epsilon_greedy_choice`; the episode source recognises it and
    runs the same lines inside its step loop, which saves a call per step.
    ``epsilon = 0`` is greedy acting that still spends one uniform per decision.
    """

    __slots__ = ("greedy", "epsilon", "n_actions", "next_uniform", "explore", "exploit")

    def __init__(self, greedy: list[int], epsilon: float, n_actions: int, next_uniform: Callable[[], float]):
        self.greedy, self.epsilon, self.n_actions, self.next_uniform = greedy, float(epsilon), int(n_actions), next_uniform
        self.explore = self.epsilon / self.n_actions
        self.exploit = self.explore + (1.0 - self.epsilon)

    def __call__(self, state: int) -> tuple[int, float]:
        best = self.greedy[state]
        u = self.next_uniform()
        if u < self.epsilon:
            action = min(int(u / self.epsilon * self.n_actions), self.n_actions - 1)
            return action, (self.exploit if action == best else self.explore)
        return best, self.exploit


def sample_action(cumulative_row: list[float], probability_row: list[float], u: float) -> tuple[int, float]:
    """Inverse-transform sampling of one row of a probability table with the uniform ``u``.

    Zero-probability actions are never chosen, even at the boundaries.

    >>> sample_action([0.25, 0.25, 1.0], [0.25, 0.0, 0.75], 0.25)
    (2, 0.75)
    """
    threshold = u * cumulative_row[-1]
    last = len(cumulative_row) - 1
    action = 0
    while action < last and (cumulative_row[action] <= threshold or probability_row[action] == 0.0):
        action += 1
    return action, probability_row[action]


@dataclass(frozen=True)
class TablePolicy:
    """A Q table read as a policy: greedy actions, epsilon-soft probabilities, and what was learned where.

    ``visits`` (returns absorbed per pair) tells which states training reached; states
    never reached have no learned action, and :attr:`visited_states` says which they are.
    ``visited`` overrides that with an explicit bool per state (as a policy file stores
    it); with neither, every state counts as visited. :meth:`act` follows ``fallback``
    where the state was not visited.
    """

    q: np.ndarray
    visits: np.ndarray | None = None
    fallback: Fallback = field(default_factory=Fallback)
    visited: np.ndarray | None = None

    @property
    def n_states(self) -> int:
        return int(self.q.shape[0])

    @property
    def n_actions(self) -> int:
        return int(self.q.shape[1])

    def greedy_actions(self) -> np.ndarray:
        return greedy_actions(self.q)

    def probabilities(self, epsilon: float | np.ndarray = 0.0) -> np.ndarray:
        """The ``(S, A)`` action probabilities; ``epsilon=0`` is the greedy policy."""
        return epsilon_soft_probabilities(self.q, epsilon)

    def state_value(self, state: int, epsilon: float = 0.0) -> float:
        """``sum_a pi(a|s) Q(s, a)`` of the epsilon-soft policy: the value a cut-off episode is seeded with.

        The mean is a plain left-to-right sum (not numpy's pairwise one, nor Python 3.12's
        compensated ``sum``), the same additions the compiled kernel makes, so both engines
        seed a cut episode with the same float whatever the number of actions.
        """
        row = self.q[state].tolist()
        total = 0.0
        for value in row:
            total += value
        return float(epsilon * (total / len(row)) + (1.0 - epsilon) * max(row))

    @property
    def visited_states(self) -> np.ndarray:
        """Bool ``(S,)``: states where at least one action has absorbed a return."""
        if self.visited is not None:
            return np.asarray(self.visited, dtype=bool)
        if self.visits is None:
            return np.ones(self.n_states, dtype=bool)
        return np.asarray(self.visits).sum(axis=1) > 0

    @property
    def visited_share(self) -> float:
        """Share of **all** table states that training reached.

        The table does not know which states are terminal (nothing is ever learned there),
        so a fully trained table reports less than 1 when it has terminal or unreachable
        states; :meth:`visited_share_among` takes the states that matter, e.g.
        ``environment.decision_states(model)``.
        """
        return float(self.visited_states.mean()) if self.n_states else 0.0

    def visited_share_among(self, states: np.ndarray) -> float:
        """Share of the states selected by the bool mask ``states`` that training reached."""
        mask = np.asarray(states, dtype=bool)
        return float(self.visited_states[mask].mean()) if mask.any() else 0.0

    def act(self, states: np.ndarray, uniforms: np.ndarray | None = None, describe: Callable[[int], str] | None = None) -> np.ndarray:
        """The action for each table index in ``states``: greedy where visited, the fallback elsewhere.

        ``uniforms`` (one per state, in [0, 1)) feeds the ``uniform`` fallback; it is
        required with that rule whatever the states are, so that every decision consumes
        one uniform and a caller never depends on which states happen to be visited.
        ``describe`` turns a table index into the state in its own terms for the
        ``refuse`` error (an encoder's ``describe``); without it the error names indices.
        """
        states = np.asarray(states, dtype=np.int64)
        if self.fallback.rule == "uniform" and uniforms is None:
            raise ValueError("the uniform fallback needs uniforms: pass one uniform in [0, 1) per state (the acting stream)")
        actions = greedy_actions(self.q)[states]
        unvisited = ~self.visited_states[states]
        if not unvisited.any():
            return actions
        if self.fallback.rule == "refuse":
            missing = sorted({int(s) for s in states[unvisited]})
            shown = [describe(s) if describe else str(s) for s in missing[:5]]
            more = f" and {len(missing) - 5} more" if len(missing) > 5 else ""
            label = "state" if len(missing) == 1 else "states"
            raise UnvisitedStateError(f"the policy never learned an action for {label} {'; '.join(shown)}{more} (fallback rule: refuse)")
        if self.fallback.rule == "action":
            self.fallback.check_actions(self.n_actions)
            actions[unvisited] = self.fallback.action
            return actions
        u = np.broadcast_to(np.asarray(uniforms, dtype=np.float64), states.shape)
        actions[unvisited] = np.minimum(np.floor(u[unvisited] * self.n_actions).astype(np.int64), self.n_actions - 1)
        return actions
