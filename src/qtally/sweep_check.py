"""Every job of a sweep checked before the first one starts: a bad combination stops the sweep up front.

Hydra's basic sweeper expands ``key=a,b`` overrides into the cartesian product of jobs.
:func:`first_bad_job` expands them the same way, composes each job's config, and runs the
same checks a single run makes before opening a run (:func:`qtally.experiment.prepare`:
values, ranges, the environment and its constructor arguments, start control). Searches
whose points are drawn as they go (the Optuna sweeper) cannot be listed up front; there
the base config is checked and each trial is checked when it starts.
"""

from __future__ import annotations

from typing import Sequence

__all__ = ["is_sweep", "first_bad_job"]


def is_sweep(arguments: Sequence[str]) -> bool:
    return any(a in ("-m", "--multirun") for a in arguments)


def _job_overrides(arguments: Sequence[str]) -> list[list[str]]:
    from hydra._internal.core_plugins.basic_sweeper import BasicSweeper
    from hydra.core.override_parser.overrides_parser import OverridesParser

    candidates = [a for a in arguments if "=" in a and not a.startswith("-")]
    if any(a.split("=", 1)[0].lstrip("+~") in ("hydra/sweeper",) for a in candidates):
        candidates = [a for a in candidates if not OverridesParser.create().parse_override(a).is_sweep_override()]
    overrides = OverridesParser.create().parse_overrides([a for a in candidates if not a.lstrip("+~").startswith("hydra")])
    return [list(job) for batch in BasicSweeper.split_arguments(overrides, None) for job in batch]


def first_bad_job(arguments: Sequence[str], config_name: str = "train") -> str | None:
    """A one-line description of the first job that would be refused, or None when all pass."""
    from hydra import compose, initialize_config_module
    from hydra.core.global_hydra import GlobalHydra

    from .errors import QtallyError
    from .experiment import prepare

    try:
        jobs = _job_overrides(arguments)
    except Exception:  # syntax Hydra will report itself
        return None
    if not jobs:
        return "the sweep has no jobs: give at least one value to every swept key (key=a,b)"
    GlobalHydra.instance().clear()
    try:
        with initialize_config_module(config_module="qtally.configs", version_base="1.3"):
            for number, job in enumerate(jobs):
                try:
                    cfg = compose(config_name, overrides=job)
                    variant, schedule, environment, evaluation_environment = prepare(cfg)
                    environment.close()
                    evaluation_environment.close()
                except QtallyError as exc:
                    return f"sweep job {number} ({' '.join(job)}): {exc}"
                except Exception as exc:  # composition errors name the key themselves
                    first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
                    return f"sweep job {number} ({' '.join(job)}): {first}"
    finally:
        GlobalHydra.instance().clear()
    return None
