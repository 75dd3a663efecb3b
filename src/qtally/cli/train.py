"""``qtally-train``: a thin Hydra entry point around :func:`qtally.experiment.run_training`."""

from __future__ import annotations

import math
import sys

import hydra
from omegaconf import DictConfig, OmegaConf

from ..config.schema import register_schema
from .console import TrainingProgress, fail, pre_check_overrides, quiet_libraries, run_reporting_errors

PROGRAM = "qtally-train"


def ranking_note(half_width: float, episodes: int, resolution: float | None) -> str:
    """Whether the final evaluation can rank this run against another, and what would make it so.

    The rule: two runs evaluated alike differ at the 5% level when their mean returns are
    further apart than about sqrt(2) times the 95% half-width (their errors add in
    quadrature; the shared evaluation seeds usually narrow the difference). The interval is
    too wide to rank runs when that distance exceeds ``env.eval_resolution``, the smallest
    difference in mean return worth telling apart in the environment (each bundled config
    states one). The half-width shrinks as 1/sqrt(n), which gives the suggested size.

    >>> ranking_note(0.13, 200, 0.02)
    'too wide to rank runs: differences below 0.18 are noise, env.eval_resolution=0.02; eval_episodes=16900 would resolve it'
    >>> ranking_note(0.013, 20000, 0.02)
    'ranks runs: differences above 0.018 are resolved (env.eval_resolution=0.02)'
    >>> ranking_note(0.05, 100, None)
    'differences below 0.071 are noise (set env.eval_resolution to judge whether that is too wide)'
    """
    if not math.isfinite(half_width):
        return "no interval (fewer than 2 evaluation episodes): too wide to rank runs"
    noise = math.sqrt(2.0) * half_width
    if resolution is None:
        return f"differences below {noise:.2g} are noise (set env.eval_resolution to judge whether that is too wide)"
    if noise <= resolution:
        return f"ranks runs: differences above {noise:.2g} are resolved (env.eval_resolution={resolution:g})"
    needed = math.ceil(round(episodes * (noise / resolution) ** 2, 6))
    return f"too wide to rank runs: differences below {noise:.2g} are noise, env.eval_resolution={resolution:g}; eval_episodes={needed} would resolve it"


@hydra.main(version_base="1.3", config_path="pkg://qtally.configs", config_name="train")
def _train(cfg: DictConfig) -> str | float | None:
    from ..experiment import run_training
    from ..tracking.sweep import current_sweep

    if current_sweep() is not None:
        return _sweep_job(cfg)
    progress = None if cfg.quiet else TrainingProgress
    summary = run_reporting_errors(PROGRAM, lambda: run_training(cfg, progress_factory=progress))
    if cfg.quiet:
        print(summary.run_id)  # quiet: the run id alone, for scripts (RUN=$(qtally-train quiet=true))
    else:
        evaluation = summary.final_evaluation
        line = f"eval_return_mean={evaluation.get('eval_return_mean', float('nan')):.4g} ± {evaluation.get('eval_return_ci95', float('nan')):.3g}"
        if "optimality_gap" in evaluation:
            line += f"  optimality_gap={evaluation['optimality_gap']:.4g}  optimal_action_fraction={evaluation['optimal_action_fraction']:.3f}"
        print(f"run {summary.run_id} finished: {line}")
        print(f"  evaluation:   {ranking_note(evaluation.get('eval_return_ci95', float('nan')), cfg.eval_episodes, cfg.env.get('eval_resolution'))}")
        print(f"                {summary.outcome.evaluation_note}")
        if summary.outcome.capped_episodes:
            print(f"  step cap:     {summary.outcome.capped_episodes} episode(s) reached env.step_cap={summary.outcome.step_cap} and were cut (treated as env.truncation={cfg.env.truncation})")
        outcome = summary.outcome
        compiled = f", compiled in {outcome.compile_seconds:.1f} s" if outcome.engine == "compiled" else ""
        print(f"  engine:       {outcome.engine} ({outcome.engine_reason}{compiled})")
        print(f"  policy model: runs:/{summary.run_id}/policy")
        print(f"  tracking UI:  mlflow ui --backend-store-uri {summary.tracking_uri} --host 127.0.0.1")
    return summary.run_id


def _sweep_job(cfg: DictConfig) -> float:
    """One job of a sweep: one run per seed (``repeat_seeds``, else ``seed``), each a child of the sweep.

    A failure is recorded on its own child run with its reason and the sweep goes on. The
    return value, the mean final ``eval_return_mean`` over the seeds (NaN if one failed), is
    what a search such as the Optuna sweeper maximises.
    """
    from omegaconf import OmegaConf

    seeds = [int(s) for s in cfg.repeat_seeds] if cfg.get("repeat_seeds") else [int(cfg.seed)]
    finals = []
    for seed in seeds:
        job = cfg.copy()
        OmegaConf.update(job, "seed", seed)
        finals.append(_one_sweep_run(job))
    return sum(finals) / len(finals)


