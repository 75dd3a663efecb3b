"""A learned qtally policy at serving time, with numpy only: read the policy file, encode rows, look up actions.

This module travels with every logged ``policy`` model (MLflow ``code_paths``), so a
process that loads or serves the model needs numpy and MLflow but not qtally. It must
therefore never import qtally; it repeats, in a few lines, what qtally's policy file
reader and observation encoders do, and ``tests/unit/test_served_policy.py`` checks it
against them.

- The policy file ("qtally-policy", versions 1 and 2) is opened with
  ``allow_pickle=False``; the format name, the version and the SHA-256 checksum over the
  arrays are checked before anything is used.
- Observation rows are encoded as qtally encodes them: ``Discrete`` as ``value - start``;
  the parts of a ``Tuple``/``MultiDiscrete`` with C-order ``ravel_multi_index`` over the
  stored sizes after subtracting the stored starts; a ``Box`` through equal-width bins
  between the stored ``low`` and ``high`` (values outside fall into the edge bins).
- A state training reached gets its greedy action (ties to the lowest index, already
  resolved in the stored ``actions``); any other state gets the stored fallback:
  ``uniform`` (one uniform per decision, ``floor(u * |A|)``), ``action`` (a fixed one)
  or ``refuse`` (:class:`ServedPolicyError` naming the rows).

>>> spec = {"kind": "parts", "sizes": [32, 11, 2], "starts": [0, 0, 0], "names": ["player_sum", "dealer_card", "usable_ace"]}
>>> encode_rows(spec, [[15, 10, 0], [4, 1, 1]]).tolist()
[350, 91]
>>> try:
...     encode_rows(spec, [[15, 10]])
... except ServedPolicyError as exc:
...     print(exc)
expected 3 columns (player_sum, dealer_card, usable_ace) per observation row, got a batch of shape (1, 2)
"""

from __future__ import annotations

import hashlib
import json
import os
import zipfile
import zlib

import numpy as np

__all__ = ["ServedPolicyError", "ServedPolicy", "read_policy_file", "load_served_policy", "encode_rows"]

FORMAT_NAME = "qtally-policy"
READABLE_VERSIONS = (1, 2)
FALLBACK_RULES = ("uniform", "action", "refuse")


class ServedPolicyError(ValueError):
    """The policy file is not usable, or a request does not fit the policy."""


def _checksum(*arrays: np.ndarray) -> str:
    digest = hashlib.sha256()
    for array in arrays:
        digest.update(np.ascontiguousarray(array).tobytes())
    return digest.hexdigest()


def _names(spec: dict, width: int) -> list[str]:
    names = list(spec.get("names") or [])
    return names if len(names) == width else [f"x{i}" for i in range(width)]


def _width(spec: dict) -> int:
    kind = spec.get("kind")
    if kind == "discrete":
        return 1
    if kind == "parts":
        return len(spec["sizes"])
    if kind == "bins":
        return len(spec["bins"])
    raise ServedPolicyError(f"unknown observation encoding {kind!r} in the policy file")


def _rows(spec: dict, observations) -> np.ndarray:
    """A 2-D batch from an array, a list of lists or a DataFrame; named DataFrame columns are put in order."""
    width = _width(spec)
    names = _names(spec, width)
    columns = getattr(observations, "columns", None)
    if columns is not None and set(names) <= {str(c) for c in columns}:
        observations = observations[[c for name in names for c in columns if str(c) == name]]
    rows = np.asarray(getattr(observations, "values", observations))
    if rows.ndim == 1 and width == 1:
        rows = rows[:, None]
    if rows.ndim != 2 or rows.shape[1] != width:
        raise ServedPolicyError(f"expected {width} column{'s' if width > 1 else ''} ({', '.join(names)}) per observation row, got a batch of shape {rows.shape}")
    if rows.dtype.kind not in "iufb":
        try:
            rows = rows.astype(np.float64)
        except (TypeError, ValueError):
            raise ServedPolicyError(f"observation rows must be numbers ({', '.join(names)}); got {rows.dtype} values") from None
    return rows


