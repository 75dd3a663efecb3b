"""Monte Carlo prediction checked against exact policy evaluation and a published figure.

Sources:
- exact values: :func:`qtally.evaluate.exact.policy_evaluation` on the model Gymnasium's
  FrozenLake ``P`` table states (itself checked in ``test_exact_reference.py``);
- the tiny chain used for the off-policy checks is invented for this file;
- Blackjack: Sutton & Barto (2018), *Reinforcement Learning: An Introduction*, 2nd ed.,
  Example 5.1 and Figure 5.1 (the value of the policy that sticks only on 20 or 21).

Tolerances are stated in standard errors of the estimates themselves, so they follow from
the sample-mean argument rather than from tuning; a broken return, ratio or average (an
off-by-one in the discount, a ratio that includes the action being valued, a divisor of the
wrong count) moves estimates by many standard errors at these sample sizes.
"""

from __future__ import annotations

import numpy as np
from gymnasium import spaces

from qtally.envs.encoders import DiscreteEncoder
from qtally.envs.factory import EnvironmentSpec, TabularEnvironment, make_environment
from qtally.envs.model_extraction import model_of
from qtally.evaluate.exact import policy_evaluation, q_from_v
from qtally.evaluate.prediction import ImportanceSamplingPrediction, OnPolicyPrediction, play_prediction_episodes
from qtally.policy.rules import soften, threshold_policy, uniform_policy

# ---------------------------------------------------------------- FrozenLake 4x4 (slippery)

FROZEN_LAKE = EnvironmentSpec(id="FrozenLake-v1", kwargs={"map_name": "4x4", "is_slippery": True}, max_episode_steps=100)
GAMMA = 0.9


def _frozen_lake_prediction(episodes: int, seed: int):
    env = make_environment(FROZEN_LAKE)
    policy = uniform_policy(env.n_states, env.n_actions)
    model = model_of(env.env)
    exact_v = policy_evaluation(model, policy, GAMMA)
    estimator = OnPolicyPrediction(env.n_states, env.n_actions, GAMMA, first_visit=True)
    play_prediction_episodes(env, policy, estimator, episodes, seed=seed)
    env.close()
    return estimator, exact_v, q_from_v(model, exact_v, GAMMA)


def test_frozen_lake_estimates_lie_within_four_standard_errors_of_exact():
    # The uniform random policy: episodes are short and the 0.9^100 cut by the time limit is
    # negligible, so the untruncated model's values are the target.
    estimator, exact_v, exact_q = _frozen_lake_prediction(20_000, seed=4)
    v = estimator.state_values()
    well_visited = v.visits >= 200
    assert well_visited.sum() >= 8  # the non-hole, non-goal cells the policy reaches
    z = np.abs(v.value - exact_v)[well_visited] / v.standard_error[well_visited]
    assert z.max() < 4.0, f"worst state is {z.max():.2f} standard errors off"
    # Q of the same policy from q_from_v, on the start state's four actions.
    q = estimator.action_values()
    zq = np.abs(q.value[0] - exact_q[0]) / q.standard_error[0]
    assert zq.max() < 4.0


def test_frozen_lake_error_shrinks_as_episodes_grow():
    # Sample means: the error scales like 1/sqrt(n), so 10x the episodes should cut the mean
    # absolute error by about 3.2x. Require 2x on states visited in both runs.
    small, exact_v, _ = _frozen_lake_prediction(2_000, seed=1)
    large, _, _ = _frozen_lake_prediction(20_000, seed=2)
    v_small, v_large = small.state_values(), large.state_values()
    both = (v_small.visits >= 20) & (v_large.visits >= 20)
    mae_small = np.abs(v_small.value - exact_v)[both].mean()
    mae_large = np.abs(v_large.value - exact_v)[both].mean()
    assert mae_large < mae_small / 2.0, (mae_small, mae_large)
    # and the reported standard errors shrink by about sqrt(10) too
    ratio = np.median(v_small.standard_error[both] / v_large.standard_error[both])
    assert 2.5 < ratio < 4.0


# ---------------------------------------------------------------- an invented three-state chain


class TinyChain:
    """Invented model: states 0, 1, 2 act; 3 is terminal. Two actions with different odds and rewards.

    From state s, action 0 ("safe") moves to s+1 w.p. 0.7 or ends w.p. 0.3, reward 1;
    action 1 ("bold") moves to s+1 w.p. 0.4 (reward 3) or ends w.p. 0.6 (reward -1).
    State 2 always ends. Every policy ends within three steps.
    """

    def __init__(self):
        self.observation_space, self.action_space = spaces.Discrete(4), spaces.Discrete(2)
        self.unwrapped = self
        self.initial_state_distrib = np.array([1.0, 0.0, 0.0, 0.0])
        self.P = {}
        for s in range(3):
            nxt = s + 1 if s < 2 else 3
            self.P[s] = {
                0: [(0.7, nxt, 1.0, nxt == 3), (0.3, 3, 1.0, True)],
                1: [(0.4, nxt, 3.0, nxt == 3), (0.6, 3, -1.0, True)],
            }
        self.P[3] = {0: [(1.0, 3, 0.0, True)], 1: [(1.0, 3, 0.0, True)]}
        self._rng = np.random.default_rng(0)
        self.s = 0

    def reset(self, seed=None):
        if seed is not None:
            self._rng = np.random.default_rng(seed)
        self.s = 0
        return 0, {}

    def step(self, action):
        outcomes = self.P[self.s][int(action)]
        k = self._rng.choice(len(outcomes), p=[o[0] for o in outcomes])
        _, self.s, reward, terminated = outcomes[k]
        return self.s, reward, terminated, False, {}

    def close(self):
        pass


