"""Sweep speed, measured side by side in one run: parallel against one job at a time, and the fixed cost of a job.

    python scripts/bench_sweep.py            # the README figures (a few minutes on two cores)
    python scripts/bench_sweep.py --quick    # a smoke run (the tests use it)

It runs the same sweep (2 schedules x N seeds on the restocking simulator) through
``qtally-train -m`` twice in fresh working directories: once with Hydra's basic launcher
(one job after another, in one process) and once with the joblib launcher (``n_jobs`` worker
processes). Then it times a sweep of one-episode jobs, whose wall time is almost all fixed
cost (process start, imports, opening the store, the artifacts and the model), against the
same jobs at full length. It prints a Markdown table and writes it, with the raw figures, to
``bench_sweep.md`` and ``bench_sweep.json`` in the working directory.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def _qtally_train() -> str:
    return shutil.which("qtally-train") or str(Path(sys.executable).with_name("qtally-train"))


def _sweep_seconds(arguments: list[str]) -> float:
    with tempfile.TemporaryDirectory(prefix="qtally-bench-sweep-") as scratch:
        env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
        start = time.perf_counter()
        result = subprocess.run([_qtally_train(), "-m", *arguments], cwd=scratch, env=env, capture_output=True, text=True)
        elapsed = time.perf_counter() - start
    if result.returncode != 0:
        raise SystemExit(f"bench_sweep: the sweep failed:\n{result.stderr[-2000:]}")
    return elapsed


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a smoke run with tiny jobs")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--episodes", type=int, default=20000, help="restocking seasons per job (full mode)")
    options = parser.parse_args()
    seeds = "0,1" if options.quick else "0,1,2,3"
    episodes = 50 if options.quick else options.episodes
    jobs = 2 * len(seeds.split(","))
    common = ["env=restock", "schedule=constant,glie_visits", f"seed={seeds}", "rollout_animation=false", "eval_every=0", "quiet=true"]
    if options.quick:
        common.append("eval_episodes=20")

    sequential = _sweep_seconds([*common, f"episodes={episodes}"])
    parallel = _sweep_seconds([*common, f"episodes={episodes}", "hydra/launcher=joblib", f"hydra.launcher.n_jobs={options.workers}"])
    fixed = _sweep_seconds([*common, "episodes=1"])
    per_job_fixed = fixed / jobs
    per_job_total = sequential / jobs
    figures = {
        "jobs": jobs,
        "episodes_per_job": episodes,
        "workers": options.workers,
        "cores": os.cpu_count(),
        "python": platform.python_version(),
        "sequential_seconds": round(sequential, 2),
        "parallel_seconds": round(parallel, 2),
        "speedup": round(sequential / parallel, 2),
        "fixed_seconds_per_job": round(per_job_fixed, 2),
        "training_seconds_per_job": round(max(per_job_total - per_job_fixed, 0.0), 2),
        "fixed_share_of_job": round(per_job_fixed / per_job_total, 2),
    }
    table = "\n".join(
        [
            f"| sweep: {jobs} jobs x {episodes} restocking seasons, {os.cpu_count()} cores | figure |",
            "|---|---|",
            f"| one job at a time (basic launcher) | {figures['sequential_seconds']} s |",
            f"| joblib launcher, {options.workers} workers | {figures['parallel_seconds']} s |",
            f"| speed-up (ratio, same run) | {figures['speedup']}x |",
            f"| fixed cost of one job (its share of start and imports; the store, artifacts, model) | {figures['fixed_seconds_per_job']} s |",
            f"| training time of one job | {figures['training_seconds_per_job']} s |",
            f"| fixed cost as a share of a job | {figures['fixed_share_of_job']:.0%} |",
        ]
    )
    print(table)
    Path("bench_sweep.md").write_text(table + "\n")
    Path("bench_sweep.json").write_text(json.dumps(figures, indent=2) + "\n")


if __name__ == "__main__":
    main()
