"""The logged ``policy`` model stands alone: it loads where qtally cannot be imported, serves over HTTP, refuses edits.

One tiny FrozenLake run (a fixed fallback action, so every answer is predictable) is
trained through ``qtally-train``; the model is then loaded in a process where importing
qtally fails, served with ``mlflow models serve`` on a loopback port, and checked against
the policy file: the greedy action on every state training reached, the fallback on the
others (FrozenLake's holes and goal are never reached: no action is taken there).
"""

import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import numpy as np
import pytest

import mlflow
from qtally.policy.artifact import PolicyFormatError, load_policy

FALLBACK_ACTION = 2
BLOCK_QTALLY = "import sys\nsys.modules['qtally'] = None  # importing qtally now raises ImportError\n"


def _script(name: str) -> str:
    return shutil.which(name) or str(Path(sys.executable).with_name(name))


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """One run in a fresh store; its policy file; an environment in which qtally cannot be imported."""
    where = tmp_path_factory.mktemp("serving")
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    args = ["env=frozen_lake_4x4", "variant=on_policy", "episodes=300", "eval_every=0", "eval_episodes=10", "exact=false", "rollout_animation=false", "seed=2", "policy_fallback.rule=action", f"policy_fallback.action={FALLBACK_ACTION}", "quiet=true"]
    result = subprocess.run([_script("qtally-train"), *args], cwd=where, env=env, capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stderr[-3000:]
    uri = f"sqlite:///{where / 'mlflow.db'}"
    mlflow.set_tracking_uri(uri)  # runs:/ URIs below resolve against this store
    client = mlflow.tracking.MlflowClient(tracking_uri=uri)
    (run,) = client.search_runs([client.get_experiment_by_name("qtally").experiment_id])
    local = mlflow.artifacts.download_artifacts(run_id=run.info.run_id, artifact_path="policy_file/policy.npz", tracking_uri=uri, dst_path=str(where / "file"))
    saved = load_policy(local)
    assert saved.fallback.rule == "action" and saved.fallback.action == FALLBACK_ACTION
    assert not saved.visited[[5, 7, 11, 12, 15]].any() and saved.visited[0]
    blocker = where / "no_qtally"
    blocker.mkdir()
    (blocker / "sitecustomize.py").write_text(BLOCK_QTALLY)
    # The blocker first on the path; the source tree and the tests stay off it.
    clean = {k: v for k, v in env.items() if k not in ("PYTHONPATH", "PYTHONSTARTUP")}
    clean.update({"PYTHONPATH": str(blocker), "MLFLOW_TRACKING_URI": uri, "MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR": "false"})
    return {"where": where, "uri": uri, "run_id": run.info.run_id, "saved": saved, "env": clean}


def _expected(saved) -> np.ndarray:
    return np.where(saved.visited, saved.actions, FALLBACK_ACTION)


def test_the_model_lists_no_qtally_requirement(trained):
    # Breakage caught: the model pinning qtally (no package index has it), so serving fails to set up.
    model_dir = Path(mlflow.artifacts.download_artifacts(f"runs:/{trained['run_id']}/policy", dst_path=str(trained["where"] / "model")))
    requirements = (model_dir / "requirements.txt").read_text().lower()
    assert "qtally" not in requirements and "numpy" in requirements and "mlflow" in requirements
    assert (model_dir / "code" / "qtally_served_policy.py").exists()
    assert not list(model_dir.rglob("*.pkl"))


def test_model_loads_where_qtally_cannot_be_imported(trained):
    # Breakage caught: the model code importing qtally (directly or through the reader).
    code = BLOCK_QTALLY + (
        "import json, mlflow, numpy as np\n"
        "try:\n    import qtally\n    raise SystemExit('qtally was importable')\nexcept ImportError:\n    pass\n"
        f"model = mlflow.pyfunc.load_model('runs:/{trained['run_id']}/policy')\n"
        "print(json.dumps(model.predict(np.arange(16).reshape(-1, 1)).tolist()))\n"
    )
    result = subprocess.run([sys.executable, "-c", code], cwd=trained["where"], env=trained["env"], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr[-3000:]
    answers = json.loads(result.stdout.strip().splitlines()[-1])
    np.testing.assert_array_equal(answers, _expected(trained["saved"]))


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _post(port: int, body: dict):
    request = urllib.request.Request(f"http://127.0.0.1:{port}/invocations", data=json.dumps(body).encode(), headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(request, timeout=30) as response:
        return json.loads(response.read())


def test_mlflow_serves_the_policy_on_loopback(trained):
    # Breakage caught: the server unable to load the model without qtally, either request
    # shape answered wrongly, or the fallback not applied over HTTP.
    port = _free_port()
    command = [_script("mlflow"), "models", "serve", "-m", f"runs:/{trained['run_id']}/policy", "--host", "127.0.0.1", "--port", str(port), "--env-manager", "local"]
    log = (trained["where"] / "serve.log").open("w")
    server = subprocess.Popen(command, cwd=trained["where"], env=trained["env"], stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    try:
        deadline = time.monotonic() + 90  # a bound on waiting, not an assertion about speed
        while True:
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/ping", timeout=2):
                    break
            except (urllib.error.URLError, ConnectionError, OSError):
                if server.poll() is not None or time.monotonic() > deadline:
                    pytest.fail(f"the model server did not come up: {(trained['where'] / 'serve.log').read_text()[-3000:]}")
                time.sleep(0.5)
        states = list(range(16))
        expected = _expected(trained["saved"]).tolist()
        assert _post(port, {"inputs": [[s] for s in states]})["predictions"] == expected
        assert _post(port, {"dataframe_split": {"columns": ["state"], "data": [[s] for s in states]}})["predictions"] == expected
        with pytest.raises(urllib.error.HTTPError) as refused:
            _post(port, {"inputs": [[1, 2]]})
        assert "1 column" in refused.value.read().decode()
    finally:
        # Stop the server this test started (its own process group), then make sure.
        if server.poll() is None:
            os.killpg(server.pid, signal.SIGTERM)
            try:
                server.wait(timeout=15)
            except subprocess.TimeoutExpired:
                os.killpg(server.pid, signal.SIGKILL)
                server.wait(timeout=15)
        log.close()


def test_an_edited_policy_in_the_model_is_refused(trained):
    # Breakage caught: the served reader or qtally's reader acting on an edited table.
    model_dir = Path(mlflow.artifacts.download_artifacts(f"runs:/{trained['run_id']}/policy", dst_path=str(trained["where"] / "edited")))
    (policy_file,) = list((model_dir / "artifacts").glob("*.npz"))
    with np.load(policy_file, allow_pickle=False) as archive:
        arrays = {k: archive[k] for k in archive.files}
    arrays["actions"] = (arrays["actions"] + 1) % 4
    np.savez(policy_file, **arrays)
    with pytest.raises(PolicyFormatError, match="checksum"):
        load_policy(policy_file)
    with pytest.raises(Exception, match="checksum"):
        mlflow.pyfunc.load_model(str(model_dir))
    policy_file.write_bytes(b"not a policy")
    with pytest.raises(Exception, match="not a qtally policy file"):
        mlflow.pyfunc.load_model(str(model_dir))


def test_a_fallback_action_the_environment_lacks_is_refused_before_a_run(tmp_path):
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    result = subprocess.run([_script("qtally-train"), "env=frozen_lake_4x4", "policy_fallback.rule=action", "policy_fallback.action=4"], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=120)
    assert result.returncode == 2
    assert result.stderr.strip().splitlines() == ["qtally-train: error: policy_fallback.action=4 is not an action here: allowed 0..3"]
    assert not (tmp_path / "mlflow.db").exists()  # refused before the store was opened: no run at all
