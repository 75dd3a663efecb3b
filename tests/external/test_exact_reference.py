"""Exact DP checked against independent routes and against facts of Gymnasium's toy-text layouts.

Sources are named per test. The random model is invented (seeded numpy generator).
"""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest
import scipy.sparse as sp

from qtally.envs.model import TabularModel
from qtally.envs.model_extraction import model_of
from qtally.evaluate.exact import (
    greedy_policy_probs,
    iterative_policy_evaluation,
    optimal_actions_mask,
    policy_evaluation,
    start_value,
    value_iteration,
)

ATOL = 1e-8


def random_episodic_model(seed: int = 7, n_states: int = 40, n_actions: int = 3, n_terminal: int = 4):
    """Invented sparse MDP: each (s, a) has 1-3 successors plus at least 10% mass on a terminal.

    The forced terminal mass makes every policy end with probability 1, so gamma = 1 is valid.
    Returns the model and the dense (S, A, S) array it was built from.
    """
    rng = np.random.default_rng(seed)
    S, A = n_states, n_actions
    dense = np.zeros((S, A, S))
    terminals = np.arange(S - n_terminal, S)
    for s in range(S - n_terminal):
        for a in range(A):
            succ = rng.choice(S, size=rng.integers(1, 4), replace=False)
            dense[s, a, succ] = rng.dirichlet(np.ones(succ.size)) * 0.9
            dense[s, a, rng.choice(terminals)] += 0.1
    rewards = rng.normal(size=(S, A))
    rewards[terminals] = 0.0
    terminal = np.zeros(S, dtype=bool)
    terminal[terminals] = True
    start = np.zeros(S)
    start[: S // 2] = 1.0 / (S // 2)
    model = TabularModel(
        transitions=sp.csr_array(dense.reshape(S * A, S)),
        rewards=rewards,
        terminal=terminal,
        start_distribution=start,
    )
    return model, dense


def dense_solve_from_arrays(dense, rewards, terminal, pi, gamma):
    """Dense numpy.linalg.solve of v = r_pi + gamma P_pi v with v = 0 imposed on terminal rows."""
    S = dense.shape[0]
    p_pi = np.einsum("sa,sat->st", pi, dense)
    r_pi = (pi * rewards).sum(axis=1)
    a_mat = np.eye(S) - gamma * p_pi
    a_mat[terminal] = 0.0
    a_mat[terminal, terminal] = 1.0
    r_pi[terminal] = 0.0
    return np.linalg.solve(a_mat, r_pi)


def dense_solve_from_p_table(P, n_states, n_actions, pi, gamma):
    """Dense solve built straight from a toy-text P table, without the model arrays.

    Uses the table's own ``terminated`` flag: an outcome that terminates adds its reward and no
    future value, v(s) = sum_a pi(a|s) sum p (r + gamma (1 - terminated) v(s')).
    """
    a_mat = np.eye(n_states)
    b = np.zeros(n_states)
    for s in range(n_states):
        for a in range(n_actions):
            for prob, s_next, reward, terminated in P[s][a]:
                b[s] += pi[s, a] * prob * reward
                if not terminated:
                    a_mat[s, s_next] -= gamma * pi[s, a] * prob
    return np.linalg.solve(a_mat, b)


# ---------------------------------------------------------------- (a) three routes agree


@pytest.mark.parametrize("gamma", [0.9, 1.0])
def test_random_model_sparse_iterative_and_dense_agree(gamma):
    # Source: independent routes - repeated Bellman backups, and a dense numpy.linalg.solve
    # of the same equations assembled from the dense array the model was built from.
    model, dense = random_episodic_model()
    pi = np.random.default_rng(11).dirichlet(np.ones(model.n_actions), size=model.n_states)
    v = policy_evaluation(model, pi, gamma)
    np.testing.assert_allclose(v, iterative_policy_evaluation(model, pi, gamma, tol=1e-13), atol=ATOL)
    np.testing.assert_allclose(
        v, dense_solve_from_arrays(dense, model.rewards, model.terminal, pi, gamma), atol=ATOL
    )


@pytest.mark.parametrize("gamma", [0.9, 0.99, 1.0])
def test_frozen_lake_sparse_iterative_and_p_table_agree(gamma):
    # Source: Gymnasium FrozenLake-v1 4x4 (slippery) P table, read directly for the dense
    # route; the uniform random policy reaches a hole or the goal with probability 1.
    env = gym.make("FrozenLake-v1").unwrapped
    model = model_of(env)
    pi = np.full((model.n_states, model.n_actions), 1.0 / model.n_actions)
    v = policy_evaluation(model, pi, gamma)
    np.testing.assert_allclose(v, iterative_policy_evaluation(model, pi, gamma, tol=1e-13), atol=ATOL)
    np.testing.assert_allclose(
        v, dense_solve_from_p_table(env.P, model.n_states, model.n_actions, pi, gamma), atol=ATOL
    )
    # An epsilon-soft (non-uniform) policy through the same two routes.
    pi = np.random.default_rng(3).dirichlet(np.ones(model.n_actions), size=model.n_states)
    np.testing.assert_allclose(
        policy_evaluation(model, pi, gamma),
        dense_solve_from_p_table(env.P, model.n_states, model.n_actions, pi, gamma),
        atol=ATOL,
    )


# ---------------------------------------------------------------- (b) value iteration is self-consistent


@pytest.mark.parametrize("gamma", [0.99, 1.0])
def test_frozen_lake_value_iteration_matches_its_greedy_policy(gamma):
    # Source: Bellman optimality - V* is the value of any policy greedy with respect to Q*,
    # checked by exact policy evaluation (an independent linear solve).
    model = model_of(gym.make("FrozenLake-v1"))
    result = value_iteration(model, gamma, tol=1e-13)
    v_greedy = policy_evaluation(model, greedy_policy_probs(result.policy, model.n_actions), gamma)
    np.testing.assert_allclose(v_greedy, result.v_star, atol=ATOL)
    chosen = optimal_actions_mask(result.q_star, atol=1e-12)[np.arange(model.n_states), result.policy]
    assert chosen.all()
    np.testing.assert_allclose(result.v_star, result.q_star.max(axis=1), atol=0)
    assert 0.0 < start_value(model, result.v_star) < 1.0  # reward 1 only at the goal


# ---------------------------------------------------------------- (c) Taxi, 500 states, sparse path


@pytest.mark.parametrize("gamma", [0.99, 1.0])
def test_taxi_optimal_values(gamma):
    # Source: Gymnasium Taxi-v4 P table (500 states, 6 actions). Delivery pays +20 and every
    # start is a short drive from the passenger and the destination, so V* > 0 at every start.
    model = model_of(gym.make("Taxi-v4"))
    assert model.n_states == 500 and sp.issparse(model.transitions)
    result = value_iteration(model, gamma, tol=1e-12)
    starts = model.start_distribution > 0
    assert starts.sum() == 300
    assert (result.v_star[starts] > 0).all()
    v_greedy = policy_evaluation(model, greedy_policy_probs(result.policy, model.n_actions), gamma)
    np.testing.assert_allclose(v_greedy, result.v_star, atol=ATOL)


# ---------------------------------------------------------------- (d) CliffWalking, a fact of the layout


def test_cliff_walking_undiscounted_optimum_is_minus_thirteen():
    # Source: the CliffWalking-v1 layout, derivable by hand. On the 4 x 12 grid the start is
    # (3, 0), the goal (3, 11), and (3, 1..10) is cliff. The shortest safe path is one step up,
    # eleven right along the cliff edge and one down: 13 steps at -1 each.
    model = model_of(gym.make("CliffWalking-v1"))
    result = value_iteration(model, 1.0)
    assert start_value(model, result.v_star) == pytest.approx(-13.0, abs=1e-12)
    v_greedy = policy_evaluation(model, greedy_policy_probs(result.policy, model.n_actions), 1.0)
    assert start_value(model, v_greedy) == pytest.approx(-13.0, abs=1e-12)
