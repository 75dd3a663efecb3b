"""One prediction run, end to end: config -> policy tables -> episodes -> estimates -> MLflow record.

This is the wiring behind ``qtally-evaluate``. :func:`prepare_prediction` does everything
that can fail on bad input (environment, policy sources, start control, coverage of the
target by the behaviour policy, the exact values where a model exists) before a run is
opened, so bad input leaves no run behind. :func:`run_prediction` then opens the run,
plays the episodes, logs the table, metrics and pictures, and closes it as FINISHED, or
FAILED/KILLED if anything goes wrong on the way.

Where the environment exposes its model, each estimate is put beside the exact value of
the same target policy (:func:`qtally.evaluate.exact.policy_evaluation`, and
:func:`~qtally.evaluate.exact.q_from_v` for Q) and its error is expressed in standard
errors; the report arithmetic (which estimates are flagged as worth too few effective
visits, the summary metrics, the CSV) is :mod:`qtally.evaluate.prediction_report`, and no
infinite value is ever logged (``max_error_in_se`` is left out and
``entries_infinite_error_in_se`` counts the entries instead). The model ignores time
limits; an episode cut by one is handled as ``env.truncation`` says (``bootstrap`` seeds
the cut with the current estimate).
"""

from __future__ import annotations

import contextlib
import math
import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
from omegaconf import DictConfig, OmegaConf

from .envs.encoders import EncoderError
from .envs.factory import EnvironmentConfigError, TabularEnvironment, make_environment
from .evaluate.prediction import (
    Estimates,
    ImportanceSamplingPrediction,
    OnPolicyPrediction,
    PlayedSummary,
    check_coverage,
    play_prediction_episodes,
)
from .evaluate.prediction_report import ReportRow, prediction_report, write_csv
from .errors import QtallyError
from .experiment import environment_spec
from .tracking.runs import log_config, open_experiment, recorded_run, resolve_tracking_uri
from .policy.rules import (
    RULES,
    PolicyRuleError,
    check_policy_table,
    constant_policy,
    deterministic_policy,
    soften,
    threshold_policy,
    uniform_policy,
)

__all__ = [
    "PolicyTable",
    "PredictionPlan",
    "ReportRow",
    "PredictionSummary",
    "prepare_prediction",
    "run_prediction",
    "policy_table",
    "prediction_report",
    "POLICY_SOURCES",
]

POLICY_SOURCES = ("run", "file", "model", "rule")
ESTIMATE_CHOICES = ("v", "q", "both")
IMPORTANCE_SAMPLING_CHOICES = ("ordinary", "weighted", "both")
EXPLORING_CHOICES = ("none", "states", "pairs")
TRUNCATION_CHOICES = ("bootstrap", "as_terminal", "discard")
@dataclass(frozen=True)
class PolicyTable:
    """A policy as an ``(S, A)`` probability table, with where it came from."""

    probs: np.ndarray
    source: str
    label: str


@dataclass
class PredictionPlan:
    """Everything checked and built before a run is opened."""

    environment: TabularEnvironment
    target: PolicyTable
    behaviour: PolicyTable | None
    methods: tuple[str, ...]
    kinds: tuple[str, ...]
    start_observation: Any
    start_action: int | None
    start_states: list | None
    random_first_action: bool
    truncation: str
    tracking_uri: str
    exact_v: np.ndarray | None
    exact_q: np.ndarray | None
    exact_reason: str | None


@dataclass
class PredictionSummary:
    run_id: str
    experiment_id: str
    tracking_uri: str
    metrics: dict[str, float]
    rows: list[ReportRow]
    plan: PredictionPlan
    played: PlayedSummary
    min_visits: int
    first_visit: bool
    episodes: int
    estimates: dict[tuple[str, str], Estimates] = field(default_factory=dict)


# ---------------------------------------------------------------- policy sources


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return (text[0] if text else type(exc).__name__)[:300]


def _from_policy_file(path: str | Path, environment: TabularEnvironment, what: str) -> np.ndarray:
    from .policy.artifact import PolicyFormatError, load_policy

    try:
        artifact = load_policy(path)
        artifact.check_signature(environment.signature())
    except PolicyFormatError as exc:
        raise QtallyError(f"{what}: {exc}") from None
    return deterministic_policy(artifact.actions, environment.n_actions)


