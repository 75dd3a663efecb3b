"""Damaged checkpoints and policy files are refused with the loader's own error, never anything else.

Hypothesis feeds random bytes, truncations of a good file and good archives with one
member edited, removed or added. Which bug each test catches: a loader that lets numpy's,
zipfile's or json's exceptions escape (a traceback instead of one line), that accepts an
edited table (the checksum not checked, or checked over the wrong bytes), or that can be
made to unpickle (``allow_pickle`` left on: an object array then loads).
"""

from __future__ import annotations

import io
import json
import zipfile

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from qtally.control.trainer_state import TrainerState, TrainerStateError
from qtally.policy.artifact import PolicyArtifact, PolicyFormatError, load_policy

SIGNATURE = {"env_id": "FrozenLake-v1", "kwargs": {}, "observation": {"kind": "discrete", "n": 4, "start": 0, "names": ["state"]}, "n_actions": 2}


def _good_state(tmp_path) -> bytes:
    state = TrainerState.fresh(4, 2, seed=3)
    state.values.q[1, 1] = 2.5
    state.values.visits[1, 1] = 3
    state.episode = 9
    return state.save(tmp_path / "good_state.npz").read_bytes()


def _good_policy(tmp_path) -> bytes:
    q = np.array([[0.0, 1.0], [2.0, 0.5], [0.0, 0.0], [1.0, 1.0]])
    visits = np.array([[1, 2], [3, 1], [0, 0], [1, 1]])
    return PolicyArtifact.from_q(q, visits, SIGNATURE).save(tmp_path / "good_policy.npz").read_bytes()


LOADERS = {
    "trainer state": (_good_state, TrainerState.load, TrainerStateError),
    "policy file": (_good_policy, load_policy, PolicyFormatError),
}


def _refused(tmp_path, content: bytes, loader, error) -> None:
    path = tmp_path / "candidate.npz"
    path.write_bytes(content)
    with pytest.raises(error):
        loader(path)


def _members(content: bytes) -> dict[str, bytes]:
    with zipfile.ZipFile(io.BytesIO(content)) as archive:
        return {name: archive.read(name) for name in archive.namelist()}


def _archive(members: dict[str, bytes]) -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for name, data in members.items():
            archive.writestr(name, data)
    return buffer.getvalue()


@pytest.mark.parametrize("kind", LOADERS)
def test_the_good_file_loads(tmp_path, kind):
    make, loader, _ = LOADERS[kind]
    path = tmp_path / "ok.npz"
    path.write_bytes(make(tmp_path))
    loader(path)


@pytest.mark.parametrize("kind", LOADERS)
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(content=st.binary(max_size=2048))
def test_random_bytes_are_refused(tmp_path, kind, content):
    make, loader, error = LOADERS[kind]
    _refused(tmp_path, content, loader, error)


@pytest.mark.parametrize("kind", LOADERS)
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(fraction=st.floats(min_value=0.0, max_value=0.999))
def test_truncated_files_are_refused(tmp_path, kind, fraction):
    make, loader, error = LOADERS[kind]
    good = make(tmp_path)
    _refused(tmp_path, good[: int(len(good) * fraction)], loader, error)


@pytest.mark.parametrize("kind", LOADERS)
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_edited_archives_are_refused(tmp_path, kind, data):
    make, loader, error = LOADERS[kind]
    members = _members(make(tmp_path))
    name = data.draw(st.sampled_from(sorted(members)))
    action = data.draw(st.sampled_from(["flip", "drop", "object", "metadata"]))
    if action == "flip":  # one byte of one member's data changed (past the .npy header)
        body = bytearray(members[name])
        position = data.draw(st.integers(min_value=128 if len(body) > 128 else 0, max_value=len(body) - 1))
        body[position] ^= data.draw(st.integers(min_value=1, max_value=255))
        members[name] = bytes(body)
    elif action == "drop":
        del members[name]
    elif action == "object":  # an object array: loads only if pickle were allowed
        buffer = io.BytesIO()
        np.save(buffer, np.array([{"x": 1}], dtype=object), allow_pickle=True)
        members[name] = buffer.getvalue()
    else:  # metadata replaced by valid JSON of the wrong shape
        buffer = io.BytesIO()
        np.save(buffer, np.array(json.dumps(data.draw(st.sampled_from([[], {}, {"format": "other"}, 3, "text"])))))
        members["metadata.npy" if "metadata.npy" in members else name] = buffer.getvalue()
    edited = _archive(members)
    path = tmp_path / "edited.npz"
    path.write_bytes(edited)
    try:
        loader(path)
    except error:
        return
    # A flip inside a member's padding or a header field numpy ignores can leave the content intact: then it must load the same.
    assert action == "flip"
    path.write_bytes(make(tmp_path))
    original = loader(path)
    path.write_bytes(edited)
    again = loader(path)
    if kind == "trainer state":
        np.testing.assert_array_equal(again.values.q, original.values.q)
    else:
        np.testing.assert_array_equal(again.actions, original.actions)
