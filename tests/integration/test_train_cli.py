"""`qtally-train` end to end through the command line, then the run read back with the MLflow client."""

import math
import re

import numpy as np
import pandas as pd
import pytest
from mlflow.tracking import MlflowClient
from scipy import stats

import mlflow


def _only_run(tmp_path):
    client = MlflowClient(tracking_uri=f"sqlite:///{tmp_path / 'mlflow.db'}")
    experiment = client.get_experiment_by_name("qtally")
    runs = client.search_runs([experiment.experiment_id])
    assert len(runs) == 1
    return client, runs[0]


def _artifact_paths(client, run_id, path=None):
    found = []
    for item in client.list_artifacts(run_id, path):
        found.extend(_artifact_paths(client, run_id, item.path) if item.is_dir else [item.path])
    return found


def test_frozen_lake_run_is_recorded_completely(run_cli, tmp_path):
    result = run_cli("qtally-train", "env=frozen_lake_4x4", "variant=on_policy", "episodes=600", "eval_every=300", "eval_episodes=50", "snapshot_every=300", "log_every=50", "seed=5",
                     "tracking.sqlite_rows=false", check=True)
    client, run = _only_run(tmp_path)
    run_id = run.info.run_id
    assert run_id in result.stdout and "mlflow ui --backend-store-uri sqlite:///mlflow.db" in result.stdout
    assert run.info.status == "FINISHED"
    # engine=auto took the compiled engine (FrozenLake lists its outcomes) and said so.
    assert "engine:       compiled (FrozenLake-v1 lists its outcomes (16 states), compiled in" in result.stdout
    assert run.data.tags["qtally.engine"].startswith("compiled: ") and client.get_metric_history(run_id, "engine_compile_seconds")
    # Two evaluations of 50 episodes: the first plays all of them, the second those the policy change reached (plus 4 as a check).
    note = run.data.tags["qtally.evaluation"]
    played = re.fullmatch(r"episodes played again only where the greedy action changed: (\d+) of 100 \(\d+%\)", note)
    assert played and 50 < int(played.group(1)) <= 100 and note in result.stdout, note
    assert run.data.tags["qtally.log_every"] == "50"  # as given; the default, auto, is tagged "100 (auto)" on such a run
    assert run.data.tags["qtally.metric_writer"] == "log_batch"  # asked for: MLflow's own call, whatever the store
    # Params: the flattened resolved config.
    assert run.data.params["episodes"] == "600" and run.data.params["env.id"] == "FrozenLake-v1"
    assert run.data.params["env.kwargs.map_name"] == "4x4" and run.data.params["schedule.kind"] == "glie_episode"
    # Tags.
    assert {k: run.data.tags[k] for k in ("env", "variant", "schedule", "seed")} == {"env": "FrozenLake-v1", "variant": "on_policy", "schedule": "glie_episode", "seed": "5"}
    # Metrics, with the episode number as step.
    steps = [m.step for m in client.get_metric_history(run_id, "return_mean")]
    assert steps == list(range(50, 601, 50))
    evaluations = client.get_metric_history(run_id, "eval_return_mean")
    assert [m.step for m in evaluations] == [300, 600]
    # 50 rollouts of 0/1 returns: each mean is k/50 and its interval is Student-t's for that k,
    # so an evaluation of the wrong size or with the wrong interval shows here.
    intervals = sorted(client.get_metric_history(run_id, "eval_return_ci95"), key=lambda m: m.step)
    for mean, interval in zip(sorted(evaluations, key=lambda m: m.step), intervals):
        k = round(mean.value * 50)
        assert mean.value == pytest.approx(k / 50, abs=1e-12)
        assert interval.value == pytest.approx(stats.t.ppf(0.975, 49) * math.sqrt(k * (50 - k) / (50 * 49)) / math.sqrt(50), rel=1e-9, abs=1e-12)
    for name in ("eval_return_ci95", "coverage_sa", "epsilon", "optimality_gap", "optimal_action_fraction"):
        assert client.get_metric_history(run_id, name), name
    # Artifacts.
    paths = set(_artifact_paths(client, run_id))
    for expected in ("config/resolved_config.yaml", "policy_file/policy.npz", "tables/q_table.csv", "plots/learning_curve.png", "plots/learned_policy_map.png", "plots/optimal_policy_map.png", "snapshots/policy-000000300.npz"):
        assert expected in paths, (expected, sorted(paths))
    # Nothing in the store needs unpickling.
    assert not list(tmp_path.rglob("*.pkl")) and not list(tmp_path.rglob("*.pickle"))
    # The pyfunc model predicts the saved greedy actions for numpy, list and DataFrame input
    # on every state training reached (holes and the goal never are: the fallback answers there).
    from qtally.policy.artifact import load_policy

    local = mlflow.artifacts.download_artifacts(run_id=run_id, artifact_path="policy_file/policy.npz", tracking_uri=f"sqlite:///{tmp_path / 'mlflow.db'}", dst_path=str(tmp_path / "dl"))
    saved = load_policy(local)
    actions, visited = saved.actions, saved.visited
    assert not visited[[5, 7, 11, 12, 15]].any() and visited[0]
    mlflow.set_tracking_uri(f"sqlite:///{tmp_path / 'mlflow.db'}")
    model = mlflow.pyfunc.load_model(f"runs:/{run_id}/policy")
    states = np.arange(16).reshape(-1, 1)
    for answer in (model.predict(states), model.predict(states.tolist()), model.predict(pd.DataFrame({"state": np.arange(16)}))):
        np.testing.assert_array_equal(answer[visited], actions[visited])
        assert set(answer[~visited].tolist()) <= {0, 1, 2, 3}


