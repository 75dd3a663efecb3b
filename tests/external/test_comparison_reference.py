"""``qtally-compare``'s numbers against scipy.stats, computed independently here on the same run data.

Sources: Welch's unequal-variance t-test, B. L. Welch (1947), "The generalization of
'Student's' problem when several different population variances are involved",
Biometrika 34, as implemented by ``scipy.stats.ttest_ind(equal_var=False)`` (statistic, p
and ``confidence_interval()``); the Student-t interval of a mean via ``scipy.stats.t.ppf``;
Holm's step-down adjustment, S. Holm (1979), "A simple sequentially rejective multiple
test procedure", Scandinavian Journal of Statistics 6, written out by hand below (scipy has
no Holm; its ``false_discovery_control`` is Benjamini-Hochberg, a different procedure).

The runs are built directly in a temporary SQLite store: a parent and tagged children with
invented evaluation curves, read back through the same path ``qtally-compare`` uses.
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest
from omegaconf import OmegaConf
from scipy import stats

from qtally.compare_run import run_comparison
from qtally.config.compare_schema import CompareConfig
from support.sweep_store import add_child, client_for, make_parent

# Invented restocking profits: four schedules, unequal spreads and seed counts so Welch's
# df differs from the pooled test's and Holm's step-down order matters.
LEVELS = {"glie_visits": (80.0, 1.0, 6), "exponential": (78.5, 2.5, 5), "linear": (77.0, 0.6, 4), "constant": (79.6, 1.8, 5)}
STEPS = [0, 1000, 2000, 3000]


def holm_by_hand(p):
    m = len(p)
    order = np.argsort(p)
    out = np.empty(m)
    previous = 0.0
    for k, i in enumerate(order):
        previous = max(previous, min(1.0, (m - k) * p[i]))
        out[i] = previous
    return out


@pytest.fixture(scope="module")
def compared(tmp_path_factory):
    tmp_path = tmp_path_factory.mktemp("compare_reference")
    client, uri = client_for(tmp_path)
    parent = make_parent(client)
    rng = np.random.default_rng(20260)
    finals: dict[str, list[float]] = {}
    curves: dict[str, list[list[tuple[int, float]]]] = {}
    for schedule, (level, spread, seeds) in LEVELS.items():
        for seed in range(seeds):
            final = float(level + spread * rng.standard_normal())
            curve = [(s, final * (0.6 + 0.4 * s / STEPS[-1]) + 0.3 * rng.standard_normal()) for s in STEPS[:-1]] + [(STEPS[-1], final)]
            add_child(client, parent, {"schedule": schedule, "variant": "on_policy"}, seed, {"eval_return_mean": curve})
            finals.setdefault(f"schedule={schedule} variant=on_policy", []).append(final)
            curves.setdefault(f"schedule={schedule} variant=on_policy", []).append(curve)
    cfg = OmegaConf.structured(CompareConfig)
    cfg.sweep = parent
    cfg.output_dir = str(tmp_path / "out")
    cfg.tracking.uri = uri
    summary = run_comparison(cfg)
    with open(tmp_path / "out" / "comparison.csv", newline="") as stream:
        rows = {row["label"]: row for row in csv.DictReader(stream)}
    return summary, rows, finals, client, parent, curves


def test_group_means_and_intervals_match_student_t(compared):
    _, rows, finals, _, _, _ = compared
    for label, values in finals.items():
        x = np.asarray(values)
        half = stats.t.ppf(0.975, x.size - 1) * stats.sem(x)
        assert float(rows[label]["final_eval_return_mean"]) == pytest.approx(x.mean(), rel=1e-12)
        assert float(rows[label]["final_eval_return_ci95"]) == pytest.approx(half, rel=1e-9)
        assert int(rows[label]["seeds"]) == x.size


def test_welch_statistics_and_holm_adjusted_p_match_scipy(compared):
    summary, rows, finals, _, _, _ = compared
    ranked = sorted(finals, key=lambda k: -np.mean(finals[k]))
    best, others = ranked[0], ranked[1:]
    assert rows[best]["verdict"] == "best" and rows[best]["rank"] == "1"
    raw = []
    for label in others:
        ref = stats.ttest_ind(finals[best], finals[label], equal_var=False)
        low, high = ref.confidence_interval(0.95)
        row = rows[label]
        assert float(row["welch_t"]) == pytest.approx(ref.statistic, rel=1e-9)
        assert float(row["welch_df"]) == pytest.approx(ref.df, rel=1e-9)
        assert float(row["p_value"]) == pytest.approx(ref.pvalue, rel=1e-9)
        assert float(row["difference_low"]) == pytest.approx(low, rel=1e-9)
        assert float(row["difference_high"]) == pytest.approx(high, rel=1e-9)
        raw.append(ref.pvalue)
    expected = holm_by_hand(np.asarray(raw))
    for label, p in zip(others, expected):
        assert float(rows[label]["p_adjusted"]) == pytest.approx(p, rel=1e-9)
        assert rows[label]["verdict"] == ("better" if p < 0.05 else "not_different")
    # the data were chosen so that both verdicts occur and Holm turns one raw p < 0.05 into "not different"
    assert {rows[label]["verdict"] for label in others} == {"better", "not_different"}
    assert any(p_raw < 0.05 <= p_adj for p_raw, p_adj in zip(raw, expected))
    assert summary.comparison.tests == len(others)


def test_area_under_the_curve_matches_numpy_trapezoid(compared):
    """Per run numpy.trapezoid over the episodes divided by the episode span, then the mean across seeds."""
    summary, _, _, _, _, curves = compared
    for group in summary.comparison.groups:
        areas = [np.trapezoid([v for _, v in c], [s for s, _ in c]) / (STEPS[-1] - STEPS[0]) for c in curves[group.label]]
        assert group.auc.mean == pytest.approx(np.mean(areas), rel=1e-12)
        assert group.auc.half_width == pytest.approx(stats.t.ppf(0.975, len(areas) - 1) * stats.sem(areas), rel=1e-9)


def test_the_summary_lands_on_the_parent_run(compared):
    summary, rows, _, client, parent, _ = compared
    run = client.get_run(parent)
    for label, row in rows.items():
        assert run.data.metrics[f"group.{row['group']}.eval_return_mean"] == pytest.approx(float(row["final_eval_return_mean"]))
        assert run.data.tags[f"qtally.group.{row['group']}"] == label
    names = {f.path for f in client.list_artifacts(parent, "comparison")}
    assert names == {"comparison/comparison.csv", "comparison/comparison.md", "comparison/learning_curves.png"}
    assert run.info.status == "FINISHED"
