"""The benchmark script works: its quick mode runs every measurement and writes its table.

Which bug this catches: a measurement that crashes, a section missing from the JSON, a
ratio that is not a positive finite number, a table that does not name every environment
and variant. Timing itself is never asserted (benchmarks report, tests do not time).
"""

import json
import math
import subprocess
import sys
from pathlib import Path

SCRIPT = Path(__file__).parents[2] / "scripts" / "bench.py"


def test_quick_benchmark_writes_its_table_and_json(tmp_path):
    result = subprocess.run([sys.executable, str(SCRIPT), "--quick", "--out", str(tmp_path / "out")], capture_output=True, text=True, timeout=600)
    assert result.returncode == 0, result.stderr[-2000:]
    data = json.loads((tmp_path / "out" / "bench.json").read_text())
    assert {"gym", "compiled", "compile", "memory", "recording", "versions"} <= data.keys()
    assert len(data["gym"]) == len(data["compiled"]) == 9
    for row in data["gym"]:
        for key in ("same_episodes_ratio", "same_episodes_ratio_python_update", "random_actions_steps_ratio", "train_steps_per_s"):
            assert math.isfinite(row[key]) and row[key] > 0, (row, key)
        for key in ("same_episodes_ratio", "same_episodes_ratio_python_update"):
            low, high = row[f"{key}_range"]  # the median of the per-repeat ratios lies among them
            assert low <= row[key] <= high, (row, key)
    for row in data["compiled"]:
        assert row["over_gym"] > 1.0, row  # compiled code slower than Python would be a broken engine, not noise
        for key in ("of_reference", "of_stepping"):
            assert 0 < row[key] and math.isfinite(row[key]), (row, key)
            low, high = row[f"{key}_range"]
            assert low <= row[key] <= high, (row, key)
    assert all(v > 0 for v in data["memory"].values()) and len(data["memory"]) == 2
    assert data["compile"]["warm_seconds"] > 0 and math.isfinite(data["recording"]["overhead"])
    low, high = data["recording"]["in_run_overhead_range"]
    assert low <= data["recording"]["in_run_overhead"] <= high and math.isfinite(high), data["recording"]
    # values, not calls: every 100-episode window of the main job logs 7 metrics at once
    assert data["recording"]["metric_values"] >= 7 * data["recording"]["episodes"] // 100, data["recording"]
    assert 0 < data["recording"]["sink_microseconds_per_value"] < 1e6, data["recording"]
    # the parts of a recorded run: training inside it, the fixed cost around it, the model within that
    recording = data["recording"]
    assert 0 < recording["recorded_training_seconds"] < recording["recorded_seconds"], recording
    assert 0 < recording["model_seconds"] < recording["fixed_seconds_in_run"], recording
    assert recording["metric_writer"] == "sqlite rows", recording  # the benchmark's store is SQLite: the direct writer must be the one timed
    table = (tmp_path / "out" / "bench.md").read_text()
    for env in ("frozen_lake_8x8", "blackjack", "restock"):
        assert table.count(f"| {env} |") == 3
    assert "Peak memory" in table and "Recording" in table and "Compilation" in table and "Fixed cost" in table


def test_bench_refuses_a_bad_repeat_count(tmp_path):
    result = subprocess.run([sys.executable, str(SCRIPT), "--repeats", "0", "--out", str(tmp_path)], capture_output=True, text=True, timeout=60)
    assert result.returncode == 2 and "--repeats must be at least 1" in result.stderr


def test_quick_collection_benchmark_writes_its_table_and_json(tmp_path):
    # Breakages caught: a worker count or simulator missing from the table, a rate that is not
    # a positive finite number, a ratio not taken against one worker of the same backend.
    script = SCRIPT.with_name("bench_collect.py")
    out = tmp_path / "out"
    result = subprocess.run([sys.executable, str(script), "--quick", "--step-ms", "0.2", "--out", str(out)], capture_output=True, text=True, timeout=600)
    assert result.returncode == 0, result.stderr[-2000:]
    data = json.loads((out / "bench_collect.json").read_text())
    rows = data["rows"]
    assert [(r["simulator"], r["workers"]) for r in rows] == [("ComputingDesk", 1), ("ComputingDesk", 2), ("WaitingDesk", 1), ("WaitingDesk", 2)]
    for row in rows:
        assert math.isfinite(row["episodes_per_second"]) and row["episodes_per_second"] > 0, row
        assert row["of_one_worker"] == (1.0 if row["workers"] == 1 else row["episodes_per_second"] / rows[rows.index(row) - 1]["episodes_per_second"])
    table = (out / "bench_collect.md").read_text()
    assert table.count("| ComputingDesk | local |") == 2 and table.count("| WaitingDesk | local |") == 2


def test_quick_simulator_in_run_benchmark_prints_every_case(tmp_path):
    # Breakages caught: a case missing from the table, a call count of zero (a timer that was
    # never installed where the run calls the simulator reads as 0 ns), a crash in either loop.
    script = SCRIPT.with_name("bench_simulator_in_run.py")
    out = tmp_path / "sim.md"
    result = subprocess.run([sys.executable, str(script), "--quick", "--out", str(out)], capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stderr[-2000:]
    rows = [line for line in out.read_text().splitlines() if line.startswith("| ") and not line.startswith("| environment")]
    assert [tuple(cell.strip() for cell in row.split("|")[1:3]) for row in rows] == [
        ("restock", "exploring_starts"), ("restock", "on_policy"), ("blackjack", "exploring_starts"), ("frozen_lake_8x8", "exploring_starts")]
    for row in rows:
        numbers = [float(cell.split()[0].replace(",", "")) for cell in row.split("|")[3:-1]]
        assert len(numbers) == 6 and all(n > 0 for n in numbers), row


def test_quick_evaluation_benchmark_reports_equal_returns_and_reuse(tmp_path):
    # Breakages caught: a case missing, the two ways logging different evaluations (the script
    # exits 1 and prints "NO"), evaluations that replay everything (a share of 100%), a timing of 0.
    script = SCRIPT.with_name("bench_evaluation.py")
    out = tmp_path / "evaluation.md"
    result = subprocess.run([sys.executable, str(script), "--quick", "--out", str(out)], capture_output=True, text=True, timeout=600)
    assert result.returncode == 0, result.stdout[-2000:] + result.stderr[-2000:]
    rows = [[cell.strip() for cell in line.split("|")[1:-1]] for line in out.read_text().splitlines() if line.startswith("| ") and not line.startswith("| environment")]
    assert [row[:2] for row in rows] == [["frozen_lake_4x4", "on_policy"], ["blackjack", "exploring_starts"], ["restock", "on_policy"]]
    for row in rows:
        assert row[-1] == "yes", row
        assert 0 < int(row[-2].rstrip("%")) < 100, row
        assert all(float(cell) > 0 for cell in (row[4], row[5], row[7], row[8])), row
