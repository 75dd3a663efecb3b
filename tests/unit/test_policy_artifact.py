"""The policy file: round trip, refusal of damaged, foreign or mismatched files, no pickle anywhere."""

import json
import zipfile

import numpy as np
import pytest

from qtally.policy.artifact import FORMAT_VERSION, PolicyArtifact, PolicyFormatError, _checksum, load_policy
from qtally.policy.table_policy import Fallback

SIGNATURE = {"env_id": "demo", "kwargs": {"price": 3}, "observation": {"kind": "parts", "sizes": [3, 2], "starts": [0, 0], "names": ["a", "b"]}, "n_actions": 2}


def _artifact():
    q = np.array([[0.0, 1.0], [2.0, -1.0], [0.5, 0.5], [0.0, 0.0], [-3.0, 4.0], [1.0, 0.0]])
    return PolicyArtifact.from_q(q, np.arange(12).reshape(6, 2), SIGNATURE, episode=40, gamma=0.9)


def test_round_trip_keeps_arrays_and_facts(tmp_path):
    path = _artifact().save(tmp_path / "p.npz")
    loaded = load_policy(path)
    np.testing.assert_array_equal(loaded.q, _artifact().q)
    np.testing.assert_array_equal(loaded.visits, _artifact().visits)
    assert loaded.actions.tolist() == [1, 0, 0, 0, 1, 0]  # ties to the lowest action
    assert loaded.facts == {"episode": 40, "gamma": 0.9}
    assert loaded.encoder().decode(3) == (1, 1)
    assert not list(tmp_path.glob("*.partial"))


def test_file_holds_no_object_arrays(tmp_path):
    path = _artifact().save(tmp_path / "p.npz")
    with np.load(path, allow_pickle=False) as archive:
        assert {archive[k].dtype.kind for k in archive.files} <= {"f", "i", "b", "U"}
        assert json.loads(str(archive["metadata"]))["format_version"] == FORMAT_VERSION


def _rewrite(path, **changes):
    with np.load(path, allow_pickle=False) as archive:
        arrays = {k: archive[k] for k in archive.files}
    arrays.update(changes)
    np.savez(path, **arrays)


def test_edited_q_table_fails_the_checksum(tmp_path):
    path = _artifact().save(tmp_path / "p.npz")
    q = load_policy(path).q.copy()
    q[0, 0] = 99.0
    _rewrite(path, q=q)
    with pytest.raises(PolicyFormatError, match="checksum"):
        load_policy(path)


def test_newer_format_version_is_refused(tmp_path):
    path = _artifact().save(tmp_path / "p.npz")
    metadata = _artifact().metadata()
    metadata["format_version"] = FORMAT_VERSION + 1
    _rewrite(path, metadata=np.array(json.dumps(metadata)))
    with pytest.raises(PolicyFormatError, match="version"):
        load_policy(path)


def test_foreign_files_are_refused(tmp_path):
    np.savez(tmp_path / "other.npz", x=np.zeros(3))
    with pytest.raises(PolicyFormatError, match="not a qtally policy"):
        load_policy(tmp_path / "other.npz")
    (tmp_path / "text.npz").write_text("hello")
    with pytest.raises(PolicyFormatError):
        load_policy(tmp_path / "text.npz")
    with pytest.raises(PolicyFormatError, match="does not exist"):
        load_policy(tmp_path / "missing.npz")
    with zipfile.ZipFile(tmp_path / "pickled.npz", "w") as archive:
        archive.writestr("q.npy", b"\x93NUMPY\x01\x00v\x00{'descr': '|O', 'fortran_order': False, 'shape': (1,), }" + b" " * 40 + b"\n")
    with pytest.raises(PolicyFormatError):
        load_policy(tmp_path / "pickled.npz")


def test_signature_mismatch_is_refused_naming_both_sides():
    other = dict(SIGNATURE, n_actions=3, env_id="elsewhere")
    with pytest.raises(PolicyFormatError, match="env_id, n_actions differ") as caught:
        _artifact().check_signature(other)
    assert "'demo'" in str(caught.value) and "'elsewhere'" in str(caught.value) and "\n" not in str(caught.value)
    _artifact().check_signature(json.loads(json.dumps(SIGNATURE)))  # the same signature through JSON fits


def test_other_constructor_arguments_are_refused():
    """Same id, same table shape, other prices: a different problem, so refused, both prices named."""
    with pytest.raises(PolicyFormatError, match="kwargs differ") as caught:
        _artifact().check_signature(dict(SIGNATURE, kwargs={"price": 5}))
    assert '{"price": 3}' in str(caught.value) and '{"price": 5}' in str(caught.value)
    with pytest.raises(PolicyFormatError, match="observation differ"):
        _artifact().check_signature(dict(SIGNATURE, observation=dict(SIGNATURE["observation"], starts=[1, 0])))


def test_visited_and_fallback_round_trip(tmp_path):
    visits = np.zeros((6, 2), dtype=np.int64)
    visits[[0, 4], 1] = 5
    art = PolicyArtifact.from_q(_artifact().q, visits, SIGNATURE, fallback=Fallback("action", 1))
    loaded = load_policy(art.save(tmp_path / "p.npz"))
    assert loaded.visited.tolist() == [True, False, False, False, True, False]
    assert loaded.fallback == Fallback("action", 1)
    assert loaded.visited_share == pytest.approx(2 / 6)
    assert loaded.policy().act(np.arange(6)).tolist() == [1, 1, 1, 1, 1, 1]
    assert loaded.policy().act(np.array([0, 4])).tolist() == [1, 1]


def test_edited_visited_array_fails_the_checksum(tmp_path):
    path = _artifact().save(tmp_path / "p.npz")
    visited = load_policy(path).visited.copy()
    visited[3] = not visited[3]
    _rewrite(path, visited=visited)
    with pytest.raises(PolicyFormatError, match="checksum"):
        load_policy(path)


def test_edited_fallback_is_not_read_past_its_rules(tmp_path):
    path = _artifact().save(tmp_path / "p.npz")
    metadata = _artifact().metadata()
    metadata["fallback"] = {"rule": "action", "action": 7}
    _rewrite(path, metadata=np.array(json.dumps(metadata)))
    with pytest.raises(PolicyFormatError, match="fallback"):
        load_policy(path)


def test_version_1_files_still_load(tmp_path):
    """A file written before visited states and fallbacks existed: visited from visits, fallback uniform."""
    art = _artifact()
    visits = art.visits.copy()
    visits[2] = 0
    metadata = {"format": "qtally-policy", "format_version": 1, "signature": {k: v for k, v in SIGNATURE.items() if k != "kwargs"}, "facts": {"episode": 3}, "checksum": _checksum(art.q, visits, art.actions)}
    np.savez(tmp_path / "v1.npz", q=art.q, visits=visits, actions=art.actions, metadata=np.array(json.dumps(metadata)))
    loaded = load_policy(tmp_path / "v1.npz")
    assert loaded.visited.tolist() == [True, True, False, True, True, True]  # only row 2 was cleared
    assert loaded.fallback == Fallback("uniform")
    with pytest.raises(PolicyFormatError, match="kwargs not recorded"):
        loaded.check_signature(SIGNATURE)
