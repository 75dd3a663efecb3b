"""The ranking rule behind qtally-promote (qtally.evaluate.promotion): metric, then interval, then episodes."""

import math

from qtally.evaluate.promotion import Candidate, beats, candidate_from_metrics, overlaps, ranked


def test_order_is_metric_then_narrower_interval_then_fewer_episodes():
    runs = [Candidate("a", 0.70, 0.02, 1000), Candidate("b", 0.71, 0.05, 9000), Candidate("c", 0.70, 0.01, 9000), Candidate("d", 0.70, 0.01, 2000)]
    assert [c.run_id for c in ranked(runs)] == ["b", "d", "c", "a"]
    assert [c.run_id for c in ranked(runs, higher_is_better=False)] == ["d", "c", "a", "b"]


def test_an_unknown_interval_ranks_after_a_known_one():
    assert [c.run_id for c in ranked([Candidate("x", 0.5, math.nan, 1), Candidate("y", 0.5, 0.3, 99)])] == ["y", "x"]


def test_the_alias_moves_only_for_a_strictly_better_run():
    incumbent = Candidate("old", 0.70, 0.02, 5000)
    assert beats(Candidate("new", 0.71, 0.02, 5000), incumbent)
    assert not beats(Candidate("new", 0.69, 0.001, 10), incumbent)
    assert not beats(Candidate("new", 0.70, 0.02, 5000), incumbent)  # an equal run does not move it
    assert not beats(Candidate("old", 0.90, 0.0, 1), incumbent)  # nor does the incumbent itself
    assert beats(Candidate("new", 0.60, 0.02, 5000), incumbent, higher_is_better=False)


def test_significance_is_non_overlapping_intervals():
    incumbent = Candidate("old", 0.70, 0.02, 5000)
    assert overlaps(Candidate("new", 0.73, 0.02, 5000), incumbent)  # 0.71..0.72 is in both intervals
    assert not overlaps(Candidate("new", 0.741, 0.02, 5000), incumbent)
    assert overlaps(Candidate("new", 0.9, math.nan, 5000), incumbent)  # nothing shown without an interval


def test_candidates_read_the_matching_interval_and_exact_metrics_have_none():
    metrics = {"eval_return_mean": 0.7, "eval_return_ci95": 0.03, "greedy_expected_return": 0.74}
    assert candidate_from_metrics("r", "eval_return_mean", metrics, 10) == Candidate("r", 0.7, 0.03, 10)
    assert candidate_from_metrics("r", "greedy_expected_return", metrics, 10) == Candidate("r", 0.74, 0.0, 10)
    assert candidate_from_metrics("r", "optimality_gap", metrics, 10) is None
