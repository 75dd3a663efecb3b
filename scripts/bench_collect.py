"""Benchmark (not a test): parallel episode collection with a slow simulator, measured side by side.

Two invented simulators (scripts/slow_simulators.py) take about ``--step-ms`` per step:
one computes for the whole step, one waits. For each, the same training run
(on-policy, constant epsilon 0.1, no recording) is timed with 1, 2 and more collection
workers, as local processes and as Ray actors on a local Ray instance, and the rate is
reported as a ratio to one worker of the same backend (``collect.workers=1`` forced into
a worker process, and 8 episodes per worker in every batch, so both sides pay the same
messages). The in-process sequential trainer
is reported as well. Workers are started before the clock starts: their start-up (about
2 s for processes, more for Ray) is a fixed cost of a run, reported on its own.

Targets: the computing simulator at least 0.8 x the worker count up to the core count;
the waiting one at least 0.8 x the worker count up to 4 workers.

    python scripts/bench_collect.py                 # the README's figures
    python scripts/bench_collect.py --quick --no-ray --out bench-quick
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))  # slow_simulators, for the workers too


def _trainer(simulator: str, step_ms: float, episodes: int, collect):
    from qtally.control.schedules import Constant
    from qtally.control.variants import make_variant
    from qtally.envs.factory import EnvironmentSpec, make_environment
    from qtally.trainer import Trainer, TrainingSettings

    spec = EnvironmentSpec(id=f"slow_simulators:{simulator}", kwargs={"step_ms": step_ms})
    settings = TrainingSettings(episodes=episodes, seed=0, log_every=max(1, episodes // 4), eval_every=0, eval_episodes=1, engine="gym", collect=collect)
    return Trainer(make_environment(spec), make_variant("on_policy", 1.0, True, None), Constant(0.1), settings)


def _timed_rate(simulator: str, step_ms: float, episodes: int, collect) -> tuple[float, float]:
    """``(episodes per second of training, seconds to start the workers)`` of one run."""
    trainer = _trainer(simulator, step_ms, episodes, collect)
    began = time.perf_counter()
    trainer.start_workers()
    started = time.perf_counter()
    trainer.run()
    return episodes / (time.perf_counter() - started), started - began


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a short run that checks the script works")
    parser.add_argument("--no-ray", action="store_true", help="local processes only")
    parser.add_argument("--step-ms", type=float, default=1.0)
    parser.add_argument("--repeats", type=int, default=None)
    parser.add_argument("--out", default="bench-results")
    args = parser.parse_args(argv)
    if args.repeats is not None and args.repeats < 1:
        parser.error("--repeats must be at least 1")
    if not args.step_ms > 0:
        parser.error("--step-ms must be a positive number of milliseconds")

    from qtally.engine.collection import EPISODES_PER_WORKER, CollectSettings

    cores = os.cpu_count() or 1
    repeats = args.repeats or (1 if args.quick else 3)
    episodes = 40 if args.quick else 400  # 20 steps an episode: 400 episodes are 8 s of simulation on one worker
    counts = {"ComputingDesk": [1, 2] if args.quick else sorted({1, 2, cores}), "WaitingDesk": [1, 2] if args.quick else [1, 2, 4]}
    backends = ["local"] if args.no_ray or args.quick else ["local", "ray"]
    rows = []
    sequential = {simulator: statistics.median(_timed_rate(simulator, args.step_ms, episodes, CollectSettings())[0] for _ in range(repeats)) for simulator in counts}
    for backend in backends:  # local first: a Ray instance's own threads would share the cores with it
        if backend == "ray":
            from qtally.engine.ray_collection import keep_ray_on_loopback

            keep_ray_on_loopback()
            import ray

            ray.init(_node_ip_address="127.0.0.1", include_dashboard=False, log_to_driver=False, num_cpus=max(4, cores),
                     runtime_env={"env_vars": {"PYTHONPATH": os.pathsep.join(p for p in sys.path if p)}})
        for simulator, worker_counts in counts.items():
            base = None
            for workers in worker_counts:
                # The same batch per worker for every count (the default gives one worker batches of one).
                collect = CollectSettings(workers=workers, batch=EPISODES_PER_WORKER * workers, backend=backend, force_workers=True)
                measured = [_timed_rate(simulator, args.step_ms, episodes * workers, collect) for _ in range(repeats)]
                rate = statistics.median(m[0] for m in measured)
                base = base or rate
                target = 0.8 * (min(workers, cores) if simulator == "ComputingDesk" else min(workers, 4))
                rows.append({
                    "simulator": simulator, "backend": backend, "workers": workers, "batch": collect.batch_size,
                    "episodes_per_second": rate, "of_one_worker": rate / base, "target": target, "met": rate / base >= target - 1e-9,
                    "sequential_episodes_per_second": sequential[simulator], "start_seconds": statistics.median(m[1] for m in measured),
                })
                print(f"{simulator:14s} {backend:5s} workers={workers}: {rate:8.1f} episodes/s, {rate / base:.2f}x one worker (target {target:.1f})", flush=True)
        if backend == "ray":
            ray.shutdown()

    import gymnasium
    import numpy

    facts = {
        "cores": cores, "python": platform.python_version(), "numpy": numpy.__version__, "gymnasium": gymnasium.__version__,
        "step_ms": args.step_ms, "repeats": repeats, "episodes_per_worker": episodes, "quick": args.quick,
    }
    try:
        import ray as _ray

        facts["ray"] = _ray.__version__
    except ImportError:
        pass
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "bench_collect.json").write_text(json.dumps({"facts": facts, "rows": rows}, indent=2))
    lines = [
        f"Measured by `python scripts/bench_collect.py`: {cores} cores, Python {facts['python']}, gymnasium {facts['gymnasium']}"
        + (f", Ray {facts['ray']}" if "ray" in facts else "") + f"; a step takes about {args.step_ms:g} ms; medians of {repeats} runs.",
        "",
        "| simulator | backend | workers | batch | episodes/s | of one worker | target | sequential trainer, episodes/s | workers' start-up |",
        "|---|---|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for row in rows:
        lines.append(
            f"| {row['simulator']} | {row['backend']} | {row['workers']} | {row['batch']} | {row['episodes_per_second']:.1f} | {row['of_one_worker']:.2f}x | "
            f"{row['target']:.1f}x {'met' if row['met'] else 'missed'} | {row['sequential_episodes_per_second']:.1f} | {row['start_seconds']:.1f} s |"
        )
    (out / "bench_collect.md").write_text("\n".join(lines) + "\n")
    print(f"wrote {out / 'bench_collect.md'} and {out / 'bench_collect.json'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
