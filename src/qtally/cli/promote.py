"""``qtally-promote``: a thin Hydra entry point around :func:`qtally.promote_run.run_promotion`."""

from __future__ import annotations

import sys

import hydra
from omegaconf import DictConfig

from ..config.promote_schema import register_promote_schema
from .compare import quote_filter
from .console import pre_check_overrides, quiet_libraries, run_reporting_errors

PROGRAM = "qtally-promote"


def report_lines(outcome) -> list[str]:
    """What the console says: what changed (old run, new run, both figures) or that the incumbent stays."""
    from ..evaluate.promotion import describe

    metric = outcome.ranking.metric
    target = f"models:/{outcome.name}@{outcome.alias}"
    ranking = outcome.ranking
    lines = [f"{ranking.selection.description}: {len(ranking.candidates)} finished run(s) ranked by {metric} ({'higher' if ranking.higher_is_better else 'lower'} is better)"]
    if outcome.moved and outcome.incumbent is None:
        lines.append(f"{target} -> {describe(outcome.winner, metric)}, version {outcome.version} ({outcome.reason})")
    elif outcome.moved:
        lines.append(f"{target} moved: {describe(outcome.incumbent, metric)} -> {describe(outcome.winner, metric)}, version {outcome.version} ({outcome.reason})")
    else:
        lines.append(f"{target} stays on {describe(outcome.incumbent, metric)}, version {outcome.version}: {outcome.reason}")
    if metric == "eval_return_mean" and ranking.exact_available:
        lines.append("  note: every candidate has greedy_expected_return, the exact value of its greedy policy; metric=greedy_expected_return ranks them without sampling noise")
    lines.append(f"  load it: mlflow.pyfunc.load_model('{target}'), or qtally-rollout name={outcome.name} alias={outcome.alias}")
    return lines


@hydra.main(version_base="1.3", config_path="pkg://qtally.configs", config_name="promote")
def _promote(cfg: DictConfig) -> None:
    from ..promote_run import run_promotion

    outcome = run_reporting_errors(PROGRAM, lambda: run_promotion(cfg))
    if cfg.quiet:
        print(outcome.current.run_id)  # quiet: the run the alias points at, for scripts
        return
    print("\n".join(report_lines(outcome)))


def main() -> None:
    from ..config.promote_schema import PromoteConfig

    sys.argv[1:] = quote_filter(sys.argv[1:])
    quiet_libraries()
    register_promote_schema()
    pre_check_overrides(PROGRAM, PromoteConfig(), (), "configs/promote.yaml")
    _promote()
