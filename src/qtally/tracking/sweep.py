"""A sweep (``qtally-train -m``) as one MLflow parent run with a child run per job, through Hydra's callbacks.

:class:`SweepCallback` is registered in ``configs/train.yaml`` under ``hydra.callbacks``:

- ``on_multirun_start`` (on the machine that launches the sweep, before any job): opens the
  store and the experiment once (so parallel jobs never race to create tables), creates the
  parent run, and writes ``qtally-sweep.json`` into the sweep directory: the parent run id,
  the absolute tracking URI, the experiment, the number of jobs.
- ``on_job_start`` (in the job's own process, whatever launcher runs it): reads that file and
  hands the context to the job through the environment variable ``QTALLY_SWEEP``; the job
  opens its run as a child (``mlflow.parentRunId``) tagged with its comparison group.
- ``on_multirun_end`` (back on the launching machine): counts the children by status, logs
  per-group summaries on the parent, names every failed job on one line each, and closes
  the parent FINISHED (or FAILED when a job failed). The command then exits non-zero.

The context travels by file because a launcher may run jobs in other processes or on other
machines of a cluster (with the shared file system such clusters have); everything else is
read back from the tracking store.
"""

from __future__ import annotations

import json
import math
import os
import time
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Mapping

from hydra.experimental.callback import Callback
from omegaconf import DictConfig, OmegaConf

from .runs import open_experiment, resolve_tracking_uri
from .sweep_tags import GROUP_LABEL_TAG, GROUP_TAG, PARENT_TAG, ROLE_TAG, SWEEP_TAG, group_key, group_label

__all__ = [
    "SweepContext",
    "SweepCallback",
    "current_sweep",
    "child_tags",
    "record_failed_job",
    "sweep_failures",
    "close_open_sweep",
    "absolute_tracking_uri",
    "FAILURE_TAG",
]

CONTEXT_FILE = "qtally-sweep.json"
CONTEXT_VARIABLE = "QTALLY_SWEEP"
FAILURE_TAG = "qtally.failure"

# Set on the launching process by on_multirun_start / on_multirun_end.
_open_parent: dict[str, str] = {}
_failures: list[str] = []


@dataclass(frozen=True)
class SweepContext:
    parent_run_id: str
    tracking_uri: str
    experiment_id: str
    sweep_dir: str
    jobs: int
    swept_keys: tuple[str, ...] = ()


def absolute_tracking_uri(uri: str) -> str:
    """A relative SQLite path made absolute, so jobs started in other directories find the same file.

    >>> absolute_tracking_uri("http://127.0.0.1:5000")
    'http://127.0.0.1:5000'
    """
    prefix = "sqlite:///"
    if uri.startswith(prefix) and not uri.startswith(prefix + "/"):
        return prefix + str(Path(uri[len(prefix):]).resolve())
    return uri


def _job_count(config: DictConfig) -> int:
    """How many jobs the basic sweeper will launch (0 when another sweeper decides as it goes)."""
    from hydra._internal.core_plugins.basic_sweeper import BasicSweeper
    from hydra.core.override_parser.overrides_parser import OverridesParser

    sweeper = OmegaConf.select(config, "hydra.sweeper._target_", default="") or ""
    if not sweeper.endswith("BasicSweeper"):
        return 0
    arguments = list(OmegaConf.select(config, "hydra.overrides.task", default=[]) or [])
    params = OmegaConf.select(config, "hydra.sweeper.params", default=None)
    if params:
        arguments = [f"{key}={value}" for key, value in params.items()] + arguments
    overrides = OverridesParser.create().parse_overrides(arguments)
    batches = BasicSweeper.split_arguments(overrides, None)
    return sum(len(batch) for batch in batches)


def _swept_keys(config: DictConfig) -> tuple[str, ...]:
    """The keys the sweep varies (``key=a,b``, ranges, sweeper params): what tells its groups apart."""
    from hydra.core.override_parser.overrides_parser import OverridesParser

    arguments = [str(o) for o in (OmegaConf.select(config, "hydra.overrides.task", default=[]) or [])]
    keys = [o.key_or_group for o in OverridesParser.create().parse_overrides(arguments) if o.is_sweep_override()]
    params = OmegaConf.select(config, "hydra.sweeper.params", default=None)
    keys += list(params.keys()) if params else []
    return tuple(dict.fromkeys(keys))


