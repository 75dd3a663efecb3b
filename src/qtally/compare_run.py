"""One comparison, end to end: config -> the sweep's runs -> statistics -> files -> MLflow record.

This is the wiring behind ``qtally-compare``. Everything that can fail on bad input (the
options, the store, the runs, the groups, the metric) is checked before anything is
written. The CSV, Markdown and PNG go to ``output_dir`` and are then logged under
``comparison/`` to the sweep's parent run, with the per-group numbers as ``group.<key>.*``
metrics; runs without a common parent get a run of their own in ``tracking.experiment``,
which always ends FINISHED, FAILED or KILLED. The parent's tag ``qtally.group.<key>``
names the group behind each key.
"""

from __future__ import annotations

import math
import re
import time
from dataclasses import dataclass
from pathlib import Path

from omegaconf import DictConfig, OmegaConf

from .errors import QtallyError
from .evaluate.comparison import Comparison, compare_groups
from .evaluate.comparison_report import ReportContext, summary_metrics, write_csv, write_markdown
from .tracking.runs import resolve_tracking_uri
from .tracking.sweep_runs import FINISHED, SweepRuns, find_sweep_runs, group_runs, open_client, run_curve, status_counts

__all__ = ["CompareSummary", "run_comparison", "check_compare_config"]

GROUP_NAME_TAG_PREFIX = "qtally.group."  # on the parent: which group a group.<key>.* metric belongs to (as the sweep writes it)
# MLflow's rule for metric and tag names: letters, digits, underscores, dashes, periods, slashes, spaces.
_NAME = re.compile(r"^[A-Za-z0-9_\-./ ]+$")


@dataclass
class CompareSummary:
    comparison: Comparison
    context: ReportContext
    selection: SweepRuns
    files: list[Path]
    recorded_in: str | None  # the run holding the artifacts, None with record=false
    recorded_in_parent: bool


def check_compare_config(cfg: DictConfig) -> None:
    """Refuse option values that cannot work, in one line each, before the store is opened."""
    if not cfg.metric or not _NAME.match(cfg.metric):
        raise QtallyError(f"metric={cfg.metric!r}: not a metric name (letters, digits and _ - . / space), e.g. metric=eval_return_mean")
    if cfg.threshold is not None and not math.isfinite(cfg.threshold):
        raise QtallyError(f"threshold={cfg.threshold!r}: give a finite return, e.g. threshold=0.7, or leave it null")
    if cfg.sweep is not None and not str(cfg.sweep).strip():
        raise QtallyError("sweep='': give a sweep's parent run id, or sweep=latest")
    if cfg.group_by is not None:
        bad = [t for t in cfg.group_by if not isinstance(t, str) or not t.strip()]
        if bad or not len(cfg.group_by):
            raise QtallyError(f"group_by={OmegaConf.to_container(cfg.group_by)}: give a list of tag names, e.g. group_by=[variant,schedule]")
    if not str(cfg.output_dir).strip():
        raise QtallyError("output_dir='': give a directory for the CSV, Markdown and PNG, e.g. output_dir=comparison")


def _finished_curves(client, groups, metric: str):
    finished = [r for g in groups for r in g.runs if r.info.status == FINISHED]
    if not finished:
        return None, finished
    if not any(metric in r.data.metrics for r in finished):
        logged = sorted(set().union(*(r.data.metrics for r in finished)))
        raise QtallyError(f"metric={metric!r}: none of the {len(finished)} finished runs logged it; metrics they logged: {', '.join(logged) or '(none)'}")
    curves = {}
    for g in groups:
        runs = [run_curve(client, r) for r in g.runs if r.info.status == FINISHED]
        if runs:
            curves[g.key] = (g.label, runs)
    return curves, finished


