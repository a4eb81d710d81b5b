"""One picture of a run: the metric by generation against generation 0 and each baseline.

``filial report RUN --plot FILE.png`` draws it, and a finished run puts the same picture into
TensorBoard (``arms/with generations``, tag ``picture/did generations help``). It needs
matplotlib (the ``plot`` extra: ``pip install 'filial[plot]'``), imported only here and only when
a picture is asked for; without it :class:`PlotUnavailable` says what to install. The figure is
drawn on matplotlib's Agg canvas directly (no pyplot, no global backend).

In each panel (held-out; test when the run has one): the mean over seeds of the generations
every seed reached, with a band of one standard deviation; each seed's own values as thin lines
(generations that only some seeds reached appear only there, marked with open circles); each
seed's kept generation as a star; generation 0 and each baseline as levels across the axis. A
level far outside the generations' range is drawn at the axis edge with its value written out,
so that it cannot squash the curve it is compared with.
"""

from __future__ import annotations

import io
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ._io import atomic_write
from .tb import Comparison, SeedView, compare

INSTALL = "pip install 'filial[plot]'"

_WITH = "#1f5fbf"
_ALONE = "#555555"
_BASELINES = ["#d95f02", "#1b9e77", "#7570b3", "#e7298a", "#66a61e", "#a6761d"]


class PlotUnavailable(ImportError):
    """matplotlib is not installed."""


def _matplotlib() -> tuple[Any, Any]:
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError as exc:
        raise PlotUnavailable(
            f"the picture needs matplotlib, which is not installed: {INSTALL}"
        ) from exc
    return Figure, FigureCanvasAgg


def _fmt(band: Any) -> str:
    if band is None:
        return "-"
    if band.seeds > 1:
        return f"{band.mean:.4f} -+ {band.std:.4f}"
    return f"{band.mean:.4f}"


def _panel(ax: Any, c: Comparison, label: str) -> None:
    steps = c.steps
    _seed_lines(ax, c)
    mean, std = _mean_band(ax, c)
    lo, hi, pad = _y_range(c, mean, std)
    left, right = steps[0] - 0.2, max(steps[-1], 1) + 0.2
    _alone_level(ax, c)
    lo, hi = _baseline_levels(ax, c, lo, hi, pad, right)
    ax.set_ylim(lo, hi)
    ax.set_xlim(left, right)
    ax.set_xticks(steps)
    ax.set_xlabel("generation")
    ax.set_ylabel(f"{c.key.replace('heldout', 'held-out')} metric (higher is better)")
    ax.grid(True, alpha=0.3)
    head = f"{label}\nkept generation {_fmt(c.kept)}, generation 0 {_fmt(c.alone)}"
    if c.kept_gain is not None:
        head += f"\ngain of the kept generation {c.kept_gain.mean:+.4f}"
        if c.kept_gain.seeds > 1:
            head += f" -+ {c.kept_gain.std:.4f} (sd over {c.kept_gain.seeds} seeds)"
    ax.set_title(head, fontsize=10)


def _seed_lines(ax: Any, c: Comparison) -> None:
    """Each seed, thin; the generations only some seeds reached get open markers; each seed's
    kept generation a star."""
    common = len(c.curve)
    marked = False
    for i, (_, values, kept) in enumerate(c.per_seed):
        xs = [g for g, v in enumerate(values) if v is not None]
        ys = [values[g] for g in xs]
        ax.plot(
            xs,
            ys,
            color=_WITH,
            alpha=0.35,
            linewidth=1,
            marker="o",
            markersize=3,
            label="each seed" if i == 0 else None,
        )
        extra = [g for g in xs if g >= common]
        if extra:  # the legend names the open marker once, at the first seed that has one
            ax.plot(
                extra,
                [values[g] for g in extra],
                linestyle="none",
                marker="o",
                markersize=7,
                markerfacecolor="white",
                markeredgecolor=_WITH,
                label=None if marked else "generation not every seed reached",
            )
            marked = True
        if kept is not None and kept < len(values) and values[kept] is not None:
            ax.plot(
                [kept],
                [values[kept]],
                linestyle="none",
                marker="*",
                markersize=13,
                color="#f2b705",
                markeredgecolor="black",
                label="kept generation (each seed)" if i == 0 else None,
            )


def _mean_band(ax: Any, c: Comparison) -> tuple[np.ndarray, np.ndarray]:
    """The mean over seeds of the generations every seed reached, with one sd."""
    common = len(c.curve)
    xs = list(range(common))
    mean = np.array([b.mean for b in c.curve])
    std = np.array([b.std for b in c.curve])
    ax.fill_between(xs, mean - std, mean + std, color=_WITH, alpha=0.18, linewidth=0)
    ax.plot(
        xs,
        mean,
        color=_WITH,
        linewidth=2.5,
        marker="o",
        label=f"with generations, mean of {c.seeds} seed(s)",
    )
    return mean, std


