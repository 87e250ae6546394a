"""Put the session report together: gather (data.py, maps.py), draw (figures.py), write.

:func:`build_report` is what ``livequant report`` and the end of ``livequant
demo`` call.  It writes ``OUT/index.html``, ``OUT/figures/*.png`` and
``OUT/report.json`` (the numbers of the page's tables, for scripts) and
returns that JSON object.
"""

from __future__ import annotations

import json
import logging
import math
import re
import shutil
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from livequant.frames import write_json_atomic
from livequant.outputs import write_text_atomic
from livequant.report import figures as F
from livequant.report.defaults import DEFAULT_HISTOGRAM_FRAMES, DEFAULT_MAX_FRAMES
from livequant.report.data import (FrameData, SessionData, column_crlb_pm, fmt_time,
                                   frame_footprint_nm, frames_of_interest, load_frame,
                                   load_session, payload_get, read_cells_csv, region_corners_nm,
                                   region_corners_px, stage_region_corners_nm)
from livequant.report.maps import DEFAULT_SMOOTH_CELLS, cell_grid, wall_profile, winding_map
from livequant.report.maps import smooth_cells as smooth_cell_values
from livequant.report.page import SAFETY_CAUTION, FigureRef, Section, Table, render_page
from livequant.textfmt import plus_minus
from livequant.report.physics import physics_sections

__all__ = ["build_report", "DEFAULT_MAX_FRAMES", "DEFAULT_HISTOGRAM_FRAMES", "DEFAULT_DPI",
           "DEFAULT_VECTOR", "VECTOR_FORMATS", "ReportContext", "SECTIONS_BEFORE_FRAMES",
           "SECTIONS_AFTER_FRAMES"]

log = logging.getLogger("livequant.report")

from livequant.report.defaults import (DEFAULT_DPI, DEFAULT_HISTOGRAM_FRAMES,  # noqa: E402
                                       DEFAULT_MAX_FRAMES, DEFAULT_VECTOR, VECTOR_FORMATS)

_HIST_FIELDS = (("d_pm", "B-site displacement |d|", "pm", 1.0),
                ("a_pm", "local a", "pm", 1.0),
                ("b_pm", "local b", "pm", 1.0),
                ("c_over_a", "tetragonality c/a", "c/a", 1.0),
                ("exx", "strain εxx", "%", 100.0),
                ("eyy", "strain εyy", "%", 100.0),
                ("exy", "shear strain εxy", "%", 100.0),
                ("tilt_deg", "octahedral tilt", "deg", 1.0),
                ("ratio_b_a", "B / A column amplitude", "ratio", 1.0))


def _slug(text: str) -> str:
    """A file-name-safe version of a frame id (ids come from sidecars: never trust them)."""
    s = re.sub(r"[^A-Za-z0-9._-]+", "_", str(text)).strip("._") or "frame"
    return s[:80]


class _Figures:
    """Saves figures under OUT/figures with unique names (PNG and its vector twin)."""

    def __init__(self, out: Path, *, dpi: float = DEFAULT_DPI, vector: str = DEFAULT_VECTOR):
        self.dir = out / "figures"
        self.dpi, self.vector = dpi, vector
        self.names: list[str] = []
        self.vector_names: list[str] = []

    def save(self, fig, name: str, caption: str, alt: str = "") -> FigureRef:
        base = _slug(name)
        fname, k = f"{base}.png", 1
        while fname in self.names:
            k += 1
            fname = f"{base}-{k}.png"
        vec = None if self.vector == "none" else fname[:-4] + "." + self.vector
        F.save_figure(fig, self.dir / fname, dpi=self.dpi,
                      vector=None if vec is None else self.dir / vec)
        self.names.append(fname)
        if vec:
            self.vector_names.append(vec)
        return FigureRef(src=f"figures/{fname}", caption=caption, alt=alt or caption,
                         vector=f"figures/{vec}" if vec else "")


@dataclass
class ReportContext:
    """What the section builders read: the session, the figure saver, the frames drawn
    in full (filled before :data:`SECTIONS_AFTER_FRAMES` run) and the notes to add to."""

    session: SessionData
    figs: _Figures
    notes: list[str]
    t0: float | None
    gain: float = 1.0
    histogram_frames: int = DEFAULT_HISTOGRAM_FRAMES
    summaries: dict[str, dict] = field(default_factory=dict)
    frame_data: list[FrameData] = field(default_factory=list)


