"""Monte Carlo prediction on hand-made episodes: every expected number below is worked out by hand.

The episodes are invented for these tests.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from qtally.envs.encoders import DiscreteEncoder, PartsEncoder
from qtally.envs.factory import EnvironmentSpec, TabularEnvironment
from qtally.evaluate.prediction import (
    ImportanceSamplingPrediction,
    OnPolicyPrediction,
    Tally,
    WeightedTally,
    check_coverage,
    episode_samples,
    play_prediction_episodes,
)
from qtally.policy.rules import PolicyRuleError, constant_policy, part_index, soften, threshold_policy, uniform_policy


def arrays(*steps):
    """(state, action, reward) triples -> the three episode arrays."""
    s, a, r = zip(*steps)
    return np.array(s), np.array(a), np.array(r, dtype=float)


# Episode A: states 0, 1, 0 with rewards 1, 2, 3 (gamma 1): returns 6, 5, 3.
EPISODE_A = arrays((0, 0, 1.0), (1, 0, 2.0), (0, 0, 3.0))
# Episode B: one step from state 0, reward 0: return 0.
EPISODE_B = arrays((0, 0, 0.0))


# ---------------------------------------------------------------- on-policy averages


def test_first_visit_counts_one_return_per_episode():
    p = OnPolicyPrediction(n_states=2, n_actions=1, gamma=1.0, first_visit=True)
    p.add_episode(*EPISODE_A)
    p.add_episode(*EPISODE_B)
    v = p.state_values()
    # V(0) from returns {6, 0}: mean 3, sample sd sqrt(18), se sqrt(18)/sqrt(2) = 3.
    assert v.visits.tolist() == [2, 1]
    assert v.value.tolist() == [3.0, 5.0]
    assert v.standard_error[0] == pytest.approx(3.0)
    assert math.isnan(v.standard_error[1])  # one sample: no standard error


def test_every_visit_counts_each_occurrence():
    p = OnPolicyPrediction(n_states=2, n_actions=1, gamma=1.0, first_visit=False)
    p.add_episode(*EPISODE_A)
    v = p.state_values()
    # V(0) from returns {6, 3}: mean 4.5, sd sqrt(4.5), se 1.5.
    assert v.value[0] == pytest.approx(4.5)
    assert v.standard_error[0] == pytest.approx(1.5)
    p.add_episode(*EPISODE_B)
    v = p.state_values()
    # {6, 3, 0}: mean 3, sample variance 9, se 3 / sqrt(3).
    assert v.visits[0] == 3
    assert v.value[0] == pytest.approx(3.0)
    assert v.standard_error[0] == pytest.approx(3.0 / math.sqrt(3.0))


def test_discounting_enters_the_returns():
    p = OnPolicyPrediction(n_states=2, n_actions=1, gamma=0.5, first_visit=False)
    p.add_episode(*EPISODE_A)
    # G2 = 3, G1 = 2 + 0.5 * 3 = 3.5, G0 = 1 + 0.5 * 3.5 = 2.75.
    v = p.state_values()
    assert v.value.tolist() == [pytest.approx((2.75 + 3.0) / 2), pytest.approx(3.5)]


def test_action_values_are_kept_per_pair():
    p = OnPolicyPrediction(n_states=1, n_actions=2, gamma=1.0, first_visit=True)
    p.add_episode(*arrays((0, 1, 2.0), (0, 0, 1.0)))  # returns 3 (pair 0,1) and 1 (pair 0,0)
    p.add_episode(*arrays((0, 1, 5.0)))
    q = p.action_values()
    assert q.value.tolist() == [[1.0, 4.0]]
    assert q.visits.tolist() == [[1, 2]]
    assert q.standard_error[0, 1] == pytest.approx(1.0)  # {3, 5}: sd sqrt(2), se 1
    assert p.state_values().value.tolist() == [4.0]  # first visits of state 0 only: {3, 5}


def test_forced_first_action_is_not_a_sample_of_v():
    p = OnPolicyPrediction(n_states=2, n_actions=1, gamma=1.0, first_visit=True)
    p.add_episode(*EPISODE_A, forced_first_action=True)
    v, q = p.state_values(), p.action_values()
    # Step 0 counts for Q(0, 0) only; V(0) takes its first visit from step 2 (return 3).
    assert q.value[0, 0] == 6.0
    assert v.value.tolist() == [3.0, 5.0]


def test_tail_value_seeds_the_returns():
    s = episode_samples(*EPISODE_B, 0.5, n_actions=1, tail_value=4.0)
    assert s.returns.tolist() == [2.0]


def test_unvisited_entries_are_nan_not_zero():
    p = OnPolicyPrediction(n_states=3, n_actions=1, gamma=1.0)
    p.add_episode(*EPISODE_B)
    assert math.isnan(p.state_values().value[2])


# ---------------------------------------------------------------- running moments


def test_tally_batches_match_one_pass_moments():
    rng = np.random.default_rng(5)
    index = rng.integers(0, 4, size=1000)
    values = rng.normal(3.0, 2.0, size=1000) * (index + 1)
    t = Tally(4)
    for chunk in np.array_split(np.arange(1000), 7):
        t.add(index[chunk], values[chunk])
    for k in range(4):
        x = values[index == k]
        assert t.count[k] == x.size
        assert t.mean[k] == pytest.approx(x.mean(), rel=1e-12)
        assert t.standard_error[k] == pytest.approx(x.std(ddof=1) / math.sqrt(x.size), rel=1e-10)


def test_weighted_tally_matches_the_delta_method_formula():
    rng = np.random.default_rng(8)
    x = rng.normal(size=400)
    w = rng.exponential(size=400) * (rng.random(400) > 0.2)  # a fifth of the weights are zero
    t = WeightedTally(1)
    for chunk in np.array_split(np.arange(400), 9):
        t.add(np.zeros(chunk.size, dtype=int), x[chunk], w[chunk])
    r = (w * x).sum() / w.sum()
    m = int((w > 0).sum())
    se = math.sqrt((w**2 * (x - r) ** 2).sum() / w.sum() ** 2 * m / (m - 1))
    assert t.estimate()[0] == pytest.approx(r, rel=1e-12)
    assert t.standard_error[0] == pytest.approx(se, rel=1e-10)
    assert t.effective_visits[0] == pytest.approx(w.sum() ** 2 / (w**2).sum())
    assert t.count[0] == 400 and t.weighted_count[0] == m


def test_weighted_tally_with_equal_weights_is_the_plain_average():
    x = np.array([1.0, 4.0, 2.0, 7.0])
    t = WeightedTally(1)
    t.add(np.zeros(4, dtype=int), x, np.full(4, 2.5))
    assert t.estimate()[0] == pytest.approx(x.mean())
    assert t.standard_error[0] == pytest.approx(x.std(ddof=1) / 2.0)


# ---------------------------------------------------------------- importance sampling

# One state, two actions. Target always takes action 0; behaviour is uniform.
TARGET_1 = np.array([[1.0, 0.0]])
UNIFORM_1 = np.array([[0.5, 0.5]])


def one_state_is(first_visit=True):
    p = ImportanceSamplingPrediction(TARGET_1, UNIFORM_1, gamma=1.0, first_visit=first_visit)
    p.add_episode(*arrays((0, 0, 1.0)))  # rho for V = 1 / 0.5 = 2
    p.add_episode(*arrays((0, 1, 0.0)))  # rho = 0
    p.add_episode(*arrays((0, 0, 3.0)))  # rho = 2
    return p


def test_ordinary_is_averages_rho_times_return_over_every_visit():
    v = one_state_is().state_values("ordinary")
    # rho * G = {2, 0, 6}: mean 8/3; sample variance ((2/3)^2 + (8/3)^2 + (10/3)^2) / 2 = 28/3.
    assert v.value[0] == pytest.approx(8.0 / 3.0)
    assert v.visits[0] == 3
    assert v.standard_error[0] == pytest.approx(math.sqrt(28.0 / 3.0 / 3.0))


def test_weighted_is_divides_by_the_sum_of_ratios():
    v = one_state_is().state_values("weighted")
    # (2*1 + 0*0 + 2*3) / (2 + 0 + 2) = 2; delta method: (4*1 + 4*1) / 4^2 * 2/1 = 1, se 1.
    assert v.value[0] == pytest.approx(2.0)
    assert v.standard_error[0] == pytest.approx(1.0)
    assert v.effective_visits[0] == pytest.approx(2.0)


def test_the_action_taken_is_not_reweighted_for_q():
    p = one_state_is()
    q_ord, q_w = p.action_values("ordinary"), p.action_values("weighted")
    # Q(0, 0) from {1, 3} with ratio 1 (nothing after the action); Q(0, 1) from {0}.
    assert q_ord.value.tolist() == [[2.0, 0.0]]
    assert q_w.value.tolist() == [[2.0, 0.0]]


def test_ratios_multiply_along_the_rest_of_the_episode():
    target = np.array([[1.0, 0.0], [0.25, 0.75]])
    behaviour = np.full((2, 2), 0.5)
    s = episode_samples(*arrays((0, 0, 0.0), (1, 1, 4.0)), 1.0, n_actions=2, target=target, behaviour=behaviour)
    # Step ratios 2 and 1.5: V(s0) gets 2 * 1.5, V(s1) 1.5; Q(s0, a0) gets 1.5, Q(s1, a1) 1.
    assert s.state_ratios.tolist() == [3.0, 1.5]
    assert s.pair_ratios.tolist() == [1.5, 1.0]
    assert s.returns.tolist() == [4.0, 4.0]


def test_weighted_is_with_behaviour_equal_to_target_is_the_on_policy_estimate():
    rng = np.random.default_rng(3)
    pi = np.array([[0.3, 0.7], [0.6, 0.4], [0.5, 0.5]])
    on = OnPolicyPrediction(3, 2, gamma=0.9, first_visit=False)
    off = ImportanceSamplingPrediction(pi, pi, gamma=0.9, first_visit=False)
    for _ in range(50):
        n = int(rng.integers(1, 6))
        episode = (rng.integers(0, 3, n), rng.integers(0, 2, n), rng.normal(size=n))
        on.add_episode(*episode)
        off.add_episode(*episode)
    for method in ("ordinary", "weighted"):
        np.testing.assert_allclose(off.state_values(method).value, on.state_values().value, rtol=1e-12)
        np.testing.assert_allclose(off.action_values(method).standard_error, on.action_values().standard_error, rtol=1e-9)


def test_coverage_finds_target_actions_the_behaviour_never_takes():
    assert check_coverage(TARGET_1, np.array([[0.0, 1.0]])).tolist() == [True]
    assert check_coverage(TARGET_1, UNIFORM_1).tolist() == [False]


# ---------------------------------------------------------------- policy rules


BLACKJACK_LIKE = PartsEncoder(sizes=(32, 11, 2), starts=(0, 0, 0), names=("player_sum", "dealer_card", "usable_ace"))


def test_threshold_rule_sticks_at_and_above_twenty():
    table = threshold_policy(BLACKJACK_LIKE, 2, "player_sum", 20, low_action=1, high_action=0)
    assert table[BLACKJACK_LIKE.encode((20, 5, 0))].tolist() == [1.0, 0.0]
    assert table[BLACKJACK_LIKE.encode((19, 5, 1))].tolist() == [0.0, 1.0]
    assert table[BLACKJACK_LIKE.encode((21, 1, 1))].tolist() == [1.0, 0.0]


def test_rule_errors_name_the_key():
    with pytest.raises(PolicyRuleError, match="policy.part='hand'.*player_sum, dealer_card, usable_ace"):
        part_index(BLACKJACK_LIKE, "hand")
    with pytest.raises(PolicyRuleError, match="behaviour.high_action=2"):
        threshold_policy(BLACKJACK_LIKE, 2, 0, 20, low_action=1, high_action=2, key="behaviour")
    with pytest.raises(PolicyRuleError, match="policy.action=4"):
        constant_policy(3, 4, 4)
    with pytest.raises(PolicyRuleError, match="epsilon"):
        soften(uniform_policy(2, 2), 1.5)


def test_soften_keeps_rows_summing_to_one():
    table = soften(constant_policy(3, 4, 2), 0.2)
    np.testing.assert_allclose(table.sum(axis=1), 1.0)
    assert table[0].tolist() == pytest.approx([0.05, 0.05, 0.85, 0.05])


# ---------------------------------------------------------------- playing


class _OneStep:
    """Invented: one decision, reward = action, then the episode ends."""

    def __init__(self):
        from gymnasium import spaces

        self.observation_space, self.action_space = spaces.Discrete(1), spaces.Discrete(2)
        self.unwrapped = self

    def reset(self, seed=None):
        return 0, {}

    def step(self, action):
        return 0, float(action), True, False, {}

    def close(self):
        pass


def one_step_environment() -> TabularEnvironment:
    return TabularEnvironment(env=_OneStep(), encoder=DiscreteEncoder(n=1), n_actions=2, start_control=None, spec=EnvironmentSpec(id="one-step"))


def test_playing_is_reproducible_and_samples_the_policy():
    env = one_step_environment()
    policy = np.array([[0.25, 0.75]])
    results = []
    for _ in range(2):
        p = OnPolicyPrediction(1, 2, gamma=1.0)
        summary = play_prediction_episodes(env, policy, p, 400, seed=11)
        results.append(p.state_values().value[0])
        assert summary.episodes == 400 and summary.steps == 400
    assert results[0] == results[1]
    # V = 0.75; 400 Bernoulli(0.75) draws have se ~0.022, so 4 se is about 0.09.
    assert abs(results[0] - 0.75) < 0.09


def test_playing_a_chosen_start_needs_start_control():
    with pytest.raises(ValueError, match="cannot be started"):
        play_prediction_episodes(one_step_environment(), np.array([[0.5, 0.5]]), OnPolicyPrediction(1, 2, 1.0), 1, start_observation=0)
