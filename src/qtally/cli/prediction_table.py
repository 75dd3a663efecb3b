"""The compact table ``qtally-evaluate`` prints: the rows worth a look, then one summary line.

Only text layout lives here; which rows to show and every number come from
:mod:`qtally.evaluate.prediction_report`.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from ..evaluate.prediction_report import TABLE_ROWS, headline, shown_rows

if TYPE_CHECKING:
    from ..prediction_run import PredictionSummary

__all__ = ["format_report"]


def _headline(summary) -> str:
    """The answer first: the policy's value where its episodes start, with its interval and, where known, the exact value."""
    plan, played = summary.plan, summary.played
    where = "from the start distribution" if plan.start_observation is None and plan.start_states is None else "from the chosen start"
    if plan.behaviour is None and plan.start_action is None and plan.start_states is None:
        line = f"value of the policy {where}: {played.start_value_mean:.4g} ± {played.start_value_ci95:.3g} (95%, {played.episodes} episodes)"
        if plan.exact_start_value is not None:
            inside = abs(played.start_value_mean - plan.exact_start_value) <= played.start_value_ci95
            line += f"; exact {plan.exact_start_value:.4g} ({'inside' if inside else 'outside'} the interval)"
        return line
    if plan.exact_start_value is not None:
        return f"value of the policy {where}: exact {plan.exact_start_value:.4g} (the sampled episodes start elsewhere or follow another policy; estimates per state below)"
    return "value of the policy: see the per-state estimates below (the episodes start from drawn states, a forced action or another policy)"


def format_report(summary: PredictionSummary, limit: int = TABLE_ROWS) -> str:
    """The table printed on standard output, then the summary line."""
    plan = summary.plan
    has_exact = plan.exact_v is not None
    trusted = sum(1 for r in summary.rows if not r.flagged)
    flagged = len(summary.rows) - trusted
    shown = shown_rows(summary.rows, has_exact, limit)
    off_policy = plan.behaviour is not None
    playing = "on-policy" if not off_policy else f"off-policy from behaviour [{plan.behaviour.label}]"
    lines = [
        f"prediction of [{plan.target.label}] on {plan.environment.spec.id}: {summary.episodes} episodes, "
        f"{'first' if summary.first_visit else 'every'}-visit, {playing}"
    ]
    lines.append(_headline(summary))
    width = max([len(r.observation) for r in shown] + [11])
    show_effective = off_policy or not summary.first_visit  # elsewhere it equals the visit count
    header = f"  {'kind':<4} {'method':<9} {'observation':<{width}} {'action':>6} {'estimate':>10} {'± se':>9} {'visits':>8}"
    if show_effective:
        header += f" {'eff.':>8}"
    if has_exact:
        header += f" {'exact':>10} {'error':>10} {'err/se':>7}"
    lines.append(header)
    for r in shown:
        action = "-" if r.action is None else str(r.action)
        line = f"  {r.kind:<4} {r.method:<9} {r.observation:<{width}} {action:>6} {r.estimate:>10.4f} {r.standard_error:>9.4f} {r.visits:>8d}"
        if show_effective:
            line += f" {r.effective_visits:>8.1f}"
        if has_exact:
            line += f" {r.exact:>10.4f} {r.error:>+10.4f} {r.error_in_se:>7.2f}"
        lines.append(line)
    order = "largest error first" if has_exact else "most visited first"
    floor = max(summary.min_visits, 1)
    lines.append(
        f"  ({len(shown)} of {trusted} entries (all estimates) with >= {floor} effective visits, {order}; "
        f"{flagged} flagged below that, listed in tables/prediction.csv)"
    )
    m = summary.metrics
    facts = [f"states_estimated={int(m.get('states_estimated', 0))}"]
    for name in ("max_abs_error", "mean_abs_error", "max_error_in_se"):
        if name in m:
            facts.append(f"{name}={m[name]:.4g}")
    infinite = int(m.get("entries_infinite_error_in_se", 0))
    if infinite:
        facts.append(f"max_error_in_se=inf ({infinite} entries with se 0 but an error)")
    facts.append(f"entries_flagged={int(m.get('entries_flagged', 0))}")
    if show_effective and "min_effective_visits" in m:
        facts.append(f"min_effective_visits={m['min_effective_visits']:.4g}")
    if not has_exact:
        facts.append(f"no exact values: {plan.exact_reason}")
    top = headline(summary.estimates)
    if top is not None:
        facts.append(f"(of {top[0]} {top[1]})")
    lines.append("summary: " + "  ".join(facts))
    played = summary.played
    if played.capped:
        lines.append(f"note: {played.capped} of {played.episodes} episodes reached env.step_cap and were cut (treated as env.truncation={plan.truncation})")
    return "\n".join(lines)