def build_report(session_dir: str | Path, *, out_dir: str | Path | None = None,
                 frames: list[str] | None = None, max_frames: int = DEFAULT_MAX_FRAMES,
                 gain: float = 1.0, histogram_frames: int = DEFAULT_HISTOGRAM_FRAMES,
                 dpi: float = DEFAULT_DPI, vector: str = DEFAULT_VECTOR,
                 smooth_cells: float = DEFAULT_SMOOTH_CELLS,
                 progress: Callable[[str, int, int], None] | None = None) -> dict:
    """Write the report of one session and return its numbers (JSON-ready).

    Parameters
    ----------
    session_dir : path
        The session folder (``ledger.sqlite``, ``frames/``, ``events.jsonl``).
    out_dir : path, optional
        Default ``SESSION/report``.  Its ``figures/`` folder is replaced.
    frames : list of str, optional
        Frame ids to draw in full; default: flagged frames first, then the most
        recent, at most `max_frames`.
    max_frames : int
        Bound on the frames drawn in full (a long session stays quick to report).
    gain : float
        The ``analysis.refine.gain_counts_per_electron`` the session ran with
        (for the Cramér-Rao bound of the columns).
    histogram_frames : int
        At most this many done frames feed the descriptor histograms.
    dpi : float
        Resolution of the PNG figures (20..1200).
    vector : {"svg", "pdf", "none"}
        A vector copy of every figure beside its PNG (linked under each figure).
    smooth_cells : float
        Gaussian σ, in cells, of the smoothed |P| and strain maps drawn beside
        the raw ones (0: raw maps only); see :func:`livequant.report.maps.smooth_cells`.
    progress : callable, optional
        ``progress(step, k, n)`` before each of the n steps and ``("done", n, n)``
        at the end (see :mod:`livequant.report.progress`).

    Raises
    ------
    SessionError
        When the folder is not a readable session.
    ValueError
        For a non-positive `max_frames`, `gain` or `histogram_frames`.
    """
    if max_frames < 1:
        raise ValueError(f"`max_frames` must be >= 1, got {max_frames}")
    if not (gain > 0 and math.isfinite(gain)):
        raise ValueError(f"`gain` must be a positive number, got {gain!r}")
    if histogram_frames < 1:
        raise ValueError(f"`histogram_frames` must be >= 1, got {histogram_frames}")
    if vector not in VECTOR_FORMATS:
        raise ValueError(f"`vector` must be one of {', '.join(VECTOR_FORMATS)}, got {vector!r}")
    if not (20 <= dpi <= 1200):
        raise ValueError(f"`dpi` must lie within 20..1200, got {dpi!r}")
    if not (0 <= smooth_cells <= 10):
        raise ValueError(f"`smooth_cells` must lie within 0..10 cells, got {smooth_cells!r}")
    say = progress or (lambda step, k, n: None)
    t_start = time.perf_counter()
    say("reading the session", 0, 1)
    session = load_session(session_dir)
    out = Path(out_dir) if out_dir is not None else session.root / "report"
    out.mkdir(parents=True, exist_ok=True)
    if (out / "figures").exists():
        shutil.rmtree(out / "figures")  # only our own figures live there
    figs = _Figures(out, dpi=dpi, vector=vector)
    ctx = ReportContext(session=session, figs=figs, notes=list(session.problems),
                        t0=session.t0, gain=gain, histogram_frames=histogram_frames)
    ctx.summaries = _done_summaries(session, ctx.notes)
    chosen, choose_notes = frames_of_interest(session, max_frames=max_frames, requested=frames)
    ctx.notes += choose_notes

    n_steps = len(SECTIONS_BEFORE_FRAMES) + len(chosen) + len(SECTIONS_AFTER_FRAMES) + 1
    step = 0
    sections: list[Section] = []
    for label, builder in SECTIONS_BEFORE_FRAMES:
        say(label, step, n_steps)
        step += 1
        sections += builder(ctx)
    frame_sections: list[Section] = []
    for fid in chosen:
        say(f"frame {fid}", step, n_steps)
        step += 1
        try:
            fd = load_frame(session, fid, summary=ctx.summaries.get(fid))
        except (OSError, ValueError) as exc:
            msg = f"frame {fid}: its outputs could not be read ({exc}); it is left out"
            log.warning(msg)
            ctx.notes.append(msg)
            continue
        ctx.frame_data.append(fd)
        frame_sections += _frame_sections(fd, session, figs, smooth=smooth_cells)
    frame_data = ctx.frame_data
    intro_frames = Section("frames", "Frames of interest", paragraphs=[
        "Frames with flags come first (one for each kind of finding first), then the most "
        "recent ones." if not frames else
        "The frames named on the command line.",
        f"{len(frame_data)} frame(s) drawn in full: " + (", ".join(fd.frame_id for fd in
                                                                frame_data) or "none") + "."])
    sections.append(intro_frames)
    sections += frame_sections
    for label, builder in SECTIONS_AFTER_FRAMES:
        say(label, step, n_steps)
        step += 1
        sections += builder(ctx)
    say("writing the page", step, n_steps)
    notes, t0 = ctx.notes, ctx.t0
    if notes:
        sections.append(Section("notes", "Notes", paragraphs=notes))

    title = f"livequant session report: {session.root.name}"
    intro = [f"Session folder: {session.root}",
             f"Written {fmt_time(time.time())} UTC. Times in the tables are UTC, with seconds "
             "since the session started in brackets."]
    if not session.frames:
        intro.insert(0, "This session has no frames yet: the daemon has not seen any complete "
                        "frame in its watched folder or on its socket. Only the session "
                        "tables are shown.")
    write_text_atomic(out / "index.html", render_page(title, intro, sections))
    result = _numbers(session, t0)
    result.update({"index": str(out / "index.html"), "out_dir": str(out),
                   "figures": [f"figures/{n}" for n in figs.names],
                   "frames_drawn": [fd.frame_id for fd in frame_data],
                   "vector_figures": [f"figures/{n}" for n in figs.vector_names],
                   "dpi": dpi, "notes": notes, "seconds": time.perf_counter() - t_start})
    write_json_atomic(out / "report.json", result)
    say("done", n_steps, n_steps)
    return result


