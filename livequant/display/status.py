"""``render_status(snapshot) -> renderable``: the daemon's panel, as a pure function.

The panel takes the terminal's width (``width``) and degrades cleanly down to
80 x 24: at most 18 lines of status, no line wider than `width` once the
border is drawn.  Long paths are shortened from the left (the end of a path is
the part that tells sessions apart).  Once the decision loop has something to
show, a proposals table (ids, rotation, suggested pixel size and dwell, the
dose that scan would deliver, reason) and a panel of recent flags follow the
status panel; warnings then shrink to two lines so the whole fits 80 x 30.
With keys enabled (``ui`` given) the chosen proposal is marked, the keys are
listed, and a decision waiting for confirmation shows the proposal with the
safety caution before anything is sent.
"""

from __future__ import annotations

from rich import box
from rich.console import Group
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from livequant.daemon.status import Snapshot
from livequant.textfmt import plus_minus

__all__ = ["render_status", "format_duration", "shorten_path", "proposals_table", "flags_table",
           "proposal_dose", "proposal_cells", "confirm_panel",
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
    return plus_minus(value, sigma, "pm", digits=1)  # "390.53 ± 0.02 pm", never "± 0.0 pm"


def _seconds(value: float | None) -> str:
    return "-" if value is None else f"{value:.2f} s"


def render_status(snap: Snapshot, *, width: int = 80, ui=None):
    """Build the status panel for one snapshot (no side effects, no terminal access).

    Parameters
    ----------
    snap : Snapshot
    width : int
        The terminal's width in columns (at least 60 is used).
    ui : livequant.display.keys.PanelState, optional
        The operator's choice when the display takes keys: the chosen proposal
        is marked, the keys are listed, and a pending decision shows the
        proposal and the caution.
    """
    width = max(60, int(width))
    text_w = width - 4 - 10     # border and padding, label column
    c = snap.counts
    grid = Table.grid(padding=(0, 1))
    grid.add_column(style="bold", no_wrap=True, width=9)
    grid.add_column(no_wrap=True, overflow="ellipsis", max_width=text_w)

    grid.add_row("session", shorten_path(snap.session, text_w))
    if snap.state == "offline":
        watching = "(no daemon running: counts from the ledger)"
    else:
        watching = shorten_path(snap.watch, text_w) if snap.watch else "(socket only)"
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
        for label, line in physics_rows(last.physics, (snap.decisions or {}).get("tracks")):
            grid.add_row(label, line)

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
    panel = Panel(Group(grid), title=title, subtitle=subtitle, box=box.ROUNDED, width=width,
                  padding=(0, 1))
    if not has_decisions:
        return panel
    parts = [panel]
    current_a = (snap.decisions or {}).get("beam_current_pa")
    if snap.proposals:
        from livequant.display.keys import KEY_HELP, current

        chosen = current(ui, snap.proposals) if ui is not None else None
        if ui is not None and ui.pending is not None:
            # right under the status, so a 24-line terminal never crops it away
            row = next((p for p in snap.proposals if str(p.get("id")) == ui.pending[1]), None)
            parts.append(confirm_panel(ui.pending[0], ui.pending[1], row, width=width,
                                       beam_current_pa=current_a))
        parts.append(proposals_table(snap.proposals, limit=_MAX_PROPOSALS, width=width,
                                     selected=chosen, beam_current_pa=current_a))
        if ui is not None:
            if ui.pending is None:
                parts.append(Text(KEY_HELP, style="dim", no_wrap=True, overflow="ellipsis"))
            if ui.message:
                parts.append(Text(ui.message, style="cyan", no_wrap=True, overflow="ellipsis"))
    if snap.flags:
        parts.append(flags_table(snap.flags, limit=_MAX_FLAGS, width=width))
    return Group(*parts)


def confirm_panel(verb: str, pid: str, row: dict | None, *, width: int = 80,
                  beam_current_pa: float | None = None) -> Panel:
    """A decision waiting for ``y``: the proposal, its dose and (to accept) the caution."""
    from livequant.proposals.propose import CAUTION

    body = Text()
    if row is not None:
        c = proposal_cells(row, beam_current_pa)
        body.append(f"{pid}: centre ({c['centre']}) nm, size {c['size']} nm, rotation "
                    f"{c['rot']}, pixel {c['px']} pm, dwell {c['dwell']} µs, dose {c['dose']} "
                    "e/Å²\n")
        body.append(f"{c['reason']}\n", style="dim")
    if verb == "accept":
        body.append(f"caution: {CAUTION}\n", style="yellow")
    body.append(f"press y to {verb} {pid}, any other key to cancel", style="bold")
    return Panel(body, title=f"{verb} {pid}?", title_align="left", box=box.HEAVY,
                 border_style="yellow" if verb == "accept" else "", width=width,
                 padding=(0, 1))


def _pm_sigma(v, s, unit="pm", fmt=".0f") -> str:
    if v is None:
        return "-"
    return f"{v:{fmt}}" + ("" if s is None else f" ± {s:{fmt}}") + f" {unit}"


def physics_rows(physics: dict | None, tracks: dict | None) -> list[tuple[str, str]]:
    """Rows ``wall`` (width, energy, roughness exponent) and ``track`` (velocity).

    ``physics`` is :func:`livequant.daemon.status.wall_physics_brief` of the latest frame,
    ``tracks`` the decision loop's track status (``latest_wall``); rows with nothing to say
    are left out.
    """
    parts = []
    if physics:
        parts.append(f"w {_pm_sigma(physics.get('width_pm'), physics.get('sigma_width_pm'))}")
        if physics.get("energy_mJ_per_m2") is not None:
            e = _pm_sigma(physics["energy_mJ_per_m2"], physics.get("sigma_energy_mJ_per_m2"),
                          "mJ/m²")
            parts.append(f"E {e}")
        if physics.get("zeta") is not None:
            z = _pm_sigma(physics["zeta"], physics.get("sigma_zeta"), "", ".2f").rstrip()
            parts.append(f"ζ {z}")
    rows = [("wall", "   ".join(parts))] if parts else []
    w = (tracks or {}).get("latest_wall") or {}
    if w.get("velocity_nm_per_s") is not None:
        v, sv = 1000.0 * w["velocity_nm_per_s"], 1000.0 * (w.get("sigma_velocity_nm_per_s") or 0)
        rows.append(("track", f"{w.get('track_id')}: v {v:.1f} ± {sv:.1f} pm/s along its "
                              f"normal, {w.get('n')} frames"))
    means = w.get("means") or {}
    mw, me = means.get("width_nm"), means.get("energy_J_per_m2")
    if mw and mw.get("n", 0) > 1:
        text = f"mean w {_pm_sigma(1000 * mw['mean'], 1000 * mw['sigma_scaled'])}"
        if me and me.get("n", 0) > 1:
            text += f", E {_pm_sigma(1000 * me['mean'], 1000 * me['sigma_scaled'], 'mJ/m²')}"
        ok = mw.get("consistent") and (not me or me.get("consistent", True))
        rows.append(("", text + ("  (χ² consistent)" if ok else "  (χ²: frames disagree)")))
    return rows


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


def _num(v, fmt: str) -> str:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return "-"
    return format(f, fmt) if f == f else "-"


def proposal_dose(row: dict, beam_current_pa: float | None = None) -> float | None:
    """Dose (e/Å²) the proposal's suggested scan would deliver, None when unknown.

    The proposal's own ``beam_current_pa`` wins over the configured one
    (``proposals.beam_current_pa``); see :mod:`livequant.scan_dose`.
    """
    from livequant.scan_dose import dose_e_per_A2

    current = row.get("beam_current_pa")
    if current is None:
        current = beam_current_pa
    return dose_e_per_A2(current, row.get("dwell_time_us"), row.get("pixel_size_pm"))


def proposal_cells(row: dict, beam_current_pa: float | None = None) -> dict[str, str]:
    """One proposal as the table's text cells, by column name."""
    from livequant.scan_dose import format_dose

    c = row.get("center_nm") or (None, None)
    sz = row.get("size_nm") or (None, None)
    rot = row.get("rotation_deg")
    return {"id": str(row.get("id")), "state": str(row.get("state", "")),
            "score": _num(row.get("score"), ".2f"),
            "centre": f"{_nm(c[0])}, {_nm(c[1])}",
            "size": f"{_nm(sz[0])} x {_nm(sz[1])}",
            "rot": "-" if rot is None else f"{_num(rot, '.0f')}°",
            "px": _num(row.get("pixel_size_pm"), ".3g"),
            "dwell": _num(row.get("dwell_time_us"), ".3g"),
            "dose": format_dose(proposal_dose(row, beam_current_pa)),
            "reason": str(row.get("reason") or "")}


#: Columns of the proposals table (two-line headers keep them narrow), and the order in
#: which a narrow terminal leaves them out (the centre first: accepting shows it).
_PROPOSAL_COLUMNS = ("id", "state", "score", "centre", "size", "rot", "px", "dwell", "dose")
_HEADERS = {"centre": "centre\nnm", "size": "size\nnm", "px": "px\npm", "dwell": "dwell\nµs",
            "dose": "dose\ne/Å²"}
_DROP_ORDER = ("centre", "px", "dwell", "rot")
_RIGHT = ("score", "rot", "px", "dwell", "dose")
_MIN_REASON = 16


def proposals_table(rows, *, limit: int = _MAX_PROPOSALS, width: int | None = 80,
                    selected: str | None = None, beam_current_pa: float | None = None,
                    wrap: bool = False) -> Table:
    """Proposals with their ids, scan geometry, suggested scan and dose, and reason.

    Parameters
    ----------
    rows : sequence of dict
        Proposal briefs (``id``, ``state``, ``score``, ``center_nm``, ``size_nm``,
        ``rotation_deg``, ``pixel_size_pm``, ``dwell_time_us``, ``reason``, and
        optionally ``beam_current_pa``).
    limit : int
        Rows shown; the rest are counted in the caption.  The window follows
        `selected` so the chosen proposal is always on screen.
    width : int or None
        Width to fit.  The id, state, score, rotation, pixel size, dwell and
        dose always keep their full width (the operator needs them to decide);
        below about 100 columns the centre is left out (named in the caption),
        and the reason takes the rest.  None: no limit (piped output), one
        line per proposal, nothing cut.
    selected : str, optional
        Id of the proposal chosen on the display (marked with ``›``).
    beam_current_pa : float, optional
        Probe current for the dose column (``n/a`` without one).
    wrap : bool
        Wrap long reasons onto more lines at word boundaries instead of
        shortening them with an ellipsis.
    """
    rows = list(rows)
    start = 0
    ids = [str(r.get("id")) for r in rows]
    if selected in ids and ids.index(selected) >= limit:
        start = ids.index(selected) - limit + 1
    shown = rows[start:start + limit]
    cells = [proposal_cells(r, beam_current_pa) for r in shown]
    for cell in cells:
        cell["id"] = ("› " if cell["id"] == selected else "") + cell["id"]
    heads = list(_PROPOSAL_COLUMNS)
    fixed = {h: max([len(x) for x in _HEADERS.get(h, h).split("\n")] +
                    [len(c[h]) for c in cells]) for h in heads}
    dropped = []
    if width is not None:
        for h in _DROP_ORDER:
            if sum(fixed[x] + 1 for x in heads) + _MIN_REASON <= width:
                break
            heads.remove(h)
            dropped.append(_HEADERS.get(h, h).replace("\n", " "))
    # the box draws one space between columns and no edges: the table is as wide as its content
    t = Table(box=box.SIMPLE_HEAD, padding=(0, 0), show_edge=False, expand=False)
    for h in heads:
        t.add_column(_HEADERS.get(h, h), no_wrap=True, min_width=fixed[h],
                     justify="right" if h in _RIGHT else "left")
    if width is None:
        t.add_column("reason", no_wrap=True)
    else:
        reason_w = max(8, width - sum(fixed[h] + 1 for h in heads))
        t.add_column("reason", no_wrap=not wrap, overflow="fold" if wrap else "ellipsis",
                     max_width=reason_w)
    for c in cells:
        style = _PROPOSAL_STYLE.get(c["state"], "")
        first = Text(c["id"], style="reverse" if c["id"].startswith("›") else "")
        t.add_row(first, Text(c["state"], style=style), *(c[h] for h in heads[2:]),
                  c["reason"])
    notes = []
    if start:
        notes.append(f"{start} above")
    if len(rows) > start + limit:
        notes.append(f"{len(rows) - start - limit} more: livequant proposals")
    if dropped:
        notes.append(f"not shown: {', '.join(dropped)} (wider terminal)")
    if notes:
        t.caption = "; ".join(notes)
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
