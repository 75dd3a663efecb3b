"""Benchmark (not a test): what evaluations cost when only the episodes a policy change can alter are played again.

A run evaluates its greedy policy on the same seeds every ``eval_every`` episodes. With
``eval_replay=changed`` (the default) an evaluation plays again only the episodes that
acted in a state whose greedy action changed since the last one
(:mod:`qtally.evaluate.seeded_evaluation`); ``eval_replay=all`` plays every episode every
time. This script runs the same training both ways, side by side in one process, for the
README's examples (each environment's own ``eval_every`` and ``eval_episodes``, the engine
``auto`` chooses, no recording) and reports:

- the seconds spent in evaluations and in the whole run, each way, and their ratios;
- the share of evaluation episodes actually played with ``changed`` (the first
  evaluation's repeat check included);
- whether the two runs logged the same evaluations (they must: the returns are equal bit for bit).

Medians over ``--repeats``; which way runs first alternates between repeats.

    python scripts/bench_evaluation.py
    python scripts/bench_evaluation.py --quick
"""

from __future__ import annotations

import statistics
import sys
from importlib import resources
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
import bench  # noqa: E402  (the timing of a run apart from its evaluations, and the command line)

# (env, variant, schedule kind, schedule parameters, episodes, quick episodes): the README's training examples
CASES = (
    ("frozen_lake_4x4", "on_policy", "glie_episode", {"scale": 100.0, "floor": 0.01}, 5000, 2000),
    ("blackjack", "exploring_starts", "constant", {"epsilon": 0.1}, 200_000, 20_000),
    ("restock", "on_policy", "glie_visits", {"scale": 10.0, "floor": 0.01}, 20_000, 4000),
)


def _env_node(name: str):
    from omegaconf import OmegaConf

    return OmegaConf.create((resources.files("qtally.configs") / "env" / f"{name}.yaml").read_text())


def _evaluation_settings(name: str, episodes: int, quick: bool) -> tuple[int, int]:
    """``(eval_every, eval_episodes)``: the environment's own; quick: ten evaluations of a tenth of its episodes."""
    node = _env_node(name)
    if quick:
        return max(1, episodes // 10), max(50, int(node.eval_episodes) // 10)
    return int(node.eval_every), int(node.eval_episodes)


def _trainer(name: str, variant: str, kind: str, parameters: dict, episodes: int, replay: str, quick: bool):
    from qtally.control.schedules import make_schedule
    from qtally.control.variants import make_variant
    from qtally.envs.factory import make_environment
    from qtally.experiment import bundled_environment_spec
    from qtally.trainer import Trainer, TrainingSettings

    spec, truncation = bundled_environment_spec(name)
    eval_every, eval_episodes = _evaluation_settings(name, episodes, quick)
    settings = TrainingSettings(episodes=episodes, seed=0, eval_every=eval_every, eval_episodes=eval_episodes, truncation=truncation, eval_replay=replay)
    gamma = float(_env_node(name).gamma)
    return Trainer(make_environment(spec), make_variant(variant, gamma, variant != "off_policy", None), make_schedule(kind, **parameters), settings)


def _timed(trainer) -> tuple[float, float, dict]:
    """``(evaluation seconds, run seconds, logged evaluations)`` of one run."""
    seconds, evaluating, outcome = bench.timed_run_parts(trainer)
    return evaluating, seconds, {name: list(outcome.history[name]) for name in ("eval_return_mean", "eval_return_ci95")}


def measure(quick: bool, repeats: int) -> list[dict]:
    rows = []
    for name, variant, kind, parameters, episodes, quick_episodes in CASES:
        episodes = quick_episodes if quick else episodes
        _timed(_trainer(name, variant, kind, parameters, min(episodes, 200), "all", quick))  # warm-up: imports, compilation
        figures: dict[str, list[float]] = {"all_eval": [], "all_run": [], "changed_eval": [], "changed_run": [], "eval_ratio": [], "run_ratio": []}
        same, share, evaluations = True, 0.0, 0
        for repeat in range(repeats):
            results = {}
            for replay in (("all", "changed") if repeat % 2 == 0 else ("changed", "all")):
                trainer = _trainer(name, variant, kind, parameters, episodes, replay, quick)
                results[replay] = _timed(trainer)
                if replay == "changed":
                    share = trainer.evaluation.played_total / trainer.evaluation.asked_total
                    evaluations = trainer.evaluation.asked_total // len(trainer.eval_seeds)
            same = same and results["all"][2] == results["changed"][2]
            for replay in ("all", "changed"):
                figures[f"{replay}_eval"].append(results[replay][0])
                figures[f"{replay}_run"].append(results[replay][1])
            figures["eval_ratio"].append(results["all"][0] / results["changed"][0])
            figures["run_ratio"].append(results["all"][1] / results["changed"][1])
        row = {"env": name, "variant": variant, "episodes": episodes, "evaluations": evaluations, "eval_episodes": _evaluation_settings(name, episodes, quick)[1]}
        row.update({key: statistics.median(values) for key, values in figures.items()})
        row["played_share"], row["same_returns"] = share, same
        rows.append(row)
        print(f"  {name:16s} {variant:17s} evaluations {row['eval_ratio']:.1f}x faster, whole run {row['run_ratio']:.1f}x; same returns: {'yes' if same else 'NO'}", flush=True)
    return rows


def markdown(rows: list[dict], repeats: int) -> str:
    lines = [
        f"Measured by `python scripts/bench_evaluation.py`: one training run each way, engine `auto`, no recording; medians of {repeats}.",
        "",
        "| environment | variant | episodes | evaluations × episodes | evaluation s, all | evaluation s, changed | faster | run s, all | run s, changed | faster | episodes played | same returns |",
        "|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---|",
    ]
    for r in rows:
        lines.append(
            f"| {r['env']} | {r['variant']} | {r['episodes']:,} | {r['evaluations']} × {r['eval_episodes']:,} | {r['all_eval']:.2f} | {r['changed_eval']:.2f} | {r['eval_ratio']:.1f}x "
            f"| {r['all_run']:.2f} | {r['changed_run']:.2f} | {r['run_ratio']:.1f}x | {r['played_share']:.0%} | {'yes' if r['same_returns'] else 'NO'} |"
        )
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    rows = bench.table_script(argv, "Evaluation time with eval_replay=changed against eval_replay=all, side by side.", measure, markdown, 3, "runs each way per case")
    return 0 if all(r["same_returns"] for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