@contextlib.contextmanager
def _quiet_mlflow():
    """No artifact download progress bars on the user's terminal while fetching a policy."""
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
    import mlflow

    with tempfile.TemporaryDirectory(prefix="qtally-policy-") as scratch, _quiet_mlflow():
        try:
            local = mlflow.artifacts.download_artifacts(run_id=run_id, artifact_path="policy_file/policy.npz", dst_path=scratch)
        except Exception as exc:  # unknown run, no such artifact, unreachable store
            raise QtallyError(f"{key}.run_id={run_id!r}: cannot fetch its policy_file/policy.npz ({_first_line(exc)})") from None
        return _from_policy_file(local, environment, f"{key}.run_id={run_id!r}")


def _from_model(uri: str, environment: TabularEnvironment, key: str) -> np.ndarray:
    """Load the pyfunc policy and ask it for an action in every state the encoder can decode."""
    import mlflow

    try:
        with _quiet_mlflow():
            model = mlflow.pyfunc.load_model(uri)
    except Exception as exc:
        raise QtallyError(f"{key}.uri={uri!r}: cannot load the model ({_first_line(exc)})") from None
    encoder = environment.encoder
    observations = [encoder.decode(s) for s in range(environment.n_states)]
    dtype = np.float64 if encoder.spec().get("kind") == "bins" else np.int64
    batch = np.asarray(observations, dtype=dtype).reshape(environment.n_states, encoder.width)
    try:
        with _quiet_mlflow():
            actions = np.asarray(model.predict(batch)).reshape(-1).astype(np.int64)
    except Exception as exc:
        raise QtallyError(f"{key}.uri={uri!r}: the model cannot act on this environment's observations ({_first_line(exc)})") from None
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


# ---------------------------------------------------------------- preparation


def _check_scalars(cfg: DictConfig) -> None:
    if cfg.episodes <= 0:
        raise QtallyError(f"episodes={cfg.episodes} must be a positive number of episodes")
    if not 0.0 <= cfg.gamma <= 1.0:
        raise QtallyError(f"gamma={cfg.gamma} is outside [0, 1]; the discount must lie in [0, 1]")
    if cfg.estimate not in ESTIMATE_CHOICES:
        raise QtallyError(f"estimate={cfg.estimate!r} is unknown; choose one of {', '.join(ESTIMATE_CHOICES)}")
    if cfg.min_visits < 0:
        raise QtallyError(f"min_visits={cfg.min_visits} must be 0 or more")
    if cfg.behaviour.importance_sampling not in IMPORTANCE_SAMPLING_CHOICES:
        raise QtallyError(
            f"behaviour.importance_sampling={cfg.behaviour.importance_sampling!r} is unknown; choose one of {', '.join(IMPORTANCE_SAMPLING_CHOICES)}"
        )
    if cfg.start.exploring not in EXPLORING_CHOICES:
        raise QtallyError(f"start.exploring={cfg.start.exploring!r} is unknown; choose one of {', '.join(EXPLORING_CHOICES)}")
    if cfg.policy.source is None:
        raise QtallyError(f"policy.source is required; choose one of {', '.join(POLICY_SOURCES)}")
    if cfg.env.truncation not in TRUNCATION_CHOICES:
        raise QtallyError(f"env.truncation={cfg.env.truncation!r}; choose one of {', '.join(TRUNCATION_CHOICES)}")


def _normalise_observation(value: Any, environment: TabularEnvironment) -> Any:
    """The configured start observation in the environment's own terms (an int, or a tuple of parts)."""
    if isinstance(value, (list, tuple)):
        parts = list(value)
    else:
        parts = [value]
    if environment.encoder.width == 1 and type(environment.encoder).__name__ == "DiscreteEncoder":
        if len(parts) != 1:
            raise QtallyError(f"start.observation={value!r}: this environment's observation is a single integer")
        return int(parts[0])
    if len(parts) != environment.encoder.width:
        raise QtallyError(
            f"start.observation={value!r}: needs {environment.encoder.width} parts ({', '.join(environment.encoder.names)})"
        )
    return tuple(int(p) for p in parts)


