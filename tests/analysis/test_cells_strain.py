"""Local lattice parameters, tetragonality and the strain tensor from column positions.

Sources: CHECK-VALUES.md section 1 (PbTiO3 a = 3.8987 A, c = 4.1380 A, c/a = 1.0614, Rietveld,
Bull. Mater. Sci. 34, 1495 (2011)) and suggested check 2; strain definitions of section 5
(eps = (e + e^T)/2 of the distortion e = F - I).
"""

from __future__ import annotations

import numpy as np
import pytest

from livequant.analysis.cells import compute_cells
from livequant.analysis.polarization import MaterialConstants
from livequant.analysis.strain import local_lattice, reference_basis, strain_from_corners
from tests.analysis.test_cells_synthetic import lattice_for, make_columns, perovskite

PX = 10.0
A_PX = 20.0  # 200 pm cells keep the frames small; the geometry does not care


def _ideal_centres(cells, a_px=A_PX, origin=15.0):
    # Ideal (undeformed) centre of cell (i, j) in pixels along x and y.
    return origin + (cells.i + 0.5) * a_px, origin + (cells.j + 0.5) * a_px


def test_linear_strain_gradient_is_recovered():
    # Analytic field: u_x = e0 (x - x0) + k (x - x0)^2 / 2, so exx(x) = e0 + k (x - x0); the
    # mean of two cell edges samples u' at the cell centre exactly for a quadratic u.
    e0, k, x0 = -0.004, 2.0e-4, 100.0  # k per pixel: exx runs from -0.022 to +0.040
    field = lambda r: np.column_stack([np.zeros(len(r)),
                                       e0 * (r[:, 1] - x0) + k * (r[:, 1] - x0) ** 2 / 2])
    sites = perovskite(16, 6, a_xy_px=(A_PX, 0), b_xy_px=(0, A_PX), field=field)
    mat = MaterialConstants("cubic-200pm", A_PX * PX, A_PX * PX)
    cells = compute_cells(make_columns(sites), lattice_for(), pixel_size_pm=PX, material=mat,
                          reference="material")
    xc, _ = _ideal_centres(cells)
    np.testing.assert_allclose(cells.exx, e0 + k * (xc - x0), atol=1e-9)
    np.testing.assert_allclose(cells.eyy, 0.0, atol=1e-9)
    np.testing.assert_allclose(cells.exy, 0.0, atol=1e-9)
    np.testing.assert_allclose(cells.a_pm, A_PX * PX * (1 + e0 + k * (xc - x0)), rtol=1e-9)


def test_pto_tetragonality_and_handbook_reference():
    # Check 2: a = 389.87 pm, c = 413.80 pm -> c/a = 1.0614 +- 0.002 from noisy columns
    # (0.05 px = 0.5 pm per coordinate), and zero strain against the handbook cell.
    rng = np.random.default_rng(7)
    a_px, c_px = 389.87 / PX, 413.80 / PX
    sites = perovskite(10, 8, a_xy_px=(a_px, 0), b_xy_px=(0, c_px))
    pto = MaterialConstants("PbTiO3", 389.87, 413.80)
    cells = compute_cells(make_columns(sites, sigma_px=0.05, rng=rng),
                          lattice_for((a_px, 0), (0, c_px)), pixel_size_pm=PX, material=pto,
                          reference="material")
    assert np.median(cells.c_over_a) == pytest.approx(1.0614, abs=0.002)
    assert np.median(cells.a_pm) == pytest.approx(389.87, abs=0.5)
    assert np.median(cells.b_pm) == pytest.approx(413.80, abs=0.5)
    assert abs(np.median(cells.exx)) < 1e-3 and abs(np.median(cells.eyy)) < 1e-3
    ref = cells.summary()["reference"]
    assert ref["b_pm"] == pytest.approx(413.80)  # b took c: |b|/|a| is near c/a, not 1
    # A 90-degree domain (long axis along a) reads b/a < 1 but the same c/a.
    rot = perovskite(6, 6, a_xy_px=(c_px, 0), b_xy_px=(0, a_px))
    cells2 = compute_cells(make_columns(rot), lattice_for((c_px, 0), (0, a_px)),
                           pixel_size_pm=PX)
    np.testing.assert_allclose(cells2.c_over_a, 413.80 / 389.87, rtol=1e-9)
    np.testing.assert_allclose(cells2.b_over_a, 389.87 / 413.80, rtol=1e-9)


