"""Rollouts of a learned policy (qtally.evaluate.policy_rollout) and their seeds (control.streams.rollout_seeds).

FrozenLake 4x4 (slippery) is the test bed: it has a model, so every rollout figure has an
exact counterpart. The time limit is lifted (max_episode_steps=10000) because the model
knows none; with Gymnasium's 100-step limit a slow policy's rollout mean sits below its
exact value.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from qtally.control.streams import SEED_MODULUS, RandomStreams, evaluation_base, evaluation_seeds, rollout_seeds
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.envs.model_extraction import model_of
from qtally.evaluate.exact import policy_evaluation, start_value, value_iteration
from qtally.evaluate.policy_rollout import exact_return, policy_probabilities, roll_out
from qtally.policy.table_policy import Fallback, TablePolicy, UnvisitedStateError

LAKE = EnvironmentSpec(id="FrozenLake-v1", kwargs={"map_name": "4x4", "is_slippery": True}, max_episode_steps=10_000)
# States an episode from the start can reach under the optimal policy and that are not holes or the goal.
UNVISITED = [4, 9]


@pytest.fixture(scope="module")
def lake():
    environment = make_environment(LAKE)
    yield environment
    environment.close()


@pytest.fixture(scope="module")
def optimal_q(lake):
    # gamma < 1 so the optimal policy is unique enough to be a fair test policy; the rollout measures it undiscounted.
    return value_iteration(model_of(lake.env), 0.99).q_star


def _policy(q: np.ndarray, unvisited=(), fallback: Fallback | None = None) -> TablePolicy:
    visits = np.ones(q.shape, dtype=np.int64)
    visits[list(unvisited)] = 0
    return TablePolicy(q=q, visits=visits, fallback=fallback or Fallback())


def test_same_seed_same_rollout_and_other_seed_other_episodes(lake, optimal_q):
    # Which bug: a rollout seeded from the clock or a shared global generator, or uniforms not tied to the seed.
    policy = _policy(optimal_q, UNVISITED)
    a = roll_out(lake, policy, 300, seed=5, step_cap=10_000, exact=False)
    b = roll_out(lake, policy, 300, seed=5, step_cap=10_000, exact=False)
    c = roll_out(lake, policy, 300, seed=6, step_cap=10_000, exact=False)
    np.testing.assert_array_equal(a.returns, b.returns)
    assert (a.return_mean, a.return_ci95, a.length_mean, a.fallback_decisions) == (b.return_mean, b.return_ci95, b.length_mean, b.fallback_decisions)
    assert a.fallback_decisions > 0  # the fallback's uniforms are part of what the seed fixes
    assert not np.array_equal(a.returns, c.returns)


def test_interval_agrees_with_scipy_t_interval(lake, optimal_q):
    # Source: scipy.stats.t.interval with scipy.stats.sem computes the same Student-t interval by another route.
    report = roll_out(lake, _policy(optimal_q), 400, seed=1, step_cap=10_000, exact=False)
    low, high = stats.t.interval(0.95, len(report.returns) - 1, loc=np.mean(report.returns), scale=stats.sem(report.returns))
    assert report.return_mean == pytest.approx((low + high) / 2, rel=1e-12)
    assert report.return_ci95 == pytest.approx((high - low) / 2, rel=1e-12)


def test_success_on_frozen_lake_is_reaching_the_goal(lake, optimal_q):
    # FrozenLake pays 1 on the goal and 0 elsewhere, so success (a positive final reward at the end) is a positive return.
    report = roll_out(lake, _policy(optimal_q), 300, seed=2, step_cap=10_000, exact=False)
    assert report.success_rate == pytest.approx(float(np.mean(report.returns > 0)), abs=0.0)
    assert 0.5 < report.success_rate < 0.95


def test_exact_value_lies_in_the_rollout_interval_with_the_fallback_counted(lake, optimal_q):
    """The exact expected return of the policy as it acts (uniform fallback in two unvisited states) lies
    in the rollout's 95% interval, and the value of the same table read greedily everywhere does not:
    so the test would catch an exact value that ignored the fallback."""
    policy = _policy(optimal_q, UNVISITED)
    report = roll_out(lake, policy, 6000, seed=3, step_cap=10_000)
    assert report.exact_return is not None and report.exact_in_interval
    assert abs(report.exact_return - report.return_mean) <= report.return_ci95
    model = model_of(lake.env)
    ignoring_fallback = start_value(model, policy_evaluation(model, np.eye(4)[np.argmax(optimal_q, axis=1)], 1.0))
    assert abs(ignoring_fallback - report.return_mean) > report.return_ci95
    discounted = start_value(model, policy_evaluation(model, policy_probabilities(policy), 0.99))
    assert abs(discounted - report.return_mean) > report.return_ci95  # the rollout measures the undiscounted return
    assert 0.0 < report.fallback_share < 0.5


def test_fallback_share_counts_decisions_in_unvisited_states(lake, optimal_q):
    report = roll_out(lake, _policy(optimal_q, UNVISITED), 200, seed=4, step_cap=10_000, trace=200, exact=False)
    states = np.concatenate([t.states for t in report.traces])
    assert report.decisions == states.size
    assert report.fallback_decisions == int(np.isin(states, UNVISITED).sum())


def test_a_fixed_fallback_action_is_what_the_unvisited_states_do(lake, optimal_q):
    report = roll_out(lake, _policy(optimal_q, UNVISITED, Fallback("action", 3)), 100, seed=4, step_cap=10_000, trace=100, exact=False)
    for t in report.traces:
        assert set(t.actions[np.isin(t.states, UNVISITED)].tolist()) <= {3}


def test_refuse_fallback_stops_the_rollout_and_has_no_exact_value(lake, optimal_q):
    policy = _policy(optimal_q, UNVISITED, Fallback("refuse"))
    assert policy_probabilities(policy) is None
    assert exact_return(lake, policy)[0] is None
    with pytest.raises(UnvisitedStateError):
        roll_out(lake, policy, 200, seed=0, step_cap=10_000, exact=False)


def test_no_success_rate_where_success_is_undefined():
    from qtally.experiment import bundled_environment_spec

    spec, _ = bundled_environment_spec("restock")
    environment = make_environment(spec)
    try:
        q = np.zeros((environment.n_states, environment.n_actions))
        report = roll_out(environment, TablePolicy(q=q), 5, seed=0, step_cap=1000, exact=False)
    finally:
        environment.close()
    assert report.success_rate is None and "rollout_success_rate" not in report.metrics()


@settings(max_examples=200, deadline=None)
@given(seed=st.integers(0, 2**63 - 1), eval_seed=st.one_of(st.none(), st.integers(0, 2**63 - 1)), base=st.integers(0, 2**63 - 1))
def test_rollout_seeds_are_disjoint_from_training_and_evaluation_seeds(seed, eval_seed, base):
    # Training seeds its environment with env_seed, evaluation with evaluation_seeds: all below 2**31 - 1.
    streams = RandomStreams(seed)
    assert streams.env_seed < SEED_MODULUS
    assert evaluation_seeds(evaluation_base(seed, eval_seed), 50).max() < SEED_MODULUS
    seeds = rollout_seeds(base, 50)
    assert seeds.min() >= 2**31 and seeds.max() < 2**32
    assert len(set(seeds.tolist())) == 50


def test_rollout_uses_its_own_seeds(lake, optimal_q):
    report = roll_out(lake, _policy(optimal_q), 3, seed=9, step_cap=10_000, trace=3, exact=False)
    assert [t.seed for t in report.traces] == rollout_seeds(9, 3).tolist()