def _write_files(comparison: Comparison, context: ReportContext, curves, directory: Path, title: str) -> list[Path]:
    from .comparison_plots import group_learning_curves

    directory.mkdir(parents=True, exist_ok=True)
    ordered = [(g.label, curves[g.key][1]) for g in comparison.groups]
    return [
        write_csv(comparison, context, directory / "comparison.csv"),
        write_markdown(comparison, context, directory / "comparison.md"),
        group_learning_curves(ordered, directory / "learning_curves.png", title, comparison.threshold),
    ]


def _log(client, run_id: str, comparison: Comparison, files: list[Path]) -> None:
    from mlflow.entities import Metric, RunTag

    now = int(time.time() * 1000)
    metrics = [Metric(k, v, now, 0) for k, v in summary_metrics(comparison).items()]
    tags = [RunTag("qtally.compare.metric", comparison.metric)]
    if comparison.best is not None:
        tags.append(RunTag("qtally.compare.best", comparison.groups[comparison.best].label[:5000]))
    tags += [RunTag(f"{GROUP_NAME_TAG_PREFIX}{g.key}", g.label[:500]) for g in comparison.groups]
    for i in range(0, len(metrics), 500):
        client.log_batch(run_id, metrics=metrics[i : i + 500], tags=tags if i == 0 else [])
    if not metrics:
        client.log_batch(run_id, tags=tags)
    for path in files:
        client.log_artifact(run_id, str(path), "comparison")


def _record_in_new_run(client, cfg: DictConfig, selection: SweepRuns, comparison: Comparison, files: list[Path]) -> str:
    experiment = client.get_experiment_by_name(cfg.tracking.experiment)
    experiment_id = experiment.experiment_id if experiment else client.create_experiment(cfg.tracking.experiment)
    run = client.create_run(experiment_id, run_name=f"compare {selection.experiment_name}", tags={
        "qtally.role": "comparison",
        "qtally.compare.source": selection.description[:5000],
        "qtally.compare.experiment": selection.experiment_name,
    })
    run_id = run.info.run_id
    status = "FAILED"
    try:
        _log(client, run_id, comparison, files)
        status = "FINISHED"
    except KeyboardInterrupt:
        status = "KILLED"
        raise
    finally:
        client.set_terminated(run_id, status)
    return run_id


def run_comparison(cfg: DictConfig) -> CompareSummary:
    """Compare the runs ``cfg`` names; raises :class:`QtallyError` for input the user can fix."""
    check_compare_config(cfg)
    client = open_client(resolve_tracking_uri(cfg.tracking.uri))
    selection = find_sweep_runs(client, cfg.sweep, cfg.experiment, cfg.filter)
    group_by = list(cfg.group_by) if cfg.group_by is not None else None
    groups = group_runs(selection.runs, group_by)
    counts = status_counts(selection.runs)
    curves, finished = _finished_curves(client, groups, cfg.metric)
    if curves is None:
        raise QtallyError(
            f"{selection.description}: none of its {len(selection.runs)} runs has finished yet "
            f"({', '.join(f'{n} {s.lower()}' for s, n in sorted(counts.items()))}); run qtally-compare again when some have"
        )
    comparison = compare_groups(curves, cfg.metric, cfg.higher_is_better, cfg.threshold)
    context = ReportContext(selection.description, counts, {g.key: status_counts(g.runs) for g in groups}, selection.planned)
    files = _write_files(comparison, context, curves, Path(cfg.output_dir), f"{selection.description}: eval_return_mean")
    recorded_in, in_parent = None, False
    if cfg.record:
        try:
            if selection.parent_id is not None:
                _log(client, selection.parent_id, comparison, files)
                recorded_in, in_parent = selection.parent_id, True
            else:
                recorded_in = _record_in_new_run(client, cfg, selection, comparison, files)
        except QtallyError:
            raise
        except Exception as exc:
            text = (str(exc).strip().splitlines() or [type(exc).__name__])[0][:200]
            raise QtallyError(f"the comparison was written to {cfg.output_dir}/ but could not be logged to MLflow ({text}); record=false skips logging") from None
    return CompareSummary(comparison, context, selection, files, recorded_in, in_parent)