def test_blackjack_model_takes_observation_parts_as_columns(run_cli, tmp_path):
    run_cli("qtally-train", "env=blackjack", "variant=exploring_starts", "episodes=3000", "eval_episodes=20", "gamma=1.0", check=True)
    client, run = _only_run(tmp_path)
    assert run.data.tags["qtally.log_every"] == "100 (auto)" and len(client.get_metric_history(run.info.run_id, "return_mean")) == 30
    assert run.data.tags["qtally.metric_writer"] == "sqlite rows"  # the curves above went into the SQLite store directly
    assert run.data.metrics["return_mean"] == client.get_metric_history(run.info.run_id, "return_mean")[-1].value  # the latest value moved along
    mlflow.set_tracking_uri(f"sqlite:///{tmp_path / 'mlflow.db'}")
    info = mlflow.models.get_model_info(f"runs:/{run.info.run_id}/policy")
    assert info.metadata["observation_columns"] == ["player_sum", "dealer_card", "usable_ace"]
    model = mlflow.pyfunc.load_model(f"runs:/{run.info.run_id}/policy")
    frame = pd.DataFrame({"player_sum": [21, 20, 5], "dealer_card": [10, 1, 7], "usable_ace": [0, 1, 0]})
    actions = model.predict(frame)
    # The model answers with the saved policy's actions for those observations.
    from qtally.policy.artifact import load_policy

    local = mlflow.artifacts.download_artifacts(run_id=run.info.run_id, artifact_path="policy_file/policy.npz", dst_path=str(tmp_path / "dl"))
    saved = load_policy(local)
    encoder = saved.encoder()
    index = [encoder.encode(tuple(int(v) for v in row)) for row in frame.to_numpy()]
    assert saved.visited[index[:2]].all()  # 21 and 20 are reached in 3000 exploring starts; the fallback may answer for 5
    np.testing.assert_array_equal(actions[:2], saved.actions[index[:2]])
    np.testing.assert_array_equal(model.predict(frame.to_numpy().tolist())[:2], actions[:2])
    with pytest.raises(Exception, match="3 column"):
        model.predict(np.array([[1, 2]]))


def test_a_run_that_fails_keeps_the_metrics_it_measured(run_cli, tmp_path):
    # The corridor raises on its 2,001st step, some 100 episodes in: the windows of 10 episodes
    # closed before that were queued, not yet sent (a queue goes when full), and must still land.
    corridor = ["env=cliff_walking", "env.id=support.breaking:BreakingCorridor", "env.max_episode_steps=20", "env.eval_episodes=5", "engine=gym",
                "episodes=5000", "log_every=10", "rollout_animation=false", "tracking.log_model=false", "+env.kwargs.break_after_steps=2000"]
    result = run_cli(*["qtally-train", *corridor])
    assert result.returncode != 0 and "simulator broke after 2000 steps" in result.stderr and "Traceback" not in result.stderr
    client, run = _only_run(tmp_path)
    assert run.info.status == "FAILED"
    steps = [m.step for m in client.get_metric_history(run.info.run_id, "return_mean")]
    assert steps and steps == list(range(10, steps[-1] + 1, 10)), steps
