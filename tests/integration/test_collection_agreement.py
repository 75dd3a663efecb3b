"""Over seeds, two collection workers learn the restocking simulator as the sequential trainer does.

Batches of 16 episodes played by two workers on one snapshot of the policy are another
random run than one episode at a time, so the tables differ; what must not differ is how
well the run learns. On a fixed set of seeds, Welch's two-sample t-test
(scipy.stats.ttest_ind) must not tell the final exact optimality gaps apart at the 1%
level. The test can fail: the same comparison rejects sequential runs that explore at
epsilon 0.02 instead of 0.1 (measured p about 1e-4). Its power has limits: runs of half the
episodes gave p = 0.10, so it would not catch a collector that learned from only one
worker's episodes; the exactness of collection is carried by tests/unit/test_collection.py
(one worker is the sequential trainer bit for bit; two workers reproduce themselves).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from qtally.control.schedules import Constant
from qtally.control.variants import make_variant
from qtally.engine.collection import CollectSettings
from qtally.envs.factory import make_environment
from qtally.envs.model_extraction import model_of
from qtally.evaluate.exact import optimality_gap, value_iteration
from qtally.experiment import bundled_environment_spec
from qtally.trainer import Trainer, TrainingSettings

SEEDS = range(8)
EPISODES = 4000
GAMMA = 0.95


@pytest.fixture(scope="module")
def restock():
    spec, _ = bundled_environment_spec("restock")
    environment = make_environment(spec)
    model = model_of(environment.env)
    return environment, model, value_iteration(model, GAMMA).v_star


def _gaps(restock, epsilon: float, collect: CollectSettings) -> np.ndarray:
    environment, model, v_star = restock
    gaps = []
    for seed in SEEDS:
        settings = TrainingSettings(episodes=EPISODES, seed=seed, log_every=1000, eval_every=0, eval_episodes=2, engine="gym", collect=collect)
        outcome = Trainer(environment, make_variant("on_policy", GAMMA, True, None), Constant(epsilon), settings).run()
        gaps.append(optimality_gap(model, outcome.values.q, GAMMA, v_star).gap)
    return np.array(gaps)


@pytest.fixture(scope="module")
def sequential(restock):
    return _gaps(restock, 0.1, CollectSettings())


def test_two_workers_learn_as_well_as_one_process(restock, sequential):
    parallel = _gaps(restock, 0.1, CollectSettings(workers=2, batch=16))
    p = stats.ttest_ind(sequential, parallel, equal_var=False).pvalue
    assert p > 0.01, f"final gap: sequential {sequential.mean():.3f} vs two workers {parallel.mean():.3f}, p={p:.3g}"


def test_the_comparison_has_the_power_to_reject(restock, sequential):
    less_exploration = _gaps(restock, 0.02, CollectSettings())
    assert stats.ttest_ind(sequential, less_exploration, equal_var=False).pvalue < 0.01
