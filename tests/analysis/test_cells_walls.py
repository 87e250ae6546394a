"""Domain-wall profile fits with the Landau-Ginzburg tanh solution.

Sources: CHECK-VALUES.md section 7 (P(x) = P0 tanh(x / (sqrt(2) xi)), xi = sqrt(g/|alpha|);
-0.8 P0 -> +0.8 P0 distance 2.197 w; wall energy (2 sqrt(2)/3) g^(1/2) |alpha|^(3/2) / beta)
and suggested checks 11 and 12.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import brentq

from livequant.analysis.cells import compute_cells
from livequant.analysis.polarization import MaterialConstants, polarization_per_pm
from livequant.analysis.walls import (WIDTH_80_FACTOR, fit_wall_profile, landau_wall,
                                      tanh_profile)
from tests.analysis.test_cells_synthetic import lattice_for, make_columns, perovskite

PX = 10.0
A_PX = 20.0  # 200 pm cells


def test_profile_fit_check_11():
    # Check 11: P0 = 0.75 C/m^2, w = 1.5 unit cells, 2 % noise -> w within 5 %, P0 within 2 %.
    rng = np.random.default_rng(11)
    x = np.tile(np.arange(-12.0, 13.0), 4)          # four rows of cells across the wall
    p = tanh_profile(x, 0.75, 0.3, 1.5) + rng.normal(0, 0.02 * 0.75, x.size)
    fit = fit_wall_profile(x, p, np.full(x.size, 0.015))
    assert fit.width == pytest.approx(1.5, rel=0.05)
    assert fit.p0 == pytest.approx(0.75, rel=0.02)
    assert fit.x0 == pytest.approx(0.3, abs=0.1)
    assert 0.5 < fit.reduced_chi2 < 1.6
    assert "sqrt(2) xi" in fit.convention


def test_width_conventions():
    # 2 atanh(0.8) = 2.197 (CHECK-VALUES section 7), checked by solving the profile itself.
    assert WIDTH_80_FACTOR == pytest.approx(2.197, abs=5e-4)
    w = 1.7
    lo = brentq(lambda x: tanh_profile(x, 1.0, 0.0, w) + 0.8, -10, 0)
    hi = brentq(lambda x: tanh_profile(x, 1.0, 0.0, w) - 0.8, 0, 10)
    assert hi - lo == pytest.approx(2.197 * w, rel=2e-4)
    fit = fit_wall_profile(np.linspace(-8, 8, 41), tanh_profile(np.linspace(-8, 8, 41), 1, 0, w))
    assert fit.correlation_length == pytest.approx(w / np.sqrt(2), rel=1e-6)
    assert fit.width_80 == pytest.approx(hi - lo, rel=1e-4)


def test_landau_wall_check_12():
    # Check 12: g = 1, alpha = -2, beta = 1 -> energy 2 sqrt(2)/3 * 2^(3/2) = 2.6667; the tanh
    # profile with w = sqrt(2) xi must give the same excess energy by direct integration.
    g, alpha, beta = 1.0, -2.0, 1.0
    wall = landau_wall(g, alpha, beta)
    assert wall["energy"] == pytest.approx(2.6667, abs=1e-4)
    assert wall["w"] == pytest.approx(np.sqrt(2) * np.sqrt(g / 2.0))
    x = np.linspace(-40, 40, 400001)
    p = tanh_profile(x, wall["p0"], 0.0, wall["w"])
    dp = np.gradient(p, x)
    density = alpha / 2 * p**2 + beta / 4 * p**4 + g / 2 * dp**2 + alpha**2 / (4 * beta)
    assert np.trapezoid(density, x) == pytest.approx(wall["energy"], rel=1e-5)
    assert wall["energy"] == pytest.approx(4 / 3 * g * wall["p0"] ** 2 / wall["w"], rel=1e-12)
    with pytest.raises(ValueError, match="alpha < 0"):
        landau_wall(1.0, 2.0, 1.0)


def test_fit_errors():
    with pytest.raises(ValueError, match="does not change sign"):
        fit_wall_profile(np.arange(10.0), np.ones(10))
    with pytest.raises(ValueError, match="at least 4"):
        fit_wall_profile([0.0, 1.0], [-1.0, 1.0])


def _wall_frame(d0_pm, w_px, x0_px, *, sigma_px=0.0, rng=None):
    # B-site shift along y reversing across a wall normal to x: dy = d0 tanh((x - x0) / w).
    def shift(r):
        dy = d0_pm / PX * np.tanh((r[:, 1] - x0_px) / w_px)
        return np.column_stack([dy, np.zeros(len(r))])

    sites = perovskite(18, 6, a_xy_px=(A_PX, 0), b_xy_px=(0, A_PX), b_shift=shift)
    return make_columns(sites, sigma_px=sigma_px, rng=rng)


def test_tanh_wall_in_a_cell_map_is_found_and_fitted():
    # Wall of half-width w = 1.5 cells (300 pm) at x0 = 190 px, P0 = 20 pm of B-site shift.
    bto = MaterialConstants("BaTiO3", 399.98, 401.80, born_b=7.16, p_sign_b_vs_a=1)
    cols = _wall_frame(20.0, 1.5 * A_PX, 190.0, sigma_px=0.05, rng=np.random.default_rng(3))
    cells = compute_cells(cols, lattice_for(), pixel_size_pm=PX, material=bto)
    wall = cells.summary()["wall"]
    assert wall is not None
    assert wall["width"] == pytest.approx(300.0, rel=0.05)
    assert wall["x_pm"] == pytest.approx(1900.0, abs=20.0)
    assert wall["p0"] == pytest.approx(20.0, rel=0.02)
    assert abs(abs(wall["axis_deg"]) - 90.0) < 3.0     # the reversing component is along y
    assert abs(wall["normal_deg"]) < 3.0                # the wall normal is along x
    assert wall["p0_C_per_m2"] == pytest.approx(20.0 * abs(polarization_per_pm(bto)), rel=0.02)


def test_single_domain_has_no_wall():
    cols = _wall_frame(20.0, 1e-3, -1e4)  # x0 far outside: one domain everywhere
    cells = compute_cells(cols, lattice_for(), pixel_size_pm=PX)
    assert cells.summary()["wall"] is None


def test_wall_fit_sigmas_are_calibrated():
    # Monte Carlo over noisy column sets (0.1 px = 1 pm): pulls of width, position and P0.
    rng = np.random.default_rng(12)
    truth = {"width": 1.5 * A_PX * PX, "x_pm": 1900.0, "p0": 20.0}
    pulls = {k: [] for k in truth}
    for _ in range(40):
        cells = compute_cells(_wall_frame(20.0, 1.5 * A_PX, 190.0, sigma_px=0.1, rng=rng),
                              lattice_for(), pixel_size_pm=PX)
        w = cells.summary()["wall"]
        pulls["width"].append((w["width"] - truth["width"]) / w["sigma_width"])
        # The wall normal is along +x here, so the position error along x is that of x0.
        pulls["x_pm"].append((w["x_pm"] - truth["x_pm"]) / w["sigma_x0"])
        pulls["p0"].append((w["p0"] - truth["p0"]) / w["sigma_p0"])
    for k, v in pulls.items():
        assert 0.8 < np.std(v) < 1.25, k


def test_inclined_wall_orientation_is_fitted():
    # A wall whose normal is 25 deg from x (from +x towards +y): the 2D fit returns the angle,
    # and the width is measured along the true normal (not smeared by a wrong projection).
    theta = np.radians(25.0)
    n = np.array([np.cos(theta), np.sin(theta)])
    centre = np.array([190.0, 75.0])  # (x, y) px

    def shift(r):
        s = (r[:, 1] - centre[0]) * n[0] + (r[:, 0] - centre[1]) * n[1]
        dy = 20.0 / PX * np.tanh(s / (1.5 * A_PX))
        return np.column_stack([dy, np.zeros(len(r))])

    sites = perovskite(18, 8, a_xy_px=(A_PX, 0), b_xy_px=(0, A_PX), b_shift=shift)
    cells = compute_cells(make_columns(sites, sigma_px=0.05, rng=np.random.default_rng(25)),
                          lattice_for(), pixel_size_pm=PX)
    wall = cells.summary()["wall"]
    assert wall["normal_deg"] == pytest.approx(25.0, abs=3 * wall["sigma_normal_deg"] + 0.5)
    assert wall["width"] == pytest.approx(1.5 * A_PX * PX, rel=0.05)
    # The reported point lies on the true wall: its distance along n from the centre is ~0.
    offset = (np.array([wall["x_pm"], wall["y_pm"]]) / PX - centre) @ n
    assert abs(offset) < 0.1 * A_PX
