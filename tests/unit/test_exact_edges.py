"""Exact dynamic programming at its edges: leaking rows, convergence counts, tie rules, bad policies.

Tiny invented models whose values are worked out by hand in each test. Each test names
the breakage it catches (found by mutation testing, scripts/mutation.sh).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from qtally.envs.model import TabularModel
from support.dense_models import make_model
from qtally.evaluate.exact import (
    NotConvergedError,
    epsilon_soft_probs,
    greedy_policy_probs,
    iterative_policy_evaluation,
    optimal_action_fraction,
    optimal_actions_mask,
    optimality_gap,
    policy_evaluation,
    q_from_v,
    value_iteration,
)

BACK, FORWARD = 0, 1



def walk(rewards=None) -> TabularModel:
    """Cells 0 -> 1 -> 2 -> 3 (terminal). BACK goes one cell back (stays at 0), FORWARD one on."""
    p = np.zeros((4, 2, 4))
    for s in range(3):
        p[s, BACK, max(s - 1, 0)] = 1.0
        p[s, FORWARD, s + 1] = 1.0
    rewards = np.zeros((4, 2)) if rewards is None else rewards
    return make_model(p, rewards, [False, False, False, True], [1.0, 0.0, 0.0, 0.0])


def fork(reward_0: float, reward_1: float) -> TabularModel:
    """One decision: both actions end the episode at once, with the given rewards."""
    p = np.zeros((2, 2, 2))
    p[0, :, 1] = 1.0
    return make_model(p, [[reward_0, reward_1], [0.0, 0.0]], [False, True], [1.0, 0.0])


def test_iterative_evaluation_agrees_with_the_linear_solve():
    # A stochastic model with a terminal state, discounted and not. Breakages caught: a
    # convergence test that can never pass (change floored at 1, or |v_new + v|), terminal
    # values that are not 0.
    p = np.zeros((3, 2, 3))
    p[0, 0] = [0.5, 0.3, 0.2]
    p[0, 1] = [0.0, 0.0, 1.0]
    p[1, 0] = [0.4, 0.0, 0.6]
    p[1, 1] = [0.0, 0.9, 0.1]
    model = make_model(p, [[1.0, -2.0], [0.5, 3.0], [0.0, 0.0]], [False, False, True], [1.0, 0.0, 0.0])
    policy = np.array([[0.7, 0.3], [0.2, 0.8], [1.0, 0.0]])
    for gamma in (0.9, 1.0):
        exact = policy_evaluation(model, policy, gamma)
        iterative = iterative_policy_evaluation(model, policy, gamma, tol=1e-13)
        np.testing.assert_allclose(iterative, exact, atol=1e-9)
        assert iterative[2] == 0.0
    with pytest.raises(NotConvergedError, match=r"^policy evaluation did not reach tol=1e-13 in 3 sweeps$"):
        iterative_policy_evaluation(model, policy, 0.9, tol=1e-13, max_sweeps=3)


def test_q_from_v_by_hand():
    # q(s, a) = r(s, a) + gamma * sum P(s'|s, a) v(s'), terminal rows 0. With gamma 0.5 and
    # v = [2, 4, 9]: q(0, BACK) = 0 + 0.5 * 2, q(0, FORWARD) = 0 + 0.5 * 4, q(2, FORWARD) = 0.5 * v(3).
    # Breakage caught: gamma divided instead of multiplied; terminal rows not zeroed (None
    # would put NaN there).
    model = walk()
    q = q_from_v(model, np.array([2.0, 4.0, 9.0, 0.0]), 0.5)
    np.testing.assert_array_equal(q, [[1.0, 2.0], [1.0, 4.5], [2.0, 0.0], [0.0, 0.0]])


def test_value_iteration_counts_its_sweeps_and_honours_the_limit():
    # A walk with reward -1 per step from cell 0: values settle after 3 backups
    # (v = [-3, -2, -1]) and the 4th sees no change. Breakages caught: the sweep counter
    # starting elsewhere, the limit off by one either way, the count not reported.
    rewards = np.array([[-1.0, -1.0]] * 3 + [[0.0, 0.0]])
    model = walk(rewards)
    result = value_iteration(model, 1.0)
    assert result.sweeps == 4
    np.testing.assert_array_equal(result.v_star, [-3.0, -2.0, -1.0, 0.0])
    assert value_iteration(model, 1.0, max_sweeps=4).sweeps == 4
    with pytest.raises(NotConvergedError, match=r"^value iteration did not reach tol=1e-10 in 3 sweeps$"):
        value_iteration(model, 1.0, max_sweeps=3)


def test_undiscounted_ties_head_for_the_end_layer_by_layer():
    # All rewards 0, gamma 1: both actions are optimal everywhere, and BACK never ends the
    # episode from cell 0. The policy must go FORWARD in every cell. Breakages caught: the
    # placed set losing its earlier layers (cell 2 would be re-placed going BACK), the
    # layers not growing at all, progress not required of the chosen action.
    assert value_iteration(walk(), 1.0).policy[:3].tolist() == [FORWARD] * 3


def test_undiscounted_ties_in_one_layer_take_each_state_its_own_action():
    # Two cells each with one way out, placed in the same layer: cell 0 ends by action 1,
    # cell 1 by action 0; the other action swaps cells at no cost. Breakage caught: one
    # argmax over the whole layer instead of one per state.
    p = np.zeros((3, 2, 3))
    p[0, 0, 1] = p[0, 1, 2] = 1.0
    p[1, 0, 2] = p[1, 1, 0] = 1.0
    model = make_model(p, np.zeros((3, 2)), [False, False, True], [0.5, 0.5, 0.0])
    assert value_iteration(model, 1.0).policy[:2].tolist() == [1, 0]


def test_undiscounted_near_ties_use_the_convergence_tolerance():
    # Action 1 is better by 1e-9: more than the default tolerance 1e-10, so it is not a tie
    # and must be chosen. Breakage caught: the tie tolerance of the undiscounted policy
    # falling back to 1e-8.
    assert value_iteration(fork(0.0, 1e-9), 1.0).policy[0] == 1


def test_discounted_ties_go_to_the_lowest_index():
    # With gamma < 1 the one tie rule holds (lowest index), within the convergence
    # tolerance: 1e-12 apart counts as a tie, so action 0; the undiscounted heading-for-the-end
    # rule is not used. Breakages caught: the gamma == 1 rule used for every gamma, the
    # tolerance dropped (action 1 would win by 1e-12).
    p = np.zeros((2, 2, 2))
    p[0, 0, 0] = 1.0  # action 0 stays, forever worth 0
    p[0, 1, 1] = 1.0  # action 1 ends the episode, worth 0
    stay_or_go = make_model(p, np.zeros((2, 2)), [False, True], [1.0, 0.0])
    assert value_iteration(stay_or_go, 0.9).policy[0] == 0
    assert value_iteration(fork(0.0, 1e-12), 0.9).policy[0] == 0


def test_a_row_that_leaks_probability_counts_as_an_end():
    # State 0 stays with probability 0.5 and otherwise leaves the model (its row sums to
    # 0.5): under gamma 1 the episode ends with probability 1 and v = 1 / (1 - 0.5) = 2.
    # State 1 loops forever and is never started in: no value (NaN). Breakages caught:
    # leaking rows not counted as ends (the policy would be refused as never ending), the
    # leak measured over the whole table instead of per row (state 1 would count as an end).
    p = np.zeros((3, 1, 3))
    p[0, 0, 0] = 0.5
    p[1, 0, 1] = 1.0
    model = make_model(p, [[1.0], [1.0], [0.0]], [False, False, True], [1.0, 0.0, 0.0])
    np.testing.assert_allclose(policy_evaluation(model, np.ones((3, 1)), 1.0), [2.0, np.nan, 0.0])


@pytest.mark.parametrize(
    "policy, message",
    [
        ([[1.5, -0.5], [1.0, 0.0]], r"^policy_probs must be finite and non-negative$"),
        ([[np.nan, 1.0], [1.0, 0.0]], r"^policy_probs must be finite and non-negative$"),
        ([[0.5, 0.5 + 5e-9], [1.0, 0.0]], r"^policy_probs rows must sum to 1$"),
        ([[0.5, 0.5 + 2e-6], [1.0, 0.0]], r"^policy_probs rows must sum to 1$"),
    ],
)
def test_bad_policies_are_refused(policy, message):
    # Breakages caught: a negative probability let through when the row still sums to 1
    # (`or` turned into `and`), the row-sum tolerance loosened from 1e-9 (absolute, no
    # relative part).
    with pytest.raises(ValueError, match=message):
        policy_evaluation(fork(0.0, 1.0), np.array(policy), 1.0)
    policy_evaluation(fork(0.0, 1.0), np.array([[0.5, 0.5 + 5e-10], [1.0, 0.0]]), 1.0)


def test_optimal_actions_mask_default_tolerance_is_tight():
    # Breakage caught: a default tolerance of about 1 (0.5 worse would count as optimal).
    assert optimal_actions_mask(np.array([[1.0, 0.5, 1.0 - 1e-9]])).tolist() == [[True, False, True]]


def test_a_greedy_policy_that_never_ends_has_no_value():
    # Undiscounted, a table preferring BACK in cell 0 loops forever. Breakage caught: the
    # refusal reported with a missing value or termination flag other than NaN / False.
    gap = optimality_gap(walk(), np.array([[1.0, 0.0]] * 4), 1.0)
    assert gap.greedy_terminates is False
    assert math.isnan(gap.greedy_start_value) and math.isnan(gap.gap)
    assert gap.optimal_start_value == 0.0


def test_optimal_action_fraction_counts_only_states_the_greedy_policy_reaches():
    # With a -1 step cost FORWARD is the only optimal action in cells 0..2. A wrong choice in
    # a cell the greedy policy never reaches must not count. Breakage caught: unreachable
    # (or terminal) states counted.
    rewards = np.array([[-1.0, -1.0]] * 3 + [[0.0, 0.0]])
    model = walk(rewards)
    q_star = value_iteration(model, 1.0).q_star
    table = np.array([[0.0, 1.0], [0.0, 1.0], [0.0, 1.0], [0.0, 0.0]])
    assert optimal_action_fraction(model, table, q_star) == 1.0
    # Start in cell 2 only: cells 0 and 1 are never reached, so their (wrong) BACK does not count.
    start_late = TabularModel(model.transitions, model.rewards, model.terminal, np.array([0.0, 0.0, 1.0, 0.0]))
    table_wrong_early = np.array([[1.0, 0.0], [1.0, 0.0], [0.0, 1.0], [0.0, 0.0]])
    assert optimal_action_fraction(start_late, table_wrong_early, q_star) == 1.0
    only_terminal = TabularModel(model.transitions, model.rewards, model.terminal, np.array([0.0, 0.0, 0.0, 1.0]))
    assert math.isnan(optimal_action_fraction(only_terminal, table, q_star))
    np.testing.assert_array_equal(greedy_policy_probs(np.array([1, 0]), 2), [[0.0, 1.0], [1.0, 0.0]])


def test_optimal_action_fraction_default_tolerance_does_not_forgive_a_real_loss():
    # Action 0 is worth 0, action 1 is worth 0.5: choosing 0 is not optimal by any tolerance
    # a user would accept. Breakage caught: a default tolerance of about 1.
    model = fork(0.0, 0.5)
    q_star = value_iteration(model, 1.0).q_star
    assert optimal_action_fraction(model, np.array([[1.0, 0.0], [0.0, 0.0]]), q_star) == 0.0
    assert optimal_action_fraction(model, np.array([[0.0, 1.0], [0.0, 0.0]]), q_star) == 1.0


def test_an_epsilon_outside_the_unit_interval_is_refused():
    with pytest.raises(ValueError, match=r"^epsilon must be in \[0, 1\]"):
        epsilon_soft_probs(np.zeros((2, 3)), 1.5)
