"""Benchmark (not a test): qtally's engines against the limits of this machine, measured side by side.

Four measurements, each in one run on the same machine, written as a Markdown table and a
JSON file (``--out``, default ``bench-results/``):

1. **gym path vs bare stepping.** ``Trainer`` with ``engine=gym`` and no recording, against
   (a) a loop that replays the *same episodes* (the run's own starts and actions, the same
   seeded environment, nothing else done) and (b) a loop that steps the same wrapped
   environment with uniformly random actions. (a) is the overhead qtally adds to the
   environment's own work; the run and its replay are timed in alternating slices, so a
   slow spell of a shared machine falls on both sides. (b) is reported too, but a random
   policy plays episodes of another length (on Blackjack it hits more), so it mixes
   overhead with a different workload. numba is loaded first, as in a run long enough to
   repay loading it, so long episodes are learned by the compiled update; the same run with
   the Python loop for every episode (what a short run in a fresh process gets) is timed too.
2. **compiled vs gym.** The compiled engine's steps per second against the gym path's, and
   against a minimal compiled kernel (``qtally.engine.kernels.reference_kernel``): Monte
   Carlo control in the fewest operations, epsilon-greedy episodes started as the
   variant's are and learned from by every-visit sample averages, with no streams,
   first-visit rule, schedule, truncation, weights or logging; the limit of this machine
   for the same job. It starts from the run's final table, so it plays episodes like the
   run's (from an all-zero table its greedy action is always the first, and a Blackjack
   hand or a season would be another workload). It is timed right after each compiled run
   over as many steps (the median of the per-repeat ratios is reported), and once more
   without learning (table stepping alone). Compilation is reported apart: cold (an
   empty numba cache) and warm (cached).
3. **memory.** Peak resident memory of the main job (``qtally-train`` in a child process,
   full MLflow recording) after 10^4 and 10^6 episodes.
4. **recording.** Wall time of a run with full MLflow recording against the same run with
   recording off, fixed cost aside, in pairs whose order alternates (the median of the
   paired overheads is reported), and the same cost measured inside the recorded runs (the
   time spent in the MLflow sink, which a drifting machine cannot skew); the metric values
   the run sends and the sink's time per value (the store's own cost, which no training
   speed changes); and the fixed cost of one run (imports, opening the store, artifacts,
   the model) on its own.

Greedy evaluations are timed apart and left out of every training time (the final one,
about 2 ms, is there in every run). Every figure is a median over ``--repeats`` runs (the ratios to bare stepping and to the
minimal kernel: the median of ratios taken within each repeat). ``--quick`` shrinks every run (the tests
use it to check the script works); the README's figures come from the full mode::

    python scripts/bench.py
    python scripts/bench.py --quick --out bench-quick
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

ENVS = ("frozen_lake_8x8", "blackjack", "restock")
VARIANTS = ("exploring_starts", "on_policy", "off_policy")
# Episodes of one timed gym run (about a second each) and of one compiled run.
GYM_EPISODES = {"frozen_lake_8x8": 3000, "blackjack": 30000, "restock": 8000}
EPSILON = 0.1  # every run's constant schedule (exploring starts act greedily whatever it says)
GAMMA = 1.0
COMPILED_EPISODES = {"frozen_lake_8x8": 300_000, "blackjack": 3_000_000, "restock": 300_000}


def _trainer(name: str, variant_name: str, episodes: int, engine: str, seed: int = 0):
    from qtally.control.schedules import Constant
    from qtally.control.variants import make_variant
    from qtally.envs.factory import make_environment
    from qtally.experiment import bundled_environment_spec
    from qtally.trainer import Trainer, TrainingSettings

    spec, truncation = bundled_environment_spec(name)
    settings = TrainingSettings(episodes=episodes, seed=seed, log_every=100, eval_every=0, eval_episodes=1, truncation=truncation, engine=engine)
    return Trainer(make_environment(spec), make_variant(variant_name, GAMMA, variant_name != "off_policy", None), Constant(EPSILON), settings)


def _timed_run(trainer, pause_at: int | None = None):
    """Seconds of ``trainer.run(pause_at)`` less the greedy evaluations in it (timed apart, as the evaluation is not training), and its outcome."""
    seconds, evaluating, outcome = timed_run_parts(trainer, pause_at)
    return seconds - evaluating, outcome


def timed_run_parts(trainer, pause_at: int | None = None):
    """``(seconds of trainer.run(pause_at), seconds of the greedy evaluations in it, outcome)``."""
    evaluate = trainer.evaluate
    evaluating = [0.0]

    def timed_evaluate():
        start = time.perf_counter()
        try:
            return evaluate()
        finally:
            evaluating[0] += time.perf_counter() - start

    trainer.evaluate = timed_evaluate
    start = time.perf_counter()
    try:
        outcome = trainer.run(pause_at=pause_at)
        return time.perf_counter() - start, evaluating[0], outcome
    finally:
        del trainer.evaluate


def table_script(argv, description: str, measure, markdown, default_repeats: int, repeats_help: str) -> list[dict]:
    """The command line of a benchmark that prints one Markdown table: ``--quick``, ``--repeats``, ``--out FILE``; returns its rows."""
    parser = argparse.ArgumentParser(description=description)
    parser.add_argument("--quick", action="store_true", help="small runs, to check the script works")
    parser.add_argument("--repeats", type=int, default=None, help=f"{repeats_help}; the median is reported (default {default_repeats}, quick 1)")
    parser.add_argument("--out", type=Path, default=None, help="also write the table to this Markdown file")
    args = parser.parse_args(argv)
    repeats = args.repeats if args.repeats is not None else (1 if args.quick else default_repeats)
    if repeats < 1:
        parser.error("--repeats must be at least 1")
    rows = measure(args.quick, repeats)
    table = markdown(rows, repeats)
    print()
    print(table, end="")
    if args.out is not None:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(table)
    return rows


def _steps(outcome, log_every: int = 100) -> float:
    """Environment steps of a run, from the window means of ``episode_length_mean``."""
    steps, previous = 0.0, 0
    for episode, mean_length in outcome.history["episode_length_mean"]:
        steps += mean_length * (episode - previous)
        previous = episode
    return steps


def _recorded_episodes(name: str, variant_name: str, episodes: int):
    """The starts and actions of a gym run (untimed), to replay in the bare loop."""
    trainer = _trainer(name, variant_name, episodes, "gym")
    played, source = [], trainer.episodes
    original = source.play

    def spy(choose, start_observation=None, first_action=None):
        episode = original(choose, start_observation=start_observation, first_action=first_action)
        played.append((start_observation, list(episode.actions)))
        return episode

    source.play = spy
    trainer.run()
    return trainer.environment.spec, trainer.state.streams.env_seed, played


class _BareReplay:
    """Steps the same wrapped environment through a run's recorded episodes, nothing else, a slice at a time."""

    def __init__(self, spec, env_seed: int, played):
        from qtally.envs.factory import make_environment

        environment = make_environment(spec)
        self.env, self.start_control = environment.env, environment.start_control
        self.seed, self.played = env_seed, played

    def seconds(self, first: int, stop: int) -> float:
        """Seconds to play recorded episodes ``first`` to ``stop - 1``, continuing the environment's stream."""
        env, start_control = self.env, self.start_control
        start = time.perf_counter()
        for start_observation, actions in self.played[first:stop]:
            if start_observation is not None:
                start_control.reset_to(start_observation, seed=self.seed)
            else:
                env.reset(seed=self.seed)
            self.seed = None
            step = env.step
            for action in actions:
                step(action)
        return time.perf_counter() - start


