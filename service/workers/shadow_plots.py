"""Plots of the shadow report (matplotlib, drawn off-screen to SVG without pyplot).

Each function takes the report's `PlotData` and returns a `data:` URI of an SVG image, so the
page embeds every plot and fetches nothing. Colours are from the Okabe-Ito palette, which stays
distinct under the common colour-vision deficiencies (Okabe & Ito, "Color Universal Design", 2008).
"""

from __future__ import annotations

import base64
import io
import math
from typing import Any

import matplotlib as mpl
import numpy as np
from matplotlib.axes import Axes
from matplotlib.dates import AutoDateLocator, ConciseDateFormatter
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, PercentFormatter
from matplotlib.typing import RcKeyType

from service.workers.shadow import PlotData

OURS, RULES = "#D55E00", "#0072B2"
OUTCOME_COLOURS = {
    "fraud": "#CC79A7",
    "not fraud": "#009E73",
    "unlabelled": "#A0A0A0",
    "all events": "#7F7F7F",
}
STYLE: dict[RcKeyType, Any] = {
    "font.size": 10,
    "axes.titlesize": 12,
    "axes.titleweight": "bold",
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#dddddd",
    "legend.frameon": False,
    "svg.hashsalt": "emberscore",  # stable ids: the same report gives the same file
}


def _figure() -> Figure:
    return Figure(figsize=(7.2, 4.6), layout="constrained")


def svg_uri(figure: Figure) -> str:
    """The figure as a base64 `data:` URI of an SVG image."""
    buffer = io.BytesIO()
    with mpl.rc_context(STYLE):
        figure.savefig(buffer, format="svg", metadata={"Date": None})
    return "data:image/svg+xml;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _percent_axis(axis: object) -> None:
    def label(value: float, _: int) -> str:
        if value <= 0:
            return "0%"
        return f"{100 * value:.{max(0, -math.floor(math.log10(100 * value)))}f}%"

    axis.set_major_formatter(FuncFormatter(label))  # type: ignore[attr-defined]


def _legend_below(ax: Axes, columns: int = 2) -> None:
    """Legends under the plot never hide a line."""
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.2), ncols=columns)


def score_distribution(plots: PlotData) -> str:
    """Share of each outcome group's events per risk bin, log scale so rare tails show."""
    with mpl.rc_context(STYLE):
        figure = _figure()
        ax = figure.add_subplot()
        for name, counts in plots.histograms.items():
            total = int(counts.sum())
            if total == 0:
                continue
            shares = np.where(counts > 0, counts / total, np.nan)
            ax.stairs(
                shares,
                plots.bin_edges,
                baseline=None,
                color=OUTCOME_COLOURS[name],
                linewidth=3.5 if name == "unlabelled" else 2,
                zorder=1 if name == "unlabelled" else 2,
                label=f"{name} ({total:,} events)",
            )
        ax.set_yscale("log")
        _percent_axis(ax.yaxis)
        ax.set_xlabel("emberscore risk")
        ax.set_ylabel("share of the group's events (log scale)")
        ax.set_title("Risk by outcome")
        _legend_below(ax, columns=3)
    return svg_uri(figure)


def precision_recall(plots: PlotData) -> str:
    """Precision-recall curves of both sides, with each side's own decisions marked."""
    with mpl.rc_context(STYLE):
        figure = _figure()
        ax = figure.add_subplot()
        sides = (
            (plots.pr_ours, plots.ap_ours, plots.point_ours, OURS, "emberscore risk"),
            (
                plots.pr_rules,
                plots.ap_rules,
                plots.point_rules,
                RULES,
                "rules (deny > review > allow)",
            ),
        )
        for curve, ap, point, colour, name in sides:
            if curve is None:
                continue
            recall, precision = curve
            ax.plot(
                recall,
                precision,
                drawstyle="steps-pre",
                color=colour,
                linewidth=2,
                label=f"{name}, AP {ap:.3f}",
            )
            if point is not None:
                ax.plot(
                    *point,
                    marker="o",
                    markersize=9,
                    color=colour,
                    linestyle="none",
                    markeredgecolor="black",
                    label=f"{name.split()[0]}: own decisions",
                )
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1.02)
        ax.xaxis.set_major_formatter(PercentFormatter(1.0))
        ax.yaxis.set_major_formatter(PercentFormatter(1.0))
        ax.set_xlabel("recall (share of labelled fraud alerted)")
        ax.set_ylabel("precision (fraud among alerts)")
        ax.set_title("Precision against recall")
        _legend_below(ax)
    return svg_uri(figure)


def alert_rate(plots: PlotData, rules_rate: float | None, same_threshold: float | None) -> str:
    """Share of events at or above each risk threshold, with the rules' alert rate marked."""
    with mpl.rc_context(STYLE):
        figure = _figure()
        ax = figure.add_subplot()
        shown = plots.alert_rates > 0
        ax.plot(
            plots.thresholds[shown],
            plots.alert_rates[shown],
            color=OURS,
            linewidth=2,
            label="emberscore: events with risk >= threshold",
        )
        if rules_rate is not None and rules_rate > 0:
            ax.axhline(
                rules_rate,
                color=RULES,
                linestyle="--",
                linewidth=1.5,
                label=f"rules' alert rate ({100 * rules_rate:.2f}%)",
            )
        if same_threshold is not None and math.isfinite(same_threshold):
            ax.axvline(
                same_threshold,
                color="black",
                linestyle=":",
                linewidth=1.5,
                label=f"same volume as the rules: risk >= {same_threshold:.3f}",
            )
        ax.set_yscale("log")
        _percent_axis(ax.yaxis)
        ax.set_xlabel("risk threshold")
        ax.set_ylabel("share of events alerted (log scale)")
        ax.set_title("Alert rate against threshold")
        _legend_below(ax, columns=1)
    return svg_uri(figure)


def daily_volumes(plots: PlotData, capacity_per_day: float | None) -> str:
    """Alerts per UTC day for both sides, with the review capacity when one was given."""
    with mpl.rc_context(STYLE):
        figure = _figure()
        ax = figure.add_subplot()
        dates = plots.days.astype("datetime64[D]")
        marker = "o" if dates.size <= 60 else None
        ax.plot(
            dates,
            plots.daily_ours,
            color=OURS,
            linewidth=2,
            marker=marker,
            markersize=3,
            label="emberscore (review or deny)",
        )
        if plots.daily_rules is not None:
            ax.plot(
                dates,
                plots.daily_rules,
                color=RULES,
                linewidth=2,
                marker=marker,
                markersize=3,
                label="rules (review or deny)",
            )
        if capacity_per_day is not None:
            ax.axhline(
                capacity_per_day,
                color="black",
                linestyle="--",
                linewidth=1.5,
                label=f"review capacity ({capacity_per_day:,.0f} per day)",
            )
        locator = AutoDateLocator()  # type: ignore[no-untyped-call]
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(ConciseDateFormatter(locator, show_offset=False))  # type: ignore[no-untyped-call]
        ax.set_ylim(bottom=0)
        first, last = plots.days[[0, -1]].astype("datetime64[D]")
        ax.set_xlabel(f"day (UTC), {first} to {last}")
        ax.set_ylabel("alerts per day")
        ax.set_title("Daily alert volume")
        _legend_below(ax)
    return svg_uri(figure)