def _one_sweep_run(cfg: DictConfig) -> float:
    from ..errors import QtallyError, first_line
    from ..experiment import run_name, run_training
    from ..tracking.sweep import current_sweep, earlier_run_of_job, job_group, record_failed_job, supersede

    opened: list[str] = []
    earlier = None
    if cfg.get("resume"):  # a resumed sweep (resume = its parent): a finished job is skipped, an unfinished one continues
        earlier = earlier_run_of_job(current_sweep(), job_group(cfg), int(cfg.seed))
        cfg = cfg.copy()
        OmegaConf.update(cfg, "resume", None)
        if earlier is not None and earlier.info.status == "FINISHED":
            final = float(earlier.data.metrics.get("eval_return_mean", float("nan")))
            print(f"{PROGRAM}: job {run_name(cfg)}: run {earlier.info.run_id} had finished; skipped")
            return final
        if earlier is not None:
            OmegaConf.update(cfg, "resume", earlier.info.run_id)
    try:
        try:
            summary = run_training(cfg, announce=opened.append)
        except QtallyError as exc:
            if earlier is None or "no checkpoint" not in str(exc):
                raise
            OmegaConf.update(cfg, "resume", None)  # stopped before its first checkpoint: run the job afresh
            summary = run_training(cfg, announce=opened.append)
            supersede(current_sweep(), earlier.info.run_id, summary.run_id)
    except QtallyError as exc:
        reason = str(exc)
    except Exception as exc:  # a job that breaks while running: recorded, reported, the sweep continues
        reason = f"{type(exc).__name__}: {first_line(exc)}"
    else:
        final = float(summary.final_evaluation.get("eval_return_mean", float("nan")))
        print(f"{PROGRAM}: job {run_name(cfg)}: run {summary.run_id} finished, eval_return_mean={final:.4g}")
        return final
    if not opened:
        record_failed_job(cfg, current_sweep(), run_name(cfg), {"variant": cfg.variant.name, "schedule": cfg.schedule.kind, "seed": str(cfg.seed)}, reason)
    print(f"{PROGRAM}: job {run_name(cfg)} failed: {reason}", file=sys.stderr)
    return float("nan")


def _check_sweep_to_resume(parent: str) -> None:
    from mlflow.tracking import MlflowClient

    from ..tracking.runs import resolve_tracking_uri
    from ..tracking.sweep import sweep_parent

    configured = next((a.split("=", 1)[1] for a in sys.argv[1:] if a.startswith("tracking.uri=")), None)
    sweep_parent(MlflowClient(resolve_tracking_uri(configured)), parent)


# What a resumed run takes from the command line; everything else comes from the run itself.
_RESUME_KEYS = ("resume", "tracking.uri", "checkpoint_dir", "quiet")


def main() -> None:
    from ..config.schema import EnvConfig, ScheduleConfig, TrainConfig, VariantConfig
    from ..sweep_check import first_bad_job, is_sweep
    from .group_choices import first_bad_choice
    from ..tracking.sweep import close_open_sweep, sweep_failures

    quiet_libraries()
    register_schema()
    schema = TrainConfig(env=EnvConfig(), variant=VariantConfig(), schedule=ScheduleConfig())
    pre_check_overrides(PROGRAM, schema, ("env", "variant", "schedule"), "configs/train.yaml")
    choice_problem = first_bad_choice(sys.argv[1:], ("env", "variant", "schedule"))
    if choice_problem:
        fail(PROGRAM, choice_problem)
    if any(argument.startswith("resume=") for argument in sys.argv[1:]) and not is_sweep(sys.argv[1:]):
        ignored = [a for a in sys.argv[1:] if a.split("=", 1)[0].lstrip("+~") not in _RESUME_KEYS]
        if ignored:
            fail(PROGRAM, f"resume=<run id> continues the run with the config it was started with; drop {' '.join(ignored)} (only {', '.join(_RESUME_KEYS)} apply)")
    if "hydra/launcher=ray_loopback" in sys.argv[1:] and not any("init.address=" in a for a in sys.argv[1:]):
        from ..engine.ray_collection import keep_ray_on_loopback

        keep_ray_on_loopback()  # before the launcher imports Ray: its services then listen on 127.0.0.1 only
    if is_sweep(sys.argv[1:]):
        parent = next((a.split("=", 1)[1] for a in sys.argv[1:] if a.startswith("resume=")), None)
        if parent:
            run_reporting_errors(PROGRAM, lambda: _check_sweep_to_resume(parent))
        problem = first_bad_job(sys.argv[1:])
        if problem:
            fail(PROGRAM, f"{problem} (nothing was started)")
    try:
        _train()
    finally:
        close_open_sweep("KILLED")  # only a sweep cut short leaves its parent open
    failures = sweep_failures()
    if failures:
        for line in failures:
            print(f"{PROGRAM}: {line}", file=sys.stderr)
        fail(PROGRAM, f"{len(failures)} job(s) of the sweep failed; the other jobs' runs are recorded", code=1)
