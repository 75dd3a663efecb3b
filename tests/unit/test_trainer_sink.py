"""What the trainer writes to its sink, without any tracking store: windows, evaluations, snapshots."""

import pytest

from qtally.control.schedules import LinearDecay
from qtally.control.variants import make_variant
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.tracking.sink import MemoryRecorder
from qtally.trainer import AUTO_LOG_WINDOWS, TrainingSettings, logging_window, train


@pytest.mark.parametrize(("episodes", "window"), [(1, 100), (5000, 100), (50_000, 100), (50_001, 200), (100_000, 200), (100_001, 500),
                                                   (250_000, 500), (375_000, 1000), (2_000_000, 5000), (3_000_000, 10000), (10_000_001, 50000)])
def test_an_automatic_window_keeps_a_run_to_five_hundred_windows_of_round_size(episodes, window):
    # Breakage caught: a window below 100 on short runs, more than 500 windows on a long
    # one, a window larger than needed (skipping a step of 1, 2, 5 times ten), ceil as floor.
    assert logging_window("auto", episodes) == window and episodes / window <= AUTO_LOG_WINDOWS


def test_a_window_given_as_a_number_is_kept_whatever_the_run_length():
    assert logging_window(7, 10_000_000) == 7 and logging_window(100, 1) == 100


def test_windows_evaluations_and_snapshots_reach_the_sink():
    environment = make_environment(EnvironmentSpec(id="support.corridor:Corridor", max_episode_steps=20))
    recorder = MemoryRecorder()
    settings = TrainingSettings(episodes=1000, seed=2, log_every=100, eval_every=500, eval_episodes=20, snapshot_every=250)
    outcome = train(environment, make_variant("on_policy", 1.0, True, None), LinearDecay(1.0, 0.0, 1000), settings, recorder=recorder)
    assert [step for step, _ in recorder.series("return_mean")] == list(range(100, 1001, 100))
    assert [step for step, _ in recorder.series("eval_return_mean")] == [500, 1000]
    assert recorder.files == [("policy-000000250.npz", "snapshots"), ("policy-000000500.npz", "snapshots"), ("policy-000000750.npz", "snapshots")]
    # The recorded epsilon follows the linear schedule: the window mean of episodes 1..100
    # is 1 - (mean of 0..99)/1000 = 0.9505 (every step of an episode uses that episode's epsilon).
    assert recorder.series("epsilon")[0][1] == pytest.approx(0.9505, abs=1e-9)
    assert recorder.series("coverage_sa")[-1][1] == pytest.approx(outcome.values.coverage())
    assert outcome.history["eval_return_mean"] == recorder.series("eval_return_mean")


def test_windows_closed_column_by_column_give_the_floats_of_one_window_at_a_time():
    # The compiled engine logs its closed windows as columns (window_metric_columns); the
    # gym path one LogWindow at a time, through LogWindow.sums (the formulas themselves are
    # held by test_the_window_sums_and_averages_what_it_was_given). Breakage caught: sums()
    # listing the fields in another order than the kernel's rows, an empty window (0
    # episodes, 0 steps) dividing by zero, or the columns' names in another order.
    import numpy as np

    from qtally.control.trainer_state import LogWindow, window_metric_columns

    rng = np.random.default_rng(4)
    windows = [LogWindow(0, 0.0, 0, 0.0, 0, 0, 0)]
    for _ in range(50):
        episodes = int(rng.integers(1, 300))
        length = int(rng.integers(0, 5000))
        windows.append(LogWindow(episodes, float(rng.normal(0, 50)), length, float(rng.uniform(0, episodes)), int(rng.integers(0, episodes + 1)),
                                 int(rng.integers(0, episodes + 1)), int(rng.integers(0, length + 1))))
    sums = np.array([[w.episodes, w.return_sum, w.length_sum, w.epsilon_sum, w.truncated, w.capped, w.steps_used] for w in windows], dtype=np.float64)
    columns = window_metric_columns(sums)
    expected = [w.metrics() for w in windows]
    assert list(columns) == list(expected[0])
    assert [dict(zip(columns, row)) for row in zip(*columns.values())] == expected


def test_the_compiled_engine_sends_the_sink_what_the_gym_path_sends():
    # Same seed, same model: the compiled engine closes its windows in the kernel and logs
    # them column by column. Breakage caught: a window logged at the wrong episode, dropped,
    # sent twice, or its metrics keyed differently from the gym path's.
    pytest.importorskip("numba")
    from qtally.control.schedules import Constant

    def run(engine):
        recorder = MemoryRecorder()
        environment = make_environment(EnvironmentSpec(id="FrozenLake-v1", kwargs={"map_name": "8x8"}))
        settings = TrainingSettings(episodes=2500, seed=3, log_every=100, eval_every=1000, eval_episodes=5, engine=engine)
        train(environment, make_variant("on_policy", 0.95, True, None), Constant(0.2), settings, recorder=recorder)
        return recorder.metrics

    gym, compiled = run("gym"), run("compiled")
    assert [step for step, _ in compiled] == [step for step, _ in gym]
    assert compiled == gym
