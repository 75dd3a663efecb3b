"""``qtally-rollout``: a thin Hydra entry point around :func:`qtally.rollout_run.run_rollout`."""

from __future__ import annotations

import hydra
from omegaconf import DictConfig

from ..config.rollout_schema import register_rollout_schema
from .console import EpisodeProgress, pre_check_overrides, quiet_libraries, run_reporting_errors

PROGRAM = "qtally-rollout"


def RolloutProgress(total: int) -> EpisodeProgress:
    return EpisodeProgress(total, "rollout", show_epsilon=False)


def report_lines(summary) -> list[str]:
    """The console report: the answer first (mean return and interval, exact value), then the rest."""
    report, plan = summary.report, summary.plan
    lines = [f"policy: {plan.label}" + (f" (trained in run {plan.source_run})" if plan.source_run and plan.source_run not in plan.label else "")]
    line = f"return: {report.return_mean:.4g} ± {report.return_ci95:.3g} (95% interval, {report.episodes} episodes on environment seeds {report.seeds[0]}..{report.seeds[1]})"
    lines.append(line)
    if report.exact_return is not None:
        inside = "inside" if report.exact_in_interval else "OUTSIDE"
        lines.append(f"exact expected return: {report.exact_return:.4g} ({inside} the interval)")
    else:
        lines.append(f"exact expected return: none ({report.exact_reason})")
    if report.success_rate is not None:
        lines.append(f"success: {report.success_rate:.3f} ({report.successes} of {report.episodes}; success = {report.success_rule})")
    lines.append(f"length: {report.length_mean:.3g} steps on average, at most {report.length_max}" + (f"; {report.truncated} episode(s) cut by a time limit or the step cap" if report.truncated else ""))
    artifact = plan.artifact
    lines.append(
        f"unvisited states: {report.fallback_share:.2%} of {report.decisions} decisions fell back to {artifact.fallback.rule}"
        + (f" {artifact.fallback.action}" if artifact.fallback.action is not None else "")
        + f" (training reached {artifact.visited_share:.0%} of the table's states)"
    )
    if summary.animation_note:
        lines.append(f"animation: {summary.animation_note}")
    return lines


@hydra.main(version_base="1.3", config_path="pkg://qtally.configs", config_name="rollout")
def _rollout(cfg: DictConfig) -> None:
    from ..rollout_run import run_rollout

    progress = None if cfg.quiet or cfg.episodes < 200 else RolloutProgress
    summary = run_reporting_errors(PROGRAM, lambda: run_rollout(cfg, progress_factory=progress))
    if cfg.quiet:
        print(summary.run_id)  # quiet: the run id alone, for scripts
        return
    if summary.trace_text:
        print(summary.trace_text)
    print("\n".join(report_lines(summary)))
    saved = ["summary.json"] + (["trace.txt"] if summary.trace_text else []) + (["rollout.gif"] if summary.animation_note and not summary.animation_note.startswith("no animation") else [])
    print(f"run {summary.run_id} finished (experiment {cfg.tracking.experiment}; {', '.join(saved)} under rollout/)")


def main() -> None:
    from ..config.rollout_schema import RolloutConfig
    from ..config.schema import EnvConfig

    quiet_libraries()
    register_rollout_schema()
    pre_check_overrides(PROGRAM, RolloutConfig(env=EnvConfig()), ("env",), "configs/rollout.yaml")
    _rollout()
