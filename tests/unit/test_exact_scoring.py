"""Scoring a Q table against the exact optimum: the tolerance of optimal_action_fraction, greedy_regret.

The models are random and invented for the tests (seeded), plus the chain of test_exact.py.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from qtally.envs.model import TabularModel
from qtally.evaluate.exact import (
    ACTION_RTOL,
    greedy_policy_probs,
    greedy_regret,
    optimal_action_fraction,
    optimality_gap,
    reachable_states,
    state_occupancy,
    value_iteration,
    value_scale,
)


def random_model(seed: int, n_states: int = 6, n_actions: int = 3, end_probability: float = 0.3) -> TabularModel:
    """Dense random dynamics; every action ends the episode with at least ``end_probability``."""
    rng = np.random.default_rng(seed)
    S = n_states + 1  # the last state is terminal
    p = np.zeros((S, n_actions, S))
    p[:n_states, :, :n_states] = rng.dirichlet(np.ones(n_states), size=(n_states, n_actions)) * (1 - end_probability)
    p[:n_states, :, n_states] = end_probability
    rewards = np.zeros((S, n_actions))
    rewards[:n_states] = rng.normal(size=(n_states, n_actions))
    start = np.zeros(S)
    start[:n_states] = rng.dirichlet(np.ones(n_states))
    return TabularModel(sp.csr_array(p.reshape(S * n_actions, S)), rewards, np.arange(S) == n_states, start)


def chain() -> TabularModel:
    """0 -> 1 -> 2 (terminal): action 0 moves on for -1, action 1 stays for -2."""
    p = np.zeros((3, 2, 3))
    p[0, 0, 1] = p[1, 0, 2] = p[0, 1, 0] = p[1, 1, 1] = 1.0
    return TabularModel(sp.csr_array(p.reshape(6, 3)), np.array([[-1.0, -2.0], [-1.0, -2.0], [0.0, 0.0]]), np.array([False, False, True]), np.array([1.0, 0.0, 0.0]))


# ---------------------------------------------------------------- occupancy


@pytest.mark.parametrize("gamma", [0.0, 0.7, 1.0])
def test_occupancy_matches_a_dense_inverse(gamma):
    # d = start (I - gamma P_pi)^-1 with terminal rows zeroed, by a dense numpy solve.
    model = random_model(seed=3)
    rng = np.random.default_rng(4)
    pi = rng.dirichlet(np.ones(model.n_actions), size=model.n_states)
    P = (model.transitions.toarray().reshape(model.n_states, model.n_actions, model.n_states) * pi[:, :, None]).sum(axis=1)
    P[model.terminal] = 0.0
    expected = np.linalg.solve((np.eye(model.n_states) - gamma * P).T, model.start_distribution)
    expected[model.terminal] = 0.0
    np.testing.assert_allclose(state_occupancy(model, pi, gamma), expected, rtol=1e-10, atol=1e-12)


def test_occupancy_refuses_an_endless_undiscounted_policy():
    stay = greedy_policy_probs(np.array([1, 1, 1]), 2)
    with pytest.raises(ValueError, match="never end"):
        state_occupancy(chain(), stay, 1.0)
    np.testing.assert_allclose(state_occupancy(chain(), stay, 0.5), [2.0, 0.0, 0.0])


# ---------------------------------------------------------------- greedy regret


@pytest.mark.parametrize("seed, gamma", [(0, 0.9), (1, 0.9), (2, 1.0), (5, 1.0)])
def test_visit_weighted_regret_times_visits_is_the_optimality_gap(seed, gamma):
    # Performance difference identity (Kakade and Langford 2002, Lemma 6.1):
    # V*(start) - V^pi(start) = sum_s d_pi(s) (V*(s) - Q*(s, pi(s))). Checked for random
    # greedy tables; a wrong weighting (start only, unnormalised, untransposed chain) breaks it.
    model = random_model(seed)
    solution = value_iteration(model, gamma, tol=1e-13)
    rng = np.random.default_rng(seed + 10)
    checked = 0
    for _ in range(20):
        q_table = rng.normal(size=(model.n_states, model.n_actions))
        gap = optimality_gap(model, q_table, gamma, v_star=solution.v_star).gap
        visits = state_occupancy(model, greedy_policy_probs(q_table.argmax(axis=1), model.n_actions), gamma)
        regret = greedy_regret(model, q_table, solution.q_star, gamma)
        assert regret * visits.sum() == pytest.approx(gap, abs=1e-9)
        checked += gap > 1e-3
    assert checked >= 10  # most random tables are measurably worse than optimal


def test_state_weighted_regret_counts_each_reached_state_once():
    model = random_model(seed=7)
    q_star = value_iteration(model, 0.9).q_star
    q_table = np.random.default_rng(8).normal(size=(model.n_states, model.n_actions))
    actions = q_table.argmax(axis=1)
    reached = reachable_states(model, greedy_policy_probs(actions, model.n_actions)) & ~model.terminal
    per_state = q_star.max(axis=1) - q_star[np.arange(model.n_states), actions]
    assert greedy_regret(model, q_table, q_star, 0.9, weighting="states") == pytest.approx(per_state[reached].mean())
    assert greedy_regret(model, q_star, q_star, 0.9) == pytest.approx(0.0, abs=1e-12)


def test_regret_of_an_endless_undiscounted_policy_is_nan_and_bad_weighting_is_refused():
    model = chain()
    q_star = value_iteration(model, 1.0).q_star
    stay = np.array([[0.0, 1.0]] * 3)
    assert np.isnan(greedy_regret(model, stay, q_star, 1.0))
    assert greedy_regret(model, stay, q_star, 1.0, weighting="states") == pytest.approx(2.0)  # -2 - (-4) at state 0
    with pytest.raises(ValueError, match="weighting"):
        greedy_regret(model, stay, q_star, 1.0, weighting="start")


# ---------------------------------------------------------------- tolerance of the fraction


def test_fraction_forgives_choices_below_one_percent_of_the_value_scale_and_no_more():
    model = random_model(seed=11, n_states=8, n_actions=4)
    q_star = value_iteration(model, 0.9).q_star
    scale = value_scale(model, q_star)
    assert scale == pytest.approx(np.ptp(q_star[~model.terminal]))
    best = q_star.argmax(axis=1)
    # A table that prefers, in state 0, a second action worth exactly 0.5% or 2% of the scale less.
    for cost, counted_right in [(0.005, True), (0.02, False)]:
        shifted = q_star.copy()
        shifted[0, (best[0] + 1) % model.n_actions] = q_star[0, best[0]] - cost * scale
        q_table = shifted.copy()
        q_table[0, (best[0] + 1) % model.n_actions] += 10 * scale  # the table's greedy pick in state 0
        # q_star with the shifted value plays the role of the optimum here.
        fraction = optimal_action_fraction(model, q_table, shifted)
        strict = optimal_action_fraction(model, q_table, shifted, rtol=0.0)
        reached = reachable_states(model, greedy_policy_probs(q_table.argmax(axis=1), model.n_actions)) & ~model.terminal
        assert reached[0]
        assert strict == pytest.approx(1.0 - 1.0 / reached.sum())
        assert fraction == (1.0 if counted_right else strict), (cost, fraction)
    assert ACTION_RTOL == 0.01
