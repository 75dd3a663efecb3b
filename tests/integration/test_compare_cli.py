"""``qtally-compare`` as a user runs it (a subprocess on a SQLite store built here), and once on real training runs.

The sweeps are built directly with MlflowClient, tagged as :mod:`qtally.tracking.sweep_tags`
says, with invented evaluation curves; each bad input must give one line naming the fix, a
non-zero exit, no traceback and no run left RUNNING.
"""

from __future__ import annotations

import csv
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from omegaconf import OmegaConf

from support.sweep_store import add_child, client_for, make_parent

ROOT = Path(__file__).resolve().parents[2]


def _command() -> list[str]:
    script = Path(sys.executable).with_name("qtally-compare")
    if script.exists():
        return [str(script)]
    found = shutil.which("qtally-compare")
    if found is None:
        pytest.skip("qtally-compare is not installed (pip install -e .)")
    return [found]


def _curve(final: float) -> list[tuple[int, float]]:
    return [(0, 0.0), (1000, final / 2), (2000, final)]


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    tmp_path = tmp_path_factory.mktemp("compare_cli")
    client, uri = client_for(tmp_path)
    empty = make_parent(client)
    time.sleep(0.01)  # the good sweep must be the latest by start time
    sweep = make_parent(client, status="RUNNING")  # a sweep still under way
    client.log_param(sweep, "sweep.jobs", "10")  # as the sweep records it: one job has not started yet
    for seed, final in enumerate([0.70, 0.72, 0.74]):
        add_child(client, sweep, {"schedule": "glie_visits"}, seed, {"eval_return_mean": _curve(final), "optimality_gap": [(2000, 0.8 - final)]})
    add_child(client, sweep, {"schedule": "glie_visits"}, 3, {"eval_return_mean": [(0, 0.0)]}, status="FAILED")
    add_child(client, sweep, {"schedule": "glie_visits"}, 4, {"eval_return_mean": [(0, 0.0)]}, status="RUNNING")
    for seed, final in enumerate([0.40, 0.45, 0.42]):
        add_child(client, sweep, {"schedule": "constant"}, seed, {"eval_return_mean": _curve(final), "optimality_gap": [(2000, 0.8 - final)]})
    add_child(client, sweep, {"schedule": "linear"}, 0, {"eval_return_mean": _curve(0.9)})
    # Plain runs of another experiment, as qtally-train -m made them before sweeps had parents.
    plain_parent = make_parent(client, experiment="plain")
    plain_experiment = client.get_run(plain_parent).info.experiment_id
    client.delete_run(plain_parent)  # only there to create the experiment with its artifacts beside the store
    for schedule, level in (("constant", 0.3), ("exponential", 0.6)):
        for seed in range(3):
            run = client.create_run(plain_experiment, tags={"variant": "on_policy", "schedule": schedule, "seed": str(seed)})
            client.log_metric(run.info.run_id, "eval_return_mean", level + 0.01 * seed, step=500)
            client.set_terminated(run.info.run_id, "FINISHED")
    return tmp_path, uri, client, {"empty": empty, "sweep": sweep}


def _run(store, *overrides: str) -> subprocess.CompletedProcess:
    tmp_path, uri, _, _ = store
    env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "tests"), env.get("PYTHONPATH", "")])
    args = _command() + [f"tracking.uri={uri}", f"hydra.run.dir={tmp_path / 'hydra'}", *overrides]
    return subprocess.run(args, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300)


def _running(client, store_ids) -> set[str]:
    """Runs left RUNNING, besides the two this store holds on purpose (the sweep and one of its jobs)."""
    runs = client.search_runs([e.experiment_id for e in client.search_experiments()], filter_string="attributes.status = 'RUNNING'")
    return {r.info.run_id for r in runs} - {store_ids["sweep"]} - {r.info.run_id for r in runs if r.data.tags.get("seed") == "4"}


