"""Each bad input: a one-line message naming the problem, a non-zero exit, no traceback, no run left RUNNING."""

import pytest
from mlflow.tracking import MlflowClient

CASES = [
    # (arguments, words the message must contain)
    (["env.id=NoSuchPlace-v9"], ["env.id", "not a registered Gymnasium environment"]),
    (["env.id=no_such_module:Thing"], ["env.id", "cannot import module"]),
    (["env=cartpole_binned", "env.id=MountainCarContinuous-v0"], ["Box action space", "Discrete actions"]),
    (["env=cartpole_binned", "env.bins=null"], ["Box observations need binning", "env.bins"]),
    (["schedule.epsilon=1.5"], ["schedule.epsilon=1.5", "[0, 1]"]),
    (["schedule=linear", "schedule.end=-0.1"], ["schedule.end=-0.1", "[0, 1]"]),
    (["gamma=1.2"], ["gamma=1.2", "[0, 1]"]),
    (["episodes=0"], ["episodes=0", "positive"]),
    (["episodes=-5"], ["episodes=-5", "positive"]),
    (["env=cartpole_binned", "variant=exploring_starts"], ["exploring_starts", "variant=on_policy or variant=off_policy"]),
    (["episodes=many"], ["episodes", "could not be converted"]),
    (["no_such_key=1"], ["no_such_key", "no such config key"]),
]


@pytest.mark.parametrize("arguments, words", CASES, ids=[" ".join(a) for a, _ in CASES])
def test_bad_input_fails_cleanly(run_cli, tmp_path, arguments, words):
    result = run_cli("qtally-train", "episodes=50" if not any(a.startswith("episodes") for a in arguments) else "quiet=false", *arguments)
    assert result.returncode != 0
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("qtally-train: error: ")
    for word in words:
        assert word in lines[0], lines[0]
    assert "Traceback" not in result.stderr + result.stdout
    store = tmp_path / "mlflow.db"
    if store.exists():
        client = MlflowClient(tracking_uri=f"sqlite:///{store}")
        experiments = [e.experiment_id for e in client.search_experiments()]
        assert not [r for r in client.search_runs(experiments) if r.info.status == "RUNNING"]
