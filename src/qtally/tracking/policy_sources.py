"""Where a policy to evaluate comes from: a training run, a policy file, a logged model, or a fixed rule.

This is the tracking edge of ``qtally-evaluate``: it fetches from the MLflow store (with
MLflow's download progress bars kept off the user's console) and turns whatever it finds
into one ``(S, A)`` probability table over the environment's state indices. Every failure
a user can fix is a one-line :class:`~qtally.errors.QtallyError` naming the key.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from omegaconf import DictConfig

from ..config.validate_evaluate import POLICY_SOURCES
from ..envs.factory import TabularEnvironment
from ..errors import QtallyError, first_line
from ..policy.rules import (
    RULES,
    PolicyRuleError,
    check_policy_table,
    constant_policy,
    deterministic_policy,
    soften,
    threshold_policy,
    uniform_policy,
)

__all__ = ["PolicyTable", "POLICY_SOURCES", "policy_table", "quiet_mlflow", "run_policy_artifact", "model_policy_artifact", "model_source_run"]


@dataclass(frozen=True)
class PolicyTable:
    """A policy as an ``(S, A)`` probability table, with where it came from."""

    probs: np.ndarray
    source: str
    label: str


def _from_policy_file(path: str | Path, environment: TabularEnvironment, what: str) -> np.ndarray:
    from ..policy.artifact import PolicyFormatError, load_policy

    try:
        artifact = load_policy(path)
        artifact.check_signature(environment.signature())
    except PolicyFormatError as exc:
        raise QtallyError(f"{what}: {exc}") from None
    return deterministic_policy(artifact.actions, environment.n_actions)


@contextlib.contextmanager
def quiet_mlflow():
    """No artifact download progress bars on the user's terminal while fetching a policy.

    Forced off for the fetch even where the user's environment turns them on: qtally's
    console shows its own bar and nothing else.
    """
    name = "MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR"
    before = os.environ.get(name)
    os.environ[name] = "false"
    try:
        yield
    finally:
        if before is None:
            os.environ.pop(name, None)
        else:
            os.environ[name] = before


def _from_run(run_id: str, environment: TabularEnvironment, key: str) -> np.ndarray:
    artifact = run_policy_artifact(run_id, f"{key}.run_id")
    try:
        artifact.check_signature(environment.signature())
    except ValueError as exc:
        raise QtallyError(f"{key}.run_id={run_id!r}: {exc}") from None
    return deterministic_policy(artifact.actions, environment.n_actions)


def run_policy_artifact(run_id: str, key: str = "run_id"):
    """The verified policy file (``policy_file/policy.npz``) of a training run, as a PolicyArtifact."""
    import mlflow

    from ..policy.artifact import PolicyFormatError, load_policy

    with tempfile.TemporaryDirectory(prefix="qtally-policy-") as scratch, quiet_mlflow():
        try:
            local = mlflow.artifacts.download_artifacts(run_id=run_id, artifact_path="policy_file/policy.npz", dst_path=scratch)
        except Exception as exc:  # unknown run, no such artifact, unreachable store
            raise QtallyError(f"{key}={run_id!r}: cannot fetch its policy_file/policy.npz ({first_line(exc)})") from None
        try:
            return load_policy(local)
        except PolicyFormatError as exc:
            raise QtallyError(f"{key}={run_id!r}: {exc}") from None


def model_source_run(uri: str) -> str | None:
    """The training run behind a model URI: ``runs:/<id>/...`` directly, ``models:/<name>@<alias>`` or
    ``models:/<name>/<version>`` through the registry; None where it cannot be told."""
    if uri.startswith("runs:/"):
        return uri[len("runs:/"):].split("/", 1)[0] or None
    if not uri.startswith("models:/"):
        return None
    from mlflow.tracking import MlflowClient

    rest = uri[len("models:/"):]
    try:
        client = MlflowClient()
        if "@" in rest:
            name, alias = rest.split("@", 1)
            return client.get_model_version_by_alias(name, alias).run_id
        name, _, version = rest.partition("/")
        return client.get_model_version(name, version).run_id if version.isdigit() else None
    except Exception:
        return None


def model_policy_artifact(uri: str, key: str = "model"):
    """The verified policy file carried by a logged or registered model (``runs:/``, ``models:/``)."""
    import mlflow

    from ..policy.artifact import PolicyFormatError, load_policy

    with tempfile.TemporaryDirectory(prefix="qtally-policy-") as scratch, quiet_mlflow():
        try:
            local = Path(mlflow.artifacts.download_artifacts(artifact_uri=uri, dst_path=scratch))
        except Exception as exc:  # unknown model, alias or version, unreachable store
            raise QtallyError(f"{key}={uri!r}: cannot fetch the model ({first_line(exc)})") from None
        files = sorted(local.rglob("*.npz"))
        if not files:
            raise QtallyError(f"{key}={uri!r}: the model carries no qtally policy file; give a model logged by qtally-train")
        try:
            return load_policy(files[0])
        except PolicyFormatError as exc:
            raise QtallyError(f"{key}={uri!r}: {exc}") from None


def _from_model(uri: str, environment: TabularEnvironment, key: str) -> np.ndarray:
    """Load the pyfunc policy and ask it for an action in every state the encoder can decode."""
    import mlflow

    try:
        with quiet_mlflow():
            model = mlflow.pyfunc.load_model(uri)
    except Exception as exc:
        raise QtallyError(f"{key}.uri={uri!r}: cannot load the model ({first_line(exc)})") from None
    encoder = environment.encoder
    observations = [encoder.decode(s) for s in range(environment.n_states)]
    dtype = np.float64 if encoder.spec().get("kind") == "bins" else np.int64
    batch = np.asarray(observations, dtype=dtype).reshape(environment.n_states, encoder.width)
    try:
        with quiet_mlflow():
            actions = np.asarray(model.predict(batch)).reshape(-1).astype(np.int64)
    except Exception as exc:
        raise QtallyError(f"{key}.uri={uri!r}: the model cannot act on this environment's observations ({first_line(exc)})") from None
    if actions.shape != (environment.n_states,) or actions.min() < 0 or actions.max() >= environment.n_actions:
        raise QtallyError(f"{key}.uri={uri!r}: the model's actions do not fit this environment (0..{environment.n_actions - 1}, one per state)")
    return deterministic_policy(actions, environment.n_actions)


def _from_rule(cfg: DictConfig, environment: TabularEnvironment, key: str) -> tuple[np.ndarray, str]:
    rule = cfg.rule
    S, A = environment.n_states, environment.n_actions
    if rule == "uniform":
        return uniform_policy(S, A), "uniform"
    if rule == "constant":
        if cfg.get("action") is None:
            raise QtallyError(f"{key}.action is required for {key}.rule=constant")
        return constant_policy(S, A, cfg.action, key), f"constant {cfg.action}"
    if rule == "threshold":
        for name in ("threshold", "low_action", "high_action"):
            if cfg.get(name) is None:
                raise QtallyError(f"{key}.{name} is required for {key}.rule=threshold")
        probs = threshold_policy(environment.encoder, A, cfg.part, cfg.threshold, low_action=cfg.low_action, high_action=cfg.high_action, key=key)
        return probs, f"threshold {cfg.part}>={cfg.threshold:g} -> {cfg.high_action}, else {cfg.low_action}"
    raise QtallyError(f"{key}.rule={rule!r} is unknown; choose one of {', '.join(RULES)}")


def policy_table(cfg: DictConfig, environment: TabularEnvironment, key: str = "policy") -> PolicyTable:
    """Build the ``(S, A)`` table a policy config describes; :class:`QtallyError` on bad input."""
    source = cfg.source
    try:
        if source == "rule":
            probs, label = _from_rule(cfg, environment, key)
        elif source == "file":
            if not cfg.get("path"):
                raise QtallyError(f"{key}.path is required for {key}.source=file")
            probs, label = _from_policy_file(cfg.path, environment, f"{key}.path"), f"file {Path(cfg.path).name}"
        elif source == "run":
            if not cfg.get("run_id"):
                raise QtallyError(f"{key}.run_id is required for {key}.source=run")
            probs, label = _from_run(cfg.run_id, environment, key), f"run {cfg.run_id}"
        elif source == "model":
            if not cfg.get("uri"):
                raise QtallyError(f"{key}.uri is required for {key}.source=model (runs:/<run_id>/policy or models:/<name>/<version>)")
            probs, label = _from_model(cfg.uri, environment, key), f"model {cfg.uri}"
        else:
            raise QtallyError(f"{key}.source={source!r} is unknown; choose one of {', '.join(POLICY_SOURCES)}")
        epsilon = float(cfg.get("epsilon") or 0.0)
        if epsilon:
            probs = soften(probs, epsilon, key)
            label += f", epsilon {epsilon:g}"
        probs = check_policy_table(probs, environment.n_states, environment.n_actions)
    except PolicyRuleError as exc:
        raise QtallyError(str(exc)) from None
    return PolicyTable(probs=probs, source=str(source), label=label)
