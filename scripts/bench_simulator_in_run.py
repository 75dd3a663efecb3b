"""Benchmark (not a test): does the simulator itself run slower inside a training run than in a bare loop?

``scripts/bench.py`` divides a bare loop's time by a training run's and calls the rest
qtally's overhead. That is only fair if the simulator's own calls cost the same in both.
On a machine whose caches are small or shared, they do not: between two seasons the
trainer acts, encodes and learns, and the simulator's next calls find its code and data
partly evicted. This script measures that part directly, side by side in one run:

1. **in a run**: every ``reset``/start and ``step`` call of the simulator is timed inside a
   ``Trainer`` run (gym path, no recording, numba loaded, as in ``bench.py``);
2. **bare**: the same calls timed in a loop that replays the run's episodes and does nothing
   else (it steps through Gymnasium's wrappers, so it does slightly *more* work per call);
3. **bare, data touched**: the same replay, adding one to every entry of a 256 KiB array
   between episodes: how much a cold cache alone costs on this machine.

Each figure is nanoseconds per call, medians over ``--repeats``; the ratios to the bare loop
are taken within each repeat. A ratio above 1 in (1) is time the simulator loses to the
trainer's presence, which ``bench.py`` counts as overhead although no qtally line runs in it.

    python scripts/bench_simulator_in_run.py
    python scripts/bench_simulator_in_run.py --quick
"""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
import bench  # noqa: E402  (its trainer, recorded episodes and bare replay: the same workload)

CASES = (("restock", "exploring_starts"), ("restock", "on_policy"), ("blackjack", "exploring_starts"), ("frozen_lake_8x8", "exploring_starts"))
TOUCHED_DOUBLES = 32768  # 256 KiB: half of one core's L2 on the machine this was written on


class _CallTimes:
    """Wraps a callable and sums the nanoseconds of its calls."""

    def __init__(self, function):
        self.function, self.nanoseconds, self.calls = function, 0, 0

    def __call__(self, *args, **kwargs):
        clock = time.perf_counter_ns
        start = clock()
        try:
            return self.function(*args, **kwargs)
        finally:
            self.nanoseconds += clock() - start
            self.calls += 1

    @property
    def mean(self) -> float:
        return self.nanoseconds / max(self.calls, 1)


def _in_run(name: str, variant: str, episodes: int) -> tuple[float, float]:
    """Mean ns of a start (reset or exploring start) and of a step, timed inside a training run."""
    trainer = bench._trainer(name, variant, episodes, "gym")
    source = trainer.episodes
    core = source._core
    step, reset = _CallTimes(core.step), _CallTimes(core.reset)
    source._core = type("TimedCore", (), {"step": staticmethod(step), "reset": staticmethod(reset)})()
    start_control = source.environment.start_control
    reset_to = None
    if start_control is not None:
        reset_to = start_control.reset_to = _CallTimes(start_control.reset_to)
    bench._timed_run(trainer)
    starts = reset_to if reset_to is not None and reset_to.calls else reset
    return starts.mean, step.mean


def _bare(spec, env_seed: int, played, touched) -> tuple[float, float]:
    """Mean ns of a start and of a step in the bare replay, optionally touching ``touched`` between episodes."""
    replay = bench._BareReplay(spec, env_seed, played)
    env = replay.env
    step, reset, reset_to = _CallTimes(env.step), _CallTimes(env.reset), _CallTimes(replay.start_control.reset_to) if replay.start_control else None
    env.step, env.reset = step, reset  # instance attributes: the replay reads env.step and env.reset
    if reset_to is not None:
        replay.start_control.reset_to = reset_to
    seed = env_seed
    for start_observation, actions in played:
        if touched is not None:
            touched += 1.0
        if start_observation is not None:
            reset_to(start_observation, seed=seed)
        else:
            reset(seed=seed)
        seed = None
        for action in actions:
            step(action)
    starts = reset_to if reset_to is not None and reset_to.calls else reset
    return starts.mean, step.mean


def measure(quick: bool, repeats: int) -> list[dict]:
    import numpy as np

    from qtally.engine import kernels  # noqa: F401  (numba loaded, as in bench.py's main column)

    rows = []
    for name, variant in CASES:
        episodes = max(10, bench.GYM_EPISODES[name] // (20 if quick else 2))
        spec, env_seed, played = bench._recorded_episodes(name, variant, episodes)
        bench._trainer(name, variant, min(episodes, 10), "gym").run()  # warm-up
        figures: dict[str, list[float]] = {k: [] for k in ("run_start", "run_step", "bare_start", "bare_step", "touched_start", "touched_step")}
        for _ in range(repeats):
            run = _in_run(name, variant, episodes)
            bare = _bare(spec, env_seed, played, None)
            touched = _bare(spec, env_seed, played, np.zeros(TOUCHED_DOUBLES))
            for prefix, (start, step) in (("run", run), ("bare", bare), ("touched", touched)):
                figures[f"{prefix}_start"].append(start)
                figures[f"{prefix}_step"].append(step)
        row = {"env": name, "variant": variant, "episodes": episodes}
        for key, values in figures.items():
            row[key] = statistics.median(values)
        for prefix in ("run", "touched"):
            for kind in ("start", "step"):
                ratios = [a / b for a, b in zip(figures[f"{prefix}_{kind}"], figures[f"bare_{kind}"])]
                row[f"{prefix}_{kind}_ratio"] = statistics.median(ratios)
        rows.append(row)
        print(f"  {name:16s} {variant:17s} start {row['run_start_ratio']:.2f}x, step {row['run_step_ratio']:.2f}x of bare inside a run", flush=True)
    return rows


def markdown(rows: list[dict], repeats: int) -> str:
    lines = [
        f"Measured by `python scripts/bench_simulator_in_run.py`: the simulator's own calls, ns per call, medians of {repeats} runs.",
        "",
        "| environment | variant | start, bare | start in a run | start, bare with 256 KiB touched | step, bare | step in a run | step, bare with 256 KiB touched |",
        "|---|---|---:|---:|---:|---:|---:|---:|",
    ]
    for r in rows:
        lines.append(
            f"| {r['env']} | {r['variant']} | {r['bare_start']:,.0f} | {r['run_start']:,.0f} ({r['run_start_ratio']:.2f}x) | {r['touched_start']:,.0f} ({r['touched_start_ratio']:.2f}x) "
            f"| {r['bare_step']:,.0f} | {r['run_step']:,.0f} ({r['run_step_ratio']:.2f}x) | {r['touched_step']:,.0f} ({r['touched_step_ratio']:.2f}x) |"
        )
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    bench.table_script(argv, "The simulator's own calls inside a training run against a bare loop.", measure, markdown, 5, "timed runs per figure")
    return 0


if __name__ == "__main__":
    sys.exit(main())
