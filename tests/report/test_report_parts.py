"""The report's pieces against truth: the bound, the geometry, the maps, empty sessions."""

from __future__ import annotations

import math

import numpy as np
import pytest
from matplotlib.image import imread

from livequant.daemon import Ledger
from livequant.report import SessionError, build_report
from livequant.report import figures as F
from livequant.report.data import (column_crlb_pm, frame_footprint_nm, frame_to_stage,
                                   frames_of_interest, region_corners_px, thompson_sigma_pm)
from livequant.report.maps import cell_grid, wall_profile, winding_map

from ._html import read_page, table_dicts

# ------------------------------------------------------------------ the bound


def test_thompson_bound_worked_numbers():
    """CHECK-VALUES section 4 worked numbers (s = 40 pm, a = 10 pm): N = 1e4, b = 0 ->
    0.401 pm; N = 1e4, b = 10 -> 0.897 pm; N = 1e3, b = 0 -> 1.268 pm
    (Thompson, Larson & Webb, Biophys. J. 82, 2775 (2002))."""
    got = thompson_sigma_pm(s_pm=40.0, pixel_pm=10.0, n_electrons=np.array([1e4, 1e4, 1e3]),
                            background_electrons=np.array([0.0, 100.0, 0.0]))
    assert got == pytest.approx([0.401, 0.897, 1.268], abs=0.001)
    assert np.isnan(thompson_sigma_pm(s_pm=40.0, pixel_pm=10.0, n_electrons=0.0,
                                      background_electrons=0.0))


def test_column_bound_counts_the_gaussian_and_ignores_the_gain_setting():
    """N = 2 pi A s^2 (the integral of the fitted Gaussian, s in pixels); with the
    effective gain = configured gain x median reduced chi-square, the bound does not
    depend on the configured gain (the fitter's sigmas do not either)."""
    px, s_pm, amp, bg = 10.0, 40.0, 1e4 / (2 * math.pi * 16.0), 0.0
    cols = {"amplitude": np.full(3, amp), "width_pm": np.full(3, s_pm),
            "background": np.full(3, bg), "reduced_chi2": np.ones(3),
            "sigma_x_pm": np.full(3, 0.4)}
    bound, g = column_crlb_pm(cols, pixel_size_pm=px, gain=1.0)
    assert g == 1.0
    assert bound == pytest.approx(np.full(3, 0.401), abs=0.001)   # N = 1e4, as above
    # the same frame analysed with a gain setting 4x too small: chi2 comes out 4x larger
    wrong = dict(cols, reduced_chi2=np.full(3, 4.0))
    bound2, g2 = column_crlb_pm(wrong, pixel_size_pm=px, gain=0.25)
    assert g2 == pytest.approx(1.0) and bound2 == pytest.approx(bound)
    # a real gain of 4 counts per electron: 4x fewer electrons, bound 2x larger
    bound3, _ = column_crlb_pm(cols, pixel_size_pm=px, gain=4.0)
    assert bound3 == pytest.approx(2 * bound)
    # older files without the extra columns: configured gain, no background
    old = {k: v for k, v in cols.items() if k not in ("background", "reduced_chi2")}
    bound4, g4 = column_crlb_pm(old, pixel_size_pm=px, gain=1.0)
    assert g4 == 1.0 and bound4 == pytest.approx(bound)


# ------------------------------------------------------------------ geometry


def test_frame_to_stage_centre_axes_and_rotation():
    meta = {"pixel_size_pm": 20.0, "stage_x_nm": 5.0, "stage_y_nm": -3.0,
            "scan_rotation_deg": 90.0}
    shape = (101, 201)  # centre pixel (x 100, y 50)
    x, y = frame_to_stage(meta, shape, [100.0, 150.0, 100.0], [50.0, 50.0, 60.0])
    # +x_px (fast axis) turns to +y on the stage at 90 degrees; +y_px to -x
    assert x == pytest.approx([5.0, 5.0, 5.0 - 0.2])
    assert y == pytest.approx([-3.0, -3.0 + 1.0, -3.0])
    corners = frame_footprint_nm({**meta, "scan_rotation_deg": 0.0}, shape)
    assert corners.min(axis=0) == pytest.approx([5.0 - 2.01, -3.0 - 1.01])
    assert corners.max(axis=0) == pytest.approx([5.0 + 2.01, -3.0 + 1.01])


