"""``render_status(snapshot) -> renderable``: the daemon's panel, as a pure function.

Sized for an 80 x 24 terminal: at most 18 lines and no line wider than 80
columns once the panel border is drawn.  Long paths are shortened from the
left (the end of a path is the part that tells sessions apart).
"""

from __future__ import annotations

from rich import box
from rich.console import Group
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from livequant.daemon.status import Snapshot

__all__ = ["render_status", "format_duration", "shorten_path"]

_STATE_STYLE = {"running": "bold green", "paused": "bold yellow", "draining": "bold yellow",
                "starting": "bold cyan", "stopped": "bold red", "offline": "bold red"}
_MAX_WARNINGS = 5


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
    grid.add_row("watching", shorten_path(snap.watch, 66) if snap.watch else "(socket only)")

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

    warnings = list(snap.warnings)[-_MAX_WARNINGS:]
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
    return Panel(Group(grid), title=title, subtitle=subtitle, box=box.ROUNDED, width=80,
                 padding=(0, 1))
