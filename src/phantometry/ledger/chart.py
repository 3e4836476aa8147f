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

The y range follows the values and the control lines; the acceptance band is shaded where it
lies in that range (a key entry says when a limit lies beyond it), values outside their band
are marked with a cross. Axis labels and the title name the metric and ROI in words, dates
read as day and month with the year in the axis label.

Each drawn element carries a ``gid`` (``values``, ``mean``, ``warning_high``,
``warning_low``, ``action_high``, ``action_low``, ``band``, ``band_low``, ``band_high``,
``band_high_out_of_view``, ``band_low_out_of_view``, ``band_failures``, ``baseline_points``,
``flagged``) so tests and callers can find it.
"""

from __future__ import annotations

import os
from collections import defaultdict
from datetime import timezone
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .rules import RULE_NUMBERS, RULES

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

    from .types import Trend


def trend_figure(trend: "Trend") -> "Figure":
    """Build the control chart of a trend (a matplotlib Figure, not shown).

    The y range follows the values (with their uncertainties) and the control lines; the
    acceptance band is a shaded area clipped to that range, with a note at the edge when a
    limit lies outside it. Values outside their band are marked (as well as drift flags).
    """
    import matplotlib.dates as mdates
    from matplotlib.figure import Figure
    from matplotlib.ticker import FuncFormatter

    from ..figures import axis_label, metric_title, roi_title

    fig = Figure(figsize=(9.0, 5.2), dpi=110)
    ax = fig.add_axes((0.09, 0.25, 0.66, 0.63))
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
    # ---- the y range: the values with their uncertainties and the control lines, not the bands
    err = np.nan_to_num(yerr)
    span = [float(np.min(y - err)), float(np.max(y + err))] if len(y) else [0.0, 1.0]
    lim = trend.limits
    if lim is not None:
        span += [lim.mean] + ([lim.action_low, lim.action_high] if lim.sigma > 0 else [])
    lo, hi = min(span), max(span)
    pad = 0.08 * (hi - lo) if hi > lo else max(abs(hi) * 0.05, 1e-3)
    y_lo, y_hi = lo - pad, hi + pad
    if lim is not None:
        ax.axhline(lim.mean, color="0.2", lw=1.2, ls="-", label=f"mean ({lim.source})").set_gid("mean")
        if lim.sigma > 0:
            ax.axhline(lim.warning_high, color="#E69F00", lw=1.0, ls="--", label="warning ±2σ").set_gid("warning_high")
            ax.axhline(lim.warning_low, color="#E69F00", lw=1.0, ls="--").set_gid("warning_low")
            ax.axhline(lim.action_high, color="#D55E00", lw=1.0, ls="-.", label="action ±3σ").set_gid("action_high")
            ax.axhline(lim.action_low, color="#D55E00", lw=1.0, ls="-.").set_gid("action_low")
    # ---- the acceptance band: shaded where it lies in view, its edges dotted, notes for limits out of view
    bands = {key: np.array([getattr(p, key) if getattr(p, key) is not None else np.nan for p in pts], dtype=float)
             for key in ("band_low", "band_high")}
    if any(np.any(np.isfinite(v)) for v in bands.values()):
        low = np.where(np.isfinite(bands["band_low"]), bands["band_low"], -1e30)
        high = np.where(np.isfinite(bands["band_high"]), bands["band_high"], 1e30)
        has = np.isfinite(bands["band_low"]) | np.isfinite(bands["band_high"])
        fill = ax.fill_between(x, np.clip(low, y_lo - 1, None), np.clip(high, None, y_hi + 1), where=has, step="mid", color="#56B4E9",
                               alpha=0.18, lw=0, label="acceptance band", zorder=0)
        fill.set_gid("band")
        for key in ("band_low", "band_high"):
            vals = bands[key]
            if np.any(np.isfinite(vals)):
                ax.plot(x, vals, drawstyle="steps-mid", color="#0072B2", ls=":", lw=1.2, zorder=1)[0].set_gid(key)
        above = bands["band_high"][np.isfinite(bands["band_high"])]
        below = bands["band_low"][np.isfinite(bands["band_low"])]
        if above.size and float(above.min()) > y_hi:  # said in the key: nothing is drawn over the values
            ax.plot([], [], ls="none", marker="$\u2191$", color="#0072B2",
                    label=f"band upper limit {_fmt(float(above.min()))} (above)")[0].set_gid("band_high_out_of_view")
        if below.size and float(below.max()) < y_lo:
            ax.plot([], [], ls="none", marker="$\u2193$", color="#0072B2",
                    label=f"band lower limit {_fmt(float(below.max()))} (below)")[0].set_gid("band_low_out_of_view")
    # ---- values outside their band, and the drift rules that fired
    failed = np.array([p.verdict == "fail" for p in pts], dtype=bool)
    if failed.any():
        ax.plot(x[failed], y[failed], "X", color="#D55E00", mec="black", mew=0.6, ms=9, ls="none", label="outside the band",
                zorder=6)[0].set_gid("band_failures")
    if trend.flags:
        by_point: dict[int, set[int]] = defaultdict(set)
        for f in trend.flags:
            by_point[f.analysis_id].add(RULE_NUMBERS[f.rule])
        index = {p.analysis_id: i for i, p in enumerate(pts)}
        fi = np.array([index[a] for a in by_point], dtype=int)
        ax.scatter(x[fi], y[fi], s=140, facecolors="none", edgecolors="#D55E00", linewidths=1.6, label="drift flag (rule numbers)",
                   zorder=5).set_gid("flagged")
        for a, numbers in by_point.items():
            i = index[a]
            ax.annotate(",".join(str(n) for n in sorted(numbers)), (x[i], y[i]), xytext=(7, 7), textcoords="offset points",
                        fontsize=8, color="#D55E00")
    ax.set_ylim(y_lo, y_hi)
    # ---- dates as days and months; the year once, in the axis label
    dates = [p.acquired_at.astimezone(timezone.utc) for p in pts]
    years = sorted({d.year for d in dates})
    locator = mdates.AutoDateLocator(minticks=3, maxticks=7)
    ax.xaxis.set_major_locator(locator)
    one_year = len(years) <= 1

    def day_month(value: float, _pos: int | None = None) -> str:
        d = mdates.num2date(value, tz=timezone.utc)
        return f"{d.day} {d:%b}" if one_year else f"{d.day} {d:%b}\n{d.year}"

    ax.xaxis.set_major_formatter(FuncFormatter(day_month))
    if len(x):
        margin = max(1.0, 0.04 * float(np.ptp(x)))
        ax.set_xlim(float(x.min()) - margin, float(x.max()) + margin)
    ax.set_xlabel(f"acquired, {years[0]} (UTC)" if one_year and years else "acquired (UTC)")
    ax.set_ylabel(axis_label(trend.metric, trend.unit))
    ax.tick_params(labelsize=8)
    ax.set_title(f"{trend.scanner} ({trend.site}) / {trend.protocol}\n{roi_title(trend.roi)}: {metric_title(trend.metric)}", fontsize=9)
    ax.grid(True, color="0.9", lw=0.6)
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=7, frameon=False)
    key = "Flags: " + ";  ".join(f"{RULE_NUMBERS[r]} = {text}" for r, text in RULES.items())
    fig.text(0.09, 0.06, key, fontsize=7, wrap=True)
    fig.text(0.09, 0.015, "Supports, and does not replace, the judgement of a qualified medical physicist.", fontsize=6, color="0.4")
    return fig


def _fmt(value: float) -> str:
    """A band limit for a note: three significant digits."""
    return f"{value:.3g}"


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
