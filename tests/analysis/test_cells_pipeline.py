"""End to end: rendered frames through ``analyze_frame`` to the per-cell descriptors and files.

The frames are point-sampled Gaussian columns under Poisson noise (livequant.synthetic), so the
true B-site displacement of every cell is known.  SrTiO3 / PbTiO3 cells: CHECK-VALUES.md
section 1; Born charges: section 2 (Zhong, King-Smith & Vanderbilt 1994).
"""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest

from livequant.config import Settings
from livequant.frames import FrameMeta, frame_from_array
from livequant.outputs import write_frame_outputs
from livequant.pipeline import analyze_frame
from livequant.synthetic import perovskite_frame, render_columns
from tests.analysis.test_cells_synthetic import perovskite

PX = 10.0


def _frame(pixels, detector="HAADF"):
    return frame_from_array(pixels, FrameMeta(frame_id="cells-e2e", pixel_size_pm=PX,
                                              detector=detector))


def test_uniform_displacement_through_the_pipeline_with_calibrated_sigmas():
    # B sites shifted by (d_row, d_col) = (15, -8) pm in SrTiO3 (a = 390.53 pm); over several
    # noisy renders the per-cell estimates scatter as their sigmas say: std of the pulls in
    # [0.8, 1.25] (issue 4 acceptance), and the medians sit on the truth.
    pulls_x, pulls_y = [], []
    for seed in range(4):
        f = perovskite_frame((384, 384), a_pm=390.53, pixel_size_pm=PX, rotation_deg=3.0,
                             b_shift_pm=(15.0, -8.0), seed=seed)
        res = analyze_frame(_frame(f.pixels))
        assert res.ok and res.cells is not None, res.message
        c = res.cells
        assert len(c) >= 40
        assert np.median(c.dx_pm) == pytest.approx(-8.0, abs=0.5)
        assert np.median(c.dy_pm) == pytest.approx(15.0, abs=0.5)
        pulls_x.append((c.dx_pm - -8.0) / c.sigma_dx_pm)
        pulls_y.append((c.dy_pm - 15.0) / c.sigma_dy_pm)
        assert np.median(c.a_pm) == pytest.approx(390.53, abs=1.0)
        assert "cells" in res.timings_s
    for p in (np.concatenate(pulls_x), np.concatenate(pulls_y)):
        assert 0.8 < np.std(p) < 1.25
        assert abs(np.mean(p)) < 0.25


