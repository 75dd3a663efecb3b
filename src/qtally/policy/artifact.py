"""The policy artifact: a Q table, its visit counts and greedy actions, in a file that loads without pickle.

Format ("qtally-policy", version 2): a NumPy ``.npz`` archive holding the numeric
arrays ``q`` (float64, states x actions), ``visits`` (int64, same shape), ``actions``
(int64, the greedy action per state, ties to the lowest index) and ``visited`` (bool,
one per state: did training reach it), plus ``metadata``, a 0-d unicode array holding a
JSON object: format name and version, the environment signature (env id, constructor
arguments ``kwargs``, encoder spec, action count), the ``fallback`` for unvisited states
(``{"rule": "uniform" | "action" | "refuse", "action": int | null}``), training facts
(episode, gamma, variant), and ``checksum``, the SHA-256 of the four arrays' bytes in
that order. :func:`load_policy` opens it with ``allow_pickle=False``, checks format,
version and checksum, and :meth:`PolicyArtifact.check_signature` checks that it fits an
environment.

Version 1 files (no ``visited`` array, no fallback, checksum over the first three
arrays) still load: ``visited`` is ``visits.sum(axis=1) > 0`` and the fallback is
uniform. Their signature has no ``kwargs``, so they fit only environments made without
constructor arguments.

>>> import tempfile, pathlib
>>> art = PolicyArtifact.from_q(np.array([[0.0, 1.0], [3.0, 2.0]]), np.ones((2, 2), dtype=np.int64), {"env_id": "demo", "kwargs": {}, "observation": {"kind": "discrete", "n": 2, "start": 0}, "n_actions": 2})
>>> path = pathlib.Path(tempfile.mkdtemp()) / "policy.npz"
>>> _ = art.save(path); load_policy(path).actions.tolist()
[1, 0]
"""

from __future__ import annotations

import json
import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .qtally_served_policy import FORMAT_NAME, READABLE_VERSIONS, _checksum, read_policy_file
from .table_policy import Fallback, TablePolicy, greedy_actions
from ..envs.encoders import encoder_from_spec

__all__ = ["PolicyArtifact", "PolicyFormatError", "load_policy", "FORMAT_NAME", "FORMAT_VERSION", "READABLE_VERSIONS", "Fallback"]

FORMAT_VERSION = 2
SIGNATURE_KEYS = ("env_id", "kwargs", "observation", "n_actions")


class PolicyFormatError(ValueError):
    """The file is not a valid qtally policy, or does not fit the environment."""




def _describe_signature(signature: dict) -> str:
    """One environment signature in a line: id, constructor arguments, table shape."""
    kwargs = signature.get("kwargs")
    shown = "kwargs not recorded" if kwargs is None else f"kwargs={json.dumps(kwargs, sort_keys=True)}"
    observation = signature.get("observation") or {}
    return f"{signature.get('env_id')!r} ({shown}, observation={json.dumps(observation, sort_keys=True)}, {signature.get('n_actions')} actions)"


@dataclass(frozen=True)
class PolicyArtifact:
    q: np.ndarray
    visits: np.ndarray
    actions: np.ndarray
    signature: dict
    facts: dict = field(default_factory=dict)
    visited: np.ndarray | None = None  # bool per state; None: derived from visits
    fallback: Fallback = field(default_factory=Fallback)

    def __post_init__(self) -> None:
        if self.visited is None:
            object.__setattr__(self, "visited", np.asarray(self.visits).sum(axis=1) > 0)

    @classmethod
    def from_q(cls, q: np.ndarray, visits: np.ndarray, signature: dict, *, fallback: Fallback | None = None, **facts: Any) -> "PolicyArtifact":
        visits = np.asarray(visits, dtype=np.int64)
        fallback = fallback or Fallback()
        fallback.check_actions(int(np.shape(q)[1]))
        return cls(
            q=np.asarray(q, dtype=np.float64),
            visits=visits,
            actions=greedy_actions(q).astype(np.int64),
            signature=dict(signature),
            facts=dict(facts),
            visited=visits.sum(axis=1) > 0,
            fallback=fallback,
        )

    def encoder(self):
        return encoder_from_spec(self.signature["observation"])

    def policy(self) -> TablePolicy:
        """The table as a :class:`TablePolicy` with this file's visited states and fallback."""
        return TablePolicy(q=self.q, visits=self.visits, fallback=self.fallback, visited=np.asarray(self.visited, dtype=bool))

    @property
    def visited_share(self) -> float:
        """Share of all table states that training reached (see :attr:`TablePolicy.visited_share`)."""
        return self.policy().visited_share

    def metadata(self) -> dict:
        return {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "signature": self.signature,
            "fallback": self.fallback.to_dict(),
            "facts": self.facts,
            "checksum": _checksum(self.q, self.visits, self.actions, np.asarray(self.visited, dtype=bool)),
        }

    def save(self, path: str | os.PathLike) -> Path:
        """Write atomically (temporary file, then rename): a crash never leaves half a policy."""
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        handle, temporary = tempfile.mkstemp(dir=path.parent, suffix=".npz.partial")
        try:
            with os.fdopen(handle, "wb") as stream:
                np.savez_compressed(stream, q=self.q, visits=self.visits, actions=self.actions, visited=np.asarray(self.visited, dtype=bool), metadata=np.array(json.dumps(self.metadata(), sort_keys=True)))
            os.replace(temporary, path)
        except BaseException:
            Path(temporary).unlink(missing_ok=True)
            raise
        return path

    def check_signature(self, signature: dict) -> None:
        """Refuse to act in an environment this policy was not learned for.

        The environment id, the constructor arguments, the observation encoding and the
        action count must all match: a policy learned at other prices or on another map
        has the same table shape but answers a different question. The error names both
        sides and what differs.
        """
        differ = [k for k in SIGNATURE_KEYS if json.dumps(self.signature.get(k), sort_keys=True) != json.dumps(signature.get(k), sort_keys=True)]
        if differ:
            raise PolicyFormatError(
                f"policy learned on {_describe_signature(self.signature)} does not fit {_describe_signature(signature)}: {', '.join(differ)} differ"
            )


def load_policy(path: str | os.PathLike) -> PolicyArtifact:
    """Load and verify a policy file (no pickle), through the one reader the served model uses too."""
    arrays, metadata = read_policy_file(path, PolicyFormatError)
    q, visits, actions, visited = arrays["q"], arrays["visits"], arrays["actions"], arrays["visited"]
    version = metadata["format_version"]
    try:
        fallback = Fallback.from_dict(metadata.get("fallback")) if version >= 2 else Fallback()
        fallback.check_actions(int(q.shape[1]))
    except (ValueError, TypeError, AttributeError) as exc:
        raise PolicyFormatError(f"{os.fspath(path)!r} has an invalid fallback ({exc})") from None
    if not isinstance(metadata.get("signature"), dict):
        raise PolicyFormatError(f"{os.fspath(path)!r} is not a qtally policy file (no environment signature)")
    return PolicyArtifact(q=q, visits=visits, actions=actions, signature=metadata["signature"], facts=metadata.get("facts", {}), visited=visited, fallback=fallback)
