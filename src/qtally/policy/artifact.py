"""The policy artifact: a Q table, its visit counts and greedy actions, in a file that loads without pickle.

Format ("qtally-policy", version 1): a NumPy ``.npz`` archive holding the numeric
arrays ``q`` (float64, states x actions), ``visits`` (int64, same shape) and
``actions`` (int64, one per state), plus ``metadata``, a 0-d unicode array holding a
JSON object: format name and version, the environment signature (env id, encoder spec,
action count), training facts (episode, gamma, variant), and ``checksum``, the SHA-256
of the three arrays' bytes. :func:`load_policy` opens it with ``allow_pickle=False``,
checks format, version and checksum, and :meth:`PolicyArtifact.check_signature` checks
that it fits an environment.

>>> import tempfile, pathlib
>>> art = PolicyArtifact.from_q(np.array([[0.0, 1.0], [3.0, 2.0]]), np.ones((2, 2), dtype=np.int64), {"env_id": "demo", "observation": {"kind": "discrete", "n": 2, "start": 0}, "n_actions": 2})
>>> path = pathlib.Path(tempfile.mkdtemp()) / "policy.npz"
>>> _ = art.save(path); load_policy(path).actions.tolist()
[1, 0]
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .table_policy import greedy_actions
from ..envs.encoders import encoder_from_spec

__all__ = ["PolicyArtifact", "PolicyFormatError", "load_policy", "FORMAT_NAME", "FORMAT_VERSION"]

FORMAT_NAME = "qtally-policy"
FORMAT_VERSION = 1


class PolicyFormatError(ValueError):
    """The file is not a valid qtally policy, or does not fit the environment."""


def _checksum(q: np.ndarray, visits: np.ndarray, actions: np.ndarray) -> str:
    digest = hashlib.sha256()
    for array in (q, visits, actions):
        digest.update(np.ascontiguousarray(array).tobytes())
    return digest.hexdigest()


@dataclass(frozen=True)
class PolicyArtifact:
    q: np.ndarray
    visits: np.ndarray
    actions: np.ndarray
    signature: dict
    facts: dict = field(default_factory=dict)

    @classmethod
    def from_q(cls, q: np.ndarray, visits: np.ndarray, signature: dict, **facts: Any) -> "PolicyArtifact":
        return cls(q=np.asarray(q, dtype=np.float64), visits=np.asarray(visits, dtype=np.int64), actions=greedy_actions(q).astype(np.int64), signature=dict(signature), facts=dict(facts))

    def encoder(self):
        return encoder_from_spec(self.signature["observation"])

    def metadata(self) -> dict:
        return {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "signature": self.signature,
            "facts": self.facts,
            "checksum": _checksum(self.q, self.visits, self.actions),
        }

    def save(self, path: str | os.PathLike) -> Path:
        """Write atomically (temporary file, then rename): a crash never leaves half a policy."""
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        handle, temporary = tempfile.mkstemp(dir=path.parent, suffix=".npz.partial")
        try:
            with os.fdopen(handle, "wb") as stream:
                np.savez_compressed(stream, q=self.q, visits=self.visits, actions=self.actions, metadata=np.array(json.dumps(self.metadata(), sort_keys=True)))
            os.replace(temporary, path)
        except BaseException:
            Path(temporary).unlink(missing_ok=True)
            raise
        return path

    def check_signature(self, signature: dict) -> None:
        """Refuse to act in an environment this policy was not learned for."""
        mine = {k: self.signature.get(k) for k in ("observation", "n_actions")}
        theirs = {k: signature.get(k) for k in ("observation", "n_actions")}
        if json.dumps(mine, sort_keys=True) != json.dumps(theirs, sort_keys=True):
            raise PolicyFormatError(
                f"policy was learned on {self.signature.get('env_id')!r} with a different observation table or action count than {signature.get('env_id')!r}"
            )


def load_policy(path: str | os.PathLike) -> PolicyArtifact:
    """Load and verify a policy file (no pickle)."""
    try:
        with np.load(path, allow_pickle=False) as archive:
            q, visits, actions = archive["q"], archive["visits"], archive["actions"]
            metadata = json.loads(str(archive["metadata"]))
    except FileNotFoundError:
        raise PolicyFormatError(f"policy file {os.fspath(path)!r} does not exist") from None
    except (KeyError, ValueError, OSError, json.JSONDecodeError) as exc:
        raise PolicyFormatError(f"{os.fspath(path)!r} is not a qtally policy file ({exc})") from None
    if metadata.get("format") != FORMAT_NAME:
        raise PolicyFormatError(f"{os.fspath(path)!r} is not a qtally policy file")
    if metadata.get("format_version") != FORMAT_VERSION:
        raise PolicyFormatError(f"{os.fspath(path)!r} has policy format version {metadata.get('format_version')}, this qtally reads version {FORMAT_VERSION}")
    if metadata.get("checksum") != _checksum(q, visits, actions):
        raise PolicyFormatError(f"{os.fspath(path)!r} failed its checksum: the file is damaged or was edited")
    return PolicyArtifact(q=q, visits=visits, actions=actions, signature=metadata["signature"], facts=metadata.get("facts", {}))
