"""One rollout, end to end: config -> the policy -> fits the environment? -> fresh episodes -> MLflow record.

This is the wiring behind ``qtally-rollout``. :func:`prepare_rollout` does everything that
can fail on bad input before a run is opened: exactly one policy source (a run id, a model
URI, a registered name at an alias, or the best run of a sweep ranked as ``qtally-promote``
ranks), the environment, and the policy's fit to it
(:meth:`~qtally.policy.artifact.PolicyArtifact.check_signature`: the same environment id,
constructor arguments, observation encoding and action count, or a refusal naming both
sides). :func:`run_rollout` then opens a run in its own experiment (``qtally-rollout`` by
default), tagged ``qtally.source_run`` with the training run behind the policy, plays the
episodes (:func:`qtally.evaluate.policy_rollout.roll_out`), and logs the metrics,
``summary.json``, the trace and the GIF.
"""

from __future__ import annotations

import json
import math
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

from omegaconf import DictConfig

from .config.rollout_schema import ROLLOUT_SOURCES
from .control.streams import rollout_seeds
from .control.truncation import resolve_step_cap
from .envs.factory import EnvironmentConfigError, TabularEnvironment, make_environment
from .errors import QtallyError, first_line
from .evaluate.policy_rollout import RolloutReport, format_trace, roll_out
from .experiment import environment_spec
from .policy.artifact import PolicyArtifact
from .tracking.runs import log_config, open_experiment, recorded_run, resolve_tracking_uri

__all__ = ["RolloutPlan", "RolloutSummary", "prepare_rollout", "run_rollout"]


@dataclass
class RolloutPlan:
    environment: TabularEnvironment
    artifact: PolicyArtifact
    label: str  # where the policy came from, for the console and the run's tags
    source_run: str | None  # the training run behind the policy, where it can be told
    step_cap: int
    tracking_uri: str


@dataclass
class RolloutSummary:
    run_id: str
    plan: RolloutPlan
    report: RolloutReport
    trace_text: str | None
    animation_note: str | None


def _one_source(cfg: DictConfig) -> str:
    given = [key for key in ROLLOUT_SOURCES if cfg.get(key) not in (None, "")]
    if len(given) != 1:
        shown = ", ".join(f"{k}={cfg.get(k)}" for k in given) or "none"
        raise QtallyError(f"name the policy one way: exactly one of run_id=, model=, name= (with alias=) or sweep= (given: {shown})")
    return given[0]


def _check_numbers(cfg: DictConfig) -> None:
    if cfg.episodes < 1:
        raise QtallyError(f"episodes={cfg.episodes}: give a positive number of episodes, e.g. episodes=1000")
    if cfg.seed < 0:
        raise QtallyError(f"seed={cfg.seed}: give a non-negative integer")
    if cfg.trace < 0 or cfg.trace > cfg.episodes:
        raise QtallyError(f"trace={cfg.trace}: give a number of episodes from 0 to episodes={cfg.episodes}")


def _fetch(cfg: DictConfig, source: str, client) -> tuple[PolicyArtifact, str, str | None]:
    from .tracking.policy_sources import model_policy_artifact, model_source_run, run_policy_artifact

    if source == "run_id":
        return run_policy_artifact(cfg.run_id, "run_id"), f"run {cfg.run_id}", str(cfg.run_id)
    if source == "model":
        uri = str(cfg.model)
        if not uri.startswith(("runs:/", "models:/")):
            raise QtallyError(f"model={uri!r}: give a model URI, runs:/<run id>/policy or models:/<name>@<alias> (or models:/<name>/<version>)")
        return model_policy_artifact(uri, "model"), f"model {uri}", model_source_run(uri)
    if source == "name":
        uri = f"models:/{cfg.name}@{cfg.alias}"
        from mlflow.exceptions import MlflowException

        try:
            client.get_model_version_by_alias(str(cfg.name), str(cfg.alias))
        except MlflowException as exc:
            raise QtallyError(f"name={cfg.name!r} alias={cfg.alias!r}: the registry has no such model alias ({first_line(exc)}); promote one with qtally-promote name={cfg.name}") from None
        return model_policy_artifact(uri, "name"), f"model {uri}", model_source_run(uri)
    from .promote_run import rank_runs

    ranking = rank_runs(client, str(cfg.sweep), cfg.experiment, None, cfg.metric, cfg.higher_is_better)
    best = ranking.candidates[0].run_id
    return run_policy_artifact(best, "sweep"), f"best run {best} of {ranking.selection.description} by {cfg.metric}", best


