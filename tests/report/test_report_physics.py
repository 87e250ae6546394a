"""Report sections of wall physics (livequant.report.physics) on synthetic summaries.

Truth: six frames of one wall moving at 20 pm/s along +x on a stage that drifts at
(5, 0) pm/s, with the drift rows the daemon would have written; wall lines are random walks
(zeta = 1/2, CHECK-VALUES section 12).  The rebuilt track must give the wall's own velocity
(drift removed) within 2 sigma; tables and figures must be written.
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from types import SimpleNamespace

import numpy as np

from livequant.report.build import _Figures
from livequant.report.page import render_page
from livequant.report.physics import physics_sections, wall_tracks_from_summaries

T0 = datetime(2026, 12, 3, 9, 0, 0, tzinfo=timezone.utc)
PX_PM = 10.0


def _summaries(rng):
    out, drift = {}, []
    for k in range(6):
        t = 20.0 * k
        fid = f"f{k}"
        d = np.array([0.005 * t, 0.0])        # specimen offset on the stage, nm
        x_spec = 0.02 * t                      # the wall in the specimen, nm
        x_stage = x_spec + d[0]
        x_px = 255.5 + x_stage / (PX_PM / 1000.0) + rng.normal(0, 0.5)
        u = np.cumsum(rng.normal(0, 8.0, 40))
        wall = {"x_pm": x_px * PX_PM, "y_pm": 2555.0, "normal_deg": 0.0, "sigma_x0": 5.0,
                "width": 400.0 + rng.normal(0, 10.0), "sigma_width": 10.0, "p0": 17.0,
                "sigma_p0": 0.2, "asymmetry": 0.0, "sigma_asymmetry": 0.3}
        out[fid] = {
            "frame_id": fid, "shape": [512, 512], "pixel_size_pm": PX_PM,
            "meta": {"stage_x_nm": 0.0, "stage_y_nm": 0.0, "scan_rotation_deg": 0.0,
                     "pixel_size_pm": PX_PM, "dwell_time_us": 2.0,
                     "acquired_at": (T0 + timedelta(seconds=t)).isoformat(), "extra": {}},
            "cells": {"wall": wall, "material": "PbTiO3"},
            "physics": {"wall": wall,
                        "gl": {"g_m3_per_F": 4e-11, "sigma_g_m3_per_F": 2e-12,
                               "energy_J_per_m2": 0.08, "sigma_energy_J_per_m2": 0.002},
                        "roughness": None, "roughness_reason": "test",
                        "line": {"u_pm": u.tolist(), "sigma_u_pm": [1.0] * 40}}}
        drift.append({"frame_id": fid, "t": (T0 + timedelta(seconds=t)).timestamp(),
                      "dx_nm": d[0], "dy_nm": d[1], "sigma_nm": 0.01})
    return out, drift


def test_rebuilt_track_removes_the_drift():
    summaries, drift = _summaries(np.random.default_rng(4))
    tracker, frame_track, notes = wall_tracks_from_summaries(summaries, drift)
    assert len(tracker.walls) == 1 and not notes
    v = tracker.walls[0].velocity()
    # The normal points along +x: the wall's specimen velocity is +0.02 nm/s.
    assert abs(v["velocity_nm_per_s"] - 0.02) <= 2 * v["sigma_velocity_nm_per_s"]
    assert set(frame_track) == set(summaries)


def test_sections_tables_and_figures(tmp_path):
    summaries, drift = _summaries(np.random.default_rng(5))
    flags = [{"frame_id": "f4", "kind": "wall-moved", "payload": {"message": "moved"}}]
    session = SimpleNamespace(drift=drift, flags=flags)
    figs = _Figures(tmp_path)
    secs = physics_sections(session, summaries, figs, T0.timestamp())
    ids = [s.section_id for s in secs]
    assert ids == ["wall-physics", "wall-roughness", "wall-tracks"]
    gl, means = secs[0].tables
    assert len(gl.rows) == 6 and gl.rows[0][3].startswith("[")
    width_mean = [r for r in means.rows if r[1].startswith("half-width")][0]
    assert width_mean[2] == 6 and width_mean[6] == "yes"      # consistent widths
    assert secs[1].figures and (tmp_path / secs[1].figures[0].src).exists()
    assert secs[2].figures and secs[2].tables[1].rows[0][1] == "wall-moved"
    html = render_page("t", [], secs)
    assert "Paruch" in html and "gl-session" in html
    assert physics_sections(session, {}, figs, None) == []


def test_a_frame_without_its_own_drift_gets_it_interpolated():
    summaries, drift = _summaries(np.random.default_rng(4))
    drift = [r for r in drift if r["frame_id"] != "f3"]
    tracker, _, notes = wall_tracks_from_summaries(summaries, drift)
    assert len(tracker.walls) == 1 and "interpolated" in notes[0]
    v = tracker.walls[0].velocity()
    assert abs(v["velocity_nm_per_s"] - 0.02) <= 2 * v["sigma_velocity_nm_per_s"]
