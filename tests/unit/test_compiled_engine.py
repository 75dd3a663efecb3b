"""The compiled engine plays the gym path's episodes and ends with its Q table, bit for bit.

Both engines read the same streams (qtally.envs.outcomes, qtally.control.streams), and
FrozenLake, CliffWalking and the restocking simulator follow the draw protocol, so on the
*real* environments the two must agree exactly. Which bug each test catches: any change
of arithmetic or order in the kernel (a schedule computed differently, a tie broken the
other way, a tail value, a first-visit rule, the weighted-IS cut), a stream read once too
often or too rarely (every later episode differs), a time limit or step cap counted
differently, and a checkpoint that does not carry the environment's stream across engines.
"""

from __future__ import annotations

import numpy as np
import pytest

from qtally.control.schedules import Constant, ExponentialDecay, GlieEpisodes, GlieVisits, LinearDecay
from qtally.control.trainer_state import TrainerState
from qtally.control.variants import make_variant
from qtally.engine.compiled import EngineUnavailable
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.trainer import Trainer, TrainingSettings

FROZEN_8X8 = EnvironmentSpec(id="FrozenLake-v1", kwargs={"map_name": "8x8"})
RESTOCK = EnvironmentSpec(id="qtally/Restock-v0")
CLIFF = EnvironmentSpec(id="CliffWalking-v1", max_episode_steps=60)


def _train(spec, variant, first_visit, schedule, engine, *, episodes=1500, truncation="as_terminal", step_cap=None, gamma=0.95, step_size=None, pause_at=None, state=None):
    environment = make_environment(spec)
    settings = TrainingSettings(episodes=episodes, seed=5, log_every=100, eval_every=0, eval_episodes=3, truncation=truncation, step_cap=step_cap, engine=engine)
    trainer = Trainer(environment, make_variant(variant, gamma, first_visit, step_size), schedule, settings, state=state)
    assert trainer.engine == engine
    # The gym side learns through the variants' Python loops only, so every update here is
    # checked against the kernel's (test_compiled_update.py covers the gym path's mix).
    trainer.long_episode_update = None
    outcome = trainer.run(pause_at=pause_at)
    return trainer, outcome


def _assert_same(gym, compiled):
    (_, a), (_, b) = gym, compiled
    for name in ("q", "visits", "cumulative_weights", "state_visits"):
        np.testing.assert_array_equal(getattr(a.values, name), getattr(b.values, name), err_msg=name)
    assert a.history == b.history
    assert a.capped_episodes == b.capped_episodes


@pytest.mark.parametrize("first_visit", [True, False], ids=["first_visit", "every_visit"])
@pytest.mark.parametrize("variant", ["exploring_starts", "on_policy", "off_policy"])
def test_engines_agree_on_frozen_lake_8x8(variant, first_visit):
    schedule = ExponentialDecay(1.0, 0.998, 0.05)
    _assert_same(
        _train(FROZEN_8X8, variant, first_visit, schedule, "gym", truncation="bootstrap"),
        _train(FROZEN_8X8, variant, first_visit, schedule, "compiled", truncation="bootstrap"),
    )


@pytest.mark.parametrize(
    "schedule",
    [Constant(0.2), LinearDecay(1.0, 0.05, 300), GlieEpisodes(5.0, 0.01), GlieVisits(2.0, 0.02)],
    ids=["constant", "linear", "glie_episode", "glie_visits"],
)
@pytest.mark.parametrize("variant", ["on_policy", "off_policy"])
def test_engines_agree_on_the_restocking_simulator_for_every_schedule(variant, schedule):
    _assert_same(
        _train(RESTOCK, variant, variant == "on_policy", schedule, "gym", episodes=300, gamma=1.0),
        _train(RESTOCK, variant, variant == "on_policy", schedule, "compiled", episodes=300, gamma=1.0),
    )


@pytest.mark.parametrize("truncation", ["as_terminal", "bootstrap", "discard"])
@pytest.mark.parametrize("variant", ["on_policy", "off_policy"])
def test_engines_agree_where_time_limits_and_the_step_cap_cut_episodes(variant, truncation):
    # CliffWalking under a 60-step limit and a 40-step cap: most early episodes are cut,
    # some by the cap (which comes first), and with a constant step size.
    runs = [
        _train(CLIFF, variant, False, Constant(0.3), engine, episodes=400, truncation=truncation, step_cap=40, step_size=0.1)
        for engine in ("gym", "compiled")
    ]
    assert runs[0][1].capped_episodes > 50
    _assert_same(*runs)


def test_engines_agree_on_an_on_policy_bootstrap_with_ten_actions():
    # Ten actions: numpy's mean of a row would sum pairwise from eight on; both engines must add left to right.
    wide = EnvironmentSpec(id="qtally/Restock-v0", kwargs={"max_order": 9, "shelf_life": 1}, max_episode_steps=6)  # 15 states: rows fill fast
    _assert_same(*(_train(wide, "on_policy", True, GlieEpisodes(20.0, 0.3), engine, episodes=1500, truncation="bootstrap", gamma=1.0) for engine in ("gym", "compiled")))