def _resolve_start(cfg: DictConfig, environment: TabularEnvironment):
    start = cfg.start
    observation = OmegaConf.to_container(start.observation) if OmegaConf.is_config(start.observation) else start.observation
    wants_start = observation is not None or start.action is not None or start.exploring != "none"
    if not wants_start:
        return None, None, None, False
    if environment.start_control is None:
        raise QtallyError(
            f"start.* needs an environment whose start state can be set, and {environment.spec.id!r} cannot; "
            "drop start.observation/start.action/start.exploring, or implement start_states()/reset_to() (see DEVELOPERS.md)"
        )
    if start.action is not None and not 0 <= start.action < environment.n_actions:
        raise QtallyError(f"start.action={start.action} is not an action; this environment has actions 0..{environment.n_actions - 1}")
    allowed = list(environment.start_control.start_states())
    if start.exploring != "none":
        if observation is not None or start.action is not None:
            raise QtallyError("start.exploring draws the start itself; leave start.observation and start.action null with it")
        return None, None, allowed, start.exploring == "pairs"
    if observation is None:
        raise QtallyError("start.action needs start.observation (the state it is taken in)")
    normalised = _normalise_observation(observation, environment)
    encode = environment.encoder.encode
    try:
        index = encode(normalised)
        allowed_index = {encode(s) for s in allowed}
    except (EncoderError, TypeError, ValueError) as exc:
        raise QtallyError(f"start.observation={observation!r}: {_first_line(exc)}") from None
    if index not in allowed_index:
        raise QtallyError(
            f"start.observation={observation!r} is not a state an episode can start in here "
            f"({len(allowed)} are, e.g. {allowed[0]!r})"
        )
    return normalised, start.action, None, False


def _exact_values(environment: TabularEnvironment, target: np.ndarray, gamma: float):
    from .envs.model import NoModelError
    from .envs.model_extraction import model_of
    from .evaluate.exact import ImproperPolicyError, policy_evaluation, q_from_v

    try:
        model = model_of(environment.env)
    except (NoModelError, ValueError) as exc:
        return None, None, _first_line(exc)
    if model.n_states != environment.n_states or model.n_actions != environment.n_actions:
        return None, None, "the model's state or action count does not match the observation table"
    try:
        v = policy_evaluation(model, target, gamma)
    except ImproperPolicyError as exc:
        return None, None, _first_line(exc)
    return v, q_from_v(model, v, gamma), None


def prepare_prediction(cfg: DictConfig) -> PredictionPlan:
    """Check and build everything before a run exists; :class:`QtallyError` for input the user can fix."""
    _check_scalars(cfg)
    uri = resolve_tracking_uri(cfg.tracking.uri)
    needs_store = {cfg.policy.source, cfg.behaviour.source} & {"run", "model"}
    if needs_store:
        import mlflow

        try:
            mlflow.set_tracking_uri(uri)
        except Exception as exc:
            raise QtallyError(f"tracking.uri={uri!r}: cannot open the MLflow store ({_first_line(exc)})") from None
    try:
        environment = make_environment(environment_spec(cfg.env))
    except EnvironmentConfigError as exc:
        raise QtallyError(str(exc)) from None
    try:
        target = policy_table(cfg.policy, environment, "policy")
        behaviour = None
        if cfg.behaviour.source is not None:
            behaviour = policy_table(cfg.behaviour, environment, "behaviour")
            uncovered = check_coverage(target.probs, behaviour.probs)
            if uncovered.any():
                example = environment.encoder.describe(int(np.flatnonzero(uncovered)[0]))
                raise QtallyError(
                    f"behaviour policy never takes actions the target takes in {int(uncovered.sum())} state(s) (e.g. {example}); "
                    "importance sampling needs a behaviour that covers the target (try behaviour.epsilon > 0)"
                )
        start_observation, start_action, start_states, random_first_action = _resolve_start(cfg, environment)
        if cfg.exact:
            exact_v, exact_q, reason = _exact_values(environment, target.probs, cfg.gamma)
        else:
            exact_v, exact_q, reason = None, None, "exact=false"
    except BaseException:
        environment.close()
        raise
    if behaviour is None:
        methods: tuple[str, ...] = ("on_policy",)
    else:
        chosen = cfg.behaviour.importance_sampling
        methods = ("ordinary", "weighted") if chosen == "both" else (chosen,)
    kinds = {"v": ("v",), "q": ("q",), "both": ("v", "q")}[cfg.estimate]
    return PredictionPlan(
        environment=environment,
        target=target,
        behaviour=behaviour,
        methods=methods,
        kinds=kinds,
        start_observation=start_observation,
        start_action=start_action,
        start_states=start_states,
        random_first_action=random_first_action,
        truncation=cfg.env.truncation,
        tracking_uri=uri,
        exact_v=exact_v,
        exact_q=exact_q,
        exact_reason=reason,
    )


