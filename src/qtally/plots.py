"""Pictures people would rather see than read: learning curves, policy maps and value heat maps.

Drawn with matplotlib's non-interactive Agg backend into PNG files; callers log them.
"""

from __future__ import annotations

from pathlib import Path
from typing import Mapping, Sequence

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

__all__ = ["learning_curve", "grid_maps", "two_factor_maps", "shared_value_range"]


def learning_curve(history: Mapping[str, Sequence[tuple[int, float]]], path: Path, title: str) -> Path:
    """Window mean return, greedy evaluation with its 95% band, and epsilon, against episodes."""
    fig, ax = plt.subplots(figsize=(8, 4.5))
    if history.get("return_mean"):
        steps, values = zip(*history["return_mean"])
        ax.plot(steps, values, color="#4a6fa5", lw=1.2, label="training return (window mean)")
    if history.get("eval_return_mean"):
        steps, means = (np.asarray(x) for x in zip(*history["eval_return_mean"]))
        half = np.asarray([v for _, v in history.get("eval_return_ci95", [])] or np.zeros_like(means))
        half = np.nan_to_num(half)
        ax.plot(steps, means, "o-", color="#c0504d", ms=3, label="greedy evaluation (mean, 95% CI)")
        ax.fill_between(steps, means - half, means + half, color="#c0504d", alpha=0.2)
    ax.set_xlabel("episode")
    ax.set_ylabel("return")
    ax.set_title(title)
    ax.grid(alpha=0.3)
    handles, labels = ax.get_legend_handles_labels()
    explored = [v for _, v in history.get("epsilon", [])]
    if explored and max(explored) > 0.0:  # exploring starts act greedily: no epsilon line to draw
        twin = ax.twinx()
        steps, values = zip(*history["epsilon"])
        twin.plot(steps, values, color="#9bbb59", lw=1, ls="--", label="epsilon (right axis)")
        twin.set_ylabel("epsilon")
        twin.set_ylim(0, 1.05)
        more_handles, more_labels = twin.get_legend_handles_labels()
        handles, labels = handles + more_handles, labels + more_labels
    # Below the axes, so the legend never covers a curve.
    ax.legend(handles, labels, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=3, fontsize=8, frameon=False)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def _colour_range(values: np.ndarray) -> tuple[float, float]:
    """Colour limits from the values that exist; (0, 1) when none does (nothing visited yet), without numpy's all-NaN warning."""
    finite = np.asarray(values, dtype=float)
    finite = finite[np.isfinite(finite)]
    if finite.size == 0:
        return 0.0, 1.0
    return float(finite.min()), float(finite.max())


def shared_value_range(*value_sets: np.ndarray) -> tuple[float, float]:
    """One colour range over several value arrays (a learned and an optimal map), NaNs ignored.

    >>> shared_value_range(np.array([1.0, np.nan]), np.array([3.0, -2.0]))
    (-2.0, 3.0)
    """
    return _colour_range(np.concatenate([np.asarray(v, dtype=float).ravel() for v in value_sets]))


UNVISITED_MARK = "?"  # a cell training never reached: no learned action, the policy's fallback acts there


def grid_maps(values: np.ndarray, actions: np.ndarray, shape: tuple[int, int], arrows: Sequence[str], path: Path, title: str, blocked: np.ndarray | None = None, unvisited: np.ndarray | None = None, value_range: tuple[float, float] | None = None) -> Path:
    """Heat map of V over a grid with the greedy action drawn in each cell; ``unvisited`` cells get a grey "?".

    ``value_range`` fixes the colour scale, so a learned and an optimal map drawn with the
    same range can be compared colour for colour.
    """
    grid = values.reshape(shape)
    fig, ax = plt.subplots(figsize=(max(5.5, 1.5 + 0.6 * shape[1]), 1.4 + 0.6 * shape[0]))
    ax.set_facecolor("#9e9e9e")  # cells without a value (never reached) show grey, not white
    vmin, vmax = value_range or _colour_range(grid)
    image = ax.imshow(grid, cmap="viridis", vmin=vmin, vmax=vmax)
    fig.colorbar(image, ax=ax, fraction=0.046, pad=0.04, label="value")
    for index, action in enumerate(actions):
        r, c = divmod(index, shape[1])
        if blocked is not None and blocked[index]:
            label, colour = "·", "white"
        elif unvisited is not None and unvisited[index]:
            label, colour = UNVISITED_MARK, "black"
        else:
            label, colour = arrows[int(action)], "white"
        ax.text(c, r, label, ha="center", va="center", color=colour, fontsize=11, fontweight="bold")
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_title(title, fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def two_factor_maps(
    values: np.ndarray,
    actions: np.ndarray,
    row_labels: Sequence,
    column_labels: Sequence,
    row_name: str,
    column_name: str,
    action_letters: Sequence[str],
    panel_titles: Sequence[str],
    path: Path,
    title: str,
    unvisited: np.ndarray | None = None,
    value_range: tuple[float, float] | None = None,
) -> Path:
    """Side-by-side panels (one per value of a third factor): V as colour, greedy action as a letter.

    ``values``, ``actions`` and ``unvisited`` (bool, cells training never reached, drawn
    as a "?" on grey) are ``(panels, rows, columns)`` arrays.
    """
    panels = values.shape[0]
    fig, axes = plt.subplots(1, panels, figsize=(4.2 * panels + 1.0, 5.0), squeeze=False)
    fig.subplots_adjust(top=0.78, bottom=0.12, left=0.08, right=0.86, wspace=0.3)  # room for a multi-line title above the panels
    vmin, vmax = value_range or _colour_range(values)
    for k, ax in enumerate(axes[0]):
        ax.set_facecolor("#9e9e9e")  # mid grey: apart from every colour of the value scale
        image = ax.imshow(values[k], cmap="coolwarm", vmin=vmin, vmax=vmax, origin="lower", aspect="auto")
        for r in range(values.shape[1]):
            for c in range(values.shape[2]):
                missing = unvisited is not None and unvisited[k, r, c]
                ax.text(c, r, UNVISITED_MARK if missing else action_letters[int(actions[k, r, c])], ha="center", va="center", fontsize=7)
        ax.set_xticks(range(len(column_labels)), [str(x) for x in column_labels], fontsize=7)
        ax.set_yticks(range(len(row_labels)), [str(x) for x in row_labels], fontsize=7)
        ax.set_xlabel(column_name)
        ax.set_ylabel(row_name)
        ax.set_title(panel_titles[k], fontsize=9)
    fig.colorbar(image, cax=fig.add_axes([0.89, 0.12, 0.02, 0.66]), label="value")
    fig.suptitle(title, fontsize=9, y=0.98)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
