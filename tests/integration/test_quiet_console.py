"""What reaches the console is qtally's own: no library warnings, INFO lines or download progress bars.

Run quietly (``quiet=true``: no progress bar of qtally's own, the run id alone on standard
output), a training run and a prediction that loads its policy from that run must leave
standard error empty. The conditions that used to leak are forced on purpose:

- a one-episode Blackjack run, whose policy pictures have panels with no estimate at all
  (numpy's "All-NaN slice" RuntimeWarning);
- a fresh matplotlib cache directory (matplotlib logs an INFO line building its font
  cache, and Hydra sends INFO records to the console);
- a fresh store, so MLflow logs at INFO that it creates the experiment;
- ``MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR=true`` in the user's environment, so only
  qtally's own switch keeps MLflow's "Downloading artifacts" bar away when the policy is
  fetched from the run or loaded as a model, and when training logs the policy model.
"""

from __future__ import annotations

import re

import pytest

RUN_ID = re.compile(r"^[0-9a-f]{32}$")


def _assert_quiet(result):
    assert result.returncode == 0, result.stderr[-3000:]
    assert result.stderr.strip() == "", f"the console got more than qtally's own output:\n{result.stderr[-3000:]}"
    lines = result.stdout.strip().splitlines()
    assert len(lines) == 1 and RUN_ID.match(lines[0]), result.stdout[-3000:]
    return lines[0]


@pytest.fixture
def noisy_environment(tmp_path):
    return {"MPLCONFIGDIR": str(tmp_path / "fresh-matplotlib-cache"), "MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR": "true"}


def test_train_then_evaluate_from_the_run_and_the_model_print_nothing_else(run_cli, tmp_path, noisy_environment):
    store = f"tracking.uri=sqlite:///{tmp_path / 'mlflow.db'}"
    trained = run_cli("qtally-train", "env=blackjack", "episodes=1", "seed=0", "eval_episodes=2", "quiet=true", store, env_extra=noisy_environment)
    run_id = _assert_quiet(trained)
    for source in (["policy.source=run", f"policy.run_id={run_id}"], ["policy.source=model", f"policy.uri=runs:/{run_id}/policy"]):
        evaluated = run_cli("qtally-evaluate", "env=blackjack", *source, "episodes=20", "quiet=true", store, env_extra=noisy_environment)
        _assert_quiet(evaluated)
