"""``qtally-check``: what qtally can do with an environment, one finding per capability, and why.

Each :class:`Finding` names a capability, whether the environment has it, what it found and
what the capability unlocks. A finding marked ``required`` and missing means the
environment cannot be trained at all; the command then exits non-zero. Nothing is recorded
in MLflow: this is a look at the environment, not an experiment.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass

import numpy as np
from omegaconf import DictConfig

from .control.truncation import resolve_step_cap
from .engine.compiled import time_limit_of
from .envs.factory import EnvironmentConfigError, make_environment
from .errors import first_line

__all__ = ["Finding", "check_environment"]


@dataclass(frozen=True)
class Finding:
    capability: str
    present: bool
    detail: str
    required: bool = False


def _gymnasium_checker(env) -> Finding:
    from gymnasium.utils.env_checker import check_env

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            check_env(env.unwrapped, skip_render_check=True)
        except Exception as exc:  # the checker raises on an API violation
            return Finding("gymnasium checker", False, f"failed: {first_line(exc)[:160]}")
    notes = sorted({first_line(w.message).replace("\x1b[33m", "").replace("\x1b[0m", "").removeprefix("WARN: ")[:120] for w in caught})
    if notes:
        return Finding("gymnasium checker", True, f"passed with {len(notes)} warning(s), first: {notes[0]}")
    return Finding("gymnasium checker", True, "passed")


def _episodes(environment, seed: int, actions: np.ndarray, count: int, cap: int) -> list[list[int]]:
    """Table indices of ``count`` episodes played with a fixed action sequence from ``reset(seed=seed)``."""
    env, encode = environment.env, environment.encoder.encode
    played, k = [], 0
    observation, _ = env.reset(seed=seed)
    for episode in range(count):
        if episode:
            observation, _ = env.reset()
        states = [encode(observation)]
        for _ in range(cap):
            observation, _, terminated, truncated, _ = env.step(int(actions[k % actions.size]))
            k += 1
            states.append(encode(observation))
            if terminated or truncated:
                break
        played.append(states)
    return played


def _speed(environment, seconds: float, seed: int, cap: int) -> tuple[float, float, int, float]:
    """Seconds a step, steps an episode, episodes played, and the share of the time spent computing.

    From random episodes played for about ``seconds``. The computing share (CPU time over
    wall time) tells a simulator that computes from one that waits (on another program, a
    network, a disk), which decides how many workers pay off.
    """
    env = environment.env
    rng = np.random.default_rng(seed)
    steps = episodes = 0
    env.reset(seed=seed)
    cpu_started = time.process_time()
    started = time.perf_counter()
    while time.perf_counter() - started < seconds or episodes == 0:
        env.reset()
        episodes += 1
        for _ in range(cap):
            _, _, terminated, truncated, _ = env.step(int(rng.integers(environment.n_actions)))
            steps += 1
            if terminated or truncated:
                break
    elapsed = time.perf_counter() - started
    busy = min(1.0, (time.process_time() - cpu_started) / elapsed) if elapsed > 0 else 1.0
    return elapsed / max(steps, 1), steps / episodes, episodes, busy


def parallel_speedup(workers: int, cores: int, busy: float) -> float:
    """How many times faster ``workers`` collection workers play than one, at best.

    Each worker computes ``busy`` of its time, so the machine's ``cores`` carry at most
    ``cores / busy`` of them at full speed: a computing simulator gains up to the core
    count, a waiting one up to the worker count. The learner's own updates and the
    messages are not counted (measure with scripts/bench_collect.py).

    >>> parallel_speedup(4, 2, 1.0), parallel_speedup(4, 2, 0.1), parallel_speedup(1, 8, 1.0)
    (2.0, 4.0, 1.0)
    """
    return float(min(workers, cores / max(busy, 1e-9)))


def _workers_finding(cfg: DictConfig, total: float, episode_seconds: float, busy: float, compiled: bool) -> Finding:
    """Whether ``collect.workers`` pays off here, and the time it would take (see :func:`parallel_speedup`)."""
    import os

    cores = os.cpu_count() or 1
    workers = int(cfg.workers) if cfg.workers else cores
    speedup = parallel_speedup(workers, cores, busy)
    kind = f"computes {busy:.0%} of its time" + (" (bound by the CPU)" if busy > 0.5 else " (mostly waiting)")
    estimate = f"collect.workers={workers}: about {_duration(total / speedup)} ({speedup:.2g}x; {cores} cores here, the simulator {kind})"
    if compiled:
        return Finding("parallel workers", False, f"{estimate}; not needed: engine=auto compiles this environment, faster than any number of workers")
    if episode_seconds < 2e-3:  # measured on 2 cores: no gain at 0.2 ms an episode, 1.4x with 2 workers at 1 ms
        return Finding("parallel workers", False, f"{estimate} at best; episodes this short ({episode_seconds * 1e3:.2g} ms) gain little: the messages and the learner's own work take about as long")
    return Finding("parallel workers", speedup > 1.2, estimate + ("" if speedup > 1.2 else ": more workers would not help on this machine"))


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def check_environment(cfg: DictConfig) -> tuple[str, list[Finding]]:
    """The environment's name and one finding per capability (module docstring)."""
    from .experiment import environment_spec
    from .envs.model import NoModelError
    from .envs.model_extraction import model_of, outcomes_of

    spec = environment_spec(cfg.env)
    try:
        environment = make_environment(spec)
    except EnvironmentConfigError as exc:
        required = "action space" in str(exc)
        return spec.id, [Finding("actions" if required else "observations", False, str(exc), required=True)]
    findings = [_gymnasium_checker(environment.env)]
    findings.append(Finding("actions", True, f"Discrete({environment.n_actions}): a Q table can hold them", required=True))
    encoder = environment.encoder
    findings.append(Finding(
        "observations", True,
        f"{encoder.spec()['kind']} encoding -> {environment.n_states:,} states x {environment.n_actions} actions = {environment.n_states * environment.n_actions:,} table entries",
        required=True,
    ))
    cap = resolve_step_cap(cfg.env.get("step_cap"), environment.n_states)
    try:
        actions = np.random.default_rng(cfg.seed).integers(environment.n_actions, size=4096)
        first, second = (_episodes(environment, cfg.seed + 1, actions, 3, min(cap, 2000)) for _ in range(2))
        same = first == second
        findings.append(Finding("reproducible", same, "reset(seed=...) replays the same episodes: a seed pins a run, and evaluations replay only what a policy change alters" if same else
                                "reset(seed=...) did not replay the same episodes: runs cannot be repeated and every evaluation plays all its episodes; "
                                "seed the environment's randomness from self.np_random"))
        step_seconds, length, probed, busy = _speed(environment, float(cfg.probe_seconds), cfg.seed, min(cap, 100_000))
    except Exception as exc:  # reset or step broke: nothing can be trained
        environment.close()
        return spec.id, findings + [Finding("episodes", False, f"playing an episode failed: {type(exc).__name__}: {first_line(exc)[:160]}", required=True)]
    limit = time_limit_of(environment.env)
    findings.append(Finding("time limit", bool(limit), f"{limit} steps (a cut episode is handled as env.truncation says)" if limit else
                            f"none: episodes must end by themselves; env.step_cap={cap} cuts any that loop"))
    control = environment.start_control
    findings.append(Finding("start control", control is not None,
                            f"{len(list(control.start_states())):,} start states: variant=exploring_starts works" if control is not None else
                            "none: variant=exploring_starts is unavailable (implement start_states() and reset_to(observation))"))
    try:
        model_of(environment.env)
        findings.append(Finding("model", True, "exact values, optimality_gap and the optimal policy map at every evaluation"))
    except NoModelError:
        findings.append(Finding("model", False, "none: no exact metrics (implement tabular_model() to get them)"))
    except Exception as exc:
        findings.append(Finding("model", False, f"tabular_model() failed: {type(exc).__name__}: {first_line(exc)[:120]}"))
    try:
        import numba  # noqa: F401

        outcomes_of(environment.env)
        findings.append(Finding("compiled engine", True, "outcomes listed: engine=auto plays whole episodes as machine code"))
        compiled = True
    except Exception:
        findings.append(Finding("compiled engine", False, "no outcome table: episodes play through step() (implement outcome_table() for the compiled engine)"))
        compiled = False
    modes = list(environment.env.metadata.get("render_modes", []) or [])
    findings.append(Finding("rendering", "rgb_array" in modes, f"{', '.join(modes) or 'none'}: " + ("rollout animations (GIF) work" if "rgb_array" in modes else "no rollout animations (they need rgb_array)")))
    total = cfg.episodes * length * step_seconds
    engine_note = "; the compiled engine is typically tens of times faster" if compiled else ""
    findings.append(Finding(
        "speed", True,
        f"{step_seconds * 1e6:.3g} µs a step, {length:.3g} steps an episode ({probed:,} random episodes): "
        f"{cfg.episodes:,} episodes take about {_duration(total)} of simulation on one core{engine_note}",
    ))
    findings.append(_workers_finding(cfg, total, step_seconds * length, busy, compiled))
    environment.close()
    return spec.id, findings
