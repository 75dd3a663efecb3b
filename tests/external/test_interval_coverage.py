"""The reported 95% intervals cover the exact values about 95% of the time.

Sources:
- exact values: :func:`qtally.evaluate.exact.policy_evaluation` (a linear solve) on the
  model of Gymnasium's FrozenLake 4x4, read from its ``P`` table by
  :func:`qtally.envs.model_extraction.model_of`: another route than sampling;
- the nominal rate: an estimate +- 1.96 standard errors is a 95% normal interval (common
  practice, no source); the standard errors are the ratio ones of
  :mod:`qtally.evaluate.prediction` (Cochran 1977; Owen 2013, section 9.2).

Setup: FrozenLake 4x4 (slippery, 100-step limit, cuts counted as terminal: under the uniform
policy a cut is rare and 0.9^100 makes its effect negligible), gamma 0.9, 40 repetitions
of 4000 episodes of the uniform random policy, each repetition its own seed. The same
episodes feed three estimators: first-visit and every-visit on-policy averaging (values of
the uniform policy) and every-visit weighted importance sampling of a target that leans
towards the goal, 0.3 for down and right and 0.2 for left and up in every cell, with the
uniform policy as behaviour. That pair keeps the weights tame (each step's ratio is 0.8
or 1.2, Kish's effective size stays a fair share of the visits). Every-visit, because with
first visits the per-visit and per-episode standard errors coincide and the check could not
tell them apart.

Entries: the state values V(s) with at least ``MIN_EFFECTIVE`` effective visits (Kish's
effective size; the visit count itself for first-visit averaging), i.e. those the report
would not flag at ``min_visits=200``; for weighted IS this restriction is what the report's
own flag applies. About 10 states qualify per repetition, some 350 intervals per estimator.

What is checked, per estimator, over all the intervals kept:
- coverage: the share of intervals containing the exact value lies in ``COVERAGE_BAND``;
- scale: the median of |estimate - exact| / se, divided by 0.6745 (the median of |z| for a
  standard normal z), lies in ``SCALE_BAND``; it is 1 when the standard errors have the
  right size, and a median is not thrown by the few huge |z| of rare-event cells.

Why these bands. Measured with the seeds used here (first seed 100), and with first seeds
1000, 2000 and 3000 to see the spread (first-visit / every-visit / weighted IS):

    coverage   0.947 / 0.955 / 0.935   (spread over the four seed sets: 0.914-0.947 / 0.894-0.955 / 0.871-0.935)
    scale      1.03 / 1.06 / 1.07      (spread: 0.84-1.07 / 0.88-1.13 / 0.90-1.07)

Coverage falls short of 0.95 mostly in cells whose value is tiny and rests on a few rare
successes (the top-right corner: exact V near 0.005), where any normal interval
under-covers, and all cells of one repetition share its episodes, so the share moves by a
few points from one seed set to the next; hence the generous lower bound. The per-visit
standard error the every-visit estimators used before (visits treated as independent,
restored temporarily to check) gave, with first seeds 100 and 1000: coverage 0.800 and
0.740 (every-visit), 0.789 and 0.788 (weighted IS), scale 1.52 and 1.53, 1.54 and 1.42:
below the coverage band and above the scale band, so both checks fail on it. Standard
errors twice too large would give coverage near 1.0 and scale near 0.5, also outside.
First-visit numbers do not depend on that change (one visit per episode), which is why the
every-visit estimators are the ones that test it.
"""

from __future__ import annotations

import numpy as np
import pytest

from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.envs.model_extraction import model_of
from qtally.evaluate.exact import policy_evaluation
from qtally.evaluate.prediction import ImportanceSamplingPrediction, OnPolicyPrediction, play_prediction_episodes
from qtally.policy.rules import uniform_policy

FROZEN_LAKE = EnvironmentSpec(id="FrozenLake-v1", kwargs={"map_name": "4x4", "is_slippery": True}, max_episode_steps=100)
GAMMA = 0.9
REPETITIONS = 40
EPISODES = 4000
FIRST_SEED = 100
MIN_EFFECTIVE = 200
LEANING = [0.2, 0.3, 0.3, 0.2]  # left, down, right, up: the weighted-IS target in every cell
Z_95 = 1.959964
COVERAGE_BAND = (0.85, 0.99)
SCALE_BAND = (0.75, 1.3)
MEDIAN_ABS_NORMAL = 0.6745  # the median of |z| for a standard normal z


class _FanOut:
    """Feeds each played episode to several estimators (cuts are terminal here, so no bootstrap value is asked)."""

    def __init__(self, **estimators):
        self.estimators = estimators

    def add_episode(self, *episode, **options) -> None:
        for estimator in self.estimators.values():
            estimator.add_episode(*episode, **options)

    def value_of(self, state: int) -> float:  # pragma: no cover - never asked under as_terminal
        raise AssertionError("as_terminal cuts need no bootstrap value")


def standardised_errors(repetitions: int = REPETITIONS, first_seed: int = FIRST_SEED) -> dict[str, np.ndarray]:
    """(estimate - exact) / se per repetition and state; NaN where the entry would be flagged."""
    env = make_environment(FROZEN_LAKE)
    behaviour = uniform_policy(env.n_states, env.n_actions)
    target = np.tile(LEANING, (env.n_states, 1))
    model = model_of(env.env)
    exact = {"first": policy_evaluation(model, behaviour, GAMMA), "weighted": policy_evaluation(model, target, GAMMA)}
    exact["every"] = exact["first"]
    z = {name: np.full((repetitions, env.n_states), np.nan) for name in exact}
    try:
        for rep in range(repetitions):  # ~1 s of one core per repetition
            fan = _FanOut(
                first=OnPolicyPrediction(env.n_states, env.n_actions, GAMMA, first_visit=True),
                every=OnPolicyPrediction(env.n_states, env.n_actions, GAMMA, first_visit=False),
                weighted=ImportanceSamplingPrediction(target, behaviour, GAMMA, first_visit=False),
            )
            play_prediction_episodes(env, behaviour, fan, EPISODES, seed=first_seed + rep)
            for name, estimator in fan.estimators.items():
                v = estimator.state_values("weighted") if name == "weighted" else estimator.state_values()
                kept = v.effective_visits >= MIN_EFFECTIVE
                with np.errstate(divide="ignore", invalid="ignore"):  # se 0 outside the kept entries
                    z[name][rep, kept] = ((v.value - exact[name]) / v.standard_error)[kept]
    finally:
        env.close()
    return z


@pytest.fixture(scope="module")
def z_scores() -> dict[str, np.ndarray]:
    return standardised_errors()


@pytest.mark.slow
@pytest.mark.parametrize("name", ["first", "every", "weighted"])
def test_reported_intervals_cover_the_exact_values_at_the_nominal_rate(z_scores, name):
    z = z_scores[name]
    kept = ~np.isnan(z)  # an infinite z (se 0, error not) counts as a miss
    assert kept.sum() >= 250, f"only {kept.sum()} intervals qualified"
    coverage = float((np.abs(z[kept]) <= Z_95).mean())
    scale = float(np.median(np.abs(z[kept])) / MEDIAN_ABS_NORMAL)
    print(f"{name}: coverage {coverage:.3f} over {kept.sum()} intervals, scale {scale:.2f}")
    assert COVERAGE_BAND[0] <= coverage <= COVERAGE_BAND[1], coverage
    assert SCALE_BAND[0] <= scale <= SCALE_BAND[1], scale
