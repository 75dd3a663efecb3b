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

__all__ = ["learning_curve", "grid_maps", "two_factor_maps"]


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
    if history.get("epsilon"):
        twin = ax.twinx()
        steps, values = zip(*history["epsilon"])
        twin.plot(steps, values, color="#9bbb59", lw=1, ls="--", label="epsilon")
        twin.set_ylabel("epsilon")
        twin.set_ylim(0, 1.05)
        lines, labels = ax.get_legend_handles_labels()
        lines2, labels2 = twin.get_legend_handles_labels()
        ax.legend(lines + lines2, labels + labels2, loc="lower right", fontsize=8)
    else:
        ax.legend(loc="lower right", fontsize=8)
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


UNVISITED_MARK = "?"  # a cell training never reached: no learned action, the policy's fallback acts there


def grid_maps(values: np.ndarray, actions: np.ndarray, shape: tuple[int, int], arrows: Sequence[str], path: Path, title: str, blocked: np.ndarray | None = None, unvisited: np.ndarray | None = None) -> Path:
    """Heat map of V over a grid with the greedy action drawn in each cell; ``unvisited`` cells get a grey "?"."""
    grid = values.reshape(shape)
    fig, ax = plt.subplots(figsize=(1.0 + 0.6 * shape[1], 0.8 + 0.6 * shape[0]))
    ax.set_facecolor("#9e9e9e")  # cells without a value (never reached) show grey, not white
    vmin, vmax = _colour_range(grid)
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
) -> Path:
    """Side-by-side panels (one per value of a third factor): V as colour, greedy action as a letter.

    ``values``, ``actions`` and ``unvisited`` (bool, cells training never reached, drawn
    as a "?" on grey) are ``(panels, rows, columns)`` arrays.
    """
    panels = values.shape[0]
    fig, axes = plt.subplots(1, panels, figsize=(4.2 * panels, 4.2), squeeze=False)
    vmin, vmax = _colour_range(values)
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
    fig.colorbar(image, ax=axes[0].tolist(), fraction=0.03, label="value")
    fig.suptitle(title, fontsize=10)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