def _whole(rows: np.ndarray, names: list[str]) -> np.ndarray:
    values = rows.astype(np.float64)
    if not np.all(np.isfinite(values)) or np.any(values != np.round(values)):
        raise ServedPolicyError(f"observation parts ({', '.join(names)}) must be whole numbers")
    return values.astype(np.int64)


def encode_rows(spec: dict, observations) -> np.ndarray:
    """Table index per observation row, as qtally's encoder for ``spec`` numbers them."""
    rows = _rows(spec, observations)
    kind = spec["kind"]
    names = _names(spec, rows.shape[1])
    if kind == "bins":
        low, high, bins = (np.asarray(spec[k], dtype=np.float64) for k in ("low", "high", "bins"))
        values = rows.astype(np.float64)
        if not np.all(np.isfinite(values)):
            raise ServedPolicyError(f"observation values ({', '.join(names)}) must be finite numbers")
        cells = np.clip(np.floor((values - low) / (high - low) * bins), 0, bins - 1).astype(np.int64)
        return np.ravel_multi_index(cells.T, bins.astype(np.int64)).astype(np.int64)
    if kind == "discrete":
        sizes, starts = np.array([int(spec["n"])]), np.array([int(spec["start"])])
    else:
        sizes, starts = np.asarray(spec["sizes"], dtype=np.int64), np.asarray(spec["starts"], dtype=np.int64)
    parts = _whole(rows, names) - starts
    for column, (size, name) in enumerate(zip(sizes, names)):
        bad = (parts[:, column] < 0) | (parts[:, column] >= size)
        if bad.any():
            value = int(parts[np.flatnonzero(bad)[0], column] + starts[column])
            raise ServedPolicyError(f"observation part {name}={value} is outside the policy's table: allowed {int(starts[column])}..{int(starts[column] + size - 1)}")
    return np.ravel_multi_index(parts.T, sizes).astype(np.int64)


class ServedPolicy:
    """Greedy actions, visited states and the fallback of one verified policy file."""

    def __init__(self, actions: np.ndarray, visited: np.ndarray, n_actions: int, observation: dict, fallback: dict, env_id: str | None = None):
        self.actions = np.asarray(actions, dtype=np.int64)
        self.visited = np.asarray(visited, dtype=bool)
        self.n_actions = int(n_actions)
        self.observation = dict(observation)
        self.fallback = dict(fallback)
        self.env_id = env_id
        self.columns = _names(self.observation, _width(self.observation))

    def act(self, observations, rng: np.random.Generator | None = None) -> np.ndarray:
        """One action per observation row: greedy where training reached the state, the fallback elsewhere."""
        index = encode_rows(self.observation, observations)
        actions = self.actions[index]
        unvisited = ~self.visited[index]
        if not unvisited.any():
            return actions
        rule = self.fallback.get("rule", "uniform")
        if rule == "refuse":
            rows = np.flatnonzero(unvisited)
            shown = ", ".join(str(int(r)) for r in rows[:5]) + (f" and {rows.size - 5} more" if rows.size > 5 else "")
            raise ServedPolicyError(f"the policy never learned an action for the state in row(s) {shown} (fallback rule: refuse)")
        if rule == "action":
            actions[unvisited] = int(self.fallback["action"])
            return actions
        rng = rng if rng is not None else np.random.default_rng()
        n_actions = self.n_actions
        uniforms = rng.random(index.shape[0])  # one uniform per decision, as qtally's draw protocol
        actions[unvisited] = np.minimum(np.floor(uniforms[unvisited] * n_actions).astype(np.int64), n_actions - 1)
        return actions