def prepare_rollout(cfg: DictConfig) -> RolloutPlan:
    """Check and build everything before a run exists; :class:`QtallyError` for input the user can fix."""
    source = _one_source(cfg)
    _check_numbers(cfg)
    uri = resolve_tracking_uri(cfg.tracking.uri)
    from .tracking.sweep_runs import open_client

    client = open_client(uri)
    import mlflow

    mlflow.set_tracking_uri(uri)
    try:
        environment = make_environment(environment_spec(cfg.env))
    except EnvironmentConfigError as exc:
        raise QtallyError(str(exc)) from None
    try:
        artifact, label, source_run = _fetch(cfg, source, client)
        try:
            artifact.check_signature(environment.signature())
        except ValueError as exc:
            raise QtallyError(f"{label}: {exc}") from None
        try:
            step_cap = resolve_step_cap(cfg.env.step_cap, environment.n_states)
        except ValueError as exc:
            raise QtallyError(str(exc)) from None
    except BaseException:
        environment.close()
        raise
    return RolloutPlan(environment, artifact, label, source_run, step_cap, uri)


def _summary_json(plan: RolloutPlan, report: RolloutReport, cfg: DictConfig) -> dict[str, Any]:
    return {
        "policy": plan.label,
        "source_run": plan.source_run,
        "environment": plan.environment.signature(),
        "episodes": report.episodes,
        "environment_seeds": list(report.seeds),
        "metrics": {k: v for k, v in report.metrics().items() if math.isfinite(v)},
        "success_rule": report.success_rule,
        "exact_return_reason": report.exact_reason,
        "fallback": plan.artifact.fallback.to_dict(),
        "visited_share": plan.artifact.visited_share,
        "step_cap": plan.step_cap,
    }


def run_rollout(cfg: DictConfig, progress_factory: Callable[[int], Any] | None = None) -> RolloutSummary:
    """Roll the policy out once and record the run; raises :class:`QtallyError` for input the user can fix."""
    plan = prepare_rollout(cfg)
    environment = plan.environment
    try:
        open_experiment(plan.tracking_uri, cfg.tracking.experiment)
    except BaseException:
        environment.close()
        raise
    tags = {
        "env": cfg.env.id,
        "kind": "rollout",
        "policy": plan.label[:250],
        "qtally.source_run": plan.source_run or "unknown",
        "seed": str(cfg.seed),
    }
    import mlflow

    trace_text = animation_note = None
    policy = plan.artifact.policy()
    try:
        with recorded_run(cfg, cfg.tracking.run_name or f"rollout {plan.label}"[:250], tags) as run_id:
            progress = progress_factory(cfg.episodes) if progress_factory else None
            try:
                report = roll_out(environment, policy, cfg.episodes, cfg.seed, plan.step_cap, trace=cfg.trace, exact=cfg.exact, progress=progress)
            except ValueError as exc:  # the refuse fallback met a state training never reached
                raise QtallyError(f"{plan.label}: {first_line(exc)}") from None
            finally:
                if progress is not None:
                    progress.close()
            mlflow.log_metrics({k: v for k, v in report.metrics().items() if math.isfinite(v)})
            mlflow.set_tag("qtally.exact_return", "yes" if report.exact_return is not None else f"no: {report.exact_reason}"[:250])
            with tempfile.TemporaryDirectory(prefix="qtally-rollout-") as scratch:
                scratch_dir = Path(scratch)
                log_config(cfg, scratch_dir)
                summary_path = scratch_dir / "summary.json"
                summary_path.write_text(json.dumps(_summary_json(plan, report, cfg), indent=2, sort_keys=True))
                mlflow.log_artifact(str(summary_path), "rollout")
                if report.traces:
                    trace_text = format_trace(report.traces, environment, policy.visited_states)
                    trace_path = scratch_dir / "trace.txt"
                    trace_path.write_text(trace_text)
                    mlflow.log_artifact(str(trace_path), "rollout")
                if cfg.animation:
                    animation_note = _animate(plan, policy, cfg, scratch_dir)
                    mlflow.set_tag("qtally.rollout_animation", animation_note[:250])
                    gif = scratch_dir / "rollout.gif"
                    if gif.exists():
                        mlflow.log_artifact(str(gif), "rollout")
    finally:
        environment.close()
    return RolloutSummary(run_id, plan, report, trace_text, animation_note)


def _animate(plan: RolloutPlan, policy, cfg: DictConfig, scratch_dir: Path) -> str:
    """The first rollout episode as a GIF: same environment seed and same acting uniforms, so the same episode."""
    from .envs.rollout_animation import rollout_animation
    from .evaluate.policy_rollout import PolicyActor

    actor = PolicyActor(policy, cfg.seed, describe=plan.environment.encoder.describe)
    path, note = rollout_animation(plan.environment.spec, actor, scratch_dir / "rollout.gif", seed=int(rollout_seeds(cfg.seed, 1)[0]))
    return note if path is not None else f"no animation: {note}"
