"""One promotion, end to end: the runs of a sweep or experiment -> the best one -> a registry alias.

This is the wiring behind ``qtally-promote``. The runs are found as ``qtally-compare``
finds them (:func:`qtally.tracking.sweep_runs.find_sweep_runs`: a sweep's parent id,
``latest``, or an experiment with an optional MLflow filter); without ``sweep`` and
``filter`` every run of the experiment is a candidate. Finished runs are ranked by
:mod:`qtally.evaluate.promotion`. The winner's ``policy`` model is registered under
``name`` (a new version only if this run has none yet) and the alias is set on it, so
``models:/<name>@<alias>`` resolves to it. An alias already set moves only when the winner
beats the run it points at by the same rule, and, with ``require_significant``, only
when their 95% intervals do not overlap. Every problem the user can fix is a one-line
:class:`~qtally.errors.QtallyError`, raised before anything is registered.
"""

from __future__ import annotations

import contextlib
import math
import re
from dataclasses import dataclass

from omegaconf import DictConfig

from .errors import QtallyError, first_line
from .evaluate.promotion import EXACT_METRICS, Candidate, beats, candidate_from_metrics, describe, overlaps, ranked
from .tracking.runs import resolve_tracking_uri
from .tracking.sweep_runs import FINISHED, SweepRuns, find_sweep_runs, open_client

__all__ = ["Ranking", "PromoteOutcome", "rank_runs", "run_promotion", "check_promote_config"]

_NAME = re.compile(r"^[A-Za-z0-9_\-./ ]+$")
_FINISHED_ONLY = "attributes.status = 'FINISHED'"
EXACT_HINT = "greedy_expected_return"


@dataclass(frozen=True)
class Ranking:
    selection: SweepRuns
    candidates: list[Candidate]  # best first
    metric: str
    higher_is_better: bool
    exact_available: bool  # every candidate logged greedy_expected_return


@dataclass(frozen=True)
class PromoteOutcome:
    ranking: Ranking
    name: str
    alias: str
    winner: Candidate  # the best candidate of this selection
    incumbent: Candidate | None  # the run the alias pointed at before, if any
    moved: bool
    version: str  # the model version the alias points at now
    reason: str  # one sentence: what happened and why

    @property
    def current(self) -> Candidate:
        return self.winner if self.moved or self.incumbent is None else self.incumbent


def check_promote_config(cfg: DictConfig) -> None:
    """Refuse option values that cannot work, one line each, before the store is opened."""
    if not cfg.metric or not _NAME.match(str(cfg.metric)):
        raise QtallyError(f"metric={cfg.metric!r}: not a metric name (letters, digits and _ - . / space), e.g. metric=eval_return_mean")
    if cfg.sweep is not None and not str(cfg.sweep).strip():
        raise QtallyError("sweep='': give a sweep's parent run id, or sweep=latest")


def _episodes(run) -> int | None:
    text = run.data.params.get("episodes")
    return int(text) if text and text.isdigit() else None


def rank_runs(client, sweep: str | None, experiment: str, filter_string: str | None, metric: str, higher_is_better: bool = True) -> Ranking:
    """The finished runs named by sweep / experiment / filter, ranked by ``metric``; QtallyError on bad input."""
    filter_string = (filter_string or "").strip() or None
    whole_experiment = sweep is None and filter_string is None
    try:
        selection = find_sweep_runs(client, sweep, experiment, _FINISHED_ONLY if whole_experiment else filter_string)
    except QtallyError as exc:
        if whole_experiment and str(exc).startswith("filter="):
            raise QtallyError(f"experiment={experiment!r}: holds no finished run; train one with qtally-train tracking.experiment={experiment}") from None
        raise
    if whole_experiment:
        selection = SweepRuns(f"experiment {selection.experiment_name}", selection.experiment_id, selection.experiment_name, None, selection.runs)
    finished = [r for r in selection.runs if r.info.status == FINISHED]
    if not finished:
        raise QtallyError(f"{selection.description}: none of its {len(selection.runs)} runs has finished; promote again when some have")
    found = [(r, candidate_from_metrics(r.info.run_id, metric, r.data.metrics, _episodes(r))) for r in finished]
    missing = [r for r, c in found if c is None]
    if len(missing) == len(found):
        logged = sorted(set().union(*(r.data.metrics for r in finished)))
        raise QtallyError(f"metric={metric!r}: none of the {len(finished)} finished runs of {selection.description} logged it; metrics they logged: {', '.join(logged) or '(none)'}")
    if missing:
        why = " (their environment has no model, or they ran with exact=false)" if metric in EXACT_METRICS else ""
        raise QtallyError(
            f"metric={metric!r}: {len(missing)} of the {len(finished)} finished runs did not log it{why}, e.g. run {missing[0].info.run_id}; "
            "every candidate must have the metric: narrow the runs with filter=\"...\" or choose another metric"
        )
    candidates = ranked([c for _, c in found], higher_is_better)
    exact_available = all(EXACT_HINT in r.data.metrics for r in finished)
    return Ranking(selection, candidates, metric, higher_is_better, exact_available)