def test_tanh_wall_through_the_pipeline(tmp_path):
    # A 180-degree wall normal to x in PbTiO3-like contrast: dy = 20 pm tanh((x - x0) / w) with
    # w = 1.5 cells; the fitted half-width, position and P0 come back within 10 %, and the
    # polarization estimate of the material table is attached (analysis.material = PbTiO3).
    a_px = 390.53 / PX
    w_px, x0_px = 1.5 * a_px, 250.0

    def shift(r):
        return np.column_stack([2.0 * np.tanh((r[:, 1] - x0_px) / w_px), np.zeros(len(r))])

    sites = perovskite(14, 10, a_xy_px=(a_px, 0.0), b_xy_px=(0.0, a_px), origin_px=(-5.0, -5.0),
                       b_shift=shift)
    amp = np.where(sites.sublattice == "A", 400.0, 160.0)
    pixels = render_columns((360, 512), sites.positions_px, amp, 4.0, background=20.0,
                            rng=np.random.default_rng(77))
    settings = Settings.model_validate({"analysis": {"material": "PbTiO3"}})
    res = analyze_frame(_frame(pixels), settings)
    assert res.ok and res.cells is not None, res.message
    wall = res.cells.summary()["wall"]
    assert wall is not None
    assert wall["width"] == pytest.approx(w_px * PX, rel=0.10)
    assert wall["x_pm"] == pytest.approx(x0_px * PX, abs=0.2 * w_px * PX)
    assert wall["p0"] == pytest.approx(20.0, rel=0.10)
    assert abs(wall["normal_deg"]) < 5.0
    assert res.cells.summary()["polarization"]["computed"]

    # The files: cells.csv carries the contract columns, summary.json the cells block.
    folder = write_frame_outputs(res, tmp_path)
    with open(folder / "cells.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert list(rows[0].keys()) == res.cells.csv_fields()
    assert list(rows[0].keys())[:6] == ["i", "j", "x_pm", "y_pm", "dx_pm", "sigma_dx_pm"]
    assert len(rows) == len(res.cells)
    dy = np.array([float(r["dy_pm"]) for r in rows])
    np.testing.assert_allclose(dy, res.cells.dy_pm, rtol=1e-5, atol=1e-4)
    summary = json.loads((folder / "summary.json").read_text())
    assert summary["cells"]["n_cells"] == len(res.cells)
    assert summary["cells"]["wall"]["convention"].startswith("P(x) = P0 tanh")


def test_material_reference_without_material_is_reported_not_raised():
    f = perovskite_frame((384, 384), pixel_size_pm=PX, seed=5)
    settings = Settings.model_validate({"analysis": {"cells": {"reference": "material"}}})
    res = analyze_frame(_frame(f.pixels), settings)
    assert res.ok and res.cells is None
    assert "no cell descriptors" in res.message and "analysis.material" in res.message


def _render(sites, shape, seed):
    amp = np.where(sites.sublattice == "A", 400.0, 160.0)
    return render_columns(shape, sites.positions_px, amp, 4.0, background=20.0,
                          rng=np.random.default_rng(seed))


def test_linear_strain_gradient_through_the_pipeline():
    # u_x = k (X - x0)^2 / 2 on SrTiO3 (a = 390.53 pm), so exx(X) = k (X - x0) runs from about
    # -1 % to +1 % across the frame; column strain (against the handbook cell) and GPA both
    # recover it, and the column-strain pulls are calibrated.
    a_px, x0, k = 390.53 / PX, 256.0, 4e-5

    def field(r):
        x = r[:, 1] - x0
        return np.column_stack([np.zeros(len(r)), k * x**2 / 2])

    sites = perovskite(16, 12, a_xy_px=(a_px, 0.0), b_xy_px=(0.0, a_px),
                       origin_px=(-10.0, -10.0), field=field)
    settings = Settings.model_validate({"analysis": {"material": "SrTiO3",
                                                     "cells": {"reference": "material"}}})
    res = analyze_frame(_frame(_render(sites, (400, 512), 1)), settings)
    c = res.cells
    assert c is not None and len(c) >= 80, res.message
    big_x = c.x_pm / PX
    for _ in range(3):  # undeformed coordinate X from x = X + u(X)
        big_x = c.x_pm / PX - k * (big_x - x0) ** 2 / 2
    expected = k * (big_x - x0)
    assert np.ptp(expected) > 0.015
    pulls = (c.exx - expected) / c.sigma_exx
    assert 0.8 < np.std(pulls) < 1.25 and abs(np.mean(pulls)) < 0.3
    for name in ("eyy", "exy"):
        assert 0.8 < np.std(c.values[name] / c.values["sigma_" + name]) < 1.25, name
    ok = np.isfinite(c.gpa_exx)
    assert ok.sum() >= 15
    assert np.max(np.abs(c.gpa_exx[ok] - expected[ok])) < 2e-3


def test_vortex_pair_through_the_pipeline():
    # theta = phi1 + phi2 - pi/2, |u| = 20 pm: a counter-clockwise and a clockwise vortex (both
    # winding +1) on A sites; both cores found within one cell, opposite chirality, nothing else.
    a_px, org = 390.53 / PX, -10.0
    c1 = (org + 5 * a_px, org + 6 * a_px)
    c2 = (org + 11 * a_px, org + 6 * a_px)

    def shift(r):
        th = (np.arctan2(r[:, 0] - c1[1], r[:, 1] - c1[0])
              + np.arctan2(r[:, 0] - c2[1], r[:, 1] - c2[0]) - np.pi / 2)
        return 2.0 * np.column_stack([np.sin(th), np.cos(th)])

    sites = perovskite(16, 12, a_xy_px=(a_px, 0.0), b_xy_px=(0.0, a_px), origin_px=(org, org),
                       b_shift=shift)
    res = analyze_frame(_frame(_render(sites, (420, 560), 2)))
    topo = res.cells.summary()["topology"]
    cores = sorted(topo["cores"], key=lambda c: c["x_pm"])
    assert len(cores) == 2, cores
    for core, (cx, cy) in zip(cores, (c1, c2)):
        assert np.hypot(core["x_pm"] - cx * PX, core["y_pm"] - cy * PX) < 390.53
        assert (core["winding"], core["kind"]) == (1, "vortex")
    assert cores[0]["chirality"] == -cores[1]["chirality"] != 0


@pytest.mark.slow
def test_wall_fit_sigmas_are_calibrated_over_renders():
    # Fifty rendered frames of one tanh wall (w = 1.5 cells), each through the whole pipeline:
    # the pulls of the fitted width, position and P0 have a standard deviation in [0.8, 1.25]
    # (issue 4 acceptance); this includes the refinement's own position sigmas.  Measured when
    # written: 1.18 (width), 0.94 (position), 1.20 (P0); the same geometry with independent
    # column errors gives 1.03 / 0.97 / 1.02, so the extra ~20 % comes from frame-coherent
    # errors upstream of the descriptors (the column pulls themselves are 1.00).
    a_px = 390.53 / PX
    w_px, x0_px = 1.5 * a_px, 250.0

    def shift(r):
        return np.column_stack([2.0 * np.tanh((r[:, 1] - x0_px) / w_px), np.zeros(len(r))])

    sites = perovskite(14, 10, a_xy_px=(a_px, 0.0), b_xy_px=(0.0, a_px), origin_px=(-5.0, -5.0),
                       b_shift=shift)
    pulls = {"width": [], "x": [], "p0": []}
    for seed in range(50):
        wall = analyze_frame(_frame(_render(sites, (360, 512), 100 + seed))).cells.summary()["wall"]
        pulls["width"].append((wall["width"] - w_px * PX) / wall["sigma_width"])
        pulls["x"].append((wall["x_pm"] - x0_px * PX) / wall["sigma_x0"])
        pulls["p0"].append((wall["p0"] - 20.0) / wall["sigma_p0"])
    for name, values in pulls.items():
        assert 0.8 < np.std(values) < 1.25, (name, np.std(values))


def test_pto_polarization_through_the_pipeline():
    # Check 3 end to end: a rendered tetragonal PbTiO3 frame (a = 389.87, c = 413.80 pm, Bull.
    # Mater. Sci. 34, 1495 (2011)) with Ti shifted 25 pm along x, material from the table:
    # P = -16.022 x 6.71 x 0.25 / 62.90 = -0.427 C/m^2 (tetragonal Z*, Zhong et al. 1994; the
    # minus sign: Ti against the Pb cage is antiparallel to P), c/a = 1.0614.
    f = perovskite_frame((384, 384), a_pm=389.87, c_pm=413.80, pixel_size_pm=PX,
                         rotation_deg=4.0, b_shift_pm=(0.0, 25.0), seed=2)
    settings = Settings.model_validate({"analysis": {"material": "PbTiO3",
                                                     "cells": {"reference": "material"}}})
    c = analyze_frame(_frame(f.pixels), settings).cells
    expected = -16.022 * 6.71 * 0.25 / 62.90
    # The shift is along the image x axis; the lattice is turned by 4 deg but u is not.
    assert np.median(c.pol_x_C_per_m2) == pytest.approx(expected, rel=0.02)
    assert abs(np.median(c.pol_y_C_per_m2)) < 0.01
    assert np.median(c.c_over_a) == pytest.approx(1.0614, abs=0.002)
    assert abs(np.median(c.exx)) < 1e-3 and abs(np.median(c.eyy)) < 1e-3
