"""The report's series section: precision against the number of frames averaged.

Reads ``series_aggregates`` and ``series_members`` from the ledger (absent in
a session made before schema 2: no section).  One figure per session: the
median column-position uncertainty of each running average against N, with
the shot-noise law ``sigma_1 / sqrt(N)`` drawn from the median of the single
members (Yankovich et al., Nat. Commun. 5, 4155 (2014): averaging registered
fast frames is how sub-picometre precision is reached); a table of every
member left out, with its reason.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import LogLocator, NullFormatter, ScalarFormatter

from livequant.daemon.ledger import LEDGER_NAME, Ledger
from livequant.report.page import Section, Table

__all__ = ["precision_vs_n_figure", "series_section", "read_series"]

_COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9")
_MARKERS = ("o", "s", "^", "D", "v", "P")


def read_series(session_root: str | Path) -> tuple[list[dict], list[dict]]:
    """``(aggregates, members)`` of every series of a session (empty lists when none)."""
    path = Path(session_root) / LEDGER_NAME
    with Ledger(path, readonly=True) as led:
        return led.series_aggregates(), led.series_members()


def precision_vs_n_figure(series: dict[str, list[tuple[int, float]]],
                          single_sigma_pm: dict[str, float | None]) -> Figure:
    """Median position uncertainty (pm) of each series' running average against N.

    `series` maps a series id to ``[(N, sigma_pm), ...]``; `single_sigma_pm`
    to the median uncertainty of its single members (the 1/sqrt(N) line).
    Log-log axes, so the shot-noise law is a straight line of slope -1/2.
    """
    fig = Figure(figsize=(6.5, 4.2), layout="constrained")
    ax = fig.subplots()
    n_max = 2
    for k, (sid, pts) in enumerate(sorted(series.items())):
        pts = sorted(p for p in pts if p[1] is not None and np.isfinite(p[1]))
        if not pts:
            continue
        n = np.array([p[0] for p in pts], float)
        s = np.array([p[1] for p in pts], float)
        colour, marker = _COLOURS[k % len(_COLOURS)], _MARKERS[k % len(_MARKERS)]
        ax.plot(n, s, marker=marker, color=colour, linestyle="-", label=f"{sid}: average")
        s1 = single_sigma_pm.get(sid)
        if s1:
            nn = np.linspace(1, max(n.max(), 2), 50)
            ax.plot(nn, s1 / np.sqrt(nn), color=colour, linestyle=":",
                    label=f"{sid}: one frame / sqrt(N)")
            ax.plot([1], [s1], marker=marker, color=colour, fillstyle="none", linestyle="")
        n_max = max(n_max, int(n.max()))
    ax.set_xscale("log")
    ax.set_yscale("log")
    for axis in (ax.xaxis, ax.yaxis):
        axis.set_major_formatter(ScalarFormatter())
        axis.set_minor_formatter(NullFormatter())
    ax.yaxis.set_major_locator(LogLocator(subs=(1.0, 1.5, 2.0, 3.0, 5.0, 7.0)))
    ax.set_xticks([t for t in (1, 2, 4, 8, 16, 32, 64, 128, 256) if t <= n_max * 1.3])
    ax.set_xlabel("frames averaged, N")
    ax.set_ylabel("median column-position uncertainty (pm)")
    ax.set_xlim(0.8, n_max * 1.3)
    ax.grid(True, which="both", alpha=0.3)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=8)
    return fig


def series_section(session_root: str | Path, save) -> Section | None:
    """The section, or None when the session has no series.

    `save(fig, name, caption)` stores a figure and returns its reference
    (the report's figure store).
    """
    aggregates, members = read_series(session_root)
    if not aggregates and not members:
        return None
    pts: dict[str, list[tuple[int, float]]] = {}
    single: dict[str, float | None] = {}
    rows = []
    for a in aggregates:
        if a["kind"] == "average":
            pts.setdefault(a["series_id"], []).append((a["n_members"],
                                                       a["median_sigma_position_pm"]))
            single[a["series_id"]] = a["member_sigma_position_pm"]
        rows.append([a["aggregate_id"], a["kind"], a["n_members"], a["n_excluded"],
                     a["median_sigma_position_pm"], a["member_sigma_position_pm"],
                     a["precision_gain"]])
    figures = []
    if pts:
        figures.append(save(precision_vs_n_figure(pts, single), "series-precision-vs-n",
                            "Median column-position uncertainty of each series' running "
                            "average against the number of frames in it (filled), its single "
                            "frames (open) and the shot-noise law one frame / sqrt(N) (dotted). "
                            "The uncertainties are those of the summed dose."))
    out = [[m["series_id"], m["frame_id"], m["index"], m["reason"], m["message"],
            m["residual_chi2"]] for m in members if not m["accepted"]]
    tables = [Table("series-aggregates", "Aggregates analysed (running averages and "
                    "corrected orthogonal pairs)",
                    ["aggregate", "kind", "N", "left out", "sigma pm", "one frame pm",
                     "gain"], rows),
              Table("series-left-out", "Frames left out of their series, with the reason",
                    ["series", "frame", "index", "reason", "why", "residual"], out,
                    empty_text="no frame was left out")]
    n_series = len({m["series_id"] for m in members} | {a["series_id"] for a in aggregates})
    paras = [f"{n_series} series, {len(members)} frames offered, "
             f"{sum(1 for m in members if m['accepted'])} averaged, {len(out)} left out."]
    return Section("series", "Series and orthogonal pairs", paragraphs=paras, tables=tables,
                   figures=figures)
