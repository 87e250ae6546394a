"""``render_status(snapshot) -> renderable``: the daemon's panel, as a pure function.

Sized for an 80 x 24 terminal: at most 18 lines and no line wider than 80
columns once the panel border is drawn.  Long paths are shortened from the
left (the end of a path is the part that tells sessions apart).  Once the
decision loop has something to show, a proposals table (ids, so the operator
can ``livequant accept ID``) and a panel of recent flags follow the status
panel; warnings then shrink to two lines so the whole fits 80 x 30.
"""

from __future__ import annotations

from rich import box
from rich.console import Group
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from livequant.daemon.status import Snapshot

__all__ = ["render_status", "format_duration", "shorten_path", "proposals_table", "flags_table",
           "series_line"]

_STATE_STYLE = {"running": "bold green", "paused": "bold yellow", "draining": "bold yellow",
                "starting": "bold cyan", "stopped": "bold red", "offline": "bold red"}
_MAX_WARNINGS = 5
_MAX_WARNINGS_WITH_DECISIONS = 2
_MAX_PROPOSALS = 4
_MAX_FLAGS = 3
_PROPOSAL_STYLE = {"open": "bold", "accepted": "green", "rejected": "dim", "expired": "dim"}


def format_duration(seconds: float) -> str:
    """``93.4 -> '1:33'``, ``7384 -> '2:03:04'``."""
    s = int(max(0.0, seconds))
    h, rem = divmod(s, 3600)
    m, s = divmod(rem, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def shorten_path(path: str | None, width: int) -> str:
    if not path:
        return "-"
    return path if len(path) <= width else "..." + path[-(width - 3):]


def _pm(value: float | None, sigma: float | None = None) -> str:
    if value is None:
        return "-"
    if sigma is None:
        return f"{value:.1f} pm"
    return f"{value:.1f} ± {sigma:.1f} pm"


def _seconds(value: float | None) -> str:
    return "-" if value is None else f"{value:.2f} s"


def render_status(snap: Snapshot):
    """Build the status panel for one snapshot (no side effects, no terminal access)."""
    c = snap.counts
    grid = Table.grid(padding=(0, 1))
    grid.add_column(style="bold", no_wrap=True, width=9)
    grid.add_column(no_wrap=True, overflow="ellipsis", max_width=66)

    grid.add_row("session", shorten_path(snap.session, 66))
    if snap.state == "offline":
        watching = "(no daemon running: counts from the ledger)"
    else:
        watching = shorten_path(snap.watch, 66) if snap.watch else "(socket only)"
    grid.add_row("watching", watching)

    frames = Text()
    frames.append(f"{c.get('done', 0)} done", style="green")
    frames.append(f"  {c.get('queued', 0)} queued")
    frames.append(f"  {snap.in_flight} in flight")
    q = c.get("quarantined", 0)
    frames.append(f"  {q} quarantined", style="red" if q else "")
    if snap.settling:
        frames.append(f"  {snap.settling} settling", style="dim")
    grid.add_row("frames", frames)

    lag_style = "yellow" if snap.lag_s > 30 else ""
    speed = Text(f"{snap.frames_per_s:.2f} frames/s  ")
    speed.append(f"lag {snap.lag_s:.1f} s", style=lag_style)
    speed.append(f"  {snap.workers} worker(s)")
    if snap.rejected_messages:
        speed.append(f"  {snap.rejected_messages} bad messages", style="red")
    grid.add_row("speed", speed)

    last = snap.last
    if last is None:
        grid.add_row("last", Text("no frame analysed yet", style="dim"))
    else:
        head = Text(f"{last.frame_id}  ")
        head.append(last.status, style="green" if last.status == "ok" else "yellow")
        head.append(f"  {last.n_columns} columns")
        grid.add_row("last", head)
        grid.add_row("", f"a {_pm(last.a_pm, last.sigma_a_pm)}   b {_pm(last.b_pm)}   "
                         f"angle {'-' if last.angle_deg is None else f'{last.angle_deg:.1f}°'}")
        grid.add_row("", f"mean displacement {_pm(last.mean_displacement_pm)}   "
                         f"analysis {_seconds(last.analyze_s)}   "
                         f"latency {_seconds(last.latency_s)}")

    has_decisions = bool(snap.proposals or snap.flags)
    if getattr(snap, "series", ()):
        grid.add_row("series", series_line(snap.series))
    if snap.decisions:
        grid.add_row("decisions", _decisions_line(snap.decisions))
    warnings = list(snap.warnings)[-(_MAX_WARNINGS_WITH_DECISIONS if has_decisions
                                     else _MAX_WARNINGS):]
    if warnings:
        for i, w in enumerate(warnings):
            grid.add_row("warnings" if i == 0 else "", Text(w, style="yellow"))
    else:
        grid.add_row("warnings", Text("none", style="dim"))

    ep = snap.endpoints
    if ep:
        grid.add_row("sockets", " ".join(f"{k} {v.replace('tcp://', '')}"
                                         for k, v in sorted(ep.items())))

    title = Text.assemble(("livequant ", "bold"), (snap.state, _STATE_STYLE.get(snap.state, "")))
    subtitle = f"up {format_duration(snap.uptime_s)}" if snap.state != "offline" else None
    panel = Panel(Group(grid), title=title, subtitle=subtitle, box=box.ROUNDED, width=80,
                  padding=(0, 1))
    if not has_decisions:
        return panel
    parts = [panel]
    if snap.proposals:
        parts.append(proposals_table(snap.proposals, limit=_MAX_PROPOSALS))
    if snap.flags:
        parts.append(flags_table(snap.flags, limit=_MAX_FLAGS))
    return Group(*parts)


def series_line(rows, *, limit: int = 2) -> Text:
    """The newest series: depth (frames averaged), frames left out, precision gain.

    ``run-a 4 frames, 1 out, precision x2.0`` (the gain is the median
    column-position uncertainty of one member over that of the average; about
    sqrt(N) when shot noise limits).  An orthogonal pair reads ``pair``.
    """
    out = Text()
    for k, r in enumerate(list(rows)[-limit:]):
        if k:
            out.append("  |  ", style="dim")
        out.append(str(r.get("series_id")), style="bold")
        if r.get("kind") == "orthogonal":
            out.append(" pair")
        else:
            out.append(f" {r.get('depth', r.get('n_members', 0))} frames")
        n_out = r.get("n_excluded") or 0
        if n_out:
            out.append(f", {n_out} out", style="yellow")
        gain = r.get("precision_gain")
        if gain:
            out.append(f", precision x{gain:.1f}", style="green")
    return out


def _decisions_line(d: dict) -> Text:
    out = Text()
    drift = d.get("drift") or {}
    v = drift.get("velocity_nm_per_s")
    if v and drift.get("pairs"):
        out.append(f"drift ({v[0] * 60:+.2f}, {v[1] * 60:+.2f}) nm/min "
                   f"± {drift.get('sigma_v_nm_per_s', 0) * 60:.2f}")
    else:
        out.append("drift not measured yet", style="dim")
    p = d.get("proposals") or {}
    if p:
        out.append(f"  {p.get('budget_left', 0)} proposals left")
    if d.get("auto_accept"):
        out.append("  AUTO-ACCEPT", style="bold red")
    n_err = d.get("errors") or 0
    if n_err:
        out.append(f"  {n_err} errors", style="red")
    return out


def _nm(v) -> str:
    return "-" if v is None else f"{v:.1f}"


def proposals_table(rows, *, limit: int = _MAX_PROPOSALS, width: int = 80) -> Table:
    """Proposals with their ids: state, score, centre and size (nm), reason.

    The id, state, score, centre and size keep their full width (the operator
    needs the id to accept); only the reason is shortened to fit.
    """
    rows = list(rows)
    cells = []
    for r in rows[:limit]:
        c = r.get("center_nm") or (None, None)
        sz = r.get("size_nm") or (None, None)
        cells.append((str(r.get("id")), r.get("state", ""),
                      "-" if r.get("score") is None else f"{r['score']:.2f}",
                      f"{_nm(c[0])}, {_nm(c[1])}", f"{_nm(sz[0])} x {_nm(sz[1])}",
                      str(r.get("reason") or "")))
    heads = ("proposal", "state", "score", "centre nm", "size nm")
    fixed = [max([len(h)] + [len(row[k]) for row in cells]) for k, h in enumerate(heads)]
    t = Table(title=None, box=box.SIMPLE_HEAD, width=width, padding=(0, 1), expand=False,
              title_justify="left")
    for k, head in enumerate(heads):
        t.add_column(head, no_wrap=True, min_width=fixed[k],
                     justify="right" if head == "score" else "left")
    reason_w = max(8, width - sum(fixed) - 2 * len(fixed) - 4)
    t.add_column("reason", no_wrap=True, overflow="ellipsis", min_width=8, max_width=reason_w)
    for row in cells:
        t.add_row(row[0], Text(row[1], style=_PROPOSAL_STYLE.get(row[1], "")), *row[2:])
    if len(rows) > limit:
        t.caption = f"{len(rows) - limit} more: livequant proposals"
    return t


def flags_table(rows, *, limit: int = _MAX_FLAGS, width: int = 80) -> Panel:
    """The most recent flags (newest last): frame, rule, kind, score, message."""
    rows = list(rows)[-limit:]
    # Frame and kind keep their full width (they tell the flags apart); the message
    # gives way.  The rule's name is in the status and in `livequant proposals`.
    frame_w = min(16, max([len(str(f.get("frame_id"))) for f in rows] + [5]))
    kind_w = min(12, max([len(str(f.get("kind"))) for f in rows] + [4]))
    grid = Table.grid(padding=(0, 1))
    grid.add_column(no_wrap=True, min_width=frame_w, max_width=16, overflow="ellipsis")
    grid.add_column(no_wrap=True, min_width=kind_w, max_width=12, overflow="ellipsis")
    grid.add_column(justify="right", no_wrap=True, min_width=4, max_width=4)
    grid.add_column(no_wrap=True, overflow="ellipsis", min_width=10,
                    max_width=max(10, width - 4 - frame_w - kind_w - 4 - 3))
    for f in rows:
        score = f.get("score")
        grid.add_row(str(f.get("frame_id")), str(f.get("kind")),
                     "-" if score is None else f"{score:.2f}", str(f.get("message") or ""))
    return Panel(grid, title="recent flags", title_align="left", box=box.ROUNDED, width=width,
                 padding=(0, 1))