def _incumbent(client, name: str, alias: str):
    """The model version the alias points at, or None if the model or the alias does not exist yet."""
    from mlflow.exceptions import MlflowException

    try:
        return client.get_model_version_by_alias(name, alias)
    except MlflowException:
        return None


def _version_of_run(client, name: str, run_id: str):
    from mlflow.exceptions import MlflowException

    try:
        versions = client.search_model_versions(f"name = '{name}'")
    except MlflowException:
        return None
    mine = [v for v in versions if v.run_id == run_id]
    return max(mine, key=lambda v: int(v.version)) if mine else None


@contextlib.contextmanager
def _registry_quiet():
    """Keep MLflow's registration chatter ("Successfully registered ...", where it found the model) off the console."""
    import io
    import logging

    logger = logging.getLogger("mlflow")
    level = logger.level
    logger.setLevel(logging.ERROR)
    try:
        with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
            yield
    finally:
        logger.setLevel(level)


def _register(client, name: str, winner: Candidate, metric: str) -> str:
    """The version of ``name`` holding the winner's policy model, registering it if need be."""
    import mlflow

    existing = _version_of_run(client, name, winner.run_id)
    if existing is not None:
        return str(existing.version)
    try:
        with _registry_quiet():
            version = mlflow.register_model(f"runs:/{winner.run_id}/policy", name)
    except Exception as exc:
        raise QtallyError(
            f"run {winner.run_id}: its policy model cannot be registered as {name!r} ({first_line(exc)}); "
            "was it trained with tracking.log_model=false?"
        ) from None
    client.set_model_version_tag(name, version.version, "qtally.source_run", winner.run_id)
    client.set_model_version_tag(name, version.version, f"qtally.{metric}", f"{winner.value:.6g}")
    return str(version.version)


def run_promotion(cfg: DictConfig) -> PromoteOutcome:
    """Promote the best run ``cfg`` names; raises :class:`QtallyError` for input the user can fix."""
    check_promote_config(cfg)
    if not cfg.name or not str(cfg.name).strip():
        raise QtallyError("name is required: the registered model the alias belongs to, e.g. name=restock-policy")
    if not cfg.alias or not re.match(r"^[A-Za-z_][A-Za-z0-9_\-]*$", str(cfg.alias)) or re.match(r"^[vV]\d+$", str(cfg.alias)):
        raise QtallyError(f"alias={cfg.alias!r}: an alias is letters, digits, _ and -, starting with a letter (and not v<number>), e.g. alias=best")
    name, alias, metric = str(cfg.name), str(cfg.alias), str(cfg.metric)
    uri = resolve_tracking_uri(cfg.tracking.uri)
    client = open_client(uri)
    import mlflow

    mlflow.set_tracking_uri(uri)
    ranking = rank_runs(client, cfg.sweep, cfg.experiment, cfg.filter, metric, cfg.higher_is_better)
    winner = ranking.candidates[0]
    incumbent_version = _incumbent(client, name, alias)
    incumbent = None
    if incumbent_version is not None:
        try:
            run = client.get_run(incumbent_version.run_id)
            incumbent = candidate_from_metrics(run.info.run_id, metric, run.data.metrics, _episodes(run))
        except Exception:
            incumbent = None
        if incumbent is None:
            reason = f"the run it pointed at ({incumbent_version.run_id}) has no {metric}, so the best candidate replaces it"
        elif winner.run_id == incumbent.run_id:
            return PromoteOutcome(ranking, name, alias, winner, incumbent, False, str(incumbent_version.version), "the incumbent is the best run here")
        elif not beats(winner, incumbent, ranking.higher_is_better):
            return PromoteOutcome(ranking, name, alias, winner, incumbent, False, str(incumbent_version.version), f"the best candidate, {describe(winner, metric)}, is not better")
        elif cfg.require_significant and overlaps(winner, incumbent):
            width = "" if math.isfinite(winner.ci95) and math.isfinite(incumbent.ci95) else " (an interval is unknown)"
            return PromoteOutcome(
                ranking, name, alias, winner, incumbent, False, str(incumbent_version.version),
                f"the best candidate, {describe(winner, metric)}, is better but its 95% interval overlaps the incumbent's{width} (require_significant=true)",
            )
        else:
            reason = "better" + (", and the 95% intervals do not overlap" if cfg.require_significant else "")
    else:
        if cfg.require_significant:
            reason = "no run held the alias yet (nothing to be significantly better than)"
        else:
            reason = "no run held the alias yet"
    version = _register(client, name, winner, metric)
    client.set_registered_model_alias(name, alias, version)
    return PromoteOutcome(ranking, name, alias, winner, incumbent, True, version, reason)
