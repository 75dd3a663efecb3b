"""Benchmark (not a test): episodes per second of the pure-Python gym engine.

``qtally.trainer.train`` with a ``NullRecorder`` (no tracking store), for each variant on
the shipped env configs frozen_lake_4x4, blackjack and restock. Runs are short and
fixed-seed; the final greedy evaluation (a few rollouts) is included in the time, as it
is in every training run. A later engine (for example compiled code on model arrays)
can print its own rate next to these and report the ratio.

    python scripts/bench_engine.py
    python scripts/bench_engine.py --scale 3        # three times the episodes of each run

Columns: episodes/s and environment steps/s, median of ``--repeats`` runs.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
import warnings

# Episodes of one timed run at --scale 1, chosen so each run takes about a second.
EPISODES = {"frozen_lake_4x4": 3000, "blackjack": 10000, "restock": 1000}
VARIANTS = ("exploring_starts", "on_policy", "off_policy")


from qtally.experiment import bundled_environment_spec

def total_steps(history: dict) -> float:
    """Environment steps of the run, from the window means of ``episode_length_mean``."""
    steps, previous = 0.0, 0
    for episode, mean_length in history.get("episode_length_mean", []):
        steps += mean_length * (episode - previous)
        previous = episode
    return steps


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Episodes per second of qtally.trainer.train with no recording.")
    parser.add_argument("--scale", type=float, default=1.0, help="multiply every run's episode count (default 1)")
    parser.add_argument("--repeats", type=int, default=3, help="timed runs per cell; the median is shown (default 3)")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    if args.scale <= 0 or args.repeats < 1:
        parser.error("--scale must be positive and --repeats at least 1")
    warnings.filterwarnings("ignore")

    from qtally.control.schedules import Constant
    from qtally.control.variants import make_variant
    from qtally.envs.factory import make_environment
    from qtally.tracking.sink import NullRecorder
    from qtally.trainer import TrainingSettings, train

    log_every = 100
    print(f"{'env':16s} {'variant':17s} {'episodes':>9s} {'seconds':>8s} {'episodes/s':>11s} {'steps/s':>10s}")
    for name, base_episodes in EPISODES.items():
        spec, truncation = bundled_environment_spec(name)
        episodes = max(1, int(base_episodes * args.scale))
        for variant_name in VARIANTS:
            variant = make_variant(variant_name, 1.0, variant_name != "off_policy", None)
            times, steps = [], 0.0
            for _ in range(args.repeats):
                environment = make_environment(spec)
                settings = TrainingSettings(
                    episodes=episodes, seed=args.seed, log_every=log_every, eval_every=0, eval_episodes=10, truncation=truncation
                )
                start = time.perf_counter()
                outcome = train(environment, variant, Constant(0.1), settings, recorder=NullRecorder())
                times.append(time.perf_counter() - start)
                steps = total_steps(outcome.history)
                environment.close()
            seconds = statistics.median(times)
            print(f"{name:16s} {variant_name:17s} {episodes:9d} {seconds:8.3f} {episodes / seconds:11.0f} {steps / seconds:10.0f}", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