def _bare_random(spec, episodes: int) -> tuple[float, int]:
    """Seconds and steps of ``episodes`` episodes of uniformly random actions on the same wrapped environment."""
    import numpy as np

    from qtally.envs.factory import make_environment

    env = make_environment(spec).env
    actions = np.random.default_rng(0).integers(env.action_space.n, size=1 << 16).tolist()
    steps, k = 0, 0
    env.reset(seed=0)
    start = time.perf_counter()
    for _ in range(episodes):
        env.reset()
        done = False
        while not done:
            _, _, terminated, truncated, _ = env.step(actions[k])
            k = (k + 1) & 0xFFFF
            steps += 1
            done = terminated or truncated
    return time.perf_counter() - start, steps


def _interleaved(name: str, variant_name: str, episodes: int, replay: "_BareReplay", chunks: int, python_update: bool = False):
    """Seconds of one training run and of its bare replay, timed in ``chunks`` alternating slices.

    ``python_update``: the variant's Python loop learns from every episode, as in a run too
    short to repay loading numba in a fresh process (:mod:`qtally.engine.compiled_update`).

    The run pauses between slices (``Trainer.run(pause_at=...)``, as a checkpoint does) and
    the bare loop plays the same slice of episodes; which side goes first alternates. A
    slow spell of a shared machine (its speed drifts by a third within seconds on the
    virtual machines this was written on) then lands on both sides of the ratio.
    """
    trainer = _trainer(name, variant_name, episodes, "gym")
    if python_update:
        trainer.long_episode_update = None
    bounds = [round(episodes * k / chunks) for k in range(chunks + 1)]
    train_seconds = replay_seconds = 0.0
    outcome = None
    for k, (first, stop) in enumerate(zip(bounds, bounds[1:])):
        if k % 2:
            replay_seconds += replay.seconds(first, stop)
        seconds, outcome = _timed_run(trainer, stop)
        train_seconds += seconds
        if not k % 2:
            replay_seconds += replay.seconds(first, stop)
    return train_seconds, replay_seconds, outcome


