"""What the trainer writes to its sink, without any tracking store: windows, evaluations, snapshots."""

import pytest

from qtally.control.schedules import LinearDecay
from qtally.control.variants import make_variant
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.tracking.sink import MemoryRecorder
from qtally.trainer import TrainingSettings, train


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