def test_region_corners_follow_the_angle_and_reject_bad_regions():
    c = region_corners_px({"x_px": 10, "y_px": 20, "width_px": 4, "height_px": 2,
                           "angle_deg": 90})
    # the width axis turned from +x to +y: the box is 2 wide in x and 4 tall in y
    assert np.ptp(c[:, 0]) == pytest.approx(2.0) and np.ptp(c[:, 1]) == pytest.approx(4.0)
    assert c.mean(axis=0) == pytest.approx([10.0, 20.0])
    assert region_corners_px({"x_px": 1}) is None
    assert region_corners_px({"x_px": 1, "y_px": 1, "width_px": "a", "height_px": 1}) is None
    assert region_corners_px(None) is None


# ------------------------------------------------------------------ maps


def _grid_cells(n=9, spacing_pm=400.0, angle_deg=20.0):
    """Cells on a rotated square grid; (i, j) along a and b."""
    i, j = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    i, j = i.ravel(), j.ravel()
    t = math.radians(angle_deg)
    a = spacing_pm * np.array([math.cos(t), math.sin(t)])
    b = spacing_pm * np.array([-math.sin(t), math.cos(t)])
    xy = 1000.0 + i[:, None] * a + j[:, None] * b
    return {"i": i, "j": j, "x_pm": xy[:, 0], "y_pm": xy[:, 1]}


def _field(cells, fx, fy):
    c = np.array([cells["x_pm"].mean(), cells["y_pm"].mean()])
    x, y = cells["x_pm"] - c[0] + 1e-3, cells["y_pm"] - c[1] + 7e-3
    dx, dy = fx(x, y), fy(x, y)
    return dict(cells, dx_pm=dx, dy_pm=dy, d_pm=np.hypot(dx, dy),
                sigma_d_pm=np.full(dx.shape, 1e-3), sigma_dx_pm=np.full(dx.shape, 1e-3),
                sigma_dy_pm=np.full(dx.shape, 1e-3))


@pytest.mark.parametrize("fx, fy, expected", [
    (lambda x, y: -y, lambda x, y: x, 1),    # counter-clockwise vortex
    (lambda x, y: y, lambda x, y: -x, 1),    # clockwise vortex
    (lambda x, y: x, lambda x, y: -y, -1),   # saddle: antivortex
])
def test_winding_map_finds_the_single_core(fx, fy, expected):
    """CHECK-VALUES section 10: both circulations wind +1, a saddle -1, and only the
    plaquette around the centre winds."""
    cells = _field(_grid_cells(n=8, angle_deg=20.0), fx, fy)
    grid = cell_grid(cells)
    w = winding_map(grid, cells)
    assert np.nansum(np.abs(w)) == 1 and np.nansum(w) == expected
    k = int(np.nanargmax(np.abs(w.ravel())))
    centre = grid.plaquette_polygons()[k].mean(axis=0)
    assert centre == pytest.approx([cells["x_pm"].mean() / 1000, cells["y_pm"].mean() / 1000],
                                   abs=0.01)


def test_cell_grid_fills_holes_and_tiles_the_cells():
    cells = _grid_cells(n=6, spacing_pm=400.0, angle_deg=30.0)
    keep = np.ones(len(cells["i"]), bool)
    keep[7] = False
    holed = {k: v[keep] for k, v in cells.items()}
    grid = cell_grid(holed)
    assert grid.present.sum() == keep.sum() and not grid.present.ravel()[7]
    # the missing cell gets its place from the affine fit
    assert grid.x_nm.ravel()[7] == pytest.approx(cells["x_pm"][7] / 1000)
    assert np.hypot(*grid.a_nm) == pytest.approx(0.4)
    polys = grid.cell_polygons(holed["x_pm"] / 1000, holed["y_pm"] / 1000)
    # each quadrilateral has the area of one cell
    x, y = polys[..., 0], polys[..., 1]
    area = 0.5 * np.abs(np.sum(x * np.roll(y, -1, 1) - y * np.roll(x, -1, 1), axis=1))
    assert area == pytest.approx(np.full(len(area), 0.16))
    assert cell_grid({k: v[:2] for k, v in cells.items()}) is None


