"""Report sections of wall physics: G-L table with CIs, session means, B(L), wall tracks.

Reads only what the session wrote: each done frame's ``summary.json`` (its
``physics`` block and wall fit), the ledger's drift rows and flags.  Wall
tracks are rebuilt here from the summaries with the drift the daemon
measured for each frame (:mod:`livequant.proposals.tracks`), so the report
does not depend on the daemon's memory.  Figures follow the house style of
:mod:`livequant.report.figures` (Figure objects, no pyplot; Okabe-Ito colours
with distinct markers).

Confidence intervals in the table are ``value +- 1.96 sigma`` (normal
approximation of the fits' first-order sigmas; the coverage of those sigmas
is tested in tests/analysis/test_wall_coverage.py); the roughness exponent's
interval is its bootstrap interval.
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
from matplotlib.figure import Figure

from livequant.analysis.combine import weighted_mean
from livequant.analysis.roughness import fit_roughness
from livequant.proposals.drift import frame_times_s
from livequant.proposals.geometry import FrameGeometry
from livequant.proposals.tracks import FeatureTracker, frame_features
from livequant.report.figures import OKABE_ITO
from livequant.report.page import Section, Table

__all__ = ["physics_sections", "wall_tracks_from_summaries", "roughness_figure",
           "wall_track_figure"]

_Z95 = 1.959964


def _f(v, digits=3):
    if v is None or not (isinstance(v, (int, float)) and math.isfinite(v)):
        return ""
    return f"{v:.{digits}g}"


def _ci(v, s, scale=1.0, digits=3):
    if v is None or s is None or not math.isfinite(v) or not math.isfinite(s):
        return ""
    return f"[{_f((v - _Z95 * s) * scale, digits)}, {_f((v + _Z95 * s) * scale, digits)}]"


def _pm(v, s, scale=1.0, digits=3):
    if v is None:
        return ""
    return f"{_f(v * scale, digits)} ± {_f(s * scale, 2)}" if s is not None else \
        _f(v * scale, digits)


def wall_tracks_from_summaries(summaries: dict[str, dict], drift_rows: list[dict]):
    """Rebuild the wall tracks of a session from its summaries and measured drift.

    Parameters
    ----------
    summaries : dict of frame id -> summary.json content
    drift_rows : list of dict
        The ledger's drift rows (``frame_id``, ``t``, ``dx_nm``, ``dy_nm``, ``sigma_nm``);
        a frame without one gets the drift interpolated in time between the measured
        frames (said in the notes).

    Returns
    -------
    tracker : FeatureTracker
    frame_track : dict of frame id -> wall track id
    notes : list of str
    """
    drift = {r["frame_id"]: r for r in drift_rows if r.get("frame_id")}
    tracker = FeatureTracker()
    frame_track: dict[str, str] = {}
    items = []
    for fid, s in summaries.items():
        meta = s.get("meta") or {}
        shape = s.get("shape")
        if not shape or not ((s.get("cells") or {}).get("wall")):
            continue
        start, dur = frame_times_s(SimpleNamespace(**meta), tuple(shape))
        if start is None:
            continue
        items.append((start + dur / 2, fid, s, meta, shape))
    rows_t = sorted((r["t"], r["dx_nm"], r["dy_nm"], r["sigma_nm"] or 0.0) for r in drift_rows
                    if r.get("t") is not None and r.get("dx_nm") is not None)
    known_t = np.array([r[0] for r in rows_t])
    known_x = np.array([r[1] for r in rows_t])
    known_y = np.array([r[2] for r in rows_t])
    known_s = np.array([r[3] for r in rows_t])
    no_drift = 0
    for t_mid, fid, s, meta, shape in sorted(items, key=lambda x: x[0]):
        geom = FrameGeometry(center_x_nm=float(meta.get("stage_x_nm") or 0.0),
                             center_y_nm=float(meta.get("stage_y_nm") or 0.0),
                             pixel_size_nm=float(s.get("pixel_size_pm")) / 1000.0,
                             rotation_deg=float(meta.get("scan_rotation_deg") or 0.0),
                             shape=tuple(shape))
        row = drift.get(fid)
        if row is None and len(known_t) >= 2:
            # Not registered itself (no overlap with a kept frame): the drift between the
            # measured frames, interpolated in time (held constant beyond them).
            no_drift += 1
            d = np.array([np.interp(t_mid, known_t, known_x), np.interp(t_mid, known_t, known_y)])
            sd = float(np.max(known_s)) if len(known_s) else 0.0
        elif row is None:
            no_drift += 1
            d, sd = np.zeros(2), 0.0
        else:
            d, sd = np.array([row["dx_nm"], row["dy_nm"]], float), float(row["sigma_nm"] or 0.0)
        view = SimpleNamespace(summary=s, frame_id=fid, pixel_size_pm=s.get("pixel_size_pm"))
        rep = frame_features(view, geom, t_mid, d, sd, cores_px=[])
        out = tracker.observe(fid, t_mid, {"center_x_nm": 0.0, "center_y_nm": 0.0,
                                           "width_nm": 0.0, "height_nm": 0.0},
                              walls=rep["walls"])
        for tid in out["walls"]:
            frame_track[fid] = tid
    notes = []
    if no_drift:
        notes.append(f"{no_drift} frame(s) with a wall had no drift measurement of their "
                     "own: their drift is interpolated between measured frames (or zero when "
                     "fewer than two were measured)")
    return tracker, frame_track, notes


def roughness_figure(result, lines_count: int) -> Figure:
    """``B(L)`` (noise floor subtracted) on log-log axes with the fitted power law."""
    fig = Figure(figsize=(6.0, 4.2), layout="constrained")
    ax = fig.add_subplot()
    lag, b, n = result.lag, result.b_pm2, result.n_pairs
    ok = np.isfinite(b) & (b > 0)
    # Standard error of a mean of n squared differences (as independent): B sqrt(2 / n).
    se = np.where(n > 0, np.abs(b) * np.sqrt(2.0 / np.maximum(n, 1)), 0.0)
    ax.errorbar(lag[ok], b[ok], yerr=se[ok], fmt="o", color=OKABE_ITO[5], ms=4,
                label=f"B(L), {lines_count} wall line(s)")
    sel = (lag >= result.l_min) & (lag <= result.l_max)
    ax.plot(lag[sel], result.amplitude_pm2 * lag[sel] ** (2 * result.zeta), color=OKABE_ITO[6],
            lw=2, ls="--", label=f"fit: ζ = {result.zeta:.2f} "
                                 f"[{result.ci_low:.2f}, {result.ci_high:.2f}]")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("L (cell rows along the wall)")
    ax.set_ylabel("B(L) = <[u(z+L) - u(z)]²> (pm²)")
    ax.set_title(f"Wall roughness; {int(result.ci_level * 100)} % interval: {result.method}",
                 fontsize=9)
    ax.legend(fontsize=8)
    return fig


def wall_track_figure(track: dict, t0: float | None) -> Figure:
    """Position along the wall normal against time, with the weighted straight-line fit."""
    t = np.asarray(track["t_s"], float) - (t0 or 0.0)
    s = np.asarray(track["s_nm"], float)
    sig = np.asarray(track["sigma_s_nm"], float)
    fig = Figure(figsize=(6.0, 3.8), layout="constrained")
    ax = fig.add_subplot()
    ax.errorbar(t, s, yerr=sig, fmt="s", color=OKABE_ITO[5], ms=4, label="wall position")
    v, sv = track.get("velocity_nm_per_s"), track.get("sigma_velocity_nm_per_s")
    if v is not None:
        w = 1.0 / sig**2
        tm, sm = np.sum(w * t) / np.sum(w), np.sum(w * s) / np.sum(w)
        xs = np.linspace(t.min(), t.max(), 50)
        ax.plot(xs, sm + v * (xs - tm), color=OKABE_ITO[6], lw=1.5, ls="--",
                label=f"v = {1000 * v:.1f} ± {1000 * sv:.1f} pm/s")
    ax.set_xlabel("time since the session started (s)")
    ax.set_ylabel("position along the wall normal (nm)")
    ax.set_title(f"wall track {track['track_id']} ({len(t)} frames; drift removed)",
                 fontsize=9)
    ax.legend(fontsize=8)
    return fig


def _gl_rows(summaries, frame_track):
    rows, lines, sigmas = [], [], []
    for fid, s in summaries.items():
        ph = s.get("physics") or {}
        w = ph.get("wall")
        if not w:
            continue
        gl = ph.get("gl") or {}
        r = ph.get("roughness") or {}
        line = ph.get("line") or {}
        if line.get("u_pm"):
            u = np.array([np.nan if v is None else v for v in line["u_pm"]], float)
            su = np.array([np.nan if v is None else v for v in line.get("sigma_u_pm", [])],
                          float)
            if u.size and su.size == u.size:
                lines.append(u)
                sigmas.append(su)
        rows.append([
            fid, frame_track.get(fid, ""),
            _pm(w.get("width"), w.get("sigma_width")), _ci(w.get("width"), w.get("sigma_width")),
            _pm(w.get("p0"), w.get("sigma_p0")),
            _pm(w.get("p0_C_per_m2"), w.get("sigma_p0_C_per_m2")),
            _pm(w.get("asymmetry"), w.get("sigma_asymmetry")),
            _pm(gl.get("g_m3_per_F"), gl.get("sigma_g_m3_per_F")),
            _pm(gl.get("energy_J_per_m2"), gl.get("sigma_energy_J_per_m2"), 1000.0),
            _ci(gl.get("energy_J_per_m2"), gl.get("sigma_energy_J_per_m2"), 1000.0),
            (f"{r['zeta']:.2f} [{r['ci_low']:.2f}, {r['ci_high']:.2f}]" if r.get("zeta")
             is not None else (ph.get("roughness_reason") or "")[:60])])
    return rows, lines, sigmas


_MEANS = (("width", "sigma_width", "wall", "half-width w (pm)", 1.0),
          ("p0", "sigma_p0", "wall", "P0 (pm)", 1.0),
          ("asymmetry", "sigma_asymmetry", "wall", "|P+| - |P-| (pm)", 1.0),
          ("g_m3_per_F", "sigma_g_m3_per_F", "gl", "g (m³/F)", 1.0),
          ("energy_J_per_m2", "sigma_energy_J_per_m2", "gl", "wall energy (mJ/m²)", 1000.0))


def _session_means(summaries, frame_track):
    groups: dict[str, list[dict]] = {}
    for fid, s in summaries.items():
        ph = s.get("physics") or {}
        if not ph.get("wall"):
            continue
        key = frame_track.get(fid) or f"material {(s.get('cells') or {}).get('material')}"
        groups.setdefault(key, []).append(ph)
    rows = []
    for key, phs in sorted(groups.items()):
        for name, sname, block, label, scale in _MEANS:
            vals = [(p.get(block) or {}).get(name) for p in phs]
            sigs = [(p.get(block) or {}).get(sname) for p in phs]
            pairs = [(v, s) for v, s in zip(vals, sigs) if v is not None and s is not None]
            if not pairs:
                continue
            try:
                m = weighted_mean([v for v, _ in pairs], [s for _, s in pairs])
            except ValueError:
                continue
            rows.append([key, label, m.n, _pm(m.mean, m.sigma, scale),
                         _f(m.chi2 / m.dof, 3) if m.dof else "", _f(m.p_value, 2),
                         "yes" if m.consistent else "no",
                         _pm(m.mean, m.sigma_scaled, scale)])
    return rows


def physics_sections(session, summaries: dict[str, dict], figs, t0) -> list[Section]:
    """The wall-physics sections of the report (empty list when no frame had a wall)."""
    tracker, frame_track, notes = wall_tracks_from_summaries(summaries, session.drift)
    rows, lines, sigmas = _gl_rows(summaries, frame_track)
    if not rows:
        return []
    paras = ["Per frame with a fitted wall: the tanh half-width w (w = √2 ξ) and plateau P0 "
             "with their sigmas and 95 % intervals (± 1.96 σ), the plateau asymmetry "
             "|P+| - |P-| (a built-in field favours the larger plateau), the gradient "
             "coefficient g and the wall energy from w and the material's Landau coefficients "
             "(convention and approximation: docs/wall-physics.md), and the roughness "
             "exponent ζ with its bootstrap interval. The Landau coefficients' own "
             "uncertainty is not propagated."] + notes
    table = Table("gl-table", "Ginzburg-Landau parameters per frame",
                  ["frame", "track", "w (pm)", "w 95 % CI", "P0 (pm)", "P0 (C/m²)",
                   "|P+|-|P-| (pm)", "g (m³/F)", "energy (mJ/m²)", "energy 95 % CI", "ζ [CI]"],
                  rows)
    means = Table("gl-session", "Session-level weighted means (same wall track, else same "
                  "material) with the chi-square consistency test (p < 0.01: the frames "
                  "disagree beyond their sigmas; the scaled sigma multiplies by √(χ²/dof))",
                  ["group", "quantity", "frames", "weighted mean", "χ²/dof", "p",
                   "consistent", "mean (scaled σ)"], _session_means(summaries, frame_track))
    sections = [Section("wall-physics", "Wall physics (Ginzburg-Landau)", paragraphs=paras,
                        tables=[table, means])]
    refs = []
    usable = [(u, s) for u, s in zip(lines, sigmas) if np.isfinite(u).sum() >= 8]
    rough_paras = ["Roughness: B(L) = <[u(z+L) - u(z)]²> of the wall position u per cell row, "
                   "noise floor 2<σ_u²> subtracted, fitted as B ∝ L^(2ζ) over the stated range "
                   "(method of Paruch, Giamarchi & Triscone, Phys. Rev. Lett. 94, 197601 "
                   "(2005)). Pooled over all frames' walls: an interval from resampling whole "
                   "lines when there are four or more."]
    if usable:
        try:
            res = fit_roughness([u for u, _ in usable], [s for _, s in usable], n_boot=200)
            refs.append(figs.save(roughness_figure(res, len(usable)), "wall-roughness",
                                  f"B(L) pooled over {len(usable)} wall line(s) with the "
                                  f"power-law fit: ζ = {res.zeta:.2f} ± {res.sigma_zeta:.2f}"))
        except ValueError as exc:
            rough_paras.append(f"No session roughness exponent: {exc}.")
    else:
        rough_paras.append("No wall line long enough (8 rows) for B(L).")
    sections.append(Section("wall-roughness", "Wall roughness", paragraphs=rough_paras,
                            figures=refs))
    track_refs, track_rows = [], []
    for tr in tracker.walls:
        js = tr.to_json()
        v, sv = js.get("velocity_nm_per_s"), js.get("sigma_velocity_nm_per_s")
        track_rows.append([js["track_id"], js["n"], ", ".join(js["frames"][:6]) +
                           (" ..." if js["n"] > 6 else ""),
                           _pm(js["displacement_nm"], js["sigma_displacement_nm"]),
                           "" if v is None else _pm(v, sv, 1000.0),
                           "" if v is None else _ci(v, sv, 1000.0)])
        if js["n"] >= 2:
            track_refs.append(figs.save(wall_track_figure(js, t0), f"wall-track-{js['track_id']}",
                                        f"Wall track {js['track_id']}: position along its "
                                        "normal against time (specimen coordinates)"))
    core_rows = [[f.get("frame_id"), f.get("kind"), (f.get("payload") or {}).get("message", "")]
                 for f in session.flags if f.get("kind") in ("core-appeared", "core-vanished",
                                                               "wall-moved")]
    sections.append(Section(
        "wall-tracks", "Features tracked over time", paragraphs=[
            "Walls linked across frames in specimen coordinates (stage position minus the "
            "drift measured for each frame); velocity from a weighted straight-line fit, its "
            "sigma scaled by √(χ²/dof) when that exceeds 1."],
        tables=[Table("wall-tracks", "Wall tracks", ["track", "frames", "frame ids",
                                                      "displacement (nm)", "velocity (pm/s)",
                                                      "velocity 95 % CI"], track_rows),
                Table("track-flags", "Moved walls, appeared and vanished cores (flags)",
                      ["frame", "kind", "message"], core_rows)],
        figures=track_refs))
    return sections