# ----------------------------------------------------------------- numbers


def _numbers(session: SessionData, t0) -> dict:
    """The counts and lists the tables show, straight from the ledger (for report.json)."""
    by_state: dict[str, int] = {}
    for p in session.proposals:
        by_state[p["state"]] = by_state.get(p["state"], 0) + 1
    return {"session": str(session.root), "frames": dict(session.counts),
            "n_frames": len(session.frames), "n_flags": len(session.flags),
            "n_proposals": len(session.proposals), "proposals_by_state": by_state,
            "n_decisions": len(session.decisions), "n_drift": len(session.drift),
            "events": dict(session.event_counts),
            "decisions": [{"id": d["id"], "proposal_id": d["proposal_id"],
                           "decision": d["decision"], "decided_by": d["decided_by"],
                           "decided_at": d["decided_at"],
                           "decided_at_text": fmt_time(d["decided_at"], t0)}
                          for d in session.decisions]}


def _done_summaries(session: SessionData, notes: list[str]) -> dict[str, dict]:
    """``summary.json`` of every done frame (meta and shape for the overview)."""
    out: dict[str, dict] = {}
    missing = 0
    for fid in session.done_ids():
        path = session.frame_dir(fid) / "summary.json"
        try:
            out[fid] = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as exc:
            missing += 1
            log.warning("%s: %s", path, exc)
    if missing:
        notes.append(f"{missing} done frame(s) have no readable summary.json; they are missing "
                     "from the overview")
    return out


def _time_axis(times, t0) -> tuple[list[float], str]:
    """Times since `t0` in seconds for a session shorter than 3 minutes, else minutes."""
    rel = [(float(t) - float(t0)) if t is not None and t0 is not None else float("nan")
           for t in times]
    finite = [r for r in rel if math.isfinite(r)]
    if finite and max(finite) >= 180.0:
        return [r / 60.0 for r in rel], "minutes since the session started"
    return rel, "seconds since the session started"


# ----------------------------------------------------------------- sections


def _summary_section(session: SessionData, t0) -> Section:
    c = session.counts
    rows = [["frames known", len(session.frames)]]
    rows += [[f"frames {state}", c.get(state, 0)] for state in c]
    rows += [["flags", len(session.flags)], ["proposals", len(session.proposals)]]
    states: dict[str, int] = {}
    for p in session.proposals:
        states[p["state"]] = states.get(p["state"], 0) + 1
    rows += [[f"proposals {s}", n] for s, n in sorted(states.items())]
    rows += [["decisions", len(session.decisions)], ["drift measurements", len(session.drift)]]
    rows += [[f"events published: {topic}", n] for topic, n in sorted(
        session.event_counts.items())]
    done = [f for f in session.frames if f.state == "done" and f.finished_at is not None]
    if done:
        lags = np.array([f.lag_s for f in done], float)
        rows.append(["median lag, complete on disk to done (s)", float(np.median(lags))])
        an = np.array([f.analyze_s for f in done if f.analyze_s is not None], float)
        if an.size:
            rows.append(["median analysis time per frame (s)", float(np.median(an))])
        span = max(f.finished_at for f in done) - min(f.complete_at for f in done)
        if span > 0:
            rows.append(["frames done per minute, whole session", len(done) / span * 60.0])
    table = Table("session-counts", "What the ledger holds", ["quantity", "value"], rows)
    quarantined = [[f.frame_id or "", f.path, f.reason or "", f.message or "",
                    fmt_time(f.finished_at, t0)] for f in session.frames
                   if f.state == "quarantined"]
    qt = Table("quarantined", "Frames set aside (quarantined) and why",
               ["frame", "path", "reason", "message", "when"], quarantined,
               empty_text="no frame was quarantined")
    paras = []
    if t0 is not None:
        paras.append(f"Session started {fmt_time(t0)} UTC (first frame found complete).")
    return Section("summary", "Session summary", paragraphs=paras, tables=[table, qt])


def _frame_geometry(summary: dict):
    meta = dict(summary.get("meta") or {})
    meta.setdefault("pixel_size_pm", summary.get("pixel_size_pm"))
    shape = summary.get("shape")
    if not shape or not meta.get("pixel_size_pm"):
        return None, None
    return meta, (int(shape[0]), int(shape[1]))


def _flag_stage_corners(flag: dict, summaries: dict[str, dict]):
    region_stage = payload_get(flag, "region_stage")
    if isinstance(region_stage, dict):
        c = stage_region_corners_nm(region_stage)
        if c is not None:
            return c
    summary = summaries.get(flag.get("frame_id"))
    if summary is None or not isinstance(flag.get("region"), dict):
        return None
    meta, shape = _frame_geometry(summary)
    if meta is None:
        return None
    return region_corners_nm(meta, shape, flag["region"])