def read_policy_file(path: str | os.PathLike, error: type[Exception] = None) -> tuple[dict, dict]:
    """Open a qtally policy file without pickle; check format, version, checksum and array shapes.

    The one reader of the format: qtally's :func:`qtally.policy.artifact.load_policy` and the
    served model both call it. Returns the arrays (``q``, ``visits``, ``actions``,
    ``visited``; version 1 files get ``visited`` from the visit counts) and the metadata;
    raises ``error`` (default :class:`ServedPolicyError`) with a one-line message.
    """
    error = error or ServedPolicyError
    where = os.fspath(path)
    try:
        with np.load(path, allow_pickle=False) as archive:
            arrays = {name: archive[name] for name in ("q", "visits", "actions")}
            visited = archive["visited"] if "visited" in archive.files else None
            metadata = json.loads(str(archive["metadata"]))
    except FileNotFoundError:
        raise error(f"policy file {where!r} does not exist") from None
    except (KeyError, ValueError, OSError, EOFError, zipfile.BadZipFile, zlib.error, json.JSONDecodeError) as exc:
        raise error(f"{where!r} is not a qtally policy file ({str(exc).splitlines()[0] if str(exc) else type(exc).__name__})") from None
    if not isinstance(metadata, dict) or metadata.get("format") != FORMAT_NAME:
        raise error(f"{where!r} is not a qtally policy file")
    version = metadata.get("format_version")
    if version not in READABLE_VERSIONS:
        raise error(f"{where!r} has policy format version {version}; this reader reads versions {', '.join(map(str, READABLE_VERSIONS))}")
    q, visits, actions = arrays["q"], arrays["visits"], arrays["actions"]
    if version == 1:
        checked = (q, visits, actions)
        visited = np.asarray(visits).sum(axis=1) > 0
    elif visited is None or visited.dtype != np.bool_:
        raise error(f"{where!r} is not a qtally policy file (no boolean 'visited' array)")
    else:
        checked = (q, visits, actions, visited)
    if metadata.get("checksum") != _checksum(*checked):
        raise error(f"{where!r} failed its checksum: the file is damaged or was edited")
    if q.ndim != 2 or visits.shape != q.shape or actions.shape != q.shape[:1] or visited.shape != q.shape[:1]:
        raise error(f"{where!r} is not a qtally policy file (array shapes do not agree)")
    arrays["visited"] = visited
    return arrays, metadata


def load_served_policy(path: str | os.PathLike) -> ServedPolicy:
    """Open a qtally policy file for serving: the verified arrays, the encoding, the fallback."""
    where = os.fspath(path)
    arrays, metadata = read_policy_file(path)
    q, actions, visited = arrays["q"], arrays["actions"], arrays["visited"]
    signature = metadata.get("signature") or {}
    observation = signature.get("observation")
    if not isinstance(observation, dict) or q.ndim != 2 or actions.shape != q.shape[:1] or visited.shape != q.shape[:1]:
        raise ServedPolicyError(f"{where!r} is not a qtally policy file (arrays or signature do not agree)")
    fallback = metadata.get("fallback") or {"rule": "uniform", "action": None}
    if fallback.get("rule") not in FALLBACK_RULES or (fallback.get("rule") == "action" and not 0 <= int(fallback.get("action", -1)) < q.shape[1]):
        raise ServedPolicyError(f"{where!r} has an invalid fallback {fallback!r}")
    try:
        expected = int(np.prod(observation["sizes"])) if observation["kind"] == "parts" else int(np.prod(observation["bins"])) if observation["kind"] == "bins" else int(observation["n"])
    except (KeyError, TypeError, ValueError):
        raise ServedPolicyError(f"{where!r} has an unreadable observation encoding") from None
    if expected != q.shape[0]:
        raise ServedPolicyError(f"{where!r}: the observation encoding numbers {expected} states but the table has {q.shape[0]}")
    return ServedPolicy(actions, visited, int(q.shape[1]), observation, fallback, env_id=signature.get("env_id"))