# ---------------------------------------------------------------- the run


def _estimator(plan: PredictionPlan, cfg: DictConfig):
    env = plan.environment
    if plan.behaviour is None:
        return OnPolicyPrediction(env.n_states, env.n_actions, cfg.gamma, cfg.first_visit)
    return ImportanceSamplingPrediction(plan.target.probs, plan.behaviour.probs, cfg.gamma, cfg.first_visit)


def _pictures(plan: PredictionPlan, estimates: dict, directory: Path) -> list[Path]:
    from .envs.pictures import policy_pictures

    env = plan.environment
    actions = np.argmax(plan.target.probs, axis=1)
    method = plan.methods[-1]  # weighted where both
    v_est = estimates.get(("v", method))
    q_est = estimates.get(("q", method))
    q = np.nan_to_num(q_est.value) if q_est is not None else np.zeros((env.n_states, env.n_actions))
    if v_est is not None:
        values = v_est.value
    else:
        with np.errstate(invalid="ignore"):
            values = (plan.target.probs * q_est.value).sum(axis=1)
    pictures = []
    if np.isfinite(values).any():  # nothing to draw when no state has an estimate
        pictures += policy_pictures(env, q, actions, directory, "estimated", values=values)
    if plan.exact_v is not None:
        pictures += policy_pictures(env, plan.exact_q, actions, directory, "exact", values=plan.exact_v)
    return pictures


def run_prediction(cfg: DictConfig, progress_factory: Callable[[int], Any] | None = None, announce=None) -> PredictionSummary:
    """Estimate once and record the run; raises :class:`QtallyError` for input the user can fix."""
    plan = prepare_prediction(cfg)
    environment = plan.environment
    try:
        experiment = open_experiment(plan.tracking_uri, cfg.tracking.experiment)
    except BaseException:
        environment.close()
        raise
    tags = {
        "env": cfg.env.id,
        "kind": "prediction",
        "policy_source": str(cfg.policy.source),
        "policy": plan.target.label[:250],
        "behaviour": "on_policy" if plan.behaviour is None else plan.behaviour.label[:250],
        "seed": str(cfg.seed),
        "qtally.exact_values": "yes" if plan.exact_v is not None else f"no: {plan.exact_reason}"[:250],
    }
    import mlflow

    try:
        with recorded_run(cfg, cfg.tracking.run_name, tags) as run_id:
            if announce:
                announce(run_id)
            estimator = _estimator(plan, cfg)
            playing = plan.behaviour.probs if plan.behaviour is not None else plan.target.probs
            progress = progress_factory(cfg.episodes) if progress_factory else None
            try:
                played = play_prediction_episodes(
                    environment, playing, estimator, cfg.episodes, seed=cfg.seed,
                    start_observation=plan.start_observation, start_action=plan.start_action,
                    start_states=plan.start_states, random_first_action=plan.random_first_action,
                    truncation=plan.truncation, progress=progress,
                )
            finally:
                if progress is not None:
                    progress.close()
            estimates: dict[tuple[str, str], Estimates] = {}
            for kind in plan.kinds:
                for method in plan.methods:
                    estimates[(kind, method)] = estimator.state_values(method) if kind == "v" else estimator.action_values(method)
            rows, metrics = prediction_report(environment, estimates, plan.exact_v, plan.exact_q, cfg.min_visits)
            metrics.update({
                "episodes": float(played.episodes),
                "return_mean": played.return_mean,
                "truncated_fraction": played.truncated / max(played.episodes, 1),
                "steps": float(played.steps),
            })
            mlflow.log_metrics({k: v for k, v in metrics.items() if math.isfinite(v)})  # the report never makes inf; NaN means no value
            with tempfile.TemporaryDirectory(prefix="qtally-prediction-") as scratch:
                scratch_dir = Path(scratch)
                log_config(cfg, scratch_dir)
                mlflow.log_artifact(str(write_csv(rows, scratch_dir / "prediction.csv")), "tables")
                for picture in _pictures(plan, estimates, scratch_dir / "maps"):
                    mlflow.log_artifact(str(picture), "plots")
    finally:
        environment.close()
    return PredictionSummary(
        run_id=run_id, experiment_id=experiment.experiment_id, tracking_uri=plan.tracking_uri, metrics=metrics,
        rows=rows, plan=plan, played=played, min_visits=cfg.min_visits, first_visit=cfg.first_visit,
        episodes=cfg.episodes, estimates=estimates,
    )