def _overview_section(session: SessionData, summaries: dict[str, dict], figs: _Figures,
                      t0) -> Section:
    by_id = {f.frame_id: f for f in session.frames if f.frame_id}
    corners, when = [], []
    for fid, summary in summaries.items():
        meta, shape = _frame_geometry(summary)
        if meta is None:
            continue
        rec = by_id.get(fid)
        corners.append(frame_footprint_nm(meta, shape))
        when.append(rec.complete_at if rec else None)
    rel, time_label = _time_axis(when, t0)
    footprints = list(zip(corners, rel))
    flags = []
    unplaced = 0
    for f in session.flags:
        c = _flag_stage_corners(f, summaries)
        if c is None:
            unplaced += 1
        else:
            flags.append((c, f"#{f['id']}"))
    proposals = []
    for p in session.proposals:
        c = stage_region_corners_nm(p.get("region") or {})
        if c is None:
            unplaced += 1
        else:
            proposals.append((c, p["state"], str(p["id"])))
    fig = F.overview_figure(footprints, flags, proposals, time_label=time_label)
    caption = ("Every done frame's footprint on the specimen at its commanded stage position "
               "(sidecar stage_x_nm, stage_y_nm, scan rotation), coloured by when it was found "
               "complete; flag regions (vermillion, x at the centre) and proposed regions "
               "(accepted: solid, hatched, green; open: dashed; rejected or expired: dotted). "
               "Positions are not corrected for drift.")
    if unplaced:
        caption += f" {unplaced} flag(s) or proposal(s) have no usable region and are not drawn."
    refs = [figs.save(fig, "session-overview", caption)]
    d = session.drift
    rel, time_label = _time_axis([x["t"] for x in d], t0)
    fig = F.drift_figure(rel, [x["dx_nm"] for x in d], [x["dy_nm"] for x in d],
                         [np.nan if x.get("sigma_nm") is None else x["sigma_nm"] for x in d],
                         time_label=time_label)
    refs.append(figs.save(fig, "session-drift",
                          "Specimen drift d(t) relative to the session's first frame, in stage "
                          "coordinates, as recorded in the ledger (one-sigma error bars where "
                          "given)."))
    return Section("overview", "Session overview", figures=refs)


def _flags_section(session: SessionData, t0) -> Section:
    rows = []
    for f in session.flags:
        rows.append([f["id"], f.get("frame_id") or "", f.get("rule") or "", f.get("kind") or "",
                     f.get("score"), payload_get(f, "message", default=""),
                     fmt_time(f.get("created_at"), t0)])
    t = Table("flags", "Every flag raised by the rules", ["id", "frame", "rule", "kind", "score",
                                                          "message", "raised"], rows,
              empty_text="no flags were raised in this session")
    return Section("flags", "Flags", tables=[t])


def _proposals_section(session: SessionData, t0) -> Section:
    decided: dict[str, list[dict]] = {}
    for d in session.decisions:
        decided.setdefault(d["proposal_id"], []).append(d)
    rows = []
    for p in session.proposals:
        r = p.get("region") or {}
        ds = decided.get(p["id"], [])
        flag_ids = payload_get(p, "flag_ids", "flags", default=[])
        rows.append([str(p["id"]), p.get("frame_id") or "", p.get("score"), p["state"],
                     _num_or_blank(r.get("center_x_nm")), _num_or_blank(r.get("center_y_nm")),
                     _num_or_blank(r.get("width_nm")), _num_or_blank(r.get("height_nm")),
                     _num_or_blank(payload_get(p, "pixel_size_pm")),
                     _num_or_blank(payload_get(p, "dwell_time_us", "dwell_us")),
                     payload_get(p, "reason", "message", default=""),
                     ", ".join(str(x) for x in flag_ids) if isinstance(flag_ids, list)
                     else str(flag_ids),
                     fmt_time(p.get("created_at"), t0),
                     "; ".join(f"{d['decision']} by {d['decided_by']} at "
                               f"{fmt_time(d['decided_at'], t0)}" for d in ds)])
    t = Table("proposals", "Proposed scan regions (stage coordinates)",
              ["id", "frame", "score", "state", "centre x (nm)", "centre y (nm)", "width (nm)",
               "height (nm)", "pixel size (pm)", "dwell (µs)", "reason", "flags", "proposed",
               "decisions"], rows, empty_text="no proposals were made in this session")
    drows = [[d["id"], str(d["proposal_id"]), d["decision"], d["decided_by"], d.get("note") or "",
              fmt_time(d["decided_at"], t0)] for d in session.decisions]
    dt = Table("decisions", "Operator (and auto-accept) decisions, oldest first",
               ["id", "proposal", "decision", "by", "note", "decided"], drows,
               empty_text="no decisions were recorded")
    return Section("proposals", "Proposals and decisions", cautions=[SAFETY_CAUTION],
                   tables=[t, dt])


