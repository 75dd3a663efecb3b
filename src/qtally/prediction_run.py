"""One prediction run, end to end: config -> policy tables -> episodes -> estimates -> MLflow record.

This is the wiring behind ``qtally-evaluate``. :func:`prepare_prediction` does everything
that can fail on bad input (the config rules of :mod:`qtally.config.validate_evaluate`, the
environment, the policies of :mod:`qtally.tracking.policy_sources`, coverage of the target
by the behaviour policy, the exact values where a model exists) before a run is opened, so
bad input leaves no run behind. :func:`run_prediction` then opens the run,
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

import math
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
from omegaconf import DictConfig

from .config.validate import ConfigError
from .config.validate_evaluate import POLICY_SOURCES, resolve_start, validate_evaluate
from .envs.factory import EnvironmentConfigError, TabularEnvironment, make_environment
from .envs.model import TabularModel
from .evaluate.prediction import (
    Estimates,
    ImportanceSamplingPrediction,
    OnPolicyPrediction,
    PlayedSummary,
    check_coverage,
    play_prediction_episodes,
)
from .evaluate.prediction_report import ReportRow, prediction_report, write_csv
from .errors import QtallyError, first_line
from .experiment import environment_spec
from .tracking.policy_sources import PolicyTable, policy_table
from .tracking.runs import log_config, open_experiment, recorded_run, resolve_tracking_uri

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
    exact_start_value: float | None = None  # the exact value where the episodes start (None: not one state or distribution)


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


# ---------------------------------------------------------------- preparation


def _model_of(environment: TabularEnvironment) -> tuple[TabularModel | None, str | None]:
    """The environment's model if it has one that fits the table, else None and why not."""
    from .envs.model import NoModelError
    from .envs.model_extraction import model_of

    try:
        model = model_of(environment.env)
    except (NoModelError, ValueError) as exc:
        return None, first_line(exc)
    if model.n_states != environment.n_states or model.n_actions != environment.n_actions:
        return None, "the model's state or action count does not match the observation table"
    return model, None


def _exact_values(model: TabularModel, target: np.ndarray, gamma: float):
    from .evaluate.exact import ImproperPolicyError, policy_evaluation, q_from_v

    try:
        v = policy_evaluation(model, target, gamma)
    except ImproperPolicyError as exc:
        return None, None, first_line(exc)
    return v, q_from_v(model, v, gamma), None


def _exact_start_value(environment: TabularEnvironment, model: TabularModel | None, exact_v: np.ndarray | None, start) -> float | None:
    """The exact value of the policy where every episode starts: the model's start distribution, or the chosen state.

    None where the episodes start from a drawn state or with a forced first action (then
    the first return measures something else than V at one start).
    """
    from .evaluate.exact import start_value

    if exact_v is None or model is None or start.action is not None or start.states is not None:
        return None
    if start.observation is None:
        return start_value(model, exact_v)
    return float(exact_v[environment.encoder.encode(start.observation)])


def _check_covered(environment: TabularEnvironment, target: PolicyTable, behaviour: PolicyTable, model: TabularModel | None) -> None:
    """Refuse a behaviour that never takes an action the target takes, in a state an episode can act in.

    A terminal state is no such state: no action is ever taken there, so what either
    policy would do in it cannot bias the importance weights.
    """
    uncovered = check_coverage(target.probs, behaviour.probs) & environment.decision_states(model)
    if uncovered.any():
        example = environment.encoder.describe(int(np.flatnonzero(uncovered)[0]))
        raise QtallyError(
            f"behaviour [{behaviour.label}] never takes actions the target [{target.label}] takes in {int(uncovered.sum())} state(s) "
            f"(e.g. {example}); importance sampling needs a behaviour that covers the target (try behaviour.epsilon > 0)"
        )


def prepare_prediction(cfg: DictConfig) -> PredictionPlan:
    """Check and build everything before a run exists; :class:`QtallyError` for input the user can fix."""
    try:
        validate_evaluate(cfg)
    except ConfigError as exc:
        raise QtallyError(str(exc)) from None
    uri = resolve_tracking_uri(cfg.tracking.uri)
    needs_store = {cfg.policy.source, cfg.behaviour.source} & {"run", "model"}
    if needs_store:
        import mlflow

        try:
            mlflow.set_tracking_uri(uri)
        except Exception as exc:
            raise QtallyError(f"tracking.uri={uri!r}: cannot open the MLflow store ({first_line(exc)})") from None
    try:
        environment = make_environment(environment_spec(cfg.env))
    except EnvironmentConfigError as exc:
        raise QtallyError(str(exc)) from None
    try:
        target = policy_table(cfg.policy, environment, "policy")
        behaviour = None
        model, no_model = (None, "exact=false")
        if cfg.exact or cfg.behaviour.source is not None:
            model, no_model = _model_of(environment)
        if cfg.behaviour.source is not None:
            behaviour = policy_table(cfg.behaviour, environment, "behaviour")
            _check_covered(environment, target, behaviour, model)
        start = resolve_start(cfg, environment)
        if not cfg.exact:
            exact_v, exact_q, reason = None, None, "exact=false"
        elif model is None:
            exact_v, exact_q, reason = None, None, no_model
        else:
            exact_v, exact_q, reason = _exact_values(model, target.probs, cfg.gamma)
        exact_start = _exact_start_value(environment, model, exact_v, start)
    except ConfigError as exc:
        environment.close()
        raise QtallyError(str(exc)) from None
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
        start_observation=start.observation,
        start_action=start.action,
        start_states=start.states,
        random_first_action=start.random_first_action,
        truncation=cfg.env.truncation,
        tracking_uri=uri,
        exact_v=exact_v,
        exact_q=exact_q,
        exact_start_value=exact_start,
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
                    truncation=plan.truncation, step_cap=cfg.env.step_cap, progress=progress,
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
                "step_capped_fraction": played.capped / max(played.episodes, 1),
                **({"start_value_estimate": played.start_value_mean, "start_value_ci95": played.start_value_ci95} if plan.behaviour is None and plan.start_action is None else {}),
                **({"start_value_exact": plan.exact_start_value} if plan.exact_start_value is not None else {}),
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