def gym_against_bare(scale: float, repeats: int) -> list[dict]:
    """Each repeat times a training run against a bare replay of its episodes, interleaved, and a random-action loop.

    The median of the per-repeat ratios is what the table reports. numba is loaded first, as
    in a run whose steps repay loading it (or one that loaded it already): long episodes
    are then learned from by the compiled update. Each repeat also times the same run with
    the Python loop for every episode, what a shorter run in a fresh process gets.
    """
    from qtally.engine import kernels  # noqa: F401  (loaded: see the docstring)

    rows = []
    for name in ENVS:
        episodes = max(10, int(GYM_EPISODES[name] * scale))
        chunks = 20 if episodes >= 2000 else 2
        for variant_name in VARIANTS:
            spec, env_seed, played = _recorded_episodes(name, variant_name, episodes)
            _trainer(name, variant_name, min(episodes, 10), "gym").run()  # warm-up
            train_times, same, same_python, random_steps_ratio, random_episodes_ratio = [], [], [], [], []
            for _ in range(repeats):
                train_seconds, replay_seconds, _ = _interleaved(name, variant_name, episodes, _BareReplay(spec, env_seed, played), chunks, python_update=True)
                same_python.append(replay_seconds / train_seconds)
                train_seconds, replay_seconds, outcome = _interleaved(name, variant_name, episodes, _BareReplay(spec, env_seed, played), chunks)
                steps = _steps(outcome)
                random_seconds, random_steps = _bare_random(spec, episodes)
                train_times.append(train_seconds)
                same.append(replay_seconds / train_seconds)
                random_steps_ratio.append((steps / train_seconds) / (random_steps / random_seconds))
                random_episodes_ratio.append(random_seconds / train_seconds)
            train_seconds = statistics.median(train_times)
            rows.append({
                "env": name, "variant": variant_name, "episodes": episodes,
                "train_steps_per_s": steps / train_seconds, "train_episodes_per_s": episodes / train_seconds,
                "same_episodes_ratio": statistics.median(same),
                "same_episodes_ratio_range": [min(same), max(same)],
                "same_episodes_ratio_python_update": statistics.median(same_python),
                "same_episodes_ratio_python_update_range": [min(same_python), max(same_python)],
                "random_actions_steps_ratio": statistics.median(random_steps_ratio),
                "random_actions_episodes_ratio": statistics.median(random_episodes_ratio),
            })
            print(f"  gym  {name:16s} {variant_name:17s} {rows[-1]['same_episodes_ratio']:.2f} of bare (same episodes; {min(same):.2f} to {max(same):.2f}); "
                  f"Python update only {rows[-1]['same_episodes_ratio_python_update']:.2f}", flush=True)
    return rows


