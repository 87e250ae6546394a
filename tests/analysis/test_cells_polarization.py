"""Polar displacement and the Born-charge polarization estimate.

Sources: CHECK-VALUES.md sections 2-3 and suggested checks 3-6 (Born charges of
Zhong, King-Smith & Vanderbilt, PRL 72, 3618 (1994); PbTiO3 cell from the
Rietveld study in Bull. Mater. Sci. 34, 1495 (2011)).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from livequant.analysis.cells import compute_cells
from livequant.analysis.polarization import (MaterialConstants, b_site_polarization,
                                             born_polarization, displacement_from_sites)
from livequant.config import load_materials
from tests.analysis.test_cells_synthetic import lattice_for, make_columns, perovskite

PX = 10.0  # pm per pixel

PTO = MaterialConstants("PbTiO3", 389.87, 413.80, born_a=3.92, born_b=6.71, born_o_par=-5.51,
                        born_o_perp=-2.56, p_sign_b_vs_a=-1)


def _pto_columns(shift_xy_pm, *, sigma_px=0.0, rng=None, ni=10, nj=8):
    a_px, c_px = 389.87 / PX, 413.80 / PX
    shift_rc = np.array([shift_xy_pm[1], shift_xy_pm[0]]) / PX
    sites = perovskite(ni, nj, a_xy_px=(a_px, 0.0), b_xy_px=(0.0, c_px), origin_px=(20.0, 20.0),
                       b_shift=lambda r: np.tile(shift_rc, (len(r), 1)))
    return make_columns(sites, sigma_px=sigma_px, rng=rng), lattice_for((a_px, 0), (0, c_px))


def test_uniform_displacement_is_recovered_exactly():
    # Analytic field: every B column shifted by (+12, -7) pm from its A-cage centre.
    cols, lat = _pto_columns((12.0, -7.0))
    cells = compute_cells(cols, lat, pixel_size_pm=PX)
    assert len(cells) == 9 * 7  # cells need all four A corners
    np.testing.assert_allclose(cells.dx_pm, 12.0, atol=1e-9)
    np.testing.assert_allclose(cells.dy_pm, -7.0, atol=1e-9)
    np.testing.assert_allclose(cells.d_pm, np.hypot(12.0, 7.0), atol=1e-9)
    np.testing.assert_allclose(cells.d_angle_deg, np.degrees(np.arctan2(-7.0, 12.0)), atol=1e-9)


def test_pto_25pm_shift_gives_the_born_charge_polarization():
    # Check 3: Ti shifted 25 pm along c, Omega = 3.8987^2 x 4.1380 = 62.90 A^3, tetragonal
    # Z*_Ti = 6.71 -> P = 16.022 x 6.71 x 0.25 / 62.90 = 0.427 C/m^2 (Zhong et al. 1994).
    # Ti relative to the Pb cage is antiparallel to P in PbTiO3 (CHECK-VALUES section 3).
    cols, lat = _pto_columns((0.0, 25.0))
    cells = compute_cells(cols, lat, pixel_size_pm=PX, material=PTO)
    expected = 16.022 * 6.71 * 0.25 / 62.90
    np.testing.assert_allclose(cells.pol_y_C_per_m2, -expected, rtol=1e-3)
    np.testing.assert_allclose(cells.pol_x_C_per_m2, 0.0, atol=1e-9)
    info = cells.summary()["polarization"]
    assert info["computed"] and "cation-only" in info["label"] and "in-plane" in info["label"]


def test_cubic_charge_and_batio3_numbers():
    # Check 3 (cubic Z*_Ti = 7.06 -> 0.450 C/m^2) and check 4 (BaTiO3, 10 pm, Z*_Ti = 7.16,
    # Omega = 3.9998^2 x 4.0180 = 64.28 A^3 -> 0.178 C/m^2, parallel to the shift).
    cubic = MaterialConstants("PbTiO3-cubic-Z", 389.87, 413.80, born_b=7.06, p_sign_b_vs_a=-1)
    px, _, _, _ = b_site_polarization([25.0], [0.0], [0.0], [0.0], cubic)
    assert px[0] == pytest.approx(-0.450, rel=0.01)
    bto = MaterialConstants("BaTiO3", 399.98, 401.80, born_b=7.16, p_sign_b_vs_a=1)
    _, py, _, spy = b_site_polarization([0.0], [10.0], [0.0], [0.5], bto)
    assert py[0] == pytest.approx(0.178, rel=0.01)
    assert spy[0] == pytest.approx(0.178 * 0.05, rel=0.01)  # sigma scales with the shift sigma


def test_material_table_feeds_the_estimate():
    # The table entry (config/materials.toml) carries the same tetragonal set and sign.
    table = load_materials()
    pto = MaterialConstants.from_object(table["PbTiO3"])
    assert pto.cell_volume_pm3 * 1e-6 == pytest.approx(62.90, abs=0.01)
    px, _, _, _ = b_site_polarization([25.0], [0.0], [0.0], [0.0], pto)
    assert px[0] == pytest.approx(-0.427, rel=0.01)


def test_acoustic_sum_rule_and_warning():
    # Check 5: a rigid shift of all five atoms changes P by < 1e-6 C/m^2 with the tetragonal
    # PbTiO3 set (sum 0.00); the cubic set (sum +0.01) changes it by 0.01 x 0.1 x 16.022 / 62.90
    # = 2.5e-4 C/m^2 for a 10 pm shift, and the code warns.
    z_tet = [3.92, 6.71, -5.51, -2.56, -2.56]
    z_cub = [3.90, 7.06, -5.83, -2.56, -2.56]
    rigid = np.tile([0.0, 0.0, 10.0], (5, 1))
    assert np.all(np.abs(born_polarization(rigid, z_tet, 62.90e6)) < 1e-6)
    with pytest.warns(UserWarning, match="acoustic sum rule"):
        p = born_polarization(rigid, z_cub, 62.90e6)
    assert p[2] == pytest.approx(0.01 * 0.1 * 16.022 / 62.90, rel=0.01)


@pytest.mark.parametrize("name, coords, z, cell, p_expected", [
    # Check 6 with the classic fractional coordinates of CHECK-VALUES section 3 (from memory,
    # unverified there): shifts along c of A, B, apical O, two equatorial O, fractions of c.
    ("PbTiO3", [0.0, 0.040, 0.112, 0.112, 0.112], [3.92, 6.71, -5.51, -2.56, -2.56],
     (390.4, 415.2), 0.97),   # "P ~ 0.97 C/m^2" with a = 3.904, c = 4.152 A (section 3)
    ("BaTiO3", [0.0, 0.0135, -0.025, -0.015, -0.015], [2.75, 7.16, -5.69, -2.11, -2.11],
     (399.2, 403.6), 0.30),   # "P ~ 0.30 C/m^2" with a = 3.992, c = 4.036 A (section 3)
])
def test_full_born_sum_agrees_with_the_table_sign(name, coords, z, cell, p_expected):
    a, c = cell
    u = np.zeros((5, 3))
    u[:, 2] = np.asarray(coords) * c
    p = born_polarization(u, z, a * a * c)
    assert abs(p[2]) == pytest.approx(p_expected, abs=0.01)
    b_vs_a = np.sign(u[1, 2] - u[0, 2])
    # The table's sign (CHECK-VALUES section 3: antiparallel in PbTiO3, parallel in BaTiO3).
    assert np.sign(p[2]) * b_vs_a == load_materials()[name].p_sign_b_vs_a


def test_no_polarization_without_charge_or_sign():
    cols, lat = _pto_columns((0.0, 25.0))
    sto = load_materials()["SrTiO3"]  # no Born charges in the table
    cells = compute_cells(cols, lat, pixel_size_pm=PX, material=sto)
    assert np.all(np.isnan(cells.pol_y_C_per_m2))
    assert "born_b" in cells.summary()["polarization"]["reason"]
    unsigned = MaterialConstants("X", 390.0, 390.0, born_b=7.0)
    with pytest.raises(ValueError, match="p_sign_b_vs_a"):
        b_site_polarization([1.0], [1.0], [0.1], [0.1], unsigned)
    with pytest.raises(ValueError, match="p_sign_b_vs_a"):
        MaterialConstants("X", 390.0, 390.0, p_sign_b_vs_a=2)


def test_missing_neighbour_gives_nan_not_a_guess():
    cols, lat = _pto_columns((5.0, 5.0), ni=4, nj=4)
    drop = (cols.sublattice == "A") & (cols.ij[:, 0] == 1) & (cols.ij[:, 1] == 1)
    drop_b = (cols.sublattice == "B") & (cols.ij[:, 0] == 2) & (cols.ij[:, 1] == 0)
    cells = compute_cells(cols.select(~(drop | drop_b)), lat, pixel_size_pm=PX)
    ij = set(zip(cells.i.tolist(), cells.j.tolist()))
    # A(1,1) is a corner of cells (0,0), (1,0), (0,1), (1,1): all four are dropped.
    assert ij == {(0, 2), (1, 2), (2, 0), (2, 1), (2, 2)}
    k = np.flatnonzero((cells.i == 2) & (cells.j == 0))[0]
    assert np.isnan(cells.dx_pm[k]) and np.isfinite(cells.a_pm[k])


def test_displacement_shape_errors():
    with pytest.raises(ValueError, match="a4_px"):
        displacement_from_sites(np.zeros((3, 2)), np.zeros((3, 2)), np.zeros((3, 3, 2)),
                                np.zeros((3, 3, 2)), pixel_size_pm=10.0)


def test_displacement_and_polarization_pulls_are_calibrated():
    # Monte Carlo: position noise of known sigma (0.15 px = 1.5 pm) on every column; the
    # propagated sigmas must describe the scatter: std of (estimate - truth) / sigma in
    # [0.8, 1.25] (issue 4 acceptance).
    rng = np.random.default_rng(20261202)
    pulls = {"dx": [], "dy": [], "d": [], "pol": []}
    truth = (8.0, 25.0)
    for _ in range(60):
        cols, lat = _pto_columns(truth, sigma_px=0.15, rng=rng, ni=6, nj=6)
        c = compute_cells(cols, lat, pixel_size_pm=PX, material=PTO)
        pulls["dx"].append((c.dx_pm - truth[0]) / c.sigma_dx_pm)
        pulls["dy"].append((c.dy_pm - truth[1]) / c.sigma_dy_pm)
        pulls["d"].append((c.d_pm - np.hypot(*truth)) / c.sigma_d_pm)
        p_true = -16.022 * 6.71 * truth[1] / 100.0 / 62.897
        pulls["pol"].append((c.pol_y_C_per_m2 - p_true) / c.sigma_pol_y_C_per_m2)
    for name, values in pulls.items():
        values = np.concatenate(values)
        assert 0.8 < np.std(values) < 1.25, name
        assert abs(np.mean(values)) < 0.15, name


def test_rigid_translation_of_all_atoms_leaves_displacement_unchanged():
    # The B-versus-A displacement is a difference, so it obeys the same invariance as the
    # acoustic sum rule: a rigid shift of the frame changes nothing.
    cols, lat = _pto_columns((3.0, -4.0))
    moved = perovskite(10, 8, a_xy_px=(38.987, 0.0), b_xy_px=(0.0, 41.38),
                       origin_px=(23.3, 17.9),
                       b_shift=lambda r: np.tile([-0.4, 0.3], (len(r), 1)))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        c1 = compute_cells(cols, lat, pixel_size_pm=PX)
        c2 = compute_cells(make_columns(moved), lat, pixel_size_pm=PX)
    np.testing.assert_allclose(c1.dx_pm, c2.dx_pm, atol=1e-9)
    np.testing.assert_allclose(c1.dy_pm, c2.dy_pm, atol=1e-9)


def test_bifeo3_projected_fe_shift_check_7():
    # Check 7 (Palewicz et al., Acta Cryst. B63, 537 (2007), R3c at 298 K): Fe at z = 0.22021 of
    # c_hex = 1386.932 pm sits (0.25 - 0.22021) c_hex = 41.3 pm below the Bi-cage midpoint along
    # [111]pc, i.e. 41.3 / sqrt(3) = 23.9 pm along each pseudocubic axis; seen along [100]pc the
    # in-plane shift is 23.9 pm along both in-plane axes (33.7 pm in magnitude).  Columns built
    # with a_pc = 396.46 pm and that shift must return it within 0.5 pm.
    along_111 = (0.25 - 0.22021) * 1386.932
    assert along_111 == pytest.approx(41.3, abs=0.05)
    per_axis = along_111 / np.sqrt(3)
    a_px = 396.46 / PX
    shift_rc = -np.array([per_axis, per_axis]) / PX  # "below": against the [111] direction
    sites = perovskite(8, 8, a_xy_px=(a_px, 0), b_xy_px=(0, a_px),
                       b_shift=lambda r: np.tile(shift_rc, (len(r), 1)))
    cells = compute_cells(make_columns(sites, sigma_px=0.02, rng=np.random.default_rng(7)),
                          lattice_for((a_px, 0), (0, a_px)), pixel_size_pm=PX)
    assert np.median(cells.dx_pm) == pytest.approx(-23.9, abs=0.5)
    assert np.median(cells.dy_pm) == pytest.approx(-23.9, abs=0.5)
    assert np.median(cells.d_pm) == pytest.approx(33.7, abs=0.5)
    # The table records P antiparallel to that shift, and no Born charges (not charge neutral).
    bfo = load_materials()["BiFeO3"]
    assert bfo.p_sign_b_vs_a == -1 and bfo.born_b is None


def test_displacement_on_the_crystal_axes_of_a_rotated_frame():
    # Lattice turned by 30 deg, Ti shifted 25 pm along the c (= b) axis: d_b = 25, d_a = 0,
    # whatever the image axes.
    th = np.radians(30.0)
    a_px, c_px = 389.87 / PX, 413.80 / PX
    ua, ub = np.array([np.cos(th), np.sin(th)]), np.array([-np.sin(th), np.cos(th)])
    shift_xy = 25.0 / PX * ub
    sites = perovskite(7, 7, a_xy_px=tuple(a_px * ua), b_xy_px=tuple(c_px * ub),
                       origin_px=(60.0, 200.0),
                       b_shift=lambda r: np.tile(shift_xy[::-1], (len(r), 1)))
    cells = compute_cells(make_columns(sites), lattice_for(tuple(a_px * ua), tuple(c_px * ub)),
                          pixel_size_pm=PX)
    np.testing.assert_allclose(cells.d_b_pm, 25.0, atol=1e-9)
    np.testing.assert_allclose(cells.d_a_pm, 0.0, atol=1e-9)
    np.testing.assert_allclose(cells.sigma_d_a_pm, cells.sigma_dx_pm, rtol=1e-9)  # isotropic
