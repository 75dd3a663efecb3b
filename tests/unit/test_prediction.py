"""Monte Carlo prediction on hand-made episodes: expected numbers are worked out by hand, or from the
module's formulas written out again with loops and numpy (the ratio standard error, Kish's effective size).

The episodes, environments and report rows are invented for these tests.
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest

from qtally.envs.encoders import DiscreteEncoder, PartsEncoder
from qtally.envs.factory import EnvironmentSpec, TabularEnvironment
from qtally.evaluate import prediction
from qtally.evaluate.prediction import (
    Estimates,
    ImportanceSamplingPrediction,
    OnPolicyPrediction,
    RatioTally,
    check_coverage,
    episode_samples,
    play_prediction_episodes,
)
from qtally.evaluate.prediction_report import error_in_se, prediction_report, shown_rows, write_csv
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


def test_every_visit_is_a_ratio_over_episodes():
    p = OnPolicyPrediction(n_states=2, n_actions=1, gamma=1.0, first_visit=False)
    p.add_episode(*EPISODE_A)
    v = p.state_values()
    # V(0) from returns {6, 3} of one episode: mean 4.5, but one episode gives no standard error.
    assert v.value[0] == pytest.approx(4.5)
    assert v.visits[0] == 2 and v.episodes[0] == 1
    assert math.isnan(v.standard_error[0])
    p.add_episode(*EPISODE_B)
    v = p.state_values()
    # Per episode: X = (9, 0), N = (2, 1); R = 9 / 3 = 3; residuals X - R N = (3, -3);
    # se = sqrt(18) / 3 * sqrt(2 / 1) = 2. Treating the three visits as independent would
    # give sd{6, 3, 0} / sqrt(3) = 3 / sqrt(3) = 1.73, too small.
    assert v.visits[0] == 3 and v.episodes[0] == 2
    assert v.value[0] == pytest.approx(3.0)
    assert v.standard_error[0] == pytest.approx(2.0)
    # Kish's effective size of the per-episode visit counts (2, 1): 3^2 / 5 = 1.8 episodes' worth.
    assert v.effective_visits[0] == pytest.approx(1.8)


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


# ---------------------------------------------------------------- the ratio estimator against numpy


def random_episodes(rng, count, n_states=3, n_actions=2, longest=8):
    """Invented episodes; states drawn from a small set so repeats within an episode are common."""
    episodes = []
    for _ in range(count):
        n = int(rng.integers(1, longest + 1))
        episodes.append((rng.integers(0, n_states, n), rng.integers(0, n_actions, n), rng.normal(1.0, 2.0, n)))
    return episodes


def returns_by_hand(rewards, gamma):
    g, out = 0.0, []
    for r in rewards[::-1]:
        g = r + gamma * g
        out.append(g)
    return out[::-1]


def per_episode_sums(episodes, gamma, state, first_visit, ratios=None):
    """(X_i, N_i, W_i, visits_i) for one state, written out with loops; ``ratios(episode) -> rho_t``."""
    rows = []
    for episode in episodes:
        states, _, rewards = episode
        g = returns_by_hand(rewards, gamma)
        rho = ratios(episode) if ratios is not None else np.ones(len(states))
        steps = [t for t in range(len(states)) if states[t] == state]
        if first_visit:
            steps = steps[:1]
        if steps:
            rows.append((sum(rho[t] * g[t] for t in steps), len(steps), sum(rho[t] for t in steps), len(steps)))
    return np.array(rows, dtype=float).reshape(-1, 4)


def ratio_se(x, n):
    """The delta-method ratio standard error of the module docstring, straight from its formula."""
    r = x.sum() / n.sum()
    m = int((n > 0).sum())
    return r, math.sqrt(((x - r * n) ** 2).sum()) / n.sum() * math.sqrt(m / (m - 1))


@pytest.fixture
def small_batches(monkeypatch):
    """Fold every ~7 samples, so the centred merge of many batches is what gets tested."""
    monkeypatch.setattr(prediction, "_FLUSH_AT", 7)


def test_first_visit_standard_error_is_the_sample_standard_error(small_batches):
    rng = np.random.default_rng(12)
    episodes = random_episodes(rng, 300)
    p = OnPolicyPrediction(3, 2, gamma=0.9, first_visit=True)
    for episode in episodes:
        p.add_episode(*episode)
    v = p.state_values()
    for s in range(3):
        g = per_episode_sums(episodes, 0.9, s, first_visit=True)[:, 0]
        assert v.visits[s] == g.size == v.episodes[s]
        assert v.value[s] == pytest.approx(g.mean(), rel=1e-12)
        assert v.standard_error[s] == pytest.approx(g.std(ddof=1) / math.sqrt(g.size), rel=1e-10)
        assert v.effective_visits[s] == pytest.approx(g.size)


def test_every_visit_standard_error_is_the_ratio_one_over_episodes(small_batches):
    rng = np.random.default_rng(13)
    episodes = random_episodes(rng, 300)
    p = OnPolicyPrediction(3, 2, gamma=0.9, first_visit=False)
    for episode in episodes:
        p.add_episode(*episode)
    v = p.state_values()
    for s in range(3):
        sums = per_episode_sums(episodes, 0.9, s, first_visit=False)
        x, n = sums[:, 0], sums[:, 1]
        r, se = ratio_se(x, n)
        assert v.visits[s] == n.sum() and v.episodes[s] == n.size
        assert v.value[s] == pytest.approx(r, rel=1e-12)
        assert v.standard_error[s] == pytest.approx(se, rel=1e-10)
        assert v.effective_visits[s] == pytest.approx(n.sum() ** 2 / (n**2).sum(), rel=1e-12)


def test_every_visit_standard_error_is_larger_than_the_per_visit_one_when_visits_repeat():
    # Invented: each episode loops in state 0 for 1 to 6 steps with one shared reward at the
    # end (gamma 1), so all visits of an episode see the same return. Per-visit arithmetic
    # counts a 6-visit episode as six independent samples; it is one.
    rng = np.random.default_rng(14)
    p = OnPolicyPrediction(1, 1, gamma=1.0, first_visit=False)
    returns = []
    for _ in range(200):
        n = int(rng.integers(1, 7))
        final = float(rng.normal())
        p.add_episode(np.zeros(n, dtype=int), np.zeros(n, dtype=int), np.r_[np.zeros(n - 1), final])
        returns += [final] * n
    returns = np.array(returns)
    naive = returns.std(ddof=1) / math.sqrt(returns.size)
    se = p.state_values().standard_error[0]
    assert p.state_values().value[0] == pytest.approx(returns.mean())
    assert se > 1.5 * naive, (se, naive)


def test_importance_sampling_standard_errors_are_ratios_over_episodes(small_batches):
    rng = np.random.default_rng(15)
    target = np.array([[0.8, 0.2], [0.3, 0.7], [0.5, 0.5]])
    behaviour = np.array([[0.5, 0.5], [0.6, 0.4], [0.2, 0.8]])
    episodes = random_episodes(rng, 400)

    def state_ratios(episode):
        states, actions, _ = episode
        step = target[states, actions] / behaviour[states, actions]
        return np.cumprod(step[::-1])[::-1]

    for first_visit in (True, False):
        p = ImportanceSamplingPrediction(target, behaviour, gamma=0.9, first_visit=first_visit)
        for episode in episodes:
            p.add_episode(*episode)
        ordinary, weighted = p.state_values("ordinary"), p.state_values("weighted")
        for s in range(3):
            sums = per_episode_sums(episodes, 0.9, s, first_visit, ratios=state_ratios)
            x, n, w = sums[:, 0], sums[:, 1], sums[:, 2]
            r_o, se_o = ratio_se(x, n)  # ordinary: sum rho G over visits
            r_w, se_w = ratio_se(x, w)  # weighted: sum rho G over sum rho
            assert ordinary.value[s] == pytest.approx(r_o, rel=1e-12)
            assert ordinary.standard_error[s] == pytest.approx(se_o, rel=1e-10)
            assert weighted.value[s] == pytest.approx(r_w, rel=1e-12)
            assert weighted.standard_error[s] == pytest.approx(se_w, rel=1e-10)
            kish = w.sum() ** 2 / (w**2).sum()
            assert weighted.effective_visits[s] == pytest.approx(kish, rel=1e-12)
            assert ordinary.effective_visits[s] == pytest.approx(kish, rel=1e-12)  # the same episode weights
            assert weighted.visits[s] == ordinary.visits[s] == n.sum()


def test_ratio_tally_merges_batches_exactly():
    # The same rows folded in one batch and in 9: the centred merge loses nothing.
    rng = np.random.default_rng(16)
    entries = rng.integers(0, 4, 500)
    n = rng.exponential(size=500) * (rng.random(500) > 0.2)  # a fifth weigh nothing
    x = n * rng.normal(5.0, 3.0, 500)
    whole, parts = RatioTally(4), RatioTally(4)
    whole.add(entries, x, n)
    for chunk in np.array_split(np.arange(500), 9):
        parts.add(entries[chunk], x[chunk], n[chunk])
    for k in range(4):
        here = entries == k
        r, se = ratio_se(x[here], n[here])
        for t in (whole, parts):
            assert t.estimate()[k] == pytest.approx(r, rel=1e-12)
            assert t.standard_error[k] == pytest.approx(se, rel=1e-9)
            assert t.episodes[k] == int((n[here] > 0).sum()) and t.visits[k] == here.sum()


def test_ratio_tally_with_equal_denominators_is_the_plain_average():
    x = np.array([1.0, 4.0, 2.0, 7.0])
    t = RatioTally(1)
    t.add(np.zeros(4, dtype=int), 2.5 * x, np.full(4, 2.5))
    assert t.estimate()[0] == pytest.approx(x.mean())
    assert t.standard_error[0] == pytest.approx(x.std(ddof=1) / 2.0)
    assert t.effective_size[0] == pytest.approx(4.0)


def test_ratio_tally_refuses_negative_weights():
    with pytest.raises(ValueError, match="non-negative"):
        RatioTally(1).add(np.array([0]), np.array([1.0]), np.array([-1.0]))


# ---------------------------------------------------------------- the current estimate


def test_value_of_reflects_every_episode_added():
    p = OnPolicyPrediction(2, 1, gamma=1.0, first_visit=False)
    assert p.value_of(0) == 0.0  # nothing yet
    p.add_episode(*EPISODE_A)
    assert p.value_of(0) == pytest.approx(4.5)  # returns 6 and 3, not yet folded by size
    p.add_episode(*EPISODE_B)
    assert p.value_of(0) == pytest.approx(3.0)
    off = ImportanceSamplingPrediction(TARGET_1, UNIFORM_1, gamma=1.0)
    off.add_episode(*arrays((0, 0, 1.0)))
    assert off.value_of(0) == pytest.approx(1.0)  # weighted IS: rho G / rho
    off.add_episode(*arrays((0, 1, 5.0)))  # rho 0: no weight
    assert off.value_of(0) == pytest.approx(1.0)


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


class _Looping:
    """Invented: state 0 leads to state 1 (reward 1); state 1 loops on itself (reward 2) forever."""

    def __init__(self):
        from gymnasium import spaces

        self.observation_space, self.action_space = spaces.Discrete(2), spaces.Discrete(1)
        self.unwrapped = self
        self.s = 0

    def reset(self, seed=None):
        self.s = 0
        return 0, {}

    def step(self, action):
        reward = 1.0 if self.s == 0 else 2.0
        self.s = 1
        return 1, reward, False, False, {}

    def close(self):
        pass


def test_a_bootstrapped_cut_uses_the_estimate_from_every_episode_so_far():
    # A step cap of 2 cuts every episode in state 1. Episode 1 has no estimate to lean on:
    # G(1) = 2. Episode 2 seeds its tail with that episode's V(1) = 2: G(1) = 2 + 0.5 * 2 = 3,
    # so V(1) = (2 + 3) / 2 = 2.5. Reading only folded sums (the old bug) left the tail at 0
    # until 65,536 steps were buffered, and V(1) would be 2.
    env = TabularEnvironment(env=_Looping(), encoder=DiscreteEncoder(n=2), n_actions=1, start_control=None, spec=EnvironmentSpec(id="looping"))
    p = OnPolicyPrediction(2, 1, gamma=0.5)
    summary = play_prediction_episodes(env, np.ones((2, 1)), p, 2, truncation="bootstrap", step_cap=2)
    assert summary.truncated == 2
    assert p.state_values().value[1] == pytest.approx(2.5)
    assert p.state_values().value[0] == pytest.approx(((1 + 0.5 * 2) + (1 + 0.5 * 3)) / 2)


# ---------------------------------------------------------------- the report


class _Cells:
    """Stands in for an environment in the report: names for states, an action count."""

    n_actions = 1

    class encoder:
        @staticmethod
        def describe(state):
            return f"cell {state}"


def _estimates(value, se, visits, effective):
    value, se, visits, effective = (np.asarray(a, dtype=float) for a in (value, se, visits, effective))
    return Estimates(value=value, standard_error=se, visits=visits.astype(int), effective_visits=effective, episodes=visits.astype(int))


def test_report_flags_few_effective_visits_and_never_yields_an_infinite_metric():
    # Invented four states, weighted IS, min_visits 30:
    # 0: 100 visits, 80 effective, error 0.1 = 1 se;  1: 100 visits but only 3 effective: flagged;
    # 2: 50 visits, 40 effective, se 0 and error 0.2 (err/se infinite);  3: never visited.
    est = _estimates([1.1, 9.0, 0.2, np.nan], [0.1, 0.01, 0.0, np.nan], [100, 100, 50, 0], [80, 3, 40, 0])
    exact = np.array([1.0, 1.0, 0.0, 0.5])
    rows, metrics = prediction_report(_Cells(), {("v", "weighted"): est}, exact, None, min_visits=30)
    assert [(r.state, r.flagged) for r in rows] == [(0, False), (1, True), (2, False)]
    assert rows[1].effective_visits == 3.0 and rows[1].error_in_se == pytest.approx(800.0)
    assert math.isinf(rows[2].error_in_se)
    assert metrics["v_weighted_entries_flagged"] == 1 and metrics["entries_flagged"] == 1
    assert metrics["v_weighted_entries_estimated"] == 2
    assert metrics["max_abs_error"] == pytest.approx(0.2)  # the flagged 8.0 error is not in it
    assert metrics["entries_infinite_error_in_se"] == 1
    assert "max_error_in_se" not in metrics and "v_weighted_max_error_in_se" not in metrics
    assert metrics["min_effective_visits"] == 40 and metrics["median_effective_visits"] == 60
    assert all(math.isfinite(v) for v in metrics.values())
    # the flagged row is not ranked (its 800 se would otherwise top the table)
    assert [r.state for r in shown_rows(rows, has_exact=True)] == [2, 0]


def test_report_keeps_max_error_in_se_when_every_ratio_is_finite():
    est = _estimates([1.1, 2.5], [0.1, 0.25], [100, 100], [100, 100])
    rows, metrics = prediction_report(_Cells(), {("v", "on_policy"): est}, np.array([1.0, 2.0]), None, min_visits=30)
    assert metrics["max_error_in_se"] == pytest.approx(2.0)
    assert metrics["entries_infinite_error_in_se"] == 0 and metrics["entries_flagged"] == 0


def test_report_csv_carries_effective_visits_and_flags(tmp_path):
    est = _estimates([1.1, 9.0], [0.1, 0.01], [100, 100], [80, 3])
    rows, _ = prediction_report(_Cells(), {("v", "weighted"): est}, np.array([1.0, 1.0]), None, min_visits=30)
    written = list(csv.DictReader(write_csv(rows, tmp_path / "p.csv").open()))
    assert [(r["effective_visits"], r["flagged"]) for r in written] == [("80", "0"), ("3", "1")]


def test_error_in_se_zero_and_infinite_cases():
    assert error_in_se(np.array([0.3, 0.0, 1e-3, -0.2]), np.array([0.1, 0.0, 0.0, 0.1])).tolist() == [pytest.approx(3.0), 0.0, math.inf, pytest.approx(2.0)]