def compiled_against_gym(scale: float, repeats: int, gym_rows: list[dict]) -> list[dict]:
    """Each repeat times a compiled run, then the minimal kernel over as many steps: the median of the per-repeat ratios is reported."""
    import numpy as np

    from qtally.engine import kernels

    gym_rate = {(r["env"], r["variant"]): r["train_steps_per_s"] for r in gym_rows}
    rows = []
    for name in ENVS:
        episodes = max(100, int(COMPILED_EPISODES[name] * scale))
        for variant_name in VARIANTS:
            _trainer(name, variant_name, 10, "compiled").run()  # warm-up: the cached code loaded
            rates, of_reference, of_stepping = [], [], []
            for _ in range(repeats):
                trainer = _trainer(name, variant_name, episodes, "compiled")
                seconds, outcome = _timed_run(trainer)
                steps = _steps(outcome)
                table = trainer.episodes.table
                exploring = variant_name == "exploring_starts"  # the limit starts where the variant does, and acts greedily after an exploring start

                def limit(learn: bool, n_steps: int) -> float:
                    """Seconds the minimal kernel takes for ``n_steps`` steps, from the run's final table (so it plays episodes like the run's)."""
                    start = time.perf_counter()
                    kernels.reference_kernel(table.offsets, table.next_states, table.probabilities, table.rewards, table.terminated,
                                             table.start_states, table.start_probabilities,
                                             trainer.episodes.exploring_starts if exploring else np.zeros(0, np.int64), 0.0 if exploring else EPSILON,
                                             GAMMA, trainer.state.values.q.copy(), n_steps, 0, learn)
                    return time.perf_counter() - start

                limit(True, 1000)
                rates.append(steps / seconds)
                of_reference.append(limit(True, int(steps)) / seconds)
                of_stepping.append(limit(False, int(steps)) / seconds)
            rate = statistics.median(rates)
            rows.append({
                "env": name, "variant": variant_name, "episodes": episodes,
                "compiled_steps_per_s": rate, "compiled_episodes_per_s": rate * episodes / steps,
                "over_gym": rate / gym_rate[(name, variant_name)],
                "of_reference": statistics.median(of_reference), "of_reference_range": [min(of_reference), max(of_reference)],
                "of_stepping": statistics.median(of_stepping), "of_stepping_range": [min(of_stepping), max(of_stepping)],
            })
            print(f"  compiled {name:16s} {variant_name:17s} {rate / 1e6:.1f} M steps/s, {rows[-1]['over_gym']:.0f}x gym, "
                  f"{rows[-1]['of_reference']:.2f} of the minimal kernel, {rows[-1]['of_stepping']:.2f} of table stepping alone", flush=True)
    return rows


_COMPILE_PROBE = """
import time, warnings
warnings.filterwarnings("ignore")
from qtally.control.schedules import Constant
from qtally.control.variants import make_variant
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.trainer import Trainer, TrainingSettings
t = Trainer(make_environment(EnvironmentSpec(id="FrozenLake-v1", kwargs={"map_name": "8x8"})), make_variant("on_policy", 1.0, True, None), Constant(0.1), TrainingSettings(episodes=1, engine="compiled"))
t.run()
print(t.episodes.compile_seconds)
"""


def compile_cost(quick: bool = False) -> dict:
    """Seconds the first kernel call takes with an empty numba cache, then with the cache it left.

    ``quick`` measures only the cached load in this machine's own cache (one child process, not two).
    """
    if quick:
        warm = float(subprocess.run([sys.executable, "-c", _COMPILE_PROBE], capture_output=True, text=True, check=True).stdout.split()[-1])
        print(f"  compile: not measured cold in quick mode, {warm:.2f} s from the cache", flush=True)
        return {"cold_seconds": float("nan"), "warm_seconds": warm}
    with tempfile.TemporaryDirectory(prefix="qtally-numba-") as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        cold = float(subprocess.run([sys.executable, "-c", _COMPILE_PROBE], env=env, capture_output=True, text=True, check=True).stdout.split()[-1])
        warm = float(subprocess.run([sys.executable, "-c", _COMPILE_PROBE], env=env, capture_output=True, text=True, check=True).stdout.split()[-1])
    print(f"  compile: {cold:.1f} s cold, {warm:.2f} s from the cache", flush=True)
    return {"cold_seconds": cold, "warm_seconds": warm}


def _train_command(episodes: int, store: Path, extra: list[str]) -> list[str]:
    launcher = "from qtally.cli.train import main; main()"  # qtally-train, run by this interpreter
    return [sys.executable, "-c", launcher, f"episodes={episodes}", f"tracking.uri=sqlite:///{store}", "quiet=true", *extra]


