"""A :class:`~qtally.evaluate.comparison.Comparison` as words: the terminal table, the CSV and the Markdown file.

Formatting only; the numbers come from :mod:`qtally.evaluate.comparison`. Every output
names what it was computed on (how many runs finished, failed, are still running) so a
partial sweep is never read as a whole one.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping

from .comparison import ALPHA, EVAL_METRIC, MIN_SEEDS, Comparison, GroupSummary, Interval

__all__ = ["ReportContext", "status_line", "terminal_report", "write_csv", "write_markdown", "summary_metrics"]


@dataclass(frozen=True)
class ReportContext:
    description: str  # which runs: "sweep <id> (experiment <name>)" or the filter
    counts: Mapping[str, int]  # status -> runs, over the whole selection
    group_counts: Mapping[str, Mapping[str, int]]  # group key -> status -> runs
    planned: int | None = None  # jobs the sweep set out to run, when known


def _num(x: float, digits: int = 4) -> str:
    return f"{x:.{digits}g}" if math.isfinite(x) else "-"


def _interval(i: Interval) -> str:
    if i.n == 0:
        return "-"
    if not math.isfinite(i.half_width):
        return f"{_num(i.mean)} (1 seed)"
    return f"{_num(i.mean)} ± {_num(i.half_width, 2)}"


def status_line(counts: Mapping[str, int], planned: int | None = None) -> str:
    """``12 runs: 10 finished, 1 failed, 1 running; compared on the 10 finished, 2 missing from the comparison``.

    With ``planned`` (the jobs the sweep set out to run) the jobs not yet started count as missing too.
    """
    found = sum(counts.values())
    total = max(found, planned or 0)
    finished = counts.get("FINISHED", 0)
    parts = [f"{finished} finished"]
    for status, word in (("FAILED", "failed"), ("KILLED", "interrupted"), ("RUNNING", "running"), ("SCHEDULED", "not started")):
        if counts.get(status):
            parts.append(f"{counts[status]} {word}")
    if total > found:
        parts.append(f"{total - found} not started yet")
    missing = total - finished
    tail = f"; compared on the {finished} finished, {missing} missing from the comparison" if missing else ""
    return f"{total} runs: {', '.join(parts)}{tail}"


def _threshold_cell(g: GroupSummary) -> str:
    total = g.threshold_reached + g.threshold_never
    if total == 0:
        return "-"
    mean = _num(g.threshold_episodes, 5) if g.threshold_reached else "never"
    return f"{mean} ({g.threshold_reached}/{total} reached)"


def _columns(c: Comparison) -> list[str]:
    names = ["rank", "group", "seeds", f"final {EVAL_METRIC} (95% CI)", "area under eval curve"]
    if c.threshold is not None:
        names.append(f"episodes to >= {_num(c.threshold)}")
    if any(g.optimality_gap is not None for g in c.groups):
        names.append("final optimality_gap")
    if c.metric != EVAL_METRIC:
        names.append(f"final {c.metric} (95% CI)")
    return names


def _row(c: Comparison, rank: int, g: GroupSummary, ctx: ReportContext) -> list[str]:
    in_group = sum(ctx.group_counts.get(g.key, {}).values()) or g.runs
    cells = [str(rank), g.label, f"{g.seeds}/{in_group}", _interval(g.final), _interval(g.auc)]
    if c.threshold is not None:
        cells.append(_threshold_cell(g))
    if any(x.optimality_gap is not None for x in c.groups):
        cells.append(_interval(g.optimality_gap) if g.optimality_gap is not None else "-")
    if c.metric != EVAL_METRIC:
        cells.append(_interval(g.metric))
    return cells


def _direction(c: Comparison) -> str:
    return "higher is better" if c.higher_is_better else "lower is better"


def _test_line(c: Comparison) -> str:
    return (
        f"Welch's t-test on per-seed final {c.metric}, best group against each other group with at least {MIN_SEEDS} seeds, "
        f"Holm-adjusted across {c.tests} comparison{'s' if c.tests != 1 else ''}, {ALPHA:.0%} level"
    )


def terminal_report(c: Comparison, ctx: ReportContext) -> str:
    """A fixed-width table, then one verdict line per group."""
    header = _columns(c)
    rows = [_row(c, i + 1, g, ctx) for i, g in enumerate(c.groups)]
    widths = [max(len(h), *(len(r[j]) for r in rows)) for j, h in enumerate(header)]
    right = {0, 2}

    def line(cells: list[str]) -> str:
        return "  ".join(cell.rjust(w) if j in right else cell.ljust(w) for j, (cell, w) in enumerate(zip(cells, widths))).rstrip()

    out = [f"comparison of {ctx.description}", status_line(ctx.counts, ctx.planned), f"ranked by final {c.metric} ({_direction(c)}); intervals are 95% Student-t across seeds", ""]
    out.append(line(header))
    out.append(line(["-" * w for w in widths]))
    out.extend(line(r) for r in rows)
    out.append("")
    out.append(f"verdicts ({_test_line(c)}):")
    for i, (g, v) in enumerate(zip(c.groups, c.verdicts)):
        out.append(f"  {i + 1}. {g.label}: {v.text}")
    return "\n".join(out)


CSV_FIELDS = [
    "rank", "group", "label", "runs_in_group", "finished", "failed", "running", "seeds",
    "final_eval_return_mean", "final_eval_return_ci95", "auc_eval_return_mean", "auc_ci95",
    "threshold", "threshold_episodes_mean", "threshold_reached", "threshold_never",
    "final_optimality_gap", "final_optimality_gap_ci95",
    "metric", "higher_is_better", "metric_mean", "metric_ci95",
    "difference_best_minus_this", "difference_low", "difference_high", "welch_t", "welch_df", "p_value", "p_adjusted", "verdict", "verdict_text",
]


def _csv_num(x) -> str:
    if x is None:
        return ""
    x = float(x)
    return repr(x) if math.isfinite(x) else ""


def write_csv(c: Comparison, ctx: ReportContext, path: Path) -> Path:
    """One row per group, numbers at full precision (empty where there is none)."""
    tmp = path.with_suffix(".csv.tmp")
    with tmp.open("w", newline="") as stream:
        writer = csv.DictWriter(stream, fieldnames=CSV_FIELDS)
        writer.writeheader()
        for i, (g, v) in enumerate(zip(c.groups, c.verdicts)):
            counts = ctx.group_counts.get(g.key, {})
            w = v.welch
            gap = g.optimality_gap
            writer.writerow({
                "rank": i + 1, "group": g.key, "label": g.label, "runs_in_group": sum(counts.values()) or g.runs,
                "finished": counts.get("FINISHED", g.runs), "failed": counts.get("FAILED", 0) + counts.get("KILLED", 0),
                "running": counts.get("RUNNING", 0) + counts.get("SCHEDULED", 0), "seeds": g.seeds,
                "final_eval_return_mean": _csv_num(g.final.mean), "final_eval_return_ci95": _csv_num(g.final.half_width),
                "auc_eval_return_mean": _csv_num(g.auc.mean), "auc_ci95": _csv_num(g.auc.half_width),
                "threshold": _csv_num(c.threshold), "threshold_episodes_mean": _csv_num(g.threshold_episodes),
                "threshold_reached": g.threshold_reached if c.threshold is not None else "",
                "threshold_never": g.threshold_never if c.threshold is not None else "",
                "final_optimality_gap": _csv_num(gap.mean if gap else None), "final_optimality_gap_ci95": _csv_num(gap.half_width if gap else None),
                "metric": c.metric, "higher_is_better": str(c.higher_is_better).lower(),
                "metric_mean": _csv_num(g.metric.mean), "metric_ci95": _csv_num(g.metric.half_width),
                "difference_best_minus_this": _csv_num(w.difference if w else None), "difference_low": _csv_num(w.low if w else None),
                "difference_high": _csv_num(w.high if w else None), "welch_t": _csv_num(w.statistic if w else None),
                "welch_df": _csv_num(w.dof if w else None), "p_value": _csv_num(w.p_value if w else None),
                "p_adjusted": _csv_num(v.p_adjusted), "verdict": v.kind, "verdict_text": v.text,
            })
    tmp.replace(path)
    return path


def write_markdown(c: Comparison, ctx: ReportContext, path: Path) -> Path:
    """The same table as the terminal, as a Markdown table with the verdicts and the definitions under it."""
    header = _columns(c) + ["verdict"]
    lines = [
        f"# Comparison of {ctx.description}",
        "",
        status_line(ctx.counts, ctx.planned) + ".",
        "",
        f"Ranked by final `{c.metric}` ({_direction(c)}). Intervals: 95% Student-t across seeds.",
        "",
        "| " + " | ".join(header) + " |",
        "|" + "|".join("---" for _ in header) + "|",
    ]
    for i, (g, v) in enumerate(zip(c.groups, c.verdicts)):
        cells = _row(c, i + 1, g, ctx) + [v.text]
        lines.append("| " + " | ".join(cell.replace("|", "\\|") for cell in cells) + " |")
    lines += [
        "",
        f"Verdicts: {_test_line(c)}.",
        "",
        "- *seeds*: finished runs with the ranking metric / all runs of the group.",
        f"- *area under eval curve*: per run, the trapezoid integral of `{EVAL_METRIC}` over episodes divided by the episode span "
        "(first to last evaluation), i.e. the average evaluation return over the run; then the mean across seeds.",
    ]
    if c.threshold is not None:
        lines.append(f"- *episodes to >= {_num(c.threshold)}*: per run, the first evaluation episode where `{EVAL_METRIC}` reached it; the mean over the runs that did.")
    path.write_text("\n".join(lines) + "\n")
    return path


def summary_metrics(c: Comparison) -> dict[str, float]:
    """Per-group numbers for the parent run, under ``group.<key>.*`` (finite values only).

    The names of the final mean, its interval and the seed count are those the sweep itself
    logs on its parent at the end, so a later comparison updates the same keys.
    """
    metrics: dict[str, float] = {}
    for i, (g, v) in enumerate(zip(c.groups, c.verdicts)):
        prefix = f"group.{g.key}."
        values = {
            "rank": i + 1,
            "seeds": g.final.n,
            f"{EVAL_METRIC}": g.final.mean,
            "eval_return_ci95": g.final.half_width,
            f"auc_{EVAL_METRIC}": g.auc.mean,
            "threshold_episodes_mean": g.threshold_episodes,
            "optimality_gap": g.optimality_gap.mean if g.optimality_gap else math.nan,
            "p_adjusted": v.p_adjusted,
        }
        if c.metric != EVAL_METRIC:
            values[c.metric] = g.metric.mean
        metrics.update({prefix + k: float(x) for k, x in values.items() if math.isfinite(float(x))})
    return metrics
