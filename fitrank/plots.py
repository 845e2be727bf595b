"""PNG figures of a run: training curve, learned weights, singular-value decay.

Figures are drawn on matplotlib's Agg canvas directly (no pyplot, no global
backend state), so plotting works in worker processes and without a display.
Each file is written to a temporary name beside the target and renamed into
place, so a reader never sees half a PNG.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from fitrank.atomic import staged_file

_MAIN_COLOUR = "#1f4e79"
_ACCENT_COLOUR = "#c05a00"
_THETA0_COLOUR = "#323f4b"
_LEARNED_COLOUR = "#2e7d32"
_TRUTH_COLOUR = "#6a1b9a"


def _figure(width: float = 7.0, height: float = 4.2) -> Figure:
    figure = Figure(figsize=(width, height), dpi=110, layout="constrained")
    FigureCanvasAgg(figure)
    return figure


def _save(figure: Figure, path: str | Path) -> Path:
    path = Path(path)
    with staged_file(path, suffix=".png") as temp:
        figure.savefig(temp, format="png")
    return path


def _style(axes) -> None:
    axes.grid(True, color="#e3e6ea", linewidth=0.8)
    axes.set_axisbelow(True)
    for side in ("top", "right"):
        axes.spines[side].set_visible(False)


def plot_training(history, path: str | Path, *, title: str = "Training") -> Path:
    """Objective per step, with validation accuracy on a second axis when it was measured.

    Several training rounds (rows with a ``round`` column, as after enrichment)
    are drawn one after another on a running step axis, separated by dotted lines.
    The objective goes on a log axis when it is positive and spans over 20x.

    Args:
      history: rows with ``step``, ``loss``, optional ``valid_acc`` and ``round``
        (a list of dicts, e.g. ``TrainResult.history``, or a DataFrame).
      path: the PNG to write.
      title: figure title.

    Returns:
      ``path`` as a Path.
    """
    rows = history.to_dict("records") if hasattr(history, "to_dict") else list(history)
    loss = np.array([r["loss"] for r in rows], dtype=float)
    accuracy = np.array([r.get("valid_acc", np.nan) for r in rows], dtype=float)
    rounds = np.array([r.get("round", 0) for r in rows])
    # A running step index: each round continues where the previous one ended.
    steps = np.array([r["step"] for r in rows], dtype=float)
    starts = np.flatnonzero(np.r_[True, rounds[1:] != rounds[:-1]])
    offset = np.zeros_like(steps)
    for first, following in zip(starts, list(starts[1:]) + [len(rows)]):
        offset[first:following] = (steps[first - 1] + offset[first - 1] + 1) if first > 0 else 0
    x = steps + offset
    figure = _figure()
    axes = figure.add_subplot()
    _style(axes)
    segments = list(zip(starts, list(starts[1:]) + [len(rows)]))
    for i, (first, following) in enumerate(segments):
        axes.plot(x[first:following], loss[first:following], color=_MAIN_COLOUR, linewidth=1.8,
                  label="training objective" if i == 0 else None)
        if first > 0:
            axes.axvline(x[first] - 0.5, color="#7b8794", linestyle=":", linewidth=1.0)
            axes.annotate(f"round {rounds[first]}", (x[first] - 0.5, 1.0), xycoords=("data", "axes fraction"),
                          xytext=(3, -12), textcoords="offset points", fontsize=8, color="#52606d")
    finite = loss[np.isfinite(loss)]
    if finite.size and finite.min() > 0 and finite.max() > 20 * finite.min():
        axes.set_yscale("log")
    axes.set_xlabel("step" if len(segments) == 1 else "step (all rounds)")
    axes.set_ylabel("objective", color=_MAIN_COLOUR)
    axes.set_title(title)
    if np.isfinite(accuracy).any():
        second = axes.twinx()
        for first, following in segments:
            second.plot(x[first:following], accuracy[first:following], color=_ACCENT_COLOUR, linewidth=1.4,
                        linestyle="--")
        second.set_ylabel("validation pair accuracy", color=_ACCENT_COLOUR)
        second.spines["top"].set_visible(False)
        best = int(np.nanargmax(accuracy))
        second.plot(x[best], accuracy[best], "o", color=_ACCENT_COLOUR)
    return _save(figure, path)


def plot_weights(names, theta, theta0, path: str | Path, *, truth=None, title: str = "Learned parameters") -> Path:
    """Bar chart of the learned parameters beside theta0 (and a known truth if given).

    Args:
      names: p parameter names.
      theta: (p,) learned parameters.
      theta0: (p,) default parameters.
      path: the PNG to write.
      truth: optional (p,) true parameters (generated data).
      title: figure title.

    Returns:
      ``path`` as a Path.
    """
    names = list(names)
    start = np.asarray(theta0, dtype=float)
    series = [("learned", np.asarray(theta, dtype=float), _LEARNED_COLOUR)]
    if truth is not None:
        series.append(("truth", np.asarray(truth, dtype=float), _TRUTH_COLOUR))
    for label, values in [("theta0", start)] + [(label, values) for label, values, _ in series]:
        if values.shape != (len(names),):
            raise ValueError(f"{label} has shape {values.shape}; expected ({len(names)},), one value per name")
    figure = _figure(width=max(5.0, 1.5 + 0.9 * len(names) * len(series)))
    axes = figure.add_subplot()
    _style(axes)
    width = 0.8 / len(series)
    where = np.arange(len(names))
    axes.axhline(0.0, color="#4a4a4a", linewidth=0.8)
    for i, (label, values, colour) in enumerate(series):
        axes.bar(where + (i - (len(series) - 1) / 2) * width, values, width, color=colour, label=label)
    # theta0 as a short dark bar across each group: visible even where it is 0.
    axes.hlines(start, where - 0.45, where + 0.45, colors=_THETA0_COLOUR, linewidth=3.0, label="theta0")
    axes.set_xticks(where, names, rotation=30 if len(names) > 4 else 0, ha="right" if len(names) > 4 else "center")
    axes.set_ylabel("value")
    axes.set_title(title)
    axes.legend(frameon=False)
    return _save(figure, path)


def plot_singular_values(singular_values, path: str | Path, *, rank: int | None = None,
                         title: str = "Snapshot singular values") -> Path:
    """Singular values s_i / s_1 on a log scale, with the kept basis size marked.

    Args:
      singular_values: (m,) descending singular values of the snapshot matrix.
      path: the PNG to write.
      rank: the basis size k that was kept (a vertical line), if any.
      title: figure title.

    Returns:
      ``path`` as a Path.
    """
    s = np.asarray(singular_values, dtype=float)
    if s.ndim != 1 or s.size == 0 or not s[0] > 0:
        raise ValueError("singular_values must be a non-empty descending vector with a positive first entry")
    relative = s / s[0]
    index = np.arange(1, s.size + 1)
    positive = relative > 0  # values the basis could not resolve are reported as 0: leave them off a log axis
    figure = _figure()
    axes = figure.add_subplot()
    _style(axes)
    axes.semilogy(index[positive], relative[positive], ".-", color=_MAIN_COLOUR, linewidth=1.2, markersize=4)
    if rank is not None:
        axes.axvline(rank, color=_ACCENT_COLOUR, linestyle="--", linewidth=1.2, label=f"kept k = {rank}")
        axes.legend(frameon=False)
    axes.set_xlabel("index i")
    axes.set_ylabel("s_i / s_1")
    axes.set_title(title)
    return _save(figure, path)