def _dose_section(session: SessionData, summaries: dict[str, dict], figs: _Figures) -> Section:
    """The cumulative dose map and each proposal's dose (livequant/report/dose.py)."""
    from livequant.report.dose import dose_map_figure, session_dose_map

    complete = {f.frame_id: f.complete_at for f in session.frames if f.frame_id}
    dm, info = session_dose_map(summaries, session.drift, complete_at=complete)
    budgets = [payload_get(p, "dose_budget_e_per_a2") for p in session.proposals]
    budget = next((b for b in budgets if b), None)
    fig = dose_map_figure(dm, session.proposals, budget_e_per_a2=budget)
    caption = (f"Cumulative electron dose of the {info['frames']} frame(s) with a beam current "
               "(sidecar beam_current_pa or frame_defaults.beam_current_pa) and dwell: I t / "
               "(e p²) per frame over its footprint, moved into specimen coordinates by the "
               "drift recorded for it; proposed regions drawn where they sit on the specimen. "
               "Probe tails and scan overshoot are not counted: a lower bound near frame "
               "edges, from nominal values.")
    if info["without_dose"]:
        caption += (f" {info['without_dose']} frame(s) had no beam current or dwell and are "
                    "not counted.")
    rows = [[str(p["id"]), p["state"], _num_or_blank(payload_get(p, "dose_e_per_a2")),
             _num_or_blank(payload_get(p, "dose_prior_max_e_per_a2")),
             _num_or_blank(payload_get(p, "dose_after_max_e_per_a2")),
             {True: "yes", False: "no"}.get(payload_get(p, "dose_budget_exceeded"), "-"),
             payload_get(p, "auto_accept_blocked", default="") or ""]
            for p in session.proposals]
    t = Table("proposal-doses", "Dose of each proposal (e/Å²; estimates from nominal current "
              "and dwell)", ["id", "state", "this scan", "most exposed part before",
                             "most exposed part after", "over budget", "not auto-accepted "
                             "because"], rows, empty_text="no proposals were made")
    paras = [f"Highest cumulative dose on the map: {dm.summary()['max_e_per_a2']:.3g} e/Å²; "
             f"one frame at most {info['max_frame_e_per_a2']:.3g} e/Å²."
             + (f" Dose budget set for proposals: {budget:.3g} e/Å²." if budget else
                " No dose budget was set (proposals.dose_budget_e_per_a2).")]
    return Section("dose", "Electron dose", paragraphs=paras, cautions=[
        "Dose limits are the operator's and the facility's to set; the numbers here are "
        "estimates from the nominal beam current and dwell, not a measurement, and the "
        "instrument's own readings and interlocks come first."], tables=[t],
        figures=[figs.save(fig, "session-dose", caption)])


def _num_or_blank(v):
    try:
        f = float(v)
    except (TypeError, ValueError):
        return ""
    return f if math.isfinite(f) else ""


# ----------------------------------------------------------------- per frame


