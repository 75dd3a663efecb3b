"""The comparison picture: one learning curve per group, the mean across seeds with its 95% band.

At each evaluation episode the band is the Student-t 95% interval of the mean across the
group's runs that were evaluated at that episode (no band where only one was); the legend
sits outside the axes so it never hides a curve.
"""

from __future__ import annotations

import textwrap
from pathlib import Path
from typing import Sequence

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .evaluate.comparison import RunCurve, mean_interval  # noqa: E402

__all__ = ["curve_band", "group_learning_curves"]


def curve_band(runs: Sequence[RunCurve]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Episodes, mean and 95% half-width (NaN below two runs) over every step any run evaluated at."""
    steps = np.unique(np.concatenate([r.steps for r in runs])) if runs else np.zeros(0)
    means, halves = [], []
    for step in steps:
        at = [float(r.values[r.steps == step][0]) for r in runs if np.any(r.steps == step)]
        interval = mean_interval(at)
        means.append(interval.mean)
        halves.append(interval.half_width)
    return steps, np.asarray(means), np.asarray(halves)


def group_learning_curves(groups: Sequence[tuple[str, Sequence[RunCurve]]], path: Path, title: str, threshold: float | None = None) -> Path:
    """``groups``: (label, finished runs) in rank order. Writes a PNG and returns its path."""
    fig, ax = plt.subplots(figsize=(9, 4.8))
    colours = plt.get_cmap("tab10")
    for i, (label, runs) in enumerate(groups):
        runs = [r for r in runs if len(r.steps)]
        if not runs:
            continue
        steps, mean, half = curve_band(runs)
        colour = colours(i % 10)
        ax.plot(steps, mean, "o-", ms=2.5, lw=1.4, color=colour, label=f"{textwrap.shorten(label, 60)} (n={len(runs)})")
        band = np.isfinite(half)
        if band.any():
            ax.fill_between(steps[band], (mean - half)[band], (mean + half)[band], color=colour, alpha=0.18, lw=0)
    if threshold is not None:
        ax.axhline(threshold, color="0.4", ls=":", lw=1, label=f"threshold {threshold:g}")
    ax.set_xlabel("episode")
    ax.set_ylabel("eval_return_mean (mean across seeds, 95% band)")
    ax.set_title(textwrap.shorten(title, 90))
    ax.grid(alpha=0.3)
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False)
    tmp = path.with_suffix(".tmp.png")
    fig.savefig(tmp, dpi=110, bbox_inches="tight")
    plt.close(fig)
    tmp.replace(path)
    return path
