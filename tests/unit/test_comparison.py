"""The comparison statistics piece by piece, on numbers small enough to work out by hand."""

from __future__ import annotations

import math

import numpy as np
import pytest

from qtally.evaluate.comparison import (
    RunCurve,
    area_under_curve,
    compare_groups,
    episodes_to_threshold,
    holm_adjust,
    mean_interval,
    welch_test,
)
from qtally.evaluate.comparison_report import ReportContext, status_line, summary_metrics, terminal_report


def _run(final: float, seed: int = 0, steps=(0, 1000, 2000), start: float = 0.0, **finals) -> RunCurve:
    values = np.linspace(start, final, len(steps))
    return RunCurve(run_id=f"r{seed}", seed=str(seed), finals={"eval_return_mean": final, **finals}, steps=np.asarray(steps, float), values=values)


# ------------------------------------------------------------ area and threshold


def test_area_of_a_constant_curve_is_the_constant_and_of_a_ramp_its_midpoint():
    assert area_under_curve([0, 500, 2000], [3.0, 3.0, 3.0]) == pytest.approx(3.0)
    assert area_under_curve([0, 100], [0.0, 1.0]) == pytest.approx(0.5)


def test_area_weights_by_episode_span_not_by_point_count():
    # Worked by hand: 0->1 over 100 episodes (area 50), then 1 flat over 900 (area 900): 950 / 1000.
    # An unweighted mean of the three points would give 2/3; a missing normalisation 950.
    assert area_under_curve([0, 100, 1000], [0.0, 1.0, 1.0]) == pytest.approx(0.95)


def test_area_of_one_evaluation_is_that_evaluation():
    assert area_under_curve([5000], [0.7]) == 0.7
    assert math.isnan(area_under_curve([], []))


def test_threshold_is_the_first_step_reaching_it_inclusive():
    steps, values = [0, 100, 200, 300], [0.1, 0.5, 0.4, 0.9]
    assert episodes_to_threshold(steps, values, 0.5) == 100  # equal counts as reached; first, not last
    assert episodes_to_threshold(steps, values, 0.45) == 100
    assert episodes_to_threshold(steps, values, 0.95) is None


# ------------------------------------------------------------ intervals, Welch, Holm


def test_interval_by_hand_for_three_values():
    # mean 2, s = 1, t_{0.975, 2} = 4.303 (printed t tables), so the half-width is 4.303 / sqrt(3);
    # a z quantile (1.96) or a population s would miss by far more than this tolerance.
    interval = mean_interval([1.0, 2.0, 3.0])
    assert interval.mean == 2.0 and interval.n == 3
    assert interval.half_width == pytest.approx(4.303 / math.sqrt(3), abs=1e-3)


def test_one_seed_has_a_mean_and_no_interval():
    interval = mean_interval([0.4])
    assert interval.mean == 0.4 and interval.n == 1 and math.isnan(interval.half_width)


def test_welch_statistic_by_hand():
    # a = [1, 2, 3] (var 1), b = [2, 4, 6, 8] (var 20/3): se^2 = 1/3 + 5/3 = 2, t = (2 - 5) / sqrt 2;
    # df = 4 / ((1/3)^2 / 2 + (5/3)^2 / 3) = 4 / (1/18 + 25/27) = 4.0754716...
    result = welch_test([1, 2, 3], [2, 4, 6, 8])
    assert result.difference == pytest.approx(-3.0)
    assert result.statistic == pytest.approx(-3.0 / math.sqrt(2.0))
    assert result.dof == pytest.approx(4.0 / (1 / 18 + 25 / 27))
    assert result.low < result.difference < result.high


def test_welch_without_any_spread_takes_the_limit():
    assert welch_test([0.7, 0.7], [0.5, 0.5]).p_value == 0.0
    same = welch_test([0.7, 0.7], [0.7, 0.7])
    assert same.p_value == 1.0 and same.no_spread


def test_holm_by_hand():
    # sorted 0.01, 0.02, 0.04 -> 3*0.01, 2*0.02, 1*0.04 = 0.03, 0.04, 0.04 (already monotone)
    assert holm_adjust([0.04, 0.01, 0.02]) == pytest.approx([0.04, 0.03, 0.04])
    # step-down monotonicity: 0.001*3=0.003, 0.04*2=0.08, 0.05*1=0.05 -> raised to 0.08
    assert holm_adjust([0.05, 0.04, 0.001]) == pytest.approx([0.08, 0.08, 0.003])
    # capped at 1
    assert holm_adjust([0.6, 0.9]) == pytest.approx([1.0, 1.0])
    assert holm_adjust([]) == []


# ------------------------------------------------------------ ranking and verdicts


def _groups(**levels):
    """Group name -> list of finals; a group of 5 seeds around each level."""
    return {name: (name, [_run(v, seed=i) for i, v in enumerate(values)]) for name, values in levels.items()}


