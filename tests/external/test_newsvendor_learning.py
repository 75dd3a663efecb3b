"""Each Monte Carlo control variant, trained on a one-day season, orders the critical fractile.

Source: the single-period newsvendor. With one selling day, no holding or lost-sale cost
and no salvage, the expected profit of ordering q is ``price * E[min(q, D)] - unit_cost * q``
and the best order is the smallest q with ``P(D <= q) >= (price - unit_cost) / price``
(Arrow, Harris and Marschak, "Optimal inventory policy", Econometrica 19(3), 1951;
restated in any operations management text). Here the answer comes from
``scipy.stats.poisson.ppf`` at that fractile, independently of qtally's model code, and
the greedy order learned from episodes of ``qtally/Restock-v0`` must equal it.

Why these numbers. Price 10 and unit cost 4.6 (invented) give the fractile 0.54. Demand
is Poisson with mean 1 or 2 (invented), so the answer is order 1 (P(D<=0)=0.37,
P(D<=1)=0.74) or order 2 (P(D<=1)=0.41, P(D<=2)=0.68): the fractile sits near the middle
of a step of the demand cdf, so the best order beats both neighbours by 1.3 to 2.0 in
expected profit (the gap between q and q+1 is price * (fractile - P(D <= q))). Small
demand means keep the profit noise small (its standard deviation is about 5 to 11 a day).
With the stated episode counts each neighbour gets at least about 660 (mean 1) or
1670 (mean 2) returns, so the learned difference to the best order is at least 4.8
standard errors from zero in every case; with the fixed seeds the outcome is
deterministic, and another seed would pass as well except with probability below 1e-5.
Two demand means with different answers guard against a hard-coded order.

What a broken implementation would do here. Every episode is one step, so each Q entry
should be the plain average of the profits seen after that order.
- Returns not averaged (last return kept, a constant step of 1, W instead of W/C, or a
  running sum instead of a mean): the greedy order follows the noise of the last
  samples, or the most-visited order, and is one of the neighbours in a large share of
  runs; across the six cases such a bug practically cannot pass. (Checked once by hand:
  with ``step_size=1.0``, which keeps only the last return, 17 of the 18 cases for seeds
  1-3 pick the wrong order; with the sample average all 18 pass.)
- Greedy ties or argmax broken (argmin, highest index, or the behaviour action instead of
  the greedy one): the table starts at 0, so a bad tie rule locks on order 0 or the
  largest order, and a flipped argmax returns the worst order.
- Off-policy stopping its backward loop before updating, or updating only where the
  behaviour action was greedy: orders explored by epsilon are never averaged and the
  greedy order stays where the zero initial table put it.
A wrong importance weight can only show in episodes longer than one step (here the only
step has weight 1), so multi-step weighting is not what this test checks. Off-policy
learns only from the tail of an episode where the behaviour followed the greedy target;
with one step that tail is the whole episode, so it learns from every episode.

Runtime: 4000 + 8000 + 8000 + 12000 + 20000 + 20000 = 72000 one-step episodes, about 7 s.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from qtally.control.schedules import Constant
from qtally.control.variants import make_variant
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.envs.restock import RESTOCK_ID, make_newsvendor_kwargs
from qtally.trainer import TrainingSettings, train

PRICE = 10.0  # invented
UNIT_COST = 4.6  # invented
MAX_ORDER = 5  # actions 0..5: the answer (1 or 2) and both neighbours lie well inside
EPSILON = 0.5  # on/off-policy behaviour: half the episodes spread over all six orders
SEED = 20240601

# (demand mean, variant, episodes). Exploring starts pick the order uniformly, so it
# needs fewer episodes than the epsilon-greedy variants, whose neighbours get eps/6 each.
CASES = [
    (1.0, "exploring_starts", 4000),
    (1.0, "on_policy", 8000),
    (1.0, "off_policy", 8000),
    (2.0, "exploring_starts", 12000),
    (2.0, "on_policy", 20000),
    (2.0, "off_policy", 20000),
]


def critical_fractile_order(mean_demand: float) -> int:
    fractile = (PRICE - UNIT_COST) / PRICE
    return int(stats.poisson.ppf(fractile, mean_demand))


@pytest.mark.slow
@pytest.mark.parametrize("mean_demand, variant_name, episodes", CASES)
def test_learned_order_is_the_critical_fractile(mean_demand, variant_name, episodes):
    kwargs = make_newsvendor_kwargs(mean_demand=mean_demand, price=PRICE, unit_cost=UNIT_COST, max_order=MAX_ORDER)
    environment = make_environment(EnvironmentSpec(RESTOCK_ID, kwargs))
    try:
        fractile = (PRICE - UNIT_COST) / PRICE
        expected = critical_fractile_order(mean_demand)
        # The parameters sit far from a tie: the cdf crosses the fractile by a clear step.
        assert stats.poisson.cdf(expected, mean_demand) - fractile > 0.1
        assert fractile - stats.poisson.cdf(expected - 1, mean_demand) > 0.1
        assert 0 < expected < MAX_ORDER

        variant = make_variant(variant_name, gamma=1.0, first_visit=variant_name != "off_policy", step_size=None)
        settings = TrainingSettings(episodes=episodes, seed=SEED, log_every=1000, eval_every=0, eval_episodes=10)
        outcome = train(environment, variant, Constant(EPSILON), settings)

        start = environment.encoder.encode(environment.env.reset(seed=0)[0])
        q = outcome.values.q[start]
        visits = outcome.values.visits[start]
        # Every order was tried often enough for the stated separation.
        assert visits.min() >= 500, visits  # expected 667 (mean 1) or 1667 (mean 2) per non-greedy order
        assert int(outcome.artifact.actions[start]) == expected, (q.round(2), visits)

        # The learned value of the best order matches its exact expected profit within
        # 0.5 (its standard error is at most 0.16 with these counts).
        demand = np.arange(200)
        profit = PRICE * np.sum(stats.poisson.pmf(demand, mean_demand) * np.minimum(expected, demand)) - UNIT_COST * expected
        assert abs(q[expected] - profit) < 0.5, (q[expected], profit)
    finally:
        environment.close()