def test_wall_profile_recovers_the_tanh_it_was_built_from():
    """Cells displaced by P0 tanh(s / w) along a polar axis, across a tilted wall: the
    projection puts every cell exactly on the fitted curve."""
    cells = _grid_cells(n=12, angle_deg=0.0)
    normal, axis = math.radians(15.0), math.radians(95.0)
    xw, yw, p0, w = 3000.0, 2500.0, 17.0, 500.0
    s = (cells["x_pm"] - xw) * math.cos(normal) + (cells["y_pm"] - yw) * math.sin(normal)
    p = p0 * np.tanh(s / w)
    cells.update(dx_pm=p * math.cos(axis), dy_pm=p * math.sin(axis),
                 sigma_dx_pm=np.full(p.shape, 1.0), sigma_dy_pm=np.full(p.shape, 1.0))
    wall = {"axis_deg": 95.0, "normal_deg": 15.0, "x_pm": xw, "y_pm": yw, "width": w, "p0": p0}
    prof = wall_profile(cells, wall, accepted=True)
    assert prof.p_pm == pytest.approx(p0 * np.tanh(prof.s_nm * 1000 / w))
    assert prof.sigma_p_pm == pytest.approx(np.full(p.shape, 1.0))
    assert wall_profile(cells, {"width": 1.0}, accepted=False) is None
    fig = F.wall_profile_figure(prof.s_nm, prof.p_pm, prof.sigma_p_pm, wall, title="t",
                                accepted=True)
    assert fig.axes and len(fig.axes[0].lines) >= 1
    rejected = F.wall_profile_figure(prof.s_nm, prof.p_pm, prof.sigma_p_pm,
                                     {**wall, "rejected": "reduced chi-square 9 > 5"},
                                     title="t", accepted=False)
    assert "rejected: reduced chi-square 9 > 5" in rejected.axes[0].get_title()


def test_figures_render_without_image_and_with_empty_inputs(tmp_path):
    """Every plotting function returns a Figure that saves as a decodable PNG, also with
    nothing to show (an empty session draws its placeholders)."""
    extent = (0.0, 5.0, 5.0, 0.0)
    figs = {
        "cols": F.image_with_columns(None, extent, np.array([1.0, 2.0]), np.array([1.0, 2.0]),
                                     np.array(["A", "B"]), title="x",
                                     regions=[(np.array([[0, 0], [1, 0], [1, 1], [0, 1]]), "#1")]),
        "arrows": F.displacement_arrows(None, extent, np.array([1.0]), np.array([1.0]),
                                        np.array([np.nan]), np.array([np.nan]), title="x"),
        "maps": F.cell_maps(np.zeros((1, 4, 2)), [F.MapPanel("a", np.array([np.nan]),
                                                             kind="signed", unit="u")],
                            extent_nm=extent, title="x"),
        "winding": F.winding_figure(np.array([np.nan]), np.zeros((1, 4, 2)), [],
                                    extent_nm=extent, title="x"),
        "overview": F.overview_figure([], [], []),
        "drift": F.drift_figure([], [], []),
        "hist": F.histograms_figure([("d", np.array([np.nan]), "pm")], title="x"),
        "fit": F.fit_quality_figure(np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0)),
        "throughput": F.throughput_figure([], [], []),
    }
    for name, fig in figs.items():
        path = F.save_png(fig, tmp_path / f"{name}.png")
        assert imread(path).ndim == 3, name
    with pytest.raises(ValueError, match="kind"):
        F.MapPanel("a", np.zeros(1), kind="rainbow", unit="u")


def test_nice_length_is_round_and_near_a_fifth():
    assert F.nice_length(5.12) == 1.0
    assert F.nice_length(20.0) == 2.0
    assert F.nice_length(0.3) == pytest.approx(0.05)
    assert F.nice_length(float("nan")) == 1.0


# ------------------------------------------------------------------ sessions