def test_identical_groups_are_not_different_and_a_clearly_better_one_is_better():
    noise = [-0.02, 0.01, 0.0, 0.02, -0.01]
    groups = _groups(
        same_a=[0.5 + e for e in noise],
        same_b=[0.5 + e for e in reversed(noise)],
        better=[0.8 + e for e in noise],
    )
    c = compare_groups(groups)
    assert [g.label for g in c.groups][0] == "better"
    kinds = {g.label: v.kind for g, v in zip(c.groups, c.verdicts)}
    assert kinds == {"better": "best", "same_a": "better", "same_b": "better"}
    c2 = compare_groups({k: groups[k] for k in ("same_a", "same_b")})
    assert [v.kind for v in c2.verdicts] == ["best", "not_different"]
    assert "not significantly different" in c2.verdicts[1].text


def test_a_single_seed_group_is_reported_and_never_the_reference():
    groups = _groups(lucky=[0.99], steady=[0.6, 0.62, 0.58], weak=[0.3, 0.32, 0.28])
    c = compare_groups(groups)
    assert [g.label for g in c.groups] == ["lucky", "steady", "weak"]  # ranked by mean
    assert c.groups[c.best].label == "steady"
    assert c.verdicts[0].kind == "too_few" and "too few seeds to tell" in c.verdicts[0].text
    assert c.tests == 1  # the single-seed group is not counted in Holm's m
    assert c.verdicts[2].kind == "better"


def test_lower_is_better_ranks_and_tests_the_other_way():
    groups = {
        "small_gap": ("small_gap", [_run(0.7, i, optimality_gap=g) for i, g in enumerate([0.01, 0.02, 0.015])]),
        "big_gap": ("big_gap", [_run(0.5, i, optimality_gap=g) for i, g in enumerate([0.2, 0.25, 0.22])]),
    }
    c = compare_groups(groups, metric="optimality_gap", higher_is_better=False)
    assert [g.label for g in c.groups] == ["small_gap", "big_gap"]
    assert c.verdicts[1].kind == "better"
    assert c.verdicts[1].welch.difference < 0  # best minus this: a smaller gap
    assert c.groups[0].optimality_gap.mean == pytest.approx(0.015)


def test_holm_is_applied_across_the_tests():
    groups = _groups(best=[1.0, 1.1, 0.9, 1.05, 0.95], a=[0.8, 0.95, 0.7, 0.9, 0.85], b=[0.2, 0.3, 0.25, 0.1, 0.15])
    c = compare_groups(groups)
    raw = [v.welch.p_value for v in c.verdicts[1:]]
    assert [v.p_adjusted for v in c.verdicts[1:]] == pytest.approx(holm_adjust(raw))
    assert c.verdicts[2].p_adjusted == pytest.approx(2 * raw[1])  # the smallest p is doubled (m = 2), not left raw


def test_threshold_counts_runs_that_never_reach_it():
    groups = {"g": ("g", [_run(0.9, 0), _run(0.9, 1, steps=(0, 500, 2000)), _run(0.3, 2)])}
    c = compare_groups(groups, threshold=0.45)
    g = c.groups[0]
    # ramps 0 -> 0.9 reach 0.45 at the middle evaluation: 1000 and 500; the 0.3 run never does.
    assert (g.threshold_reached, g.threshold_never) == (2, 1)
    assert g.threshold_episodes == pytest.approx(750.0)


# ------------------------------------------------------------ report words


def test_status_line_says_what_is_missing():
    assert status_line({"FINISHED": 10, "FAILED": 1, "RUNNING": 1}) == "12 runs: 10 finished, 1 failed, 1 running; compared on the 10 finished, 2 missing from the comparison"
    assert status_line({"FINISHED": 4}) == "4 runs: 4 finished"
    # the sweep planned 6 jobs and 2 have not started: they are missing too
    assert status_line({"FINISHED": 3, "RUNNING": 1}, planned=6) == "6 runs: 3 finished, 1 running, 2 not started yet; compared on the 3 finished, 3 missing from the comparison"


def test_summary_metric_names_are_valid_mlflow_names_and_skip_missing_values():
    import re

    c = compare_groups(_groups(a=[0.5, 0.6], b=[0.2]))
    metrics = summary_metrics(c)
    assert all(re.fullmatch(r"[A-Za-z0-9_\-./ ]+", k) for k in metrics)
    assert metrics["group.a.eval_return_mean"] == pytest.approx(0.55)
    assert "group.b.eval_return_ci95" not in metrics  # one seed: no interval, nothing logged
    text = terminal_report(c, ReportContext("invented sweep", {"FINISHED": 3}, {}))
    assert "too few seeds to tell" in text and "1 seed" in text


def test_learning_curve_band_uses_the_runs_evaluated_at_each_step(tmp_path):
    from qtally.comparison_plots import curve_band, group_learning_curves

    runs = [
        RunCurve("a", "0", {}, np.array([0.0, 100.0]), np.array([1.0, 2.0])),
        RunCurve("b", "1", {}, np.array([0.0, 100.0, 200.0]), np.array([3.0, 4.0, 5.0])),
    ]
    steps, mean, half = curve_band(runs)
    assert steps.tolist() == [0.0, 100.0, 200.0]
    assert mean.tolist() == [2.0, 3.0, 5.0]
    assert np.isfinite(half[:2]).all() and math.isnan(half[2])
    path = group_learning_curves([("g", runs)], tmp_path / "c.png", "invented", threshold=2.5)
    assert path.read_bytes()[:4] == b"\x89PNG"