class SweepCallback(Callback):
    """Hydra callback: the parent run, the children's context, and the sweep's closing summary."""

    def on_multirun_start(self, config: DictConfig, **kwargs: Any) -> None:
        from mlflow.tracking import MlflowClient

        uri = absolute_tracking_uri(resolve_tracking_uri(config.tracking.uri))
        experiment = open_experiment(uri, config.tracking.experiment)
        client = MlflowClient(uri)
        overrides = [str(o) for o in (OmegaConf.select(config, "hydra.overrides.task", default=[]) or [])]
        jobs = _job_count(config)
        if config.get("resume"):  # a sweep resumed: its parent opens again, its jobs find their own runs
            run = reopen_sweep(client, str(config.resume))
        else:
            run = client.create_run(
                experiment.experiment_id,
                run_name=f"sweep {time.strftime('%Y-%m-%d %H:%M:%S')}",
                tags={ROLE_TAG: "sweep", "qtally.sweep_overrides": " ".join(overrides)[:4000]},
            )
            client.log_param(run.info.run_id, "sweep.overrides", " ".join(overrides)[:500])
            client.log_param(run.info.run_id, "sweep.jobs", str(jobs))
        sweep_dir = Path(config.hydra.sweep.dir)
        sweep_dir.mkdir(parents=True, exist_ok=True)
        context = SweepContext(run.info.run_id, uri, experiment.experiment_id, str(sweep_dir.resolve()), jobs, _swept_keys(config))
        temporary = sweep_dir / (CONTEXT_FILE + ".partial")
        temporary.write_text(json.dumps(asdict(context)))
        os.replace(temporary, sweep_dir / CONTEXT_FILE)
        _open_parent.clear()
        _open_parent.update(run_id=run.info.run_id, uri=uri)
        _failures.clear()

    def on_job_start(self, config: DictConfig, **kwargs: Any) -> None:
        from hydra.core.hydra_config import HydraConfig
        from hydra.types import RunMode

        os.environ.pop(CONTEXT_VARIABLE, None)
        hydra_config = HydraConfig.get()
        if hydra_config.mode != RunMode.MULTIRUN:
            return
        path = Path(hydra_config.sweep.dir) / CONTEXT_FILE
        if path.exists():
            os.environ[CONTEXT_VARIABLE] = path.read_text()

    def on_multirun_end(self, config: DictConfig, **kwargs: Any) -> None:
        parent = _open_parent.get("run_id")
        if not parent:
            return
        summary = finish_sweep(parent, _open_parent["uri"])
        _name_best_trial(parent, _open_parent["uri"], Path(config.hydra.sweep.dir))
        _failures.extend(summary["failures"])
        _open_parent.clear()


SUPERSEDED_TAG = "qtally.superseded_by"


def sweep_parent(client, parent_run_id: str):
    """The parent run of a sweep to resume; a one-line error if there is none by that id."""
    from ..errors import QtallyError

    try:
        run = client.get_run(parent_run_id)
    except Exception:
        raise QtallyError(f"resume={parent_run_id}: no run with this id in the store; with -m, give the parent run id of the sweep to continue") from None
    if run.data.tags.get(ROLE_TAG) != "sweep":
        raise QtallyError(f"resume={parent_run_id} is not a sweep's parent run; with -m, resume names the parent of the sweep to continue")
    return run


def reopen_sweep(client, parent_run_id: str):
    """The parent run of the sweep to resume, set RUNNING again."""
    run = sweep_parent(client, parent_run_id)
    client.update_run(parent_run_id, status="RUNNING")
    return run


def earlier_run_of_job(context: SweepContext, group: str, seed: int):
    """In a resumed sweep, this job's run from before (the newest one for its group and seed), or None."""
    from mlflow.tracking import MlflowClient

    client = MlflowClient(context.tracking_uri)
    found = client.search_runs(
        [context.experiment_id],
        filter_string=f"tags.`{SWEEP_TAG}` = '{context.parent_run_id}' and tags.`{GROUP_TAG}` = '{group}' and tags.seed = '{seed}'",
        order_by=["attributes.start_time DESC"],
    )
    found = [run for run in found if SUPERSEDED_TAG not in run.data.tags]
    return found[0] if found else None


def supersede(context: SweepContext, old_run_id: str, new_run_id: str) -> None:
    """An earlier run of a job that could not be continued (no checkpoint) is replaced by a fresh one."""
    from mlflow.tracking import MlflowClient

    MlflowClient(context.tracking_uri).set_tag(old_run_id, SUPERSEDED_TAG, new_run_id)


def current_sweep() -> SweepContext | None:
    """The sweep this job belongs to, or None outside a sweep."""
    text = os.environ.get(CONTEXT_VARIABLE)
    if not text:
        return None
    fields = json.loads(text)
    fields["swept_keys"] = tuple(fields.get("swept_keys", ()))
    return SweepContext(**fields)


def _group_config(cfg: DictConfig) -> dict[str, Any]:
    container = OmegaConf.to_container(cfg, resolve=True)
    for key in ("tracking", "quiet", "hydra", "resume", "checkpoint_dir", "checkpoint_every", "engine"):  # none changes what is learned
        container.pop(key, None)
    return container


def job_group(cfg: DictConfig) -> str:
    """The comparison group of a job's config (its seed left out)."""
    return group_key(_group_config(cfg))


