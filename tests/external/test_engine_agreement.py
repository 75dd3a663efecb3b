"""Over seeds, the compiled engine learns Blackjack as the real environment teaches it.

Blackjack cannot agree draw for draw (the environment deals cards with its own calls), so
the compiled engine plays qtally's Blackjack table (qtally.envs.blackjack_model, checked
against the game and against Sutton & Barto 2018, Figure 5.2) and the gym path plays
Gymnasium's ``Blackjack-v1`` with ``sab=True``. On a fixed set of seeds the two must not be
told apart by Welch's two-sample t-test at the 1% level (scipy.stats.ttest_ind), neither in
the learning curve (the mean training return over the run) nor in the final exact
optimality gap. The test can fail: the same comparison rejects a compiled run whose
exploration is 0.3 instead of 0.1.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from qtally.control.schedules import Constant
from qtally.control.variants import make_variant
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.envs.model_extraction import model_of
from qtally.evaluate.exact import optimality_gap, value_iteration
from qtally.trainer import Trainer, TrainingSettings

BLACKJACK = EnvironmentSpec(id="Blackjack-v1", kwargs={"sab": True})
SEEDS = range(10)
EPISODES = 15_000


def _runs(engine: str, epsilon: float) -> tuple[np.ndarray, np.ndarray]:
    environment = make_environment(BLACKJACK)
    model = model_of(environment.env)
    solution = value_iteration(model, 1.0)
    curve, gap = [], []
    for seed in SEEDS:
        settings = TrainingSettings(episodes=EPISODES, seed=seed, log_every=1000, eval_every=0, eval_episodes=2, engine=engine)
        trainer = Trainer(environment, make_variant("on_policy", 1.0, True, None), Constant(epsilon), settings)
        outcome = trainer.run()
        curve.append(np.mean([value for _, value in outcome.history["return_mean"]]))
        gap.append(optimality_gap(model, outcome.values.q, 1.0, solution.v_star).gap)
    return np.array(curve), np.array(gap)


@pytest.fixture(scope="module")
def gym_runs():
    return _runs("gym", 0.1)


def test_compiled_and_gym_paths_are_statistically_indistinguishable(gym_runs):
    compiled = _runs("compiled", 0.1)
    for name, a, b in zip(("mean training return", "final optimality gap"), gym_runs, compiled):
        p = stats.ttest_ind(a, b, equal_var=False).pvalue
        assert p > 0.01, f"{name}: gym {a.mean():.4f} vs compiled {b.mean():.4f}, p={p:.3g}"


def test_the_comparison_has_the_power_to_reject(gym_runs):
    curve, _ = _runs("compiled", 0.3)
    assert stats.ttest_ind(gym_runs[0], curve, equal_var=False).pvalue < 0.01
