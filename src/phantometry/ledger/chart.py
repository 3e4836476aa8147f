"""Control chart of one trend (matplotlib, Agg; no screen needed).

The chart shows the values in acquisition order (with their standard uncertainty as error
bars where known), the baseline mean (solid), the +-2 sigma warning lines (dashed) and the
+-3 sigma action lines (dash-dot) of a Shewhart chart for individual values (Western Electric
Statistical Quality Control Handbook, 1956), the acceptance-band limits of each point
(dotted steps), baseline points as filled squares, and every flagged point circled with the
numbers of the rules that fired (key under the chart). Line styles differ as well as colours,
so the chart reads in greyscale print.

It knows only the result types (:class:`phantometry.ledger.types.Trend`), never the store:
``phantometry ledger trend --chart`` calls :func:`save_trend_chart` on the trend it was given.

Each drawn element carries a ``gid`` (``values``, ``mean``, ``warning_high``,
``warning_low``, ``action_high``, ``action_low``, ``band_low``, ``band_high``,
``baseline_points``, ``flagged``) so tests and callers can find it.
"""

from __future__ import annotations

import os
from collections import defaultdict
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .rules import RULE_NUMBERS, RULES

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

    from .types import Trend


def trend_figure(trend: "Trend") -> "Figure":
    """Build the control chart of a trend (a matplotlib Figure, not shown)."""
    import matplotlib.dates as mdates
    from matplotlib.figure import Figure

    fig = Figure(figsize=(9.0, 5.2), dpi=110)
    ax = fig.add_axes((0.09, 0.25, 0.70, 0.65))
    pts = [p for p in trend.points if p.value is not None]
    x = np.array([mdates.date2num(p.acquired_at) for p in pts])
    y = np.array([p.value for p in pts], dtype=float)
    yerr = np.array([p.uncertainty if p.uncertainty is not None else np.nan for p in pts], dtype=float)
    line = ax.plot(x, y, "-o", color="black", lw=1.0, ms=4, label="value", zorder=3)[0]
    line.set_gid("values")
    if np.any(np.isfinite(yerr)):
        ax.errorbar(x, y, yerr=np.nan_to_num(yerr), fmt="none", ecolor="0.35", elinewidth=0.8, capsize=2, zorder=2)
    base = np.array([p.in_baseline for p in pts], dtype=bool)
    if base.any():
        ax.plot(x[base], y[base], "s", color="0.25", ms=6, label="baseline point", zorder=4)[0].set_gid("baseline_points")
    lim = trend.limits
    if lim is not None:
        ax.axhline(lim.mean, color="0.2", lw=1.2, ls="-", label=f"mean ({lim.source})").set_gid("mean")
        if lim.sigma > 0:
            ax.axhline(lim.warning_high, color="tab:orange", lw=1.0, ls="--", label="warning ±2σ").set_gid("warning_high")
            ax.axhline(lim.warning_low, color="tab:orange", lw=1.0, ls="--").set_gid("warning_low")
            ax.axhline(lim.action_high, color="tab:red", lw=1.0, ls="-.", label="action ±3σ").set_gid("action_high")
            ax.axhline(lim.action_low, color="tab:red", lw=1.0, ls="-.").set_gid("action_low")
    for key, label in (("band_low", "band limits"), ("band_high", None)):
        vals = np.array([getattr(p, key) if getattr(p, key) is not None else np.nan for p in pts], dtype=float)
        if np.any(np.isfinite(vals)):
            ax.plot(x, vals, drawstyle="steps-mid", color="tab:blue", ls=":", lw=1.4, label=label)[0].set_gid(key)
    if trend.flags:
        by_point: dict[int, set[int]] = defaultdict(set)
        for f in trend.flags:
            by_point[f.analysis_id].add(RULE_NUMBERS[f.rule])
        index = {p.analysis_id: i for i, p in enumerate(pts)}
        fi = np.array([index[a] for a in by_point], dtype=int)
        ax.scatter(x[fi], y[fi], s=140, facecolors="none", edgecolors="tab:red", linewidths=1.6, label="flagged", zorder=5).set_gid("flagged")
        for a, numbers in by_point.items():
            i = index[a]
            ax.annotate(",".join(str(n) for n in sorted(numbers)), (x[i], y[i]), xytext=(6, 7), textcoords="offset points",
                        fontsize=8, color="tab:red")
    locator = mdates.AutoDateLocator()
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    ax.set_xlabel("acquired (UTC)")
    ax.set_ylabel(f"{trend.metric} [{trend.unit}]")
    ax.set_title(f"{trend.scanner} ({trend.site}) / {trend.protocol}\n{trend.roi} {trend.metric}", fontsize=9)
    ax.grid(True, color="0.9", lw=0.6)
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=7, frameon=False)
    key = "Flags: " + ";  ".join(f"{RULE_NUMBERS[r]} = {text}" for r, text in RULES.items())
    fig.text(0.09, 0.06, key, fontsize=7, wrap=True)
    fig.text(0.09, 0.015, "Supports, and does not replace, the judgement of a qualified medical physicist.", fontsize=6, color="0.4")
    return fig


def save_trend_chart(trend: "Trend", path: str | os.PathLike, *, overwrite: bool = False) -> Path:
    """Write the control chart of ``trend`` as PNG to ``path`` (written to a temporary name, then moved).

    Raises
    ------
    InputError
        ``path`` exists and ``overwrite`` is False, is a folder, or cannot be written.
    """
    from .outfiles import check_output_file, save_figure_atomically

    target = Path(path)
    check_output_file(target, overwrite, "ledger trend --chart")
    save_figure_atomically(trend_figure(trend), target)
    return target
