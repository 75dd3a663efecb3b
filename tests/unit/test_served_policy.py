"""The numpy-only reader shipped with the pyfunc model agrees with qtally's own encoders and policy file reader.

The reader repeats qtally's encoding in a few lines so the model needs no qtally; these
tests hold the two copies together. Each test names the breakage it is there to catch.
"""

import ast
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from qtally.envs.encoders import BinnedBoxEncoder, DiscreteEncoder, PartsEncoder
from qtally.policy.artifact import PolicyArtifact
from qtally.policy.table_policy import Fallback
from qtally.policy import qtally_served_policy as served

ENCODERS = {
    "discrete": DiscreteEncoder(n=7, start=-2, names=("shelf",)),
    "parts": PartsEncoder(sizes=(5, 3, 2), starts=(1, 0, 0), names=("day", "stock", "open")),
    "bins": BinnedBoxEncoder(low=(0.0, -1.0), high=(2.0, 1.0), bins=(3, 4), names=("x", "v")),
}


def _observations(kind, rng, n=200):
    encoder = ENCODERS[kind]
    if kind == "bins":
        return rng.uniform(-0.5, 2.5, size=(n, 2)) * np.array([1.0, 0.8])  # some beyond the edges
    return np.array([encoder.decode(i) for i in rng.integers(0, encoder.n_states, n)]).reshape(n, -1)


@pytest.mark.parametrize("kind", sorted(ENCODERS))
def test_encoding_matches_qtally(kind):
    # Breakage caught: a different state numbering (order of parts, start offsets, bin edges).
    rows = _observations(kind, np.random.default_rng(1))
    np.testing.assert_array_equal(served.encode_rows(ENCODERS[kind].spec(), rows), ENCODERS[kind].encode_batch(rows))


def _saved(tmp_path, kind, fallback, seed=2):
    encoder = ENCODERS[kind]
    rng = np.random.default_rng(seed)
    q = rng.normal(size=(encoder.n_states, 3))
    visits = rng.integers(0, 3, size=q.shape) * (rng.random(encoder.n_states) < 0.6)[:, None]
    signature = {"env_id": "demo", "kwargs": {}, "observation": encoder.spec(), "n_actions": 3}
    art = PolicyArtifact.from_q(q, visits, signature, fallback=fallback)
    return art, art.save(tmp_path / "p.npz")


@pytest.mark.parametrize("kind", sorted(ENCODERS))
def test_actions_match_the_policy_with_its_fallback(tmp_path, kind):
    # Breakage caught: the served model answering the tie of zeros, or a learned action
    # replaced by the fallback.
    art, path = _saved(tmp_path, kind, Fallback("action", 2))
    assert (~art.visited).any() and art.visited.any()
    rows = _observations(kind, np.random.default_rng(3))
    index = ENCODERS[kind].encode_batch(rows)
    np.testing.assert_array_equal(served.load_served_policy(path).act(rows), art.policy().act(index))


def test_uniform_fallback_draws_one_uniform_per_row(tmp_path):
    # Breakage caught: the served draw differing from qtally's floor(u * |A|) on the same uniforms.
    art, path = _saved(tmp_path, "parts", Fallback("uniform"))
    rows = _observations("parts", np.random.default_rng(4))
    index = ENCODERS["parts"].encode_batch(rows)
    uniforms = np.random.default_rng(5).random(len(rows))
    np.testing.assert_array_equal(served.load_served_policy(path).act(rows, np.random.default_rng(5)), art.policy().act(index, uniforms))


def test_refuse_and_wrong_width_are_one_line(tmp_path):
    art, path = _saved(tmp_path, "parts", Fallback("refuse"))
    policy = served.load_served_policy(path)
    missing = ENCODERS["parts"].decode(int(np.flatnonzero(~art.visited)[0]))
    with pytest.raises(served.ServedPolicyError, match=r"^the policy never learned an action for the state in row\(s\) 1 \(fallback rule: refuse\)$"):
        policy.act([list(ENCODERS["parts"].decode(int(np.flatnonzero(art.visited)[0]))), list(missing)])
    with pytest.raises(served.ServedPolicyError, match=r"^expected 3 columns \(day, stock, open\) per observation row, got a batch of shape \(2, 2\)$"):
        policy.act([[1, 0], [2, 1]])
    with pytest.raises(served.ServedPolicyError, match=r"^observation part day=6 is outside the policy's table: allowed 1..5$"):
        policy.act([[6, 0, 0]])
    with pytest.raises(served.ServedPolicyError, match="whole numbers"):
        policy.act([[1.5, 0, 0]])