def test_latest_sweep_is_compared_on_what_finished(store):
    tmp_path, _, client, ids = store
    result = _run(store, "threshold=0.3", "output_dir=out_latest")
    assert result.returncode == 0, result.stderr[-2000:]
    out = result.stdout
    assert f"comparison of sweep {ids['sweep']}" in out
    assert "10 runs: 7 finished, 1 failed, 1 running, 1 not started yet; compared on the 7 finished, 3 missing from the comparison" in out
    lines = out.splitlines()
    first = next(line for line in lines if line.strip().startswith("1 "))
    assert "schedule=linear" in first  # one lucky seed ranks first by mean ...
    assert any("schedule=linear: too few seeds to tell" in line for line in lines)  # ... and is reported, not tested
    assert any("schedule=glie_visits: best" in line for line in lines)
    assert any("schedule=constant: the best group is better" in line for line in lines)
    with open(tmp_path / "out_latest" / "comparison.csv", newline="") as stream:
        rows = {row["label"]: row for row in csv.DictReader(stream)}
    glie = rows["schedule=glie_visits"]
    assert (glie["seeds"], glie["runs_in_group"], glie["failed"], glie["running"]) == ("3", "5", "1", "1")
    assert float(glie["final_eval_return_mean"]) == pytest.approx(0.72)
    assert float(glie["final_optimality_gap"]) == pytest.approx(0.08)
    assert float(glie["threshold_episodes_mean"]) == pytest.approx(1000.0)  # 0.35, 0.36, 0.37 at 1000 all reach 0.3
    assert rows["schedule=constant"]["threshold_never"] == "0"
    parent = client.get_run(ids["sweep"])
    assert parent.info.status == "RUNNING"  # the comparison does not end a sweep under way
    assert parent.data.metrics[f"group.{glie['group']}.eval_return_mean"] == pytest.approx(0.72)
    assert {f.path for f in client.list_artifacts(ids["sweep"], "comparison")} == {
        "comparison/comparison.csv", "comparison/comparison.md", "comparison/learning_curves.png"}


def test_plain_runs_by_filter_and_tags_get_a_comparison_run_of_their_own(store):
    _, _, client, ids = store
    result = _run(store, "experiment=plain", "filter=\"attributes.status = 'FINISHED'\"", "group_by=[variant,schedule]", "quiet=true", "output_dir=out_plain")
    assert result.returncode == 0, result.stderr[-2000:]
    run_id = result.stdout.strip().splitlines()[-1]
    run = client.get_run(run_id)
    assert run.info.status == "FINISHED"
    assert client.get_experiment(run.info.experiment_id).name == "qtally-compare"
    assert run.data.tags["qtally.compare.best"] == "variant=on_policy schedule=exponential"
    assert len(client.list_artifacts(run_id, "comparison")) == 3
    assert not _running(client, ids)


BAD = [
    # (overrides, words the one-line message must contain): the cases the issue names, through the console script
    (lambda ids: [f"sweep={ids['empty']}"], ["has no job runs", "wait until its jobs have started"]),
    (lambda ids: ["sweep=0123456789abcdef0123456789abcdef"], ["sweep='0123456789abcdef0123456789abcdef'", "no run with this id", "sweep=latest"]),
    (lambda ids: [f"sweep={ids['sweep']}", "metric=no_such_metric"], ["metric='no_such_metric'", "none of the 7 finished runs logged it", "eval_return_mean"]),
    # as a shell hands over filter="tags.schedule = 'nothing'": the outer quotes already gone
    (lambda ids: ["experiment=plain", "filter=tags.schedule = 'nothing'"], ["matches no run", "loosen the filter"]),
]


@pytest.mark.parametrize("overrides, words", BAD)
def test_bad_input_gives_one_line_and_leaves_no_run_running(store, overrides, words):
    _, _, client, ids = store
    before = {r.info.run_id for r in client.search_runs([e.experiment_id for e in client.search_experiments()])}
    result = _run(store, *overrides(ids))
    assert result.returncode == 2, (result.returncode, result.stderr[-2000:])
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("qtally-compare: error: "), result.stderr[-2000:]
    assert "Traceback" not in result.stderr
    for word in words:
        assert word in lines[0], lines[0]
    after = {r.info.run_id for r in client.search_runs([e.experiment_id for e in client.search_experiments()])}
    assert after == before  # nothing recorded for a refused comparison
    assert not _running(client, ids)


# The other refusals, in process (a subprocess each would cost seconds for the same code path).
MORE_BAD = [
    ({"experiment": "plain", "filter": "tags.schedule ==== 1"}, ["filter=", "MLflow cannot use this filter"]),
    ({"experiment": "plain"}, ["holds no sweep", "group_by=[variant,schedule]"]),
    ({"experiment": "plain", "filter": "attributes.status = 'FINISHED'"}, ["no qtally.group tag", "group_by=[variant,schedule]"]),
    ({"experiment": "plain", "filter": "attributes.status = 'FINISHED'", "group_by": ["colour"]}, ["group_by=['colour']", "no run has the tag 'colour'", "schedule"]),
    ({"experiment": "nowhere"}, ["experiment='nowhere'", "no such experiment", "plain"]),
    ({"metric": "a,b"}, ["metric='a,b'", "not a metric name"]),
    ({"threshold": float("nan")}, ["threshold=nan", "finite"]),
]


