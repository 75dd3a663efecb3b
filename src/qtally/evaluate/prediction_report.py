"""The prediction report: each estimate beside its exact value, which estimates to trust, the summary metrics.

Pure arithmetic on :class:`~qtally.evaluate.prediction.Estimates` (no tracking, no console);
``qtally-evaluate`` logs what :func:`prediction_report` returns and prints it with
:mod:`qtally.cli.prediction_table`.

Which estimates to trust. An estimate is *flagged* when its effective sample size (Kish's,
over episodes: see :mod:`qtally.evaluate.prediction`) is below ``min_visits``. For
first-visit on-policy averaging that is the visit count, so the rule is the plain visit
floor; for every-visit averaging it counts what the correlated visits are worth in
episodes; for importance sampling it is the effective size of the episode weights, which
collapses when a few large ratios dominate, exactly when a delta-method interval stops
being trustworthy. Flagged rows stay in the CSV (column ``flagged``) but are not ranked,
not printed, and not in the summary metrics; ``entries_flagged`` counts them.

``error_in_se`` is ``|error| / se``: 0 where both vanish (a deterministic return), infinite
where the standard error is 0 but the error is not (every sampled return was the same; the
rarer outcomes have not been seen yet). No infinite value is ever put into the metrics:
where any compared entry's ratio is infinite, ``max_error_in_se`` is left out, and
``entries_infinite_error_in_se`` (logged whenever exact values exist) says how many.

>>> error_in_se(np.array([0.2, 0.0, 0.5]), np.array([0.1, 0.0, 0.0])).tolist()
[2.0, 0.0, inf]
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .prediction import Estimates

if TYPE_CHECKING:  # typing only: the report needs an encoder's describe() and the action count
    from ..envs.factory import TabularEnvironment

__all__ = ["ReportRow", "TABLE_ROWS", "error_in_se", "headline", "prediction_report", "shown_rows", "write_csv", "HEADLINE_METRICS"]

TABLE_ROWS = 20

# Logged per estimate as ``{kind}_{method}_{name}`` and, for the headline estimate, as ``{name}``.
HEADLINE_METRICS = (
    "max_abs_error",
    "mean_abs_error",
    "max_error_in_se",
    "entries_infinite_error_in_se",
    "states_estimated",
    "entries_compared",
    "entries_flagged",
    "min_effective_visits",
    "median_effective_visits",
)

# An error this small next to a zero standard error counts as no error (floating-point noise).
_ZERO_ERROR = 1e-12


@dataclass(frozen=True)
class ReportRow:
    """One visited entry: the estimate, how much it is worth, and how far it is from the exact value."""

    kind: str  # v or q
    method: str  # on_policy, ordinary or weighted
    state: int
    observation: str
    action: int | None
    estimate: float
    standard_error: float
    visits: int
    episodes: int
    effective_visits: float
    exact: float
    error: float
    error_in_se: float
    flagged: bool  # effective visits below min_visits: not to be trusted or ranked


def error_in_se(error: np.ndarray, se: np.ndarray) -> np.ndarray:
    """``|error| / se``; 0 where both vanish, inf where only the standard error does (see the module docstring)."""
    magnitude = np.abs(error)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = magnitude / se
    ratio = np.where((se == 0) & (magnitude <= _ZERO_ERROR), 0.0, ratio)
    return np.where((se == 0) & (magnitude > _ZERO_ERROR), np.inf, ratio)


def trusted(estimates: Estimates, min_visits: int) -> np.ndarray:
    """Bool, shaped like the estimates: a finite estimate worth at least ``min_visits`` effective visits."""
    return (estimates.effective_visits >= max(min_visits, 1)) & np.isfinite(estimates.value)


def headline(keys) -> tuple[str, str] | None:
    """The estimate the unprefixed metrics describe: V if estimated, else Q; on-policy, else weighted IS, else ordinary.

    >>> headline([("v", "ordinary"), ("v", "weighted"), ("q", "weighted")])
    ('v', 'weighted')
    """
    keys = list(keys)
    if not keys:
        return None
    kinds = {k for k, _ in keys}
    methods = {m for _, m in keys}
    kind = "v" if "v" in kinds else "q"
    method = "on_policy" if "on_policy" in methods else ("weighted" if "weighted" in methods else "ordinary")
    return kind, method


def prediction_report(
    environment: TabularEnvironment,
    estimates: dict[tuple[str, str], Estimates],
    exact_v: np.ndarray | None,
    exact_q: np.ndarray | None,
    min_visits: int,
) -> tuple[list[ReportRow], dict[str, float]]:
    """One row per visited entry, and the summary metrics over the unflagged entries (all finite).

    Metrics per estimate ``{kind}_{method}_{name}``; the headline (V if estimated, else Q;
    on-policy, else weighted IS where there is a choice) is also logged without the prefix.
    """
    rows: list[ReportRow] = []
    metrics: dict[str, float] = {}
    describe = environment.encoder.describe
    for (kind, method), est in estimates.items():
        exact = exact_v if kind == "v" else exact_q
        value, se = est.value.reshape(-1), est.standard_error.reshape(-1)
        visits, episodes, effective = est.visits.reshape(-1), est.episodes.reshape(-1), est.effective_visits.reshape(-1)
        truth = exact.reshape(-1) if exact is not None else np.full(value.shape, np.nan)
        error = value - truth
        in_se = error_in_se(error, se)
        counted = trusted(est, min_visits).reshape(-1)
        width = 1 if kind == "v" else environment.n_actions
        for entry in np.flatnonzero(visits > 0):
            state, action = divmod(int(entry), width)
            rows.append(
                ReportRow(
                    kind=kind, method=method, state=state, observation=describe(state),
                    action=None if kind == "v" else action,
                    estimate=float(value[entry]), standard_error=float(se[entry]), visits=int(visits[entry]),
                    episodes=int(episodes[entry]), effective_visits=float(effective[entry]), exact=float(truth[entry]),
                    error=float(error[entry]), error_in_se=float(in_se[entry]), flagged=not bool(counted[entry]),
                )
            )
        prefix = f"{kind}_{method}_"
        metrics[prefix + "entries_estimated"] = float(counted.sum())
        metrics[prefix + "entries_flagged"] = float(((visits > 0) & ~counted).sum())
        if counted.any():
            metrics[prefix + "min_effective_visits"] = float(effective[counted].min())
            metrics[prefix + "median_effective_visits"] = float(np.median(effective[counted]))
        compared = counted & np.isfinite(truth) & np.isfinite(se)
        if exact is not None:
            metrics[prefix + "entries_compared"] = float(compared.sum())
            infinite = compared & np.isinf(in_se)
            metrics[prefix + "entries_infinite_error_in_se"] = float(infinite.sum())
            if compared.any():
                metrics[prefix + "max_abs_error"] = float(np.abs(error[compared]).max())
                metrics[prefix + "mean_abs_error"] = float(np.abs(error[compared]).mean())
                if not infinite.any():
                    metrics[prefix + "max_error_in_se"] = float(in_se[compared].max())
        states = counted if kind == "v" else counted.reshape(-1, environment.n_actions).any(axis=1)
        metrics[prefix + "states_estimated"] = float(states.sum())
    top = headline(estimates)
    if top is not None:
        prefix = "{}_{}_".format(*top)
        for name in HEADLINE_METRICS:
            if prefix + name in metrics:
                metrics[name] = metrics[prefix + name]
    return rows, metrics


def shown_rows(rows: list[ReportRow], has_exact: bool, limit: int = TABLE_ROWS) -> list[ReportRow]:
    """The unflagged rows worth printing: the worst errors when exact values exist, else the most visited."""
    eligible = [r for r in rows if not r.flagged]
    if has_exact:
        eligible = [r for r in eligible if math.isfinite(r.exact)]
        eligible.sort(key=lambda r: (-abs(r.error), -r.error_in_se if not math.isnan(r.error_in_se) else math.inf))
    else:
        eligible.sort(key=lambda r: (-r.visits, r.kind, r.method, r.state, r.action or 0))
    return eligible[:limit]


CSV_COLUMNS = (
    "kind", "method", "state", "observation", "action", "estimate", "standard_error", "visits", "episodes",
    "effective_visits", "exact", "error", "error_in_se", "flagged",
)


def write_csv(rows: list[ReportRow], path: Path) -> Path:
    """The full table, every visited entry (flagged ones too); empty cells for NaN, ``inf`` where it is."""

    def number(x: float | None) -> str:
        return "" if x is None or (isinstance(x, float) and math.isnan(x)) else f"{x:.8g}"

    with path.open("w", newline="") as stream:
        writer = csv.writer(stream)
        writer.writerow(CSV_COLUMNS)
        for r in rows:
            writer.writerow([
                r.kind, r.method, r.state, r.observation, "" if r.action is None else r.action,
                number(r.estimate), number(r.standard_error), r.visits, r.episodes, number(r.effective_visits),
                number(r.exact), number(r.error), number(r.error_in_se), int(r.flagged),
            ])
    return path