def test_dataframe_columns_are_taken_by_name(tmp_path):
    # Breakage caught: columns read by position when the request names them in another order.
    art, path = _saved(tmp_path, "parts", Fallback("action", 1))
    rows = _observations("parts", np.random.default_rng(6), 20)
    frame = pd.DataFrame(rows, columns=["day", "stock", "open"])[["open", "day", "stock"]]
    policy = served.load_served_policy(path)
    np.testing.assert_array_equal(policy.act(frame), policy.act(rows))


def _rewrite(path, **changes):
    with np.load(path, allow_pickle=False) as archive:
        arrays = {k: archive[k] for k in archive.files}
    arrays.update(changes)
    np.savez(path, **arrays)


def test_edited_or_damaged_files_are_refused(tmp_path):
    # Breakage caught: the served reader skipping the checksum or the version check.
    art, path = _saved(tmp_path, "discrete", Fallback())
    visited = art.visited.copy()
    visited[0] = not visited[0]
    _rewrite(path, visited=visited)
    with pytest.raises(served.ServedPolicyError, match="checksum"):
        served.load_served_policy(path)
    art, path = _saved(tmp_path, "discrete", Fallback())
    actions = art.actions.copy()
    actions[0] = (actions[0] + 1) % 3
    _rewrite(path, actions=actions)
    with pytest.raises(served.ServedPolicyError, match="checksum"):
        served.load_served_policy(path)
    art, path = _saved(tmp_path, "discrete", Fallback())
    metadata = art.metadata()
    metadata["format_version"] = 3
    _rewrite(path, metadata=np.array(json.dumps(metadata)))
    with pytest.raises(served.ServedPolicyError, match="version 3"):
        served.load_served_policy(path)
    art, path = _saved(tmp_path, "discrete", Fallback())
    path.write_bytes(path.read_bytes()[: len(path.read_bytes()) // 2])
    with pytest.raises(served.ServedPolicyError, match="not a qtally policy file"):
        served.load_served_policy(path)


def test_version_1_files_are_served_with_the_uniform_fallback(tmp_path):
    art, _ = _saved(tmp_path, "discrete", Fallback())
    metadata = {"format": "qtally-policy", "format_version": 1, "signature": {"env_id": "demo", "observation": art.signature["observation"], "n_actions": 3}, "checksum": served._checksum(art.q, art.visits, art.actions)}
    np.savez(tmp_path / "v1.npz", q=art.q, visits=art.visits, actions=art.actions, metadata=np.array(json.dumps(metadata)))
    policy = served.load_served_policy(tmp_path / "v1.npz")
    np.testing.assert_array_equal(policy.visited, art.visited)
    assert policy.fallback["rule"] == "uniform"


def test_the_served_code_imports_no_qtally():
    # Breakage caught: a qtally import sneaking into the code that ships with the model.
    from qtally.tracking import policy_model

    for path in (Path(served.__file__), policy_model.MODEL_CODE):
        name = path.name
        tree = ast.parse(path.read_text())
        imported = {alias.name.split(".")[0] for node in ast.walk(tree) if isinstance(node, ast.Import) for alias in node.names}
        imported |= {node.module.split(".")[0] for node in ast.walk(tree) if isinstance(node, ast.ImportFrom) and node.module and node.level == 0}
        assert imported <= {"__future__", "hashlib", "json", "os", "zipfile", "zlib", "numpy", "mlflow", "qtally_served_policy"}, (name, imported)
        assert not any(isinstance(node, ast.ImportFrom) and node.level > 0 for node in ast.walk(tree)), name