def peak_memory(counts: tuple[int, int]) -> dict:
    """Peak resident memory (MiB) of the main job in a child process, full recording, for each episode count."""
    result = {}
    with tempfile.TemporaryDirectory(prefix="qtally-bench-") as scratch:
        for episodes in counts:
            process = subprocess.Popen(_train_command(episodes, Path(scratch) / f"m{episodes}.db", []), cwd=scratch, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
            _, status, usage = os.wait4(process.pid, 0)
            process.returncode = os.waitstatus_to_exitcode(status)
            if process.returncode != 0:
                raise SystemExit(f"bench: qtally-train episodes={episodes} failed: {process.stderr.read().decode()[-500:]}")
            result[str(episodes)] = usage.ru_maxrss / 1024.0  # Linux reports KiB
            print(f"  memory: {episodes} episodes, peak {result[str(episodes)]:.0f} MiB", flush=True)
    return result


class _CallClock:
    """Seconds spent inside the calls it wraps (the MLflow sink, training, the model), counting outermost calls only."""

    def __init__(self):
        self.seconds = 0.0
        self.values = 0  # metric values queued (each is one row of MLflow's store)
        self._depth = 0

    def wrap(self, function, counts_values=None):
        """``function`` timed; ``counts_values(args)``, if given, says how many metric values a call queues."""
        def timed(*args, **kwargs):
            if counts_values is not None and not self._depth:
                self.values += counts_values(args)
            self._depth += 1
            start = time.perf_counter()
            try:
                return function(*args, **kwargs)
            finally:
                self._depth -= 1
                if not self._depth:
                    self.seconds += time.perf_counter() - start

        return timed


def recording_overhead(episodes: int, repeats: int, quick: bool = False) -> dict:
    """Full MLflow recording against none, on the main job's defaults, and the fixed cost of a run.

    A recorded run has two parts: training (``Trainer.run`` and the last send of queued
    metrics), where the recording cost the target names is paid, and everything before
    and after it (the store, the config, the pictures, the tables, the model), the fixed
    cost, reported apart. Both are timed inside each recorded run. Two views of the
    recording cost: *paired*, the recorded training part against an unrecorded ``train()``
    of the same run, in pairs of alternating order (on a shared machine whose speed
    drifts, a pair can differ by a tenth with nothing changed); *in the run*, the time the
    recorded training spends inside the MLflow sink against the rest of it (a slow spell
    slows both alike, so this view does not drift). The model's share of the fixed cost is
    timed on its own: MLflow's ``log_model`` reads back every metric value of the run.
    """
    from hydra import compose, initialize_config_module
    from mlflow.tracking import MlflowClient

    import qtally.experiment as experiment
    import qtally.tracking.policy_model as policy_model
    from qtally.config.schema import register_schema
    from qtally.experiment import _exact_probes, prepare, run_training
    from qtally.tracking.mlflow_sink import MlflowRecorder
    from qtally.trainer import Trainer, TrainingSettings, logging_window, train

    register_schema()
    with tempfile.TemporaryDirectory(prefix="qtally-bench-") as scratch:
        store = Path(scratch) / "mlflow.db"

        def config(n: int):
            with initialize_config_module(config_module="qtally.configs", version_base=None):
                return compose(config_name="train", overrides=[f"episodes={n}", f"tracking.uri=sqlite:///{store}", "quiet=true"])

        measured: list[dict] = []
        writers = set()

        def recorded(n: int) -> float:
            cfg = config(n)
            sink, training, model = _CallClock(), _CallClock(), _CallClock()
            counts = {"log_metrics": lambda args: len(args[1]), "log_metric_columns": lambda args: len(args[1]) * len(args[2])}  # (self, metrics, step), (self, steps, columns)
            patches = [(MlflowRecorder, name, sink.wrap(getattr(MlflowRecorder, name), counts.get(name))) for name in ("log_metrics", "log_metric_columns", "flush", "log_file")]
            patches += [(Trainer, "run", training.wrap(Trainer.run)), (experiment, "_send_or_keep", training.wrap(experiment._send_or_keep)),
                        (policy_model, "log_policy_model", model.wrap(policy_model.log_policy_model))]
            originals = [(owner, name, getattr(owner, name)) for owner, name, _ in patches]
            for owner, name, timed in patches:
                setattr(owner, name, timed)
            try:
                start = time.perf_counter()
                summary = run_training(cfg)
                seconds = time.perf_counter() - start
            finally:
                for owner, name, function in originals:
                    setattr(owner, name, function)
            tags = MlflowClient(summary.tracking_uri).get_run(summary.run_id).data.tags
            writers.add(tags.get("qtally.metric_writer", "?"))
            measured.append({"seconds": seconds, "training": training.seconds, "sink": sink.seconds, "values": sink.values, "model": model.seconds})
            return seconds

        def unrecorded(n: int) -> float:
            cfg = config(n)
            variant, schedule, environment, evaluation_environment = prepare(cfg)
            probes, _, _ = _exact_probes(environment, cfg.gamma)
            settings = TrainingSettings(episodes=n, seed=cfg.seed, log_every=logging_window(cfg.log_every, n), eval_every=cfg.eval_every, eval_episodes=cfg.eval_episodes,
                                        truncation=cfg.env.truncation, eval_seed=cfg.eval_seed, engine=cfg.engine)
            start = time.perf_counter()
            train(environment, variant, schedule, settings, evaluation_environment=evaluation_environment, probes=probes)
            return time.perf_counter() - start

        recorded(1)  # opens the store and warms every import
        unrecorded(1)
        one_episode = []
        for _ in range(repeats):
            recorded(1)
            one_episode.append(measured[-1]["seconds"] - measured[-1]["training"])
        # Paired, in alternating order (recorded first, then unrecorded first, ...): a slow spell
        # of the machine then falls on both sides of a pair instead of on one block of runs.
        runs, offs, overheads = [], [], []
        for k in range(repeats):
            if k % 2:
                offs.append(unrecorded(episodes))
                recorded(episodes)
            else:
                recorded(episodes)
                offs.append(unrecorded(episodes))
            runs.append(measured[-1])
            overheads.append((runs[-1]["training"] - offs[-1]) / offs[-1])
        in_run = [r["sink"] / (r["training"] - r["sink"]) for r in runs]
        cold = float("nan")
        if not quick:  # a new process pays every import: measured apart, and not in quick mode
            start = time.perf_counter()
            subprocess.run(_train_command(1, Path(scratch) / "cold.db", []), cwd=scratch, capture_output=True, check=True)
            cold = time.perf_counter() - start

    def median(key: str) -> float:
        return statistics.median(r[key] for r in runs)

    result = {"episodes": episodes, "recorded_seconds": median("seconds"), "recorded_training_seconds": median("training"), "unrecorded_seconds": statistics.median(offs),
              "fixed_seconds_in_run": statistics.median(r["seconds"] - r["training"] for r in runs), "model_seconds": median("model"),
              "fixed_seconds_one_episode": statistics.median(one_episode), "fixed_seconds_new_process": cold,
              "overhead": statistics.median(overheads), "overhead_range": [min(overheads), max(overheads)],
              "in_run_overhead": statistics.median(in_run), "in_run_overhead_range": [min(in_run), max(in_run)],
              "metric_values": runs[-1]["values"], "sink_microseconds_per_value": 1e6 * statistics.median(r["sink"] / max(1, r["values"]) for r in runs),
              "metric_writer": ", ".join(sorted(writers))}
    print(f"  recording: {result['overhead']:+.1%} of training time paired, {result['in_run_overhead']:+.1%} in the run, "
          f"{result['metric_values']:,} metric values at {result['sink_microseconds_per_value']:.0f} µs each ({result['metric_writer']}), "
          f"fixed cost {result['fixed_seconds_in_run']:.1f} s in the run (the model {result['model_seconds']:.1f} s), {cold:.1f} s for a one-episode run from a new process", flush=True)
    return result


def versions() -> dict:
    import gymnasium
    import mlflow
    import numba
    import numpy

    return {"python": platform.python_version(), "numpy": numpy.__version__, "numba": numba.__version__, "gymnasium": gymnasium.__version__,
            "mlflow": mlflow.__version__, "cores": os.cpu_count(), "machine": platform.machine()}


def markdown(results: dict) -> str:
    v = results["versions"]
    lines = [
        f"Measured by `python scripts/bench.py{' --quick' if results['quick'] else ''}`: {v['cores']} cores, Python {v['python']}, numpy {v['numpy']}, "
        f"numba {v['numba']}, gymnasium {v['gymnasium']}; medians of {results['repeats']} runs.",
        "",
        "| environment | variant | gym path, steps/s | of bare stepping (same episodes; lowest–highest repeat) | the same, Python update only | of bare stepping (random actions, steps/s) | compiled, steps/s | compiled over gym | compiled of minimal kernel (lowest–highest repeat) | compiled of table stepping alone |",
        "|---|---|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    compiled = {(r["env"], r["variant"]): r for r in results["compiled"]}
    for row in results["gym"]:
        c = compiled[(row["env"], row["variant"])]
        low, high = row["same_episodes_ratio_range"]
        python_low, python_high = row["same_episodes_ratio_python_update_range"]
        lines.append(
            f"| {row['env']} | {row['variant']} | {row['train_steps_per_s']:,.0f} | {row['same_episodes_ratio']:.2f} ({low:.2f}–{high:.2f}) "
            f"| {row['same_episodes_ratio_python_update']:.2f} ({python_low:.2f}–{python_high:.2f}) | {row['random_actions_steps_ratio']:.2f} "
            f"| {c['compiled_steps_per_s']:,.0f} | {c['over_gym']:.0f}x | {c['of_reference']:.2f} ({c['of_reference_range'][0]:.2f}–{c['of_reference_range'][1]:.2f}) "
            f"| {c['of_stepping']:.2f} ({c['of_stepping_range'][0]:.2f}–{c['of_stepping_range'][1]:.2f}) |"
        )
    memory = results["memory"]
    small, large = sorted(memory, key=int)
    recording = results["recording"]
    lines += [
        "",
        f"- Compilation: {results['compile']['cold_seconds']:.1f} s on a machine's first run, {results['compile']['warm_seconds']:.2f} s once cached.",
        f"- Peak memory of the main job: {memory[small]:.0f} MiB after {int(small):,} episodes, {memory[large]:.0f} MiB after {int(large):,} "
        f"({memory[large] / memory[small]:.2f}x).",
        f"- Recording: {recording['overhead']:+.1%} of training time by paired wall times (median; {recording['overhead_range'][0]:+.1%} to {recording['overhead_range'][1]:+.1%}), "
        f"{recording['in_run_overhead']:+.1%} measured in the run (time inside the MLflow sink; {recording['in_run_overhead_range'][0]:+.1%} to {recording['in_run_overhead_range'][1]:+.1%}), "
        f"for {recording['episodes']:,} episodes ({recording['recorded_training_seconds']:.2f} s of training recorded against {recording['unrecorded_seconds']:.2f} s unrecorded); "
        f"the run sends {recording['metric_values']:,} metric values, about {recording['sink_microseconds_per_value']:.0f} µs each in the sink (queued, sent, stored; written as {recording['metric_writer']}).",
        f"- Fixed cost of a recorded run: {recording['fixed_seconds_in_run']:.2f} s around the {recording['episodes']:,}-episode training (store, config, pictures, tables, model), "
        f"{recording['fixed_seconds_one_episode']:.2f} s around a one-episode one; the model alone {recording['model_seconds']:.2f} s, as MLflow's `log_model` reads back every metric value of the run; "
        f"a one-episode `qtally-train` from a new process takes {recording['fixed_seconds_new_process']:.1f} s in all (imports included).",
    ]
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="qtally's engines against bare stepping and a minimal kernel, memory and recording cost.")
    parser.add_argument("--quick", action="store_true", help="small runs, to check the script works (minutes become seconds)")
    parser.add_argument("--repeats", type=int, default=None, help="timed runs per figure; the median is reported (default 3, quick 1)")
    parser.add_argument("--out", default="bench-results", help="folder for bench.md and bench.json (default bench-results)")
    args = parser.parse_args(argv)
    repeats = args.repeats if args.repeats is not None else (1 if args.quick else 3)
    if repeats < 1:
        parser.error("--repeats must be at least 1")
    out = Path(args.out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        parser.error(f"--out {out}: cannot create it ({exc.strerror})")
    warnings.filterwarnings("ignore")
    scale = 0.02 if args.quick else 1.0
    print("qtally benchmark" + (" (quick)" if args.quick else ""), flush=True)
    results = {"quick": args.quick, "repeats": repeats, "versions": versions()}
    results["gym"] = gym_against_bare(scale * 5 if args.quick else scale, repeats)
    results["compiled"] = compiled_against_gym(scale / 10 if args.quick else scale, repeats, results["gym"])
    results["compile"] = compile_cost(quick=args.quick)
    results["memory"] = peak_memory((100, 2_000) if args.quick else (10_000, 1_000_000))
    results["recording"] = recording_overhead(1_000 if args.quick else 100_000, repeats, quick=args.quick)
    (out / "bench.json").write_text(json.dumps(results, indent=2))
    (out / "bench.md").write_text(markdown(results))
    print(markdown(results))
    print(f"written: {out / 'bench.md'}, {out / 'bench.json'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