def test_rotation_sign_follows_the_lattice_orientation():
    # A lattice turned by +2 deg from +x towards +y (the sense of Lattice.orientation_deg)
    # against the unrotated basis: rotation +2 deg, and eps = (R + R^T)/2 - I = cos(2 deg) - 1.
    th = np.radians(2.0)
    sites = perovskite(3, 3, a_xy_px=(A_PX * np.cos(th), A_PX * np.sin(th)),
                       b_xy_px=(-A_PX * np.sin(th), A_PX * np.cos(th)))
    a = sites.positions_px[sites.sublattice == "A"].reshape(3, 3, 2)
    a4 = np.stack([a[0, 0], a[1, 0], a[0, 1], a[1, 1]])[None]
    st = strain_from_corners(a4, np.full_like(a4, 0.01), np.eye(2) * A_PX)
    assert st.rotation_deg[0] == pytest.approx(2.0, abs=1e-9)
    assert st.exx[0] == pytest.approx(np.cos(th) - 1, abs=1e-12)
    assert st.exy[0] == pytest.approx(0.0, abs=1e-12)


def test_region_reference_measures_against_the_selected_cells():
    # Unstrained on the left (x < 110 px), 1 % tensile along x on the right: with the left as
    # the reference region the right reads exx = 0.0100; the frame median would not.
    xb = 110.0
    field = lambda r: np.column_stack([np.zeros(len(r)), 0.01 * np.clip(r[:, 1] - xb, 0, None)])
    sites = perovskite(14, 5, field=field)
    cols = make_columns(sites)
    mask = np.zeros((200, 400), bool)
    mask[:, :100] = True
    cells = compute_cells(cols, lattice_for(), pixel_size_pm=PX, reference=mask)
    xc, _ = _ideal_centres(cells)
    right = xc - A_PX / 2 >= xb
    left = xc + A_PX / 2 <= xb
    np.testing.assert_allclose(cells.exx[right], 0.01, atol=1e-9)
    np.testing.assert_allclose(cells.exx[left], 0.0, atol=1e-9)
    assert "region" in cells.summary()["reference"]["description"]
    median = compute_cells(cols, lattice_for(), pixel_size_pm=PX)
    assert abs(np.median(median.exx[left])) > 1e-3


def test_reference_errors_are_specific():
    sites = perovskite(4, 4)
    cols = make_columns(sites)
    with pytest.raises(ValueError, match="needs `material`"):
        compute_cells(cols, lattice_for(), pixel_size_pm=PX, reference="material")
    with pytest.raises(ValueError, match="no complete cell"):
        compute_cells(cols, lattice_for(), pixel_size_pm=PX, reference=np.zeros((5, 5), bool))
    with pytest.raises(ValueError, match="must be 'median'"):
        compute_cells(cols, lattice_for(), pixel_size_pm=PX, reference="substrate")
    with pytest.raises(ValueError, match="boolean mask"):
        compute_cells(cols, lattice_for(), pixel_size_pm=PX, reference=np.zeros((5, 5)))
    with pytest.raises(ValueError, match="pixel_size_pm"):
        compute_cells(cols, lattice_for(), pixel_size_pm=0.0)
    loc = local_lattice(np.zeros((1, 4, 2)), np.zeros((1, 4, 2)), pixel_size_pm=PX)
    with pytest.raises(ValueError, match="singular"):
        strain_from_corners(np.zeros((1, 4, 2)), np.zeros((1, 4, 2)), np.ones((2, 2)))
    with pytest.raises(ValueError, match="cell_mask"):
        reference_basis(loc, reference="region")


def test_strain_and_lattice_pulls_are_calibrated():
    # Monte Carlo over noisy column sets with sigma = 0.1 px: std of (estimate - truth) / sigma
    # in [0.8, 1.25] for every propagated quantity (issue 4 acceptance). The truth is the
    # tetragonal cell a = 20 px, c = 21.2 px, against the exact handbook reference.
    rng = np.random.default_rng(99)
    c_px = 21.2
    mat = MaterialConstants("tetragonal", A_PX * PX, c_px * PX)
    truth = {"exx": 0.0, "eyy": 0.0, "exy": 0.0, "rotation_deg": 0.0, "a_pm": A_PX * PX,
             "b_pm": c_px * PX, "c_over_a": c_px / A_PX, "b_over_a": c_px / A_PX}
    pulls = {k: [] for k in truth}
    for _ in range(60):
        sites = perovskite(6, 6, a_xy_px=(A_PX, 0), b_xy_px=(0, c_px))
        cells = compute_cells(make_columns(sites, sigma_px=0.1, rng=rng),
                              lattice_for((A_PX, 0), (0, c_px)), pixel_size_pm=PX,
                              material=mat, reference="material")
        for k, t in truth.items():
            pulls[k].append((getattr(cells, k) - t) / getattr(cells, "sigma_" + k))
    for k, v in pulls.items():
        v = np.concatenate(v)
        assert 0.8 < np.std(v) < 1.25, k