@pytest.mark.parametrize("options, words", MORE_BAD)
def test_more_bad_input_is_one_line_naming_the_fix(store, options, words, tmp_path):
    from qtally.compare_run import run_comparison
    from qtally.config.compare_schema import CompareConfig
    from qtally.errors import QtallyError

    _, uri, _, _ = store
    cfg = OmegaConf.structured(CompareConfig)
    cfg.tracking.uri, cfg.output_dir = uri, str(tmp_path / "out")
    for key, value in options.items():
        cfg[key] = value
    with pytest.raises(QtallyError) as caught:
        run_comparison(cfg)
    message = str(caught.value)
    assert "\n" not in message
    for word in words:
        assert word in message, message
    assert not (tmp_path / "out").exists()  # refused before anything was written


def test_a_mistyped_option_is_refused_before_hydra():
    from qtally.cli.overrides import first_override_problem
    from qtally.config.compare_schema import CompareConfig

    assert "could not be converted" in first_override_problem(["threshold=lots"], CompareConfig(), groups=())
    assert "no such config key" in first_override_problem(["treshold=0.5"], CompareConfig(), groups=())


# ------------------------------------------------------------ real training runs


@pytest.mark.slow
def test_real_training_same_config_is_not_different_and_ten_times_the_episodes_is_better(tmp_path, monkeypatch):
    """Restocking simulator (invented figures), on-policy: 5 seeds at 150 episodes, 5 other seeds at 150, 5 seeds at 1500.

    At 150 seasons the seed-averaged evaluation profit sits near 64, at 1500 near 78 with
    per-seed spreads of about 1-3 (fixed seeds, measured once), so the 10x group is better by
    far more than its interval; the two 150-episode groups differ only by seed. A comparison
    that mixed groups, reversed the ranking or skipped the test would fail one of the two.
    """
    from qtally.compare_run import run_comparison
    from qtally.config.compare_schema import CompareConfig
    from qtally.control.schedules import make_schedule
    from qtally.control.variants import make_variant
    from qtally.envs.factory import make_environment
    from qtally.experiment import bundled_environment_spec
    from qtally.trainer import TrainingSettings, train

    monkeypatch.chdir(tmp_path)
    client, uri = client_for(tmp_path)
    spec, truncation = bundled_environment_spec("restock")

    def curves(episodes: int, seeds: range) -> list[list[tuple[int, float]]]:
        out = []
        for seed in seeds:
            environment, evaluation = make_environment(spec), make_environment(spec)
            try:
                outcome = train(
                    environment, make_variant("on_policy", 1.0, True, None), make_schedule("constant", epsilon=0.1),
                    TrainingSettings(episodes=episodes, seed=seed, log_every=50, eval_every=episodes // 3, eval_episodes=100, truncation=truncation),
                    evaluation_environment=evaluation,
                )
            finally:
                environment.close()
                evaluation.close()
            out.append(outcome.history["eval_return_mean"])
        return out

    def sweep(groups: dict[str, tuple[int, list]]) -> str:
        parent = make_parent(client)
        for name, (episodes, histories) in groups.items():
            for seed, history in enumerate(histories):
                add_child(client, parent, {"episodes": str(episodes), "name": name}, seed, {"eval_return_mean": history})
        return parent

    def compare(parent: str):
        cfg = OmegaConf.structured(CompareConfig)
        cfg.sweep, cfg.tracking.uri, cfg.output_dir = parent, uri, str(tmp_path / parent)
        return run_comparison(cfg).comparison

    short, other_seeds, long = curves(150, range(0, 5)), curves(150, range(5, 10)), curves(1500, range(0, 5))
    same = compare(sweep({"a": (150, short), "b": (150, other_seeds)}))
    assert [v.kind for v in same.verdicts] == ["best", "not_different"], [v.text for v in same.verdicts]
    longer = compare(sweep({"short": (150, short), "long": (1500, long)}))
    assert [g.label for g in longer.groups] == ["episodes=1500 name=long", "episodes=150 name=short"]
    assert [v.kind for v in longer.verdicts] == ["best", "better"], [v.text for v in longer.verdicts]
    assert longer.verdicts[1].welch.low > 5.0  # the gain is large, not merely significant
