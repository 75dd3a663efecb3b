"""RestockEnv against known results of inventory theory.

1. The single-period newsvendor. With one selling day, no holding or lost-sale cost and
   no salvage, the expected profit of ordering q is price * E[min(q, D)] - unit_cost * q,
   and the order maximising it is the smallest q with P(D <= q) >= (price - unit_cost) /
   price, the critical fractile (Arrow, Harris and Marschak, "Optimal inventory policy",
   Econometrica 19(3), 1951; restated in any operations management text). The optimum
   computed from ``tabular_model()`` must equal ``scipy.stats.poisson.ppf`` at that
   fractile. Two parameter sets with different answers guard against a hard-coded value,
   and each is chosen so the fractile sits well away from a tie between two orders.

2. A structural property of the multi-day season: the optimal order does not increase
   when there is more stock on hand. This is common practice knowledge about such
   inventory problems (base-stock-like behaviour), not a result taken from a source; for
   a perishable product with FIFO sales it is not guaranteed in general, so the test
   checks it for the shipped defaults and one other cost setting, one unit of one age
   at a time, where backward induction shows it holds.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from qtally.envs.restock import RestockEnv, make_newsvendor_kwargs


@pytest.mark.parametrize(
    "price, unit_cost, mean_demand, expected_order",
    [
        (5.0, 2.0, 4.0, 4),  # fractile 0.6:  P(D<=3)=0.433, P(D<=4)=0.629
        (12.0, 3.0, 8.0, 10),  # fractile 0.75: P(D<=9)=0.717, P(D<=10)=0.816
    ],
)
def test_one_day_season_orders_the_critical_fractile(price, unit_cost, mean_demand, expected_order):
    kwargs = make_newsvendor_kwargs(mean_demand=mean_demand, price=price, unit_cost=unit_cost)
    env = RestockEnv(**kwargs)
    # max_order and max_demand must not bind: the censoring mass at max_demand is negligible
    # and the answer lies well inside the action range.
    assert stats.poisson.sf(env.max_demand - 1, mean_demand) < 1e-8
    assert env.max_order > expected_order + 3
    model = env.tabular_model()
    start = int(np.argmax(model.start_distribution))
    profits = model.rewards[start]
    best = int(np.argmax(profits))

    fractile = (price - unit_cost) / price
    quantile = int(stats.poisson.ppf(fractile, mean_demand))
    # The parameters are far from a tie: the cdf steps across the fractile by a clear margin.
    assert stats.poisson.cdf(quantile, mean_demand) - fractile > 0.02
    assert fractile - stats.poisson.cdf(quantile - 1, mean_demand) > 0.02
    assert best == quantile == expected_order
    # The profit is concave in q with a unique maximiser.
    assert np.all(np.diff(profits, 2) <= 1e-12)
    assert np.sum(profits >= profits[best] - 1e-9) == 1


def _backward_induction(model, horizon: int) -> np.ndarray:
    """Optimal Q of a finite-horizon model whose states carry the day: ``horizon`` sweeps are exact."""
    n_states, n_actions = model.n_states, model.n_actions
    values = np.zeros(n_states)
    for _ in range(horizon):
        q = model.rewards + (model.transitions @ values).reshape(n_states, n_actions)
        values = np.where(model.terminal, 0.0, q.max(axis=1))
    return q


@pytest.mark.parametrize("kwargs", [{}, {"shelf_life": 2, "holding_cost": 0.8, "spoilage_cost": 2.0}])
def test_optimal_order_does_not_increase_with_stock(kwargs):
    env = RestockEnv(**kwargs)
    model = env.tabular_model()
    q = _backward_induction(model, env.horizon)
    # The smallest of the optimal orders, so that ties cannot fake a violation.
    best = np.argmax(q >= q.max(axis=1, keepdims=True) - 1e-9, axis=1)
    orders = best.reshape(tuple(int(v) for v in env.nvec))[: env.horizon]
    for age_axis in range(1, orders.ndim):
        steps = np.diff(orders, axis=age_axis)
        assert np.all(steps <= 0), f"optimal order rises with stock of age {age_axis}"
    # Not trivially constant: empty shelves order more than full ones on every day.
    empty = orders[(slice(None),) + (0,) * (orders.ndim - 1)]
    full = orders[(slice(None),) + (-1,) * (orders.ndim - 1)]
    assert np.all(empty >= full) and np.any(empty > full)