def child_tags(cfg: DictConfig, context: SweepContext) -> dict[str, str]:
    """The tags that make a job's run a child of its sweep and name its comparison group."""
    from hydra.core.hydra_config import HydraConfig

    overrides = [str(o) for o in HydraConfig.get().overrides.task]
    return {
        PARENT_TAG: context.parent_run_id,
        SWEEP_TAG: context.parent_run_id,
        GROUP_TAG: job_group(cfg),
        GROUP_LABEL_TAG: group_label(o for o in overrides if o.split("=", 1)[0].lstrip("+~") in context.swept_keys)[:500],
        ROLE_TAG: "job",
    }


def record_failed_job(cfg: DictConfig, context: SweepContext, run_name: str, tags: Mapping[str, str], reason: str) -> str:
    """A job that failed before its run could be opened still leaves a FAILED child with its reason."""
    from mlflow.tracking import MlflowClient

    client = MlflowClient(context.tracking_uri)
    run = client.create_run(context.experiment_id, run_name=run_name, tags={**tags, **child_tags(cfg, context), FAILURE_TAG: reason[:500]})
    client.set_terminated(run.info.run_id, status="FAILED")
    return run.info.run_id


def _t_half_width(values: list[float]) -> float:
    from scipy import stats

    n = len(values)
    if n < 2:
        return float("nan")
    mean = sum(values) / n
    sd = math.sqrt(sum((v - mean) ** 2 for v in values) / (n - 1))
    return float(stats.t.ppf(0.975, n - 1) * sd / math.sqrt(n))


def finish_sweep(parent_run_id: str, uri: str) -> dict[str, Any]:
    """Count the children, log the group summaries on the parent, close it; return the failures."""
    from mlflow.tracking import MlflowClient

    client = MlflowClient(uri)
    parent = client.get_run(parent_run_id)
    children = client.search_runs([parent.info.experiment_id], filter_string=f"tags.`{SWEEP_TAG}` = '{parent_run_id}'", max_results=10000)
    children = [child for child in children if SUPERSEDED_TAG not in child.data.tags]
    counts = {"FINISHED": 0, "FAILED": 0, "KILLED": 0, "RUNNING": 0}
    failures: list[str] = []
    groups: dict[str, list[float]] = {}
    labels: dict[str, str] = {}
    for child in children:
        status = child.info.status
        counts[status] = counts.get(status, 0) + 1
        if status == "FAILED":
            reason = child.data.tags.get(FAILURE_TAG, "no reason recorded")
            failures.append(f"job {child.info.run_name or child.info.run_id} ({child.data.tags.get(GROUP_LABEL_TAG, '')} seed={child.data.tags.get('seed', '?')}) failed: {reason}")
        key = child.data.tags.get(GROUP_TAG)
        if status == "FINISHED" and key and "eval_return_mean" in child.data.metrics:
            groups.setdefault(key, []).append(float(child.data.metrics["eval_return_mean"]))
            labels[key] = child.data.tags.get(GROUP_LABEL_TAG, key)
    expected = int(parent.data.params.get("sweep.jobs", "0") or 0)
    metrics = {
        "jobs_finished": counts["FINISHED"],
        "jobs_failed": counts["FAILED"],
        "jobs_interrupted": counts["KILLED"],
        "jobs_missing": max(expected - len(children), 0),
    }
    for key, finals in groups.items():
        metrics[f"group.{key}.eval_return_mean"] = sum(finals) / len(finals)
        metrics[f"group.{key}.seeds"] = len(finals)
        half = _t_half_width(finals)
        if math.isfinite(half):
            metrics[f"group.{key}.eval_return_ci95"] = half
        client.set_tag(parent_run_id, f"qtally.group.{key}", labels[key][:500])
    for name, value in metrics.items():
        client.log_metric(parent_run_id, name, float(value))
    status = "FINISHED" if not failures and counts["KILLED"] == 0 and metrics["jobs_missing"] == 0 else "FAILED"
    client.set_terminated(parent_run_id, status=status)
    return {"failures": failures, "metrics": metrics, "status": status}


def _name_best_trial(parent_run_id: str, uri: str, sweep_dir: Path) -> None:
    """A search sweeper (Optuna) leaves its best parameters in the sweep directory: put them on the parent."""
    results = sweep_dir / "optimization_results.yaml"
    if not results.exists():
        return
    from mlflow.tracking import MlflowClient

    found = OmegaConf.load(results)
    client = MlflowClient(uri)
    best = " ".join(f"{key}={value}" for key, value in (found.get("best_params") or {}).items())
    client.set_tag(parent_run_id, "qtally.best_trial", best[:500])
    if found.get("best_value") is not None:
        client.log_metric(parent_run_id, "best_trial_eval_return_mean", float(found.best_value))


def sweep_failures() -> list[str]:
    """One line per failed job of the sweep that just ended in this process (empty if none)."""
    return list(_failures)


def close_open_sweep(status: str = "KILLED") -> None:
    """Close a parent run left open by an interrupted sweep, so no run stays RUNNING."""
    parent = _open_parent.get("run_id")
    if not parent:
        return
    from mlflow.tracking import MlflowClient

    try:
        MlflowClient(_open_parent["uri"]).set_terminated(parent, status=status)
    finally:
        _open_parent.clear()
