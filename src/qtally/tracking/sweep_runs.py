"""Reading a sweep's runs back from MLflow, for ``qtally-compare``.

Three ways to name the runs: a sweep's parent run id (its children are the runs whose
``mlflow.parentRunId`` is that id), ``latest`` (the newest run tagged ``qtally.role=sweep``
in an experiment), or an experiment and an MLflow filter string over all its runs. A
filter given with a sweep narrows that sweep's children. Runs are then put into comparison
groups by their ``qtally.group`` tag (set by the sweep) or by the tags the user names.
Every problem the user can fix becomes a :class:`~qtally.errors.QtallyError` in one line.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..errors import QtallyError
from ..evaluate.comparison import EVAL_METRIC, RunCurve
from .sweep_tags import GROUP_LABEL_TAG, GROUP_TAG, PARENT_TAG, ROLE_TAG, group_key

__all__ = ["FINISHED", "PLANNED_JOBS_PARAM", "SweepRuns", "RunGroup", "open_client", "find_sweep_runs", "group_runs", "run_curve", "status_counts"]

FINISHED = "FINISHED"
PLANNED_JOBS_PARAM = "sweep.jobs"  # the parent's param holding how many jobs the sweep launches (set by the sweep callback)
_PAGE = 1000


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return (text[0] if text else type(exc).__name__)[:200]


@dataclass(frozen=True)
class SweepRuns:
    """The job runs that were asked for (any status), and the parent they share, if any."""

    description: str  # for the report's first line, e.g. "sweep 3f2a... (experiment qtally)"
    experiment_id: str
    experiment_name: str
    parent_id: str | None
    runs: tuple  # mlflow.entities.Run
    planned: int | None = None  # jobs the sweep set out to run, where the parent says so (and no filter narrows it)


@dataclass(frozen=True)
class RunGroup:
    key: str
    label: str
    runs: tuple  # every run of the group, any status


def open_client(uri: str):
    """An MlflowClient on ``uri``, checked by one cheap call so a bad store fails here in one line."""
    from mlflow.tracking import MlflowClient

    try:
        client = MlflowClient(tracking_uri=uri)
        client.search_experiments(max_results=1)
    except Exception as exc:
        raise QtallyError(f"tracking.uri={uri!r}: cannot open the MLflow store ({_first_line(exc)})") from None
    return client


def _search(client, experiment_ids: list[str], filter_string: str, what: str) -> list:
    from mlflow.entities import ViewType

    runs: list = []
    token = None
    while True:
        try:
            page = client.search_runs(experiment_ids, filter_string=filter_string, run_view_type=ViewType.ACTIVE_ONLY, max_results=_PAGE, page_token=token)
        except Exception as exc:
            raise QtallyError(f"{what}: MLflow cannot use this filter ({_first_line(exc)}); write it like filter=\"tags.variant = 'on_policy' and params.episodes = '5000'\"") from None
        runs.extend(page)
        token = page.token
        if not token:
            return runs


def _both(*clauses: str | None) -> str:
    return " and ".join(f"{c}" for c in clauses if c)


def _experiment(client, name: str):
    experiment = client.get_experiment_by_name(name)
    if experiment is None:
        names = sorted(e.name for e in client.search_experiments(max_results=50))
        raise QtallyError(f"experiment={name!r}: no such experiment in this store; experiments here: {', '.join(names) or '(none)'}")
    return experiment


def _parent(client, sweep: str):
    from mlflow.exceptions import MlflowException

    try:
        return client.get_run(sweep)
    except MlflowException:
        raise QtallyError(
            f"sweep={sweep!r}: no run with this id in the store; give the parent run id of a sweep "
            "(the run tagged qtally.role=sweep), or sweep=latest experiment=<name>"
        ) from None


def find_sweep_runs(client, sweep: str | None, experiment: str, filter_string: str | None) -> SweepRuns:
    """The job runs named by ``sweep`` (a parent run id or ``latest``) or by ``experiment`` + ``filter_string``.

    Without ``sweep`` and ``filter_string``, the latest sweep of ``experiment``.
    """
    filter_string = (filter_string or "").strip() or None
    if sweep is None and filter_string is not None:
        exp = _experiment(client, experiment)
        found = [r for r in _search(client, [exp.experiment_id], filter_string, f"filter={filter_string!r}") if r.data.tags.get(ROLE_TAG) != "sweep"]
        if not found:
            raise QtallyError(f"filter={filter_string!r}: matches no run in experiment {experiment!r}; loosen the filter or check the experiment name")
        parents = {r.data.tags.get(PARENT_TAG) for r in found}
        parent_id = parents.pop() if len(parents) == 1 else None
        return SweepRuns(f"experiment {experiment}, filter {filter_string}", exp.experiment_id, exp.name, parent_id, tuple(found))

    if sweep is None or sweep == "latest":
        exp = _experiment(client, experiment)
        newest = client.search_runs([exp.experiment_id], filter_string=f"tags.`{ROLE_TAG}` = 'sweep'", order_by=["attributes.start_time DESC"], max_results=1)
        if not newest:
            raise QtallyError(
                f"sweep=latest: experiment {experiment!r} holds no sweep (no run tagged {ROLE_TAG}=sweep); "
                "run one with qtally-train -m, or compare plain runs with filter=\"...\" group_by=[variant,schedule]"
            )
        parent = newest[0]
    else:
        parent = _parent(client, sweep)
    parent_id = parent.info.run_id
    if parent.data.tags.get(ROLE_TAG) == "job" and parent.data.tags.get(PARENT_TAG):
        raise QtallyError(f"sweep={parent_id}: this is one job of sweep {parent.data.tags[PARENT_TAG]}; use sweep={parent.data.tags[PARENT_TAG]}")
    exp_name = client.get_experiment(parent.info.experiment_id).name
    runs = _search(client, [parent.info.experiment_id], _both(f"tags.`{PARENT_TAG}` = '{parent_id}'", filter_string), f"filter={filter_string!r}")
    if not runs:
        if filter_string:
            raise QtallyError(f"filter={filter_string!r}: matches none of the runs of sweep {parent_id}; loosen the filter")
        raise QtallyError(
            f"sweep={parent_id}: the sweep has no job runs (no run has {PARENT_TAG}={parent_id}); "
            "wait until its jobs have started, or give the id of another sweep"
        )
    where = f"sweep {parent_id} (experiment {exp_name})" + (f", filter {filter_string}" if filter_string else "")
    planned = parent.data.params.get(PLANNED_JOBS_PARAM)
    planned_jobs = int(planned) if planned and planned.isdigit() and not filter_string else None
    return SweepRuns(where, parent.info.experiment_id, exp_name, parent_id, tuple(runs), planned_jobs)


def group_runs(runs: Sequence, group_by: Sequence[str] | None) -> list[RunGroup]:
    """Groups by the named tags if ``group_by`` is given, else by the sweep's ``qtally.group`` tag."""
    if group_by:
        present = set().union(*(r.data.tags for r in runs))
        missing = [t for t in group_by if t not in present]
        if missing:
            known = sorted(t for t in present if not t.startswith("mlflow."))
            raise QtallyError(f"group_by={list(group_by)}: no run has the tag {missing[0]!r}; tags on these runs: {', '.join(known)}")
        groups: dict[str, tuple[str, list]] = {}
        for r in runs:
            values = {t: r.data.tags.get(t, "(none)") for t in group_by}
            label = " ".join(f"{t}={v}" for t, v in values.items())
            groups.setdefault(group_key(values), (label, []))[1].append(r)
    else:
        untagged = [r for r in runs if GROUP_TAG not in r.data.tags]
        if untagged:
            raise QtallyError(
                f"{len(untagged)} of {len(runs)} runs carry no {GROUP_TAG} tag (they were not started by a sweep); "
                "name the tags that tell the groups apart, e.g. group_by=[variant,schedule]"
            )
        groups = {}
        for r in runs:
            key = r.data.tags[GROUP_TAG]
            groups.setdefault(key, (r.data.tags.get(GROUP_LABEL_TAG, key), []))[1].append(r)
    return [RunGroup(key, label, tuple(members)) for key, (label, members) in groups.items()]


def status_counts(runs: Sequence) -> dict[str, int]:
    counts: dict[str, int] = {}
    for r in runs:
        counts[r.info.status] = counts.get(r.info.status, 0) + 1
    return counts


def run_curve(client, run) -> RunCurve:
    """A finished run's final metrics (MLflow's latest value: highest step, then latest write) and its
    ``eval_return_mean`` history, one value per step (the last written where a step repeats)."""
    finals = {k: float(v) for k, v in run.data.metrics.items() if v is not None and math.isfinite(float(v))}
    steps = np.zeros(0)
    values = np.zeros(0)
    if EVAL_METRIC in run.data.metrics:
        history = sorted(client.get_metric_history(run.info.run_id, EVAL_METRIC), key=lambda m: (m.step, m.timestamp))
        by_step = {m.step: m.value for m in history}  # later writes at one step replace earlier ones
        steps = np.asarray(sorted(by_step), dtype=float)
        values = np.asarray([by_step[s] for s in sorted(by_step)], dtype=float)
    return RunCurve(run_id=run.info.run_id, seed=run.data.tags.get("seed", "?"), finals=finals, steps=steps, values=values)
