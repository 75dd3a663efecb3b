"""Exact answers from a :class:`~qtally.envs.model.TabularModel`, to measure learned Q tables against.

Pure array code (numpy, scipy); no tracking or config imports.

- :func:`policy_evaluation` solves the linear Bellman system of a policy (sparse solve);
  :func:`iterative_policy_evaluation` reaches the same values by repeated backups, as an
  independent cross-check.
- :func:`value_iteration` gives ``V*``, ``Q*`` and a greedy optimal policy;
  :func:`optimal_actions_mask` says which actions are optimal (ties count).
- :func:`optimality_gap`, :func:`optimal_action_fraction` and :func:`greedy_regret` score a
  learned Q table; :func:`value_scale` and :func:`state_occupancy` are what the last two weigh with.

Policies are ``(n_states, n_actions)`` probability arrays; :func:`greedy_policy_probs` and
:func:`epsilon_soft_probs` build them with qtally's one tie rule (the lowest action index,
:mod:`qtally.policy.table_policy`), the same rule training acts with.

Terminal states have value 0 by definition. With ``gamma == 1`` a value exists only where
the episode ends with probability 1; see :func:`policy_evaluation` for what happens elsewhere.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import breadth_first_order
from scipy.sparse.linalg import spsolve

from qtally.policy.table_policy import deterministic_probabilities, epsilon_soft_probabilities, greedy_actions
from qtally.envs.model import TabularModel

__all__ = [
    "ImproperPolicyError",
    "NotConvergedError",
    "ValueIterationResult",
    "OptimalityGap",
    "policy_evaluation",
    "iterative_policy_evaluation",
    "q_from_v",
    "value_iteration",
    "greedy_actions",
    "optimal_actions_mask",
    "greedy_policy_probs",
    "epsilon_soft_probs",
    "reachable_states",
    "terminating_states",
    "start_value",
    "optimality_gap",
    "ACTION_RTOL",
    "value_scale",
    "optimal_action_fraction",
    "state_occupancy",
    "greedy_regret",
]

_PROB_ATOL = 1e-9


class ImproperPolicyError(ValueError):
    """Undiscounted evaluation asked of a policy that may never end an episode."""


class NotConvergedError(RuntimeError):
    """An iterative method hit its sweep limit before reaching its tolerance."""


# ---------------------------------------------------------------- policy arrays


def optimal_actions_mask(q_star: np.ndarray, atol: float = 1e-8) -> np.ndarray:
    """Bool ``(S, A)``: True where an action is optimal within ``atol``, so ties count as optimal.

    >>> optimal_actions_mask(np.array([[1.0, 1.0 - 1e-12, 0.0]]), atol=1e-9).tolist()
    [[True, True, False]]
    """
    q_star = np.asarray(q_star, dtype=float)
    return q_star >= q_star.max(axis=1, keepdims=True) - atol


def greedy_policy_probs(actions: np.ndarray, n_actions: int) -> np.ndarray:
    """One-hot ``(S, A)`` probabilities of a deterministic policy given as one action per state.

    >>> greedy_policy_probs(np.array([2, 0]), 3).tolist()
    [[0.0, 0.0, 1.0], [1.0, 0.0, 0.0]]
    """
    return deterministic_probabilities(actions, n_actions)


def epsilon_soft_probs(q: np.ndarray, epsilon: float) -> np.ndarray:
    """``epsilon / |A|`` on every action plus ``1 - epsilon`` on the greedy one (lowest index on ties).

    >>> epsilon_soft_probs(np.array([[0.0, 3.0, 3.0]]), 0.3).round(3).tolist()
    [[0.1, 0.8, 0.1]]
    """
    return epsilon_soft_probabilities(q, epsilon)


def _check_policy(model: TabularModel, policy_probs: np.ndarray) -> np.ndarray:
    pi = np.asarray(policy_probs, dtype=float)
    if pi.shape != (model.n_states, model.n_actions):
        raise ValueError(f"policy_probs has shape {pi.shape}, model needs {(model.n_states, model.n_actions)}")
    if not np.isfinite(pi).all() or (pi < 0).any():
        raise ValueError("policy_probs must be finite and non-negative")
    if not np.allclose(pi.sum(axis=1), 1.0, rtol=0.0, atol=_PROB_ATOL):
        raise ValueError("policy_probs rows must sum to 1")
    return pi


def _check_gamma(gamma: float) -> float:
    if not 0.0 <= gamma <= 1.0:
        raise ValueError(f"gamma must be in [0, 1], got {gamma}")
    return float(gamma)


def _policy_chain(model: TabularModel, pi: np.ndarray) -> tuple[sp.csr_array, np.ndarray]:
    """``P_pi`` (S, S) and ``r_pi`` (S,) of the Markov chain the policy induces."""
    S, A = model.n_states, model.n_actions
    # mix[s, s*A + a] = pi[s, a]; mix @ T sums each state's action rows, weighted.
    mix = sp.csr_array(
        (pi.reshape(-1), (np.repeat(np.arange(S), A), np.arange(S * A))), shape=(S, S * A)
    )
    p_pi = sp.csr_array(mix @ model.transitions)
    p_pi.eliminate_zeros()
    r_pi = np.where(model.terminal, 0.0, (pi * model.rewards).sum(axis=1))
    return p_pi, r_pi


# ---------------------------------------------------------------- reachability


def _reached_from(graph: sp.csr_array, seeds: np.ndarray) -> np.ndarray:
    """Bool mask of nodes reachable (0 or more edges) from any seed, via one super-source BFS."""
    n = graph.shape[0]
    if not seeds.any():
        return np.zeros(n, dtype=bool)
    edges = sp.coo_array(graph)
    src = np.concatenate([edges.row, np.full(int(seeds.sum()), n)])
    dst = np.concatenate([edges.col, np.flatnonzero(seeds)])
    augmented = sp.csr_array((np.ones(src.size), (src, dst)), shape=(n + 1, n + 1))
    order = breadth_first_order(augmented, n, directed=True, return_predecessors=False)
    mask = np.zeros(n + 1, dtype=bool)
    mask[order] = True
    return mask[:n]


def reachable_states(model: TabularModel, policy_probs: np.ndarray) -> np.ndarray:
    """Bool mask of states reachable from the start distribution under the policy (terminals included)."""
    p_pi, _ = _policy_chain(model, _check_policy(model, policy_probs))
    return _reached_from(p_pi, np.asarray(model.start_distribution) > 0)


def _terminating(model: TabularModel, p_pi: sp.csr_array) -> np.ndarray:
    # Ends w.p. 1 iff every state reachable from it can still reach an end. A row summing
    # to less than 1 also counts as an end (probability leaves the chain).
    ends = model.terminal | (np.asarray(p_pi.sum(axis=1)).ravel() < 1.0 - _PROB_ATOL)
    reversed_graph = sp.csr_array(p_pi.T)
    stuck = ~_reached_from(reversed_graph, ends)  # cannot reach an end at all
    return ~_reached_from(reversed_graph, stuck)  # not able to reach a stuck state


def terminating_states(model: TabularModel, policy_probs: np.ndarray) -> np.ndarray:
    """Bool mask of states from which the episode ends with probability 1 under the policy.

    Decided on the transition graph alone: a state terminates surely iff every state
    reachable from it can reach a terminal state (a finite Markov chain fact).
    """
    p_pi, _ = _policy_chain(model, _check_policy(model, policy_probs))
    return _terminating(model, p_pi)


# ---------------------------------------------------------------- policy evaluation


def policy_evaluation(model: TabularModel, policy_probs: np.ndarray, gamma: float) -> np.ndarray:
    """Exact ``v_pi`` by a sparse solve of ``(I - gamma P_pi) v = r_pi`` over non-terminal states.

    Terminal states get 0. For ``gamma < 1`` the system is always solvable. For
    ``gamma == 1`` the value is the expected undiscounted return, defined where the episode
    ends with probability 1 (:func:`terminating_states`). States that may never end get NaN
    if the start distribution cannot reach them under the policy (they never matter to an
    episode); if it can, :class:`ImproperPolicyError` is raised instead.
    """
    gamma = _check_gamma(gamma)
    pi = _check_policy(model, policy_probs)
    p_pi, r_pi = _policy_chain(model, pi)
    v = np.zeros(model.n_states)
    solve = ~model.terminal
    if gamma == 1.0:
        terminating = _terminating(model, p_pi)
        never_end = ~terminating
        if never_end.any():
            reached = _reached_from(p_pi, np.asarray(model.start_distribution) > 0)
            n_reached = int((never_end & reached).sum())
            if n_reached:
                raise ImproperPolicyError(
                    f"with gamma=1 the policy may never end the episode from {int(never_end.sum())} "
                    f"state(s), {n_reached} of them reachable from the start; use gamma < 1 or a policy "
                    f"that terminates"
                )
            v[never_end] = np.nan
        solve &= terminating
    idx = np.flatnonzero(solve)
    if idx.size:
        # The solved set is closed under the chain (terminals aside), so dropping the
        # other columns loses only terminal mass, whose value is 0.
        block = sp.csc_array(sp.eye_array(idx.size) - gamma * p_pi[idx][:, idx])
        v[idx] = np.atleast_1d(spsolve(block, r_pi[idx]))
    return v


def iterative_policy_evaluation(
    model: TabularModel,
    policy_probs: np.ndarray,
    gamma: float,
    tol: float = 1e-12,
    max_sweeps: int = 1_000_000,
) -> np.ndarray:
    """``v_pi`` by synchronous Bellman backups from 0 until the largest change is below ``tol``.

    An independent route to :func:`policy_evaluation`, for cross-checking. Raises
    :class:`NotConvergedError` after ``max_sweeps`` (for example, ``gamma == 1`` with a policy
    that loops forever while collecting reward).
    """
    gamma = _check_gamma(gamma)
    p_pi, r_pi = _policy_chain(model, _check_policy(model, policy_probs))
    v = np.zeros(model.n_states)
    for _ in range(max_sweeps):
        v_new = r_pi + gamma * (p_pi @ v)
        v_new[model.terminal] = 0.0
        change = np.max(np.abs(v_new - v), initial=0.0)
        v = v_new
        if change < tol:
            return v
    raise NotConvergedError(f"policy evaluation did not reach tol={tol} in {max_sweeps} sweeps")


def q_from_v(model: TabularModel, v: np.ndarray, gamma: float) -> np.ndarray:
    """``q(s, a) = r(s, a) + gamma * sum_s' P(s'|s, a) v(s')``; terminal rows are 0."""
    gamma = _check_gamma(gamma)
    q = model.rewards + gamma * (model.transitions @ np.asarray(v, dtype=float)).reshape(
        model.n_states, model.n_actions
    )
    q[model.terminal] = 0.0
    return q


# ---------------------------------------------------------------- control


@dataclass(frozen=True)
class ValueIterationResult:
    """``v_star`` (S,), ``q_star`` (S, A), a greedy optimal ``policy`` (S,) int, and sweeps used."""

    v_star: np.ndarray
    q_star: np.ndarray
    policy: np.ndarray
    sweeps: int


def value_iteration(
    model: TabularModel,
    gamma: float,
    tol: float = 1e-10,
    max_sweeps: int = 1_000_000,
) -> ValueIterationResult:
    """Optimal values by repeated greedy backups from 0 until the largest change is below ``tol``.

    The policy takes, per state, the lowest action index whose ``q_star`` is within ``tol``
    of the best: values closer than the convergence tolerance are treated as tied, so noise
    in the last bits does not decide the action. With ``gamma == 1`` a tied action may loop
    without ever ending (standing still costs nothing when rewards are 0), so there ties go
    to the lowest index that can move on towards a terminal state; see
    :func:`_terminating_greedy`. Stopping on a change below ``tol`` bounds the error of
    ``v_star`` by ``tol * gamma / (1 - gamma)``; with ``gamma == 1`` there is no such bound,
    so pass a smaller ``tol`` when the last digits matter. Raises :class:`NotConvergedError`
    after ``max_sweeps`` (with ``gamma == 1`` this happens when a reward-earning loop never ends).
    """
    gamma = _check_gamma(gamma)
    S, A = model.n_states, model.n_actions
    v = np.zeros(S)
    for sweep in range(1, max_sweeps + 1):
        q = q_from_v(model, v, gamma)
        v_new = q.max(axis=1)
        change = np.max(np.abs(v_new - v), initial=0.0)
        v = v_new
        if change < tol:
            q = q_from_v(model, v, gamma)
            policy = (
                _terminating_greedy(model, q, tol) if gamma == 1.0 else greedy_actions(q, atol=tol)
            )
            return ValueIterationResult(v_star=q.max(axis=1), q_star=q, policy=policy, sweeps=sweep)
    raise NotConvergedError(f"value iteration did not reach tol={tol} in {max_sweeps} sweeps")


def _terminating_greedy(model: TabularModel, q: np.ndarray, atol: float) -> np.ndarray:
    """A greedy policy of ``q`` that heads for termination, built outwards from the terminal states.

    Layer by layer, each state not yet placed whose optimal actions (within ``atol``) include one
    with positive probability of entering an already placed state takes the lowest such
    action. Every placed state then has a path to a terminal state through chosen actions.
    States never placed (no optimal action makes progress) keep the lowest optimal index.
    """
    S, A = model.n_states, model.n_actions
    optimal = optimal_actions_mask(q, atol)
    policy = np.argmax(optimal, axis=1)
    placed = model.terminal.copy()
    while True:
        into_placed = (model.transitions @ placed.astype(float)).reshape(S, A) > 0
        progress = optimal & into_placed & ~placed[:, None]
        new = progress.any(axis=1)
        if not new.any():
            return policy
        policy[new] = np.argmax(progress[new], axis=1)
        placed |= new


# ---------------------------------------------------------------- scoring a Q table


def start_value(model: TabularModel, v: np.ndarray) -> float:
    """Expected value of the first state, ``sum_s start(s) v(s)``; states never started in are ignored."""
    start = np.asarray(model.start_distribution, dtype=float)
    support = start > 0
    return float(start[support] @ np.asarray(v, dtype=float)[support])


@dataclass(frozen=True)
class OptimalityGap:
    """How far the greedy policy of a Q table falls short of optimal, at the start distribution.

    ``gap = optimal_start_value - greedy_start_value`` (>= 0 up to rounding). When
    ``gamma == 1`` and the greedy policy may never end an episode that starts as the model
    says, ``greedy_terminates`` is False and ``greedy_start_value`` and ``gap`` are NaN:
    such a policy has no finite undiscounted value in general.
    """

    gap: float
    optimal_start_value: float
    greedy_start_value: float
    greedy_terminates: bool


def optimality_gap(
    model: TabularModel,
    q_table: np.ndarray,
    gamma: float,
    v_star: np.ndarray | None = None,
) -> OptimalityGap:
    """``V*(start) - V^greedy(start)`` for the greedy policy of ``q_table`` (ties to the lowest index).

    Pass ``v_star`` (from :func:`value_iteration`) to skip recomputing it.
    """
    if v_star is None:
        v_star = value_iteration(model, gamma).v_star
    optimal = start_value(model, v_star)
    greedy = greedy_policy_probs(greedy_actions(q_table), model.n_actions)
    try:
        greedy_value = start_value(model, policy_evaluation(model, greedy, gamma))
    except ImproperPolicyError:
        return OptimalityGap(np.nan, optimal, np.nan, False)
    return OptimalityGap(optimal - greedy_value, optimal, greedy_value, True)


# An action counts as optimal when choosing it costs less than this share of the problem's value scale.
ACTION_RTOL = 0.01


def value_scale(model: TabularModel, q_star: np.ndarray) -> float:
    """The spread ``max - min`` of ``q_star`` over non-terminal states: how much any choice can be worth.

    Free of the return's offset and sign (Blackjack's optimum is near 0, a shop's profit near
    85), so a tolerance relative to it means the same thing in every environment. 0 when
    every non-terminal state-action value is the same (every choice is then optimal anyway).

    >>> value_scale(_two_step_model(), np.array([[1.0, 0.995], [1.0, 0.0], [0.0, 0.0]]))
    1.0
    """
    live = np.asarray(q_star, dtype=float)[~model.terminal]
    return float(live.max() - live.min()) if live.size else 0.0


def optimal_action_fraction(
    model: TabularModel,
    q_table: np.ndarray,
    q_star: np.ndarray,
    atol: float = 1e-8,
    rtol: float = ACTION_RTOL,
) -> float:
    """Share of non-terminal states the greedy policy of ``q_table`` reaches where its action is optimal.

    Only states the greedy policy can reach from the start count: what the table says
    elsewhere never affects its returns. An action counts as optimal when its ``q_star`` is
    within ``max(atol, rtol * value_scale(model, q_star))`` of the state's best: with the
    default ``rtol`` of 1%, a choice that gives up less than 1% of the problem's value range
    counts as right. Counting strictly (``rtol=0``) calls near-ties wrong: a restocking
    policy 3.2 below the optimum of 84.8 (3.8%) read 0.42 strictly, because most states
    offer orders that differ by cents, and 0.93 at 1% (0.96 once the gap had halved), which
    tracks learning. NaN if the greedy policy reaches no non-terminal state.

    >>> model = _two_step_model()   # state 0: action 1 ends for 0.995, action 0 leads to a 1.0
    >>> q_star = value_iteration(model, 1.0).q_star
    >>> q_table = np.array([[0.0, 1.0], [1.0, 0.0], [0.0, 0.0]])   # takes the 0.995
    >>> optimal_action_fraction(model, q_table, q_star), optimal_action_fraction(model, q_table, q_star, rtol=0.0)
    (1.0, 0.0)
    """
    actions = greedy_actions(q_table)
    counted = reachable_states(model, greedy_policy_probs(actions, model.n_actions)) & ~model.terminal
    if not counted.any():
        return float("nan")
    tolerance = max(float(atol), float(rtol) * value_scale(model, q_star))
    optimal = optimal_actions_mask(q_star, tolerance)[np.arange(model.n_states), actions]
    return float(optimal[counted].mean())


def state_occupancy(model: TabularModel, policy_probs: np.ndarray, gamma: float) -> np.ndarray:
    """Expected discounted visits ``d(s) = sum_t gamma^t P(S_t = s)`` in one episode from the start.

    Terminal states get 0. Solves ``(I - gamma P_pi)^T d = start`` over the non-terminal states
    the start can reach. With ``gamma == 1`` the visits are finite only if the episode ends
    with probability 1; otherwise :class:`ImproperPolicyError` is raised.

    >>> model = _two_step_model()
    >>> state_occupancy(model, greedy_policy_probs(np.array([0, 0, 0]), 2), 0.5).tolist()
    [1.0, 0.5, 0.0]
    """
    gamma = _check_gamma(gamma)
    p_pi, _ = _policy_chain(model, _check_policy(model, policy_probs))
    start = np.asarray(model.start_distribution, dtype=float)
    live = _reached_from(p_pi, start > 0) & ~model.terminal
    if gamma == 1.0 and not _terminating(model, p_pi)[live].all():
        raise ImproperPolicyError("with gamma=1 the policy may never end the episode, so its visits are unbounded")
    d = np.zeros(model.n_states)
    idx = np.flatnonzero(live)
    if idx.size:
        # Mass enters a reached state only from reached states, so the block is closed.
        block = sp.csc_array(sp.eye_array(idx.size) - gamma * p_pi[idx][:, idx].T)
        d[idx] = np.atleast_1d(spsolve(block, start[idx]))
    return d


def greedy_regret(
    model: TabularModel,
    q_table: np.ndarray,
    q_star: np.ndarray,
    gamma: float,
    weighting: str = "visits",
) -> float:
    """Mean of ``V*(s) - Q*(s, greedy(s))``, what the greedy policy of ``q_table`` gives up per decision.

    Unlike :func:`optimal_action_fraction` it needs no tolerance: a near-tie costs nearly
    nothing, a blunder costs what it costs. ``weighting`` says which states the mean runs over:

    - ``"visits"`` (default): weighted by the greedy policy's discounted visits per episode
      (:func:`state_occupancy`), so it is the regret per decision the policy actually meets.
      By the performance difference identity (Kakade and Langford 2002, Lemma 6.1) the
      weighted *sum* is exactly the optimality gap, so this figure is the gap divided by the
      expected (discounted) number of decisions per episode. NaN when ``gamma == 1`` and the
      greedy policy may never end.
    - ``"states"``: unweighted over the non-terminal states the greedy policy reaches (the
      states :func:`optimal_action_fraction` counts), so a rare state's blunder counts in full.

    NaN if the greedy policy reaches no non-terminal state.

    >>> model = _two_step_model()
    >>> q_star = value_iteration(model, 1.0).q_star
    >>> round(greedy_regret(model, np.array([[0.0, 1.0], [1.0, 0.0], [0.0, 0.0]]), q_star, 1.0), 6)
    0.005
    >>> greedy_regret(model, np.array([[1.0, 0.0], [0.0, 1.0], [0.0, 0.0]]), q_star, 1.0)   # 0 at state 0, 1 at state 1
    0.5
    """
    if weighting not in ("visits", "states"):
        raise ValueError(f"weighting={weighting!r}; choose visits or states")
    q_star = np.asarray(q_star, dtype=float)
    actions = greedy_actions(q_table)
    regret = q_star.max(axis=1) - q_star[np.arange(model.n_states), actions]
    greedy = greedy_policy_probs(actions, model.n_actions)
    if weighting == "states":
        counted = reachable_states(model, greedy) & ~model.terminal
        return float(regret[counted].mean()) if counted.any() else float("nan")
    try:
        visits = state_occupancy(model, greedy, gamma)
    except ImproperPolicyError:
        return float("nan")
    total = visits.sum()
    return float(visits @ regret / total) if total > 0 else float("nan")


def _two_step_model() -> TabularModel:
    """For the examples: state 0 chooses between a sure 0.995 now (action 1) and state 1 (action 0),
    where action 0 ends for 1.0 and action 1 ends for 0; state 2 is terminal."""
    p = np.zeros((3, 2, 3))
    p[0, 0, 1] = p[0, 1, 2] = p[1, 0, 2] = p[1, 1, 2] = 1.0
    return TabularModel(
        transitions=sp.csr_array(p.reshape(6, 3)),
        rewards=np.array([[0.0, 0.995], [1.0, 0.0], [0.0, 0.0]]),
        terminal=np.array([False, False, True]),
        start_distribution=np.array([1.0, 0.0, 0.0]),
    )