def test_empty_session_gives_a_minimal_report(tmp_path):
    session = tmp_path / "empty"
    session.mkdir()
    Ledger(session / "ledger.sqlite").close()
    result = build_report(session)
    html = (session / "report" / "index.html").read_text(encoding="utf-8")
    assert "has no frames yet" in html
    page = read_page(html)
    counts = {r["quantity"]: r["value"] for r in table_dicts(page, "session-counts")}
    assert counts["frames known"] == "0" and counts["flags"] == "0"
    assert "no proposals were made" in html and "dose budgets" in html
    assert result["frames_drawn"] == [] and result["n_frames"] == 0
    for src in result["figures"]:
        assert imread(session / "report" / src).ndim == 3


def test_not_a_session_is_a_clear_error(tmp_path, capsys):
    from livequant.cli import main

    with pytest.raises(SessionError, match="no ledger.sqlite"):
        build_report(tmp_path)
    assert main(["report", str(tmp_path)]) == 2
    assert "is this a session folder" in capsys.readouterr().err
    assert main(["report", str(tmp_path / "missing")]) == 2
    assert main(["report", str(tmp_path), "--max-frames", "0"]) == 2
    assert "--max-frames must be at least 1" in capsys.readouterr().err


def test_frames_of_interest_order_and_bound():
    from livequant.report.data import FrameRecord, SessionData

    def rec(seq, fid, state="done"):
        return FrameRecord(seq, f"/x/{fid}.tif", fid, state, None, None, float(seq),
                           float(seq), None, float(seq) + 1, None, None, None)

    frames = [rec(k, f"f{k}") for k in range(1, 9)] + [rec(9, "q", "quarantined")]
    flags = [{"frame_id": "f2", "created_at": 5.0, "kind": "domain-wall", "score": 0.5},
             {"frame_id": "f5", "created_at": 3.0, "kind": "domain-wall", "score": 0.4},
             {"frame_id": "f5", "created_at": 4.0, "kind": "domain-wall", "score": 0.3},
             {"frame_id": "f3", "created_at": 6.0, "kind": "domain-wall", "score": 0.9},
             {"frame_id": "f6", "created_at": 2.0, "kind": "vortex", "score": 0.2},
             {"frame_id": "q", "created_at": 9.0, "kind": "vortex", "score": 1.0}]
    s = SessionData(root=None, frames=frames, counts={}, flags=flags, proposals=[],
                    decisions=[], drift=[], event_counts={})
    # the rare vortex first, the best wall frame next, then most flags, then the newest
    chosen, notes = frames_of_interest(s, max_frames=5)
    assert chosen == ["f6", "f3", "f5", "f2", "f8"]
    assert notes and "3 more" in notes[0]
    assert frames_of_interest(s, max_frames=2)[0] == ["f6", "f3"]
    chosen, notes = frames_of_interest(s, max_frames=3, requested=["f1", "q", "f1"])
    assert chosen == ["f1"] and "'q'" in notes[0]


def test_winding_figure_marks_each_core_kind_once_in_the_legend():
    polys = np.array([[[0, 0], [1, 0], [1, 1], [0, 1]], [[1, 0], [2, 0], [2, 1], [1, 1]]], float)
    cores = [{"x_pm": 500.0, "y_pm": 500.0, "kind": "vortex", "winding": 1},
             {"x_pm": 1500.0, "y_pm": 500.0, "kind": "antivortex", "winding": -1},
             {"x_pm": 1600.0, "y_pm": 600.0, "kind": "antivortex", "winding": -1},
             {"kind": "vortex"}]  # no position: skipped, not a crash
    fig = F.winding_figure(np.array([1.0, -1.0]), polys, cores, extent_nm=(0, 2, 1, 0),
                           title="t", note="n")
    ax = fig.axes[0]
    offsets = np.concatenate([np.asarray(c.get_offsets()) for c in ax.collections[1:]])
    assert offsets == pytest.approx(np.array([[0.5, 0.5], [1.5, 0.5], [1.6, 0.6]]))
    assert sorted(t.get_text() for t in ax.get_legend().get_texts()) == ["antivortex", "vortex"]
