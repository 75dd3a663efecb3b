"""The policy file: round trip, refusal of damaged, foreign or mismatched files, no pickle anywhere."""

import json
import zipfile

import numpy as np
import pytest

from qtally.policy.artifact import FORMAT_VERSION, PolicyArtifact, PolicyFormatError, load_policy

SIGNATURE = {"env_id": "demo", "observation": {"kind": "parts", "sizes": [3, 2], "starts": [0, 0], "names": ["a", "b"]}, "n_actions": 2}


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
        assert {archive[k].dtype.kind for k in archive.files} <= {"f", "i", "U"}
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


def test_signature_mismatch_is_refused():
    other = dict(SIGNATURE, n_actions=3, env_id="elsewhere")
    with pytest.raises(PolicyFormatError, match="different observation table or action count"):
        _artifact().check_signature(other)
    _artifact().check_signature(dict(SIGNATURE, env_id="renamed-but-same-table"))
