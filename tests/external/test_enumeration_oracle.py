"""Value iteration against brute force: every deterministic policy of a tiny model, evaluated exactly.

Source of the facts checked: a finite MDP has a deterministic stationary policy that is optimal
in every state at once, so V*(s) is the largest v_pi(s) over deterministic policies, state by
state (Puterman 1994, Markov Decision Processes, Theorem 6.2.10, discounted case; for
gamma = 1 when every policy ends with probability 1, the stochastic shortest path results of
Bertsekas and Tsitsiklis 1996, Neuro-Dynamic Programming, Section 2.2; both recalled from
memory). The oracle enumerates all |A|^|S| policies, so it shares nothing with value
iteration's backups; a second, dense route (``numpy.linalg.solve`` on the full matrix) checks
the sparse linear solve that the enumeration relies on.

The models are random numbers, invented for the test, with fixed seeds.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import scipy.sparse as sp

from qtally.envs.model import TabularModel
from qtally.evaluate.exact import greedy_policy_probs, policy_evaluation, start_value, value_iteration


def tiny_model(seed: int, n_states: int, n_actions: int, end_probability: float, sparsity: float) -> TabularModel:
    """Random dynamics over ``n_states`` live states plus one terminal state.

    Each (state, action) keeps a random subset of next states (``sparsity`` of them dropped),
    and ends the episode with probability at least ``end_probability`` (> 0: every policy ends).
    Rewards are normal, so some actions pay now and cost later.
    """
    rng = np.random.default_rng(seed)
    S = n_states + 1
    p = np.zeros((S, n_actions, S))
    for s in range(n_states):
        for a in range(n_actions):
            keep = rng.random(n_states) >= sparsity
            keep[rng.integers(n_states)] = True
            weights = np.where(keep, rng.random(n_states), 0.0)
            p[s, a, :n_states] = (1.0 - end_probability) * weights / weights.sum()
            p[s, a, n_states] = end_probability
    rewards = np.zeros((S, n_actions))
    rewards[:n_states] = rng.normal(size=(n_states, n_actions))
    start = np.zeros(S)
    start[:n_states] = rng.dirichlet(np.ones(n_states))
    terminal = np.arange(S) == n_states
    return TabularModel(sp.csr_array(p.reshape(S * n_actions, S)), rewards, terminal, start)


def dense_values(model: TabularModel, actions: np.ndarray, gamma: float) -> np.ndarray:
    """v = (I - gamma P)^-1 r over live states, from the dense arrays, by numpy alone."""
    S, A = model.n_states, model.n_actions
    p = model.transitions.toarray().reshape(S, A, S)[np.arange(S), actions]
    r = model.rewards[np.arange(S), actions]
    live = ~model.terminal
    v = np.zeros(S)
    v[live] = np.linalg.solve(np.eye(int(live.sum())) - gamma * p[np.ix_(live, live)], r[live])
    return v


CASES = [
    # seed, live states, actions, end probability, sparsity, gamma: 729, 625 and 1024 policies.
    (0, 6, 3, 0.05, 0.5, 0.9),
    (1, 4, 5, 0.10, 0.3, 0.95),
    (2, 6, 3, 0.05, 0.5, 1.0),
    (3, 5, 4, 0.02, 0.6, 1.0),
]


@pytest.mark.parametrize("seed, n_states, n_actions, end_probability, sparsity, gamma", CASES)
def test_value_iteration_finds_the_best_of_every_deterministic_policy(seed, n_states, n_actions, end_probability, sparsity, gamma):
    model = tiny_model(seed, n_states, n_actions, end_probability, sparsity)
    live = ~model.terminal
    policies = [np.array(choice + (0,)) for choice in itertools.product(range(n_actions), repeat=n_states)]
    values = np.array([policy_evaluation(model, greedy_policy_probs(actions, n_actions), gamma) for actions in policies])
    best_per_state = values.max(axis=0)
    best_start = max(start_value(model, v) for v in values)

    solution = value_iteration(model, gamma, tol=1e-13)
    # V* is the state-by-state best over all policies ...
    np.testing.assert_allclose(solution.v_star, best_per_state, rtol=0, atol=1e-8)
    # ... and value iteration's own policy attains it in every state and at the start.
    v_vi = policy_evaluation(model, greedy_policy_probs(solution.policy, n_actions), gamma)
    np.testing.assert_allclose(v_vi, best_per_state, rtol=0, atol=1e-8)
    assert start_value(model, v_vi) == pytest.approx(best_start, abs=1e-8)
    # Among the enumerated policies, value iteration's is one of those optimal in every state.
    optimal = (np.abs(values[:, live] - best_per_state[live]) <= 1e-8).all(axis=1)
    index = int(np.ravel_multi_index(tuple(solution.policy[:n_states]), (n_actions,) * n_states))  # itertools.product order
    assert np.array_equal(policies[index], np.append(solution.policy[:n_states], 0))
    assert optimal[index] and start_value(model, values[index]) >= best_start - 1e-8

    # The problem is not trivial: the best policy beats the myopic one (best immediate reward)
    # and the values of policies spread widely, so a broken solve or backup would show.
    myopic = np.argmax(model.rewards, axis=1)
    myopic_start = start_value(model, policy_evaluation(model, greedy_policy_probs(myopic, n_actions), gamma))
    assert best_start - myopic_start > 0.05
    assert np.ptp([start_value(model, v) for v in values]) > 1.0
    assert optimal.sum() <= 2  # random rewards leave no broad ties: "among the best" is a sharp claim


@pytest.mark.parametrize("seed, n_states, n_actions, end_probability, sparsity, gamma", CASES)
def test_sparse_policy_evaluation_matches_a_dense_numpy_solve(seed, n_states, n_actions, end_probability, sparsity, gamma):
    model = tiny_model(seed, n_states, n_actions, end_probability, sparsity)
    rng = np.random.default_rng(100 + seed)
    for _ in range(5):
        actions = np.append(rng.integers(n_actions, size=n_states), 0)
        np.testing.assert_allclose(
            policy_evaluation(model, greedy_policy_probs(actions, n_actions), gamma),
            dense_values(model, actions, gamma),
            rtol=1e-10,
            atol=1e-10,
        )