def _frame_sections(fd: FrameData, session: SessionData, figs: _Figures, *,
                    smooth: float = DEFAULT_SMOOTH_CELLS) -> list[Section]:
    fid = fd.frame_id
    px = fd.pixel_size_pm
    rows, cols = fd.shape
    px_nm = px / 1000.0
    extent = (-0.5 * px_nm, (cols - 0.5) * px_nm, (rows - 0.5) * px_nm, -0.5 * px_nm)
    image = fd.image
    no_image = f" {fd.image_note}." if fd.image_note else ""
    slug = _slug(fid)
    info = fd.cells_info
    paras = []
    lat = fd.summary.get("lattice") or {}
    facts = [f"status {fd.summary.get('status')}", f"{fd.summary.get('n_columns', 0)} columns "
             f"({fd.summary.get('n_converged', 0)} converged)",
             f"{info.get('n_cells', 0)} cells", f"pixel size {px:g} pm",
             f"{rows} x {cols} px"]
    if lat.get("a_pm") is not None:
        facts.append(f"a = {plus_minus(lat['a_pm'], lat.get('sigma_a_pm'), 'pm')}, "
                     f"b = {plus_minus(lat.get('b_pm'), lat.get('sigma_b_pm'), 'pm')}")
    if fd.summary.get("median_sigma_position_pm") is not None:
        facts.append(f"median column σ {fd.summary['median_sigma_position_pm']:.2f} pm")
    paras.append("; ".join(facts) + ".")
    if fd.summary.get("message"):
        paras.append(f"Analysis message: {fd.summary['message']}")
    if fd.image_note:
        paras.append(fd.image_note[0].upper() + fd.image_note[1:] + ".")
    frame_flags = [f for f in session.flags if f.get("frame_id") == fid]
    regions = []
    for f in frame_flags:
        c = region_corners_px(f.get("region") or {})
        if c is not None:
            regions.append((c * px_nm, f"#{f['id']} {f.get('kind', '')}"))
    refs = []
    if fd.columns is not None:
        c = fd.columns
        fig = F.image_with_columns(image, extent, c["x_px"] * px_nm, c["y_px"] * px_nm,
                                   c["sublattice"], title=f"{fid}: fitted columns", regions=regions)
        refs.append(figs.save(fig, f"{slug}-columns",
                              f"Frame {fid} with every fitted column marked by sublattice"
                              f"{' and the flagged regions (dashed)' if regions else ''}; "
                              f"scale bar in nm.{no_image}"))
    sections = [Section(f"frame-{slug}", f"Frame {fid}", paragraphs=paras, figures=refs)]
    cells = fd.cells
    if cells is None:
        sections[0].paragraphs.append("No unit cells in this frame: no descriptor maps.")
        return sections
    grid = cell_grid(cells)
    cx, cy = cells["x_pm"] / 1000.0, cells["y_pm"] / 1000.0
    if np.isfinite(cells.get("dx_pm", np.array([np.nan]))).any():
        fig = F.displacement_arrows(image, extent, cx, cy, cells["dx_pm"], cells["dy_pm"],
                                    title=f"{fid}: B-site displacement")
        refs.append(figs.save(fig, f"{slug}-displacement",
                              "B-site displacement of every cell from the centre of its four A "
                              "corners, as arrows (lengths exaggerated, true scale on the key "
                              "arrow), coloured by direction on a cyclic map." + no_image))
    if grid is None:
        sections[0].paragraphs.append("Too few cells on a 2D grid for maps.")
        return sections
    pol = info.get("polarization") or {}
    sm = float(smooth)
    sm_title = f"Gaussian σ = {sm:g} cell{'s' if sm != 1 else ''}"
    sm_note = (f" Beside each raw map, the same quantity smoothed with a Gaussian of σ = {sm:g} "
               f"cell{'s' if sm != 1 else ''} over the cell grid (a normalised average over "
               "the cells present, so holes and the frame's edge do not bias it; noise per cell "
               f"drops about {max(1.0, 2 * math.sqrt(math.pi) * sm):.1f}-fold, features "
               f"narrower than about {2 * sm:g} cells are blurred). Each map has its own colour "
               "range." if sm > 0 else "")

    def smoothed(v):
        return smooth_cell_values(grid, v, sm)

    if np.isfinite(cells.get("pol_x_C_per_m2", np.array([np.nan]))).any():
        px_, py_ = cells["pol_x_C_per_m2"], cells["pol_y_C_per_m2"]
        name, unit, what = "P", "C/m²", (
            f"Polarization estimate ({pol.get('label', 'from the B-site displacement')}"
            f"{', ' + str(pol.get('material')) if pol.get('material') else ''})")
    else:
        px_, py_ = cells["dx_pm"], cells["dy_pm"]
        name, unit, what = "d", "pm", (
            "No polarization estimate (" + str(pol.get("reason") or "not computed") +
            "); the B-site displacement magnitude and direction are shown instead")
    mag = np.hypot(px_, py_)
    ang = np.degrees(np.arctan2(py_, px_)) % 360
    panels = [F.MapPanel(f"|{name}|", mag, kind="magnitude", unit=f"|{name}| ({unit})")]
    if sm > 0:
        spx, spy = smoothed(px_), smoothed(py_)
        panels.append(F.MapPanel(f"|{name}|, {sm_title}", np.hypot(spx, spy),
                                 kind="magnitude", unit=f"|{name}| ({unit})"))
    panels.append(F.MapPanel(f"direction of {name}", ang, kind="angle",
                             unit=f"atan2({name}y, {name}x) (deg)"))
    if sm > 0:
        panels.append(F.MapPanel(f"direction, {sm_title}", np.degrees(np.arctan2(spy, spx)) % 360,
                                 kind="angle", unit=f"atan2({name}y, {name}x) (deg)"))
    polygons = grid.cell_polygons(cx, cy)
    fig = F.cell_maps(polygons, panels, extent_nm=extent, image=image,
                      title=f"{fid}: polarization" if name == "P" else f"{fid}: displacement")
    refs.append(figs.save(fig, f"{slug}-polarization",
                          f"{what}: magnitude (viridis) and direction (constant-lightness "
                          "cyclic map; x = image columns, y = image rows pointing down, angles "
                          "from +x towards +y)." + (" The smoothed maps average the vector, "
                          "so |P| is the magnitude of the local mean polarization." if sm > 0
                                                    else "") + sm_note + no_image))
    strain_panels = []
    for key, label in (("exx", "εxx"), ("eyy", "εyy"), ("exy", "εxy")):
        strain_panels.append(F.MapPanel(label, cells[key], kind="signed",
                                        unit=f"{label} (%)", scale=100.0))
    if sm > 0:
        for key, label in (("exx", "εxx"), ("eyy", "εyy"), ("exy", "εxy")):
            strain_panels.append(F.MapPanel(f"{label}, {sm_title}", smoothed(cells[key]),
                                            kind="signed", unit=f"{label} (%)", scale=100.0))
    strain_panels += [F.MapPanel("lattice rotation", cells["rotation_deg"],
                                 kind="signed", unit="rotation (deg)"),
                      F.MapPanel("tetragonality c/a", cells["c_over_a"],
                                 kind="secondary", unit="max(a, b) / min(a, b)")]
    tilt_measured = np.isfinite(cells.get("tilt_deg", np.array([np.nan]))).any()
    if tilt_measured:
        strain_panels.append(F.MapPanel("octahedral tilt", cells["tilt_deg"],
                                        kind="signed", unit="tilt (deg)"))
    ref = (info.get("reference") or {}).get("description", "the frame's median cell")
    fig = F.cell_maps(polygons, strain_panels, extent_nm=extent, image=None,
                      title=f"{fid}: strain and lattice", ncols=3)
    tilt_note = "" if tilt_measured else (" Octahedral tilt not measured: " +
                                          str((info.get("tilt") or {}).get("reason", "")) + ".")
    refs.append(figs.save(fig, f"{slug}-strain",
                          f"Strain components from the column positions against {ref} "
                          "(diverging map centred on zero, range at the 99th percentile of "
                          "|value|), local lattice rotation, tetragonality" +
                          (" and octahedral tilt." if tilt_measured else ".") + tilt_note +
                          sm_note))
    wall, accepted = info.get("wall"), True
    if not wall and info.get("wall_candidate"):
        wall, accepted = info["wall_candidate"], False
    if wall:
        prof = wall_profile(cells, wall, accepted=accepted)
        if prof is not None and prof.s_nm.size:
            fig = F.wall_profile_figure(prof.s_nm, prof.p_pm, prof.sigma_p_pm, prof.fit,
                                        title=f"{fid}: domain wall", accepted=accepted)
            refs.append(figs.save(fig, f"{slug}-wall",
                                  "Each cell's displacement component along the polar axis "
                                  "against its distance from the fitted wall, with the "
                                  "Landau-Ginzburg profile P0 tanh(s / w) (w = √2 ξ, ξ = "
                                  "sqrt(g / |α|); the text box gives the fitted parameters "
                                  "with their one-sigma errors). " + ("" if accepted else
                                  "This fit was rejected as the frame's wall (reason in the "
                                  "title) and is shown as a candidate only.")))
    topo = info.get("topology") or {}
    if np.isfinite(cells.get("dx_pm", np.array([np.nan]))).any():
        min_snr = float(topo.get("min_snr") or 3.0)
        w = winding_map(grid, cells, min_snr=min_snr)
        cores = list(topo.get("cores") or [])
        # Cores flagged by the rules (larger, smoothed loops) are marked too, with
        # "flagged" in their legend entry.
        flagged = []
        for f in frame_flags:
            reg = f.get("region") or {}
            if f.get("kind") in ("vortex", "antivortex") and "x_px" in reg and "y_px" in reg:
                try:
                    flagged.append({"x_pm": float(reg["x_px"]) * px, "y_pm": float(reg["y_px"]) * px,
                                    "kind": f"{f['kind']} (flagged)"})
                except (TypeError, ValueError):
                    continue
        note = (f"cells count where |d| / σ(|d|) ≥ {min_snr:g}\n{len(cores)} core(s) from the "
                f"analysis, {len(flagged)} flagged by the rules"
                + (" (list truncated)" if topo.get("cores_truncated") else ""))
        cores += flagged
        fig = F.winding_figure(w.ravel(), grid.plaquette_polygons(), cores, extent_nm=extent,
                               image=image, min_snr=min_snr,
                               title=f"{fid}: winding numbers", note=note)
        wr = w.ravel()
        fin = np.isfinite(wr)
        why = F.winding_explanation(wr.size, int(fin.sum()), int((fin & (wr != 0)).sum()),
                                    min_snr=min_snr, n_flagged=len(flagged))
        if why:
            sections[0].paragraphs.append(f"Winding map of {fid}: {why}")
        refs.append(figs.save(fig, f"{slug}-winding",
                              "Winding number of the displacement field on every plaquette of "
                              "four cells (+1 for vortices of either circulation, sources and "
                              "sinks; -1 for antivortices, i.e. saddles), with the cores the "
                              "analysis reported and those the rules flagged (winding on "
                              "larger, smoothed loops)."
                              + no_image))
    return sections