def _y_range(c: Comparison, mean: np.ndarray, std: np.ndarray) -> tuple[float, float, float]:
    """The y range: the generations and generation 0 (baselines far outside sit at the edge)."""
    inside = [v for _, values, _ in c.per_seed for v in values if v is not None]
    inside += list(mean - std) + list(mean + std)
    if c.alone is not None:
        inside += [c.alone.mean - c.alone.std, c.alone.mean + c.alone.std]
    low, high = min(inside), max(inside)
    pad = max(high - low, 1e-3) * 0.12
    lo, hi = low - pad, high + pad
    return lo, hi, pad


def _alone_level(ax: Any, c: Comparison) -> None:
    """Generation 0 alone as a level across the axis, with its band."""
    if c.alone is None:
        return
    ax.axhspan(
        c.alone.mean - c.alone.std,
        c.alone.mean + c.alone.std,
        color=_ALONE,
        alpha=0.08,
        linewidth=0,
    )
    ax.axhline(
        c.alone.mean,
        color=_ALONE,
        linestyle="--",
        linewidth=1.6,
        label=f"generation 0 alone: {_fmt(c.alone)}",
    )


def _baseline_levels(
    ax: Any, c: Comparison, lo: float, hi: float, pad: float, right: float
) -> tuple[float, float]:
    """Each baseline as a level; one far off the scale as an arrow at the edge with its value.
    Returns the y range widened by the levels drawn."""
    span = hi - lo
    for j, (name, (level, _)) in enumerate(sorted(c.baselines.items())):
        colour = _BASELINES[j % len(_BASELINES)]
        text = f"baseline {name}: {_fmt(level)}"
        if lo - span <= level.mean <= hi + span:
            lo, hi = min(lo, level.mean - pad / 2), max(hi, level.mean + pad / 2)
            ax.axhline(level.mean, color=colour, linestyle="-.", linewidth=1.6, label=text)
        else:
            # Off scale: an arrow at the edge, the value written beside it.
            below = level.mean < lo
            edge = lo + 0.04 * span if below else hi - 0.04 * span
            ax.annotate(
                f"{text} ({'below' if below else 'above'} the axis)",
                xy=(right - 0.05, lo if below else hi),
                xytext=(right - 0.05, edge),
                ha="right",
                va="bottom" if below else "top",
                color=colour,
                fontsize=9,
                arrowprops={"arrowstyle": "->", "color": colour},
            )
            ax.plot([], [], color=colour, linestyle="-.", label=f"{text}, off the axis")
    return lo, hi


def figure(views: Sequence[SeedView]) -> Any:
    """The run's picture as a matplotlib ``Figure`` (raises :class:`PlotUnavailable`)."""
    Figure, FigureCanvasAgg = _matplotlib()
    panels = [
        (c, label)
        for c, label in (
            (compare(views, "heldout"), "held-out"),
            (compare(views, "test"), "test, reported, never used to choose"),
        )
        if c is not None
    ]
    if not panels:
        raise ValueError("no generation has a held-out figure yet, so there is nothing to draw")
    fig = Figure(figsize=(6.6 * len(panels), 6.0), dpi=110, layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, len(panels), squeeze=False)[0]
    for ax, (c, label) in zip(axes, panels, strict=True):
        _panel(ax, c, label)
    handles, labels = axes[0].get_legend_handles_labels()
    columns = 3 if len(panels) > 1 else 2
    fig.legend(handles, labels, loc="outside lower center", ncol=columns, fontsize=9, frameon=False)
    fig.suptitle("did generations help? the metric by generation against each arm", fontsize=12)
    return fig


def png_bytes(views: Sequence[SeedView]) -> bytes:
    """The picture as PNG bytes."""
    buffer = io.BytesIO()
    figure(views).savefig(buffer, format="png")
    return buffer.getvalue()


def save(views: Sequence[SeedView], path: str | os.PathLike[str]) -> Path:
    """Write the picture to ``path`` (PNG), atomically."""
    data = png_bytes(views)
    return atomic_write(Path(path), lambda handle: handle.write(data))


def rgb_array(views: Sequence[SeedView]) -> np.ndarray:
    """The picture as an ``(height, width, 3)`` uint8 array (for TensorBoard's add_image)."""
    fig = figure(views)
    fig.canvas.draw()
    return np.asarray(fig.canvas.buffer_rgba())[..., :3].copy()