@pytest.mark.parametrize("variant", ["exploring_starts", "off_policy"])
def test_engines_agree_on_taxi(variant):
    taxi = EnvironmentSpec(id="Taxi-v4", max_episode_steps=100)
    _assert_same(*(_train(taxi, variant, True, Constant(0.2), engine, episodes=150, gamma=1.0) for engine in ("gym", "compiled")))


def test_a_checkpoint_moves_between_engines(tmp_path):
    """Pause compiled, save, resume on the gym path: the same table as one uninterrupted run."""
    schedule = GlieEpisodes(10.0, 0.02)
    whole = _train(FROZEN_8X8, "on_policy", True, schedule, "compiled", episodes=1200)
    trainer, _ = _train(FROZEN_8X8, "on_policy", True, schedule, "compiled", episodes=1200, pause_at=700)
    path = trainer.save_state(tmp_path / "state")
    resumed = _train(FROZEN_8X8, "on_policy", True, schedule, "gym", episodes=1200, state=TrainerState.load(path))
    _assert_same(whole, resumed)


def test_compiled_insists_and_auto_falls_back_with_a_reason():
    binned = EnvironmentSpec(id="CartPole-v1", bins=[3, 3, 6, 3], low=[-2.4, -3.0, -0.21, -3.5], high=[2.4, 3.0, 0.21, 3.5])
    settings = TrainingSettings(episodes=5, engine="compiled")
    with pytest.raises(EngineUnavailable, match="engine=compiled cannot run CartPole-v1: .*use engine=gym"):
        Trainer(make_environment(binned), make_variant("on_policy", 1.0, True, None), Constant(0.1), settings)
    trainer = Trainer(make_environment(binned), make_variant("on_policy", 1.0, True, None), Constant(0.1), TrainingSettings(episodes=5))
    assert trainer.engine == "gym" and "no transition model" not in trainer.engine_reason and trainer.engine_reason
    assert Trainer(make_environment(FROZEN_8X8), make_variant("on_policy", 1.0, True, None), Constant(0.1), TrainingSettings(episodes=5)).engine == "compiled"


def test_the_compiled_engine_draws_each_stream_block_once_not_once_per_call(monkeypatch):
    # Between two logging steps a kernel call uses a few hundred uniforms of a 64k block.
    # Breakage caught: handing the kernel only a fixed-size window, so every call refilled
    # (regenerated) both blocks: 7x slower on Blackjack, and invisible to every equality test.
    from qtally.control.streams import UniformDraws

    refills = []
    original = UniformDraws._restart_here
    monkeypatch.setattr(UniformDraws, "_restart_here", lambda self, size: (refills.append(size), original(self, size))[1])
    _train(FROZEN_8X8, "on_policy", True, Constant(0.2), "compiled", episodes=3000)  # 30 calls of 100 episodes
    assert 0 < len(refills) <= 12, len(refills)  # 3000 episodes of about 30 steps: a few blocks per stream, not 2 per call


def test_the_trainer_calls_the_kernel_once_per_span_not_once_per_logging_window(monkeypatch):
    # 3000 episodes logged every 100, evaluated every 1000: three spans (they end on the
    # evaluations), each closing its windows inside the kernel. Breakage caught: a span
    # per logging window again (30 calls; about 20 microseconds of Python each, a third of
    # a run of short episodes), which every equality test would pass.
    from qtally.engine import compiled

    calls = []
    original = compiled.CompiledEpisodes.learn
    monkeypatch.setattr(compiled.CompiledEpisodes, "learn", lambda self, *a, **k: (calls.append(a[-2]), original(self, *a, **k))[1])
    environment = make_environment(FROZEN_8X8)
    settings = TrainingSettings(episodes=3000, seed=2, log_every=100, eval_every=1000, eval_episodes=2, engine="compiled")
    outcome = Trainer(environment, make_variant("on_policy", 0.95, True, None), Constant(0.2), settings).run()
    assert calls == [1000, 1000, 1000]
    assert [step for step, _ in outcome.history["coverage_sa"]] == list(range(100, 3001, 100))


def test_a_kernel_call_that_plays_nothing_stops_the_run_instead_of_repeating(monkeypatch):
    # Breakage caught: the span loop calling the kernel again and again after a call that
    # played no episode (a kernel given the wrong variant's entry point did that: it waited
    # for start uniforms that were never handed over), so a run hung instead of failing.
    from qtally.engine import kernels

    real, calls = kernels.learn_episodes, []

    def stalled(variant, counts, *rest):
        calls.append(counts[0])
        assert len(calls) < 5, "the kernel was called again after it played nothing"
        if counts[0] == 0:  # the first call of a run, which only loads the compiled code
            return real(variant, counts, *rest)
        return 0, 0, 0, 0

    monkeypatch.setattr(kernels, "learn_episodes", stalled)
    with pytest.raises(RuntimeError, match="played no episode at episode 0"):
        _train(FROZEN_8X8, "on_policy", True, Constant(0.1), "compiled", episodes=50)
    assert calls == [0, 50]