def tiny_environment() -> TabularEnvironment:
    return TabularEnvironment(env=TinyChain(), encoder=DiscreteEncoder(n=4), n_actions=2, start_control=None, spec=EnvironmentSpec(id="tiny-chain"))


TARGET = np.array([[0.9, 0.1], [0.2, 0.8], [1.0, 0.0], [0.5, 0.5]])  # mostly safe, then bold, then safe
BEHAVIOUR = np.full((4, 2), 0.5)


def test_weighted_is_matches_on_policy_estimation_of_the_same_target():
    env = tiny_environment()
    on = OnPolicyPrediction(4, 2, gamma=1.0)
    play_prediction_episodes(env, TARGET, on, 8_000, seed=21)
    off = ImportanceSamplingPrediction(TARGET, BEHAVIOUR, gamma=1.0)
    play_prediction_episodes(env, BEHAVIOUR, off, 8_000, seed=22)
    exact_v = policy_evaluation(model_of(env.env), TARGET, 1.0)
    v_on, v_w = on.state_values(), off.state_values("weighted")
    q_on, q_w = on.action_values(), off.action_values("weighted")
    tiny = 1e-12  # state 2 under the target has a deterministic return: both errors are 0
    for s in range(3):
        combined = np.hypot(v_on.standard_error[s], v_w.standard_error[s])
        assert abs(v_on.value[s] - v_w.value[s]) <= 4 * combined + tiny, s
        assert abs(v_w.value[s] - exact_v[s]) <= 4 * v_w.standard_error[s] + tiny, s
    taken = (q_on.visits >= 100) & (q_w.visits >= 100)
    assert taken.sum() >= 4
    combined = np.hypot(q_on.standard_error, q_w.standard_error)[taken]
    assert (np.abs(q_on.value - q_w.value)[taken] <= 4 * combined + tiny).all()


def test_ordinary_is_is_unbiased_over_many_seeds():
    # 400 independent runs of 25 episodes each. Ordinary IS is unbiased for every n, so the
    # mean of the per-run estimates of V(start) must sit within 3 of its own standard errors
    # of the exact value; a ratio that skipped a step or included the wrong one would not.
    env = tiny_environment()
    target = soften(np.array([[1.0, 0.0], [0.0, 1.0], [1.0, 0.0], [1.0, 0.0]]), 0.1)
    exact = policy_evaluation(model_of(env.env), target, 1.0)[0]
    estimates = []
    for seed in range(400):
        off = ImportanceSamplingPrediction(target, BEHAVIOUR, gamma=1.0)
        play_prediction_episodes(env, BEHAVIOUR, off, 25, seed=1000 + seed)
        estimates.append(off.state_values("ordinary").value[0])
    estimates = np.asarray(estimates)
    se = estimates.std(ddof=1) / np.sqrt(estimates.size)
    assert abs(estimates.mean() - exact) < 3 * se, (estimates.mean(), exact, se)


# ---------------------------------------------------------------- Blackjack, Figure 5.1


def test_blackjack_stick_on_twenty_values_have_the_published_signs():
    # Pattern read from the published figure (Sutton & Barto 2018, Figure 5.1): the value of
    # "stick only on 20 or 21" is below zero for player sums 12..19 and above zero for 20
    # and 21, against every dealer card, with and without a usable ace. Starts are spread
    # uniformly over the 280 decision states (exploring-style chosen starts), 40k episodes,
    # so each state gets ~143 first visits plus those reached by hitting; the sign is
    # checked wherever the estimate is more than 3 standard errors from zero.
    env = make_environment(EnvironmentSpec(id="Blackjack-v1", kwargs={"sab": True}, observation_names=["player_sum", "dealer_card", "usable_ace"]))
    policy = threshold_policy(env.encoder, env.n_actions, "player_sum", 20, low_action=1, high_action=0)
    estimator = OnPolicyPrediction(env.n_states, env.n_actions, gamma=1.0)
    play_prediction_episodes(env, policy, estimator, 40_000, seed=0, start_states=env.start_control.start_states())
    v = estimator.state_values()
    qualifying = wrong = 0
    for player_sum in range(12, 22):
        for dealer in range(1, 11):
            for usable_ace in (0, 1):
                s = env.encoder.encode((player_sum, dealer, usable_ace))
                assert v.visits[s] >= 100
                if abs(v.value[s]) > 3 * v.standard_error[s]:
                    qualifying += 1
                    wrong += (v.value[s] > 0) != (player_sum >= 20)
    env.close()
    print(f"{qualifying} of 200 states are more than 3 standard errors from zero")
    assert qualifying >= 180
    assert wrong == 0