# ----------------------------------------------------------------- session-wide


def _histogram_section(session: SessionData, figs: _Figures, max_frames: int, *,
                       loaded: dict | None = None) -> Section:
    done = session.done_ids()
    if len(done) > max_frames:
        idx = np.unique(np.linspace(0, len(done) - 1, max_frames).round().astype(int))
        picked = [done[k] for k in idx]
    else:
        picked = done
    values: dict[str, list[np.ndarray]] = {name: [] for name, *_ in _HIST_FIELDS}
    pol: list[np.ndarray] = []
    unread = 0
    loaded = loaded or {}
    for fid in picked:
        cells = loaded.get(fid)   # the frames drawn in full are read already
        if cells is None:
            path = session.frame_dir(fid) / "cells.csv"
            if not path.exists():
                continue
            try:
                cells = read_cells_csv(path)
            except (OSError, ValueError) as exc:
                unread += 1
                log.warning("%s", exc)
                continue
        for name in values:
            if name in cells:
                values[name].append(cells[name])
        if "pol_x_C_per_m2" in cells:
            pol.append(np.hypot(cells["pol_x_C_per_m2"], cells["pol_y_C_per_m2"]))
    series = []
    for name, label, unit, scale in _HIST_FIELDS:
        v = np.concatenate(values[name]) * scale if values[name] else np.zeros(0)
        if np.isfinite(v).any():
            series.append((label, v, unit))
    p = np.concatenate(pol) if pol else np.zeros(0)
    if np.isfinite(p).any():
        series.insert(1, ("polarization |P|", p, "C/m²"))
    paras = [f"Cells of {len(picked)} of {len(done)} done frame(s)"
             + (" (evenly spread over the session)" if len(picked) < len(done) else "") + "."]
    if unread:
        paras.append(f"{unread} cells.csv file(s) could not be read.")
    if not series:
        paras.append("No cell descriptors in this session.")
        return Section("histograms", "Descriptors across the session", paragraphs=paras)
    fig = F.histograms_figure(series, title="Per-cell descriptors across the session")
    ref = figs.save(fig, "session-histograms",
                    "Histograms of the per-cell descriptors over the frames named above "
                    "(the 0.5 and 99.5 percentiles bound each range; dashed: the median).")
    return Section("histograms", "Descriptors across the session", paragraphs=paras,
                   figures=[ref])


def _fit_quality_section(frame_data: list[FrameData], figs: _Figures, gain: float) -> Section:
    sig, bound, chi2, sub = [], [], [], []
    rows = []
    for fd in frame_data:
        c = fd.columns
        if c is None:
            continue
        crlb, g_eff = column_crlb_pm(c, pixel_size_pm=fd.pixel_size_pm, gain=gain)
        s = np.sqrt((np.asarray(c["sigma_x_pm"]) ** 2 + np.asarray(c["sigma_y_pm"]) ** 2) / 2)
        sig.append(s)
        bound.append(crlb)
        chi2.append(np.asarray(c["reduced_chi2"], float))
        sub.append(np.asarray(c["sublattice"]).astype(str))
        ok = np.isfinite(s) & np.isfinite(crlb) & (crlb > 0)
        rows.append([fd.frame_id, int(len(s)), int(ok.sum()),
                     float(np.median(s[ok])) if ok.any() else float("nan"),
                     float(np.median(crlb[ok])) if ok.any() else float("nan"),
                     float(np.median(s[ok] / crlb[ok])) if ok.any() else float("nan"),
                     float(np.nanmedian(c["reduced_chi2"])) if np.isfinite(
                         c["reduced_chi2"]).any() else float("nan"), g_eff])
    paras = ["Position uncertainty of each converged column (σ per coordinate, the root mean "
             "square of σx and σy) against the Cramér-Rao bound in the closed form of Thompson, "
             "Larson & Webb, Biophys. J. 82, 2775 (2002): σ² = s_a²/N + 8π s⁴ b²/(a² N²), with N "
             "the electrons in the fitted Gaussian, b² the fitted background per pixel (both "
             "divided by the effective gain), s the fitted width and a the pixel size. The "
             "fitter also frees the widths and the background, so a healthy fit sits a little "
             "above the bound (about 1 to 1.35 times); much more points at a model that does "
             "not describe the columns (overlap, scan noise, drift).",
             f"Configured gain {gain:g} counts per electron; the effective gain multiplies it by "
             "the frame's median reduced χ², as the fitter does for its uncertainties."]
    t = Table("fit-quality", "Fit quality per frame drawn in full",
              ["frame", "columns", "with bound", "median σ (pm)", "median bound (pm)",
               "median σ / bound", "median reduced χ²", "effective gain"], rows,
              empty_text="no frame with columns was drawn")
    if not sig:
        return Section("fit-quality", "Fit quality", paragraphs=paras, tables=[t])
    fig = F.fit_quality_figure(np.concatenate(sig), np.concatenate(bound), np.concatenate(chi2),
                               np.concatenate(sub))
    ref = figs.save(fig, "session-fit-quality",
                    "Left: fitted position σ against the Thompson bound, per column and "
                    "sublattice (line: equality). Middle: their ratio. Right: reduced χ² of every "
                    "column's fit window (about 1 for a model that describes the data).")
    return Section("fit-quality", "Fit quality", paragraphs=paras, tables=[t], figures=[ref])


def _throughput_section(session: SessionData, figs: _Figures, t0) -> Section:
    done = [f for f in session.frames if f.state == "done" and f.finished_at is not None]
    fig = F.throughput_figure([f.finished_at - t0 for f in done],
                              [f.lag_s for f in done],
                              [np.nan if f.analyze_s is None else f.analyze_s for f in done])
    ref = figs.save(fig, "session-throughput",
                    "Left: frames finished per minute over the session. Right: each frame's lag "
                    "from being complete on disk to its outputs being written, and the time its "
                    "analysis took in the worker.")
    return Section("throughput", "Throughput and lag", figures=[ref])


# ----------------------------------------------------------------- the page's order

#: Sections before the frames drawn in full, then after them: ``(progress label,
#: builder(ctx) -> list of Section)``.  To add a section to the report, append a
#: builder here (it runs as one progress step).
SECTIONS_BEFORE_FRAMES: list[tuple[str, Callable[[ReportContext], list[Section]]]] = [
    ("session tables", lambda c: [_summary_section(c.session, c.t0)]),
    ("overview and drift", lambda c: [_overview_section(c.session, c.summaries, c.figs, c.t0)]),
    ("flags", lambda c: [_flags_section(c.session, c.t0)]),
    ("proposals", lambda c: [_proposals_section(c.session, c.t0)]),
    ("electron dose", lambda c: [_dose_section(c.session, c.summaries, c.figs)]),
]
SECTIONS_AFTER_FRAMES: list[tuple[str, Callable[[ReportContext], list[Section]]]] = [
    ("histograms", lambda c: [_histogram_section(
        c.session, c.figs, c.histogram_frames,
        loaded={fd.frame_id: fd.cells for fd in c.frame_data})]),
    ("fit quality", lambda c: [_fit_quality_section(c.frame_data, c.figs, c.gain)]),
    ("wall physics", lambda c: physics_sections(c.session, c.summaries, c.figs, c.t0)),
    ("throughput", lambda c: [_throughput_section(c.session, c.figs, c.t0)]),
    ("series", lambda c: _series_sections(c)),
]


def _series_sections(ctx: ReportContext) -> list[Section]:
    """Precision against the number of frames averaged, for sessions with series."""
    from livequant.report.series import series_section

    section = series_section(ctx.session.root, ctx.figs.save)
    return [] if section is None else [section]
