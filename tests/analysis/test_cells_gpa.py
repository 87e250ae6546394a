"""Strain by geometric phase analysis (Hytch, Snoeck & Kilaas, Ultramicroscopy 74, 131 (1998)).

Sources: CHECK-VALUES.md section 5 and suggested check 9 (SrTiO3 a = 390.53 pm, IUCr sh5025;
phase relation P_g = -2 pi g . u, Rouviere & Sarigiannidou 2005).
"""

from __future__ import annotations

import numpy as np
import pytest

from livequant.analysis.cells import compute_cells
from livequant.analysis.gpa import gpa_strain
from livequant.analysis.polarization import MaterialConstants
from tests.analysis.test_cells_synthetic import lattice_for, make_columns, perovskite, render

PX = 20.0                 # pm per pixel
A_STO = 390.53 / PX       # SrTiO3 lattice parameter in pixels (IUCr sh5025, 293 K)
SIZE = 320


def _frame(a_xy, b_xy, *, field=None, rng=None):
    sites = perovskite(20, 20, a_xy_px=a_xy, b_xy_px=b_xy, origin_px=(-20.0, -20.0), field=field)
    return sites, render(sites, (SIZE, SIZE), width_px=2.5, background=20.0, rng=rng)


def _interior(res):
    # Grid nodes farther than the margin from every edge.
    ny, nx = res.exx.shape
    rows = np.arange(ny)[:, None] * res.step_px[0]
    cols = np.arange(nx)[None, :] * res.step_px[1]
    m = res.margin_px
    return (rows >= m) & (rows <= SIZE - 1 - m) & (cols >= m) & (cols <= SIZE - 1 - m)


def test_uniform_one_percent_strain():
    # Check 9: 1.00 % tensile along x -> exx = 0.0100 +- 0.0005, eyy = 0 +- 0.0005,
    # rotation 0 +- 0.05 deg; phase slope of g = (100): -2 pi eps / a = -0.161 rad/nm to first
    # order (CHECK-VALUES section 5).  The exact slope is 2 pi (1/(1.01 a) - 1/a) = -0.1593
    # rad/nm, 1 % below the first-order number; both are checked.
    rng = np.random.default_rng(5)
    _, img = _frame((A_STO * 1.01, 0.0), (0.0, A_STO), rng=rng)
    basis = np.array([[0.0, A_STO], [A_STO, 0.0]])  # unstrained SrTiO3 as the reference
    res = gpa_strain(img, basis)
    inner = _interior(res)
    assert inner.sum() > 50
    assert np.mean(res.exx[inner]) == pytest.approx(0.0100, abs=0.0005)
    assert np.all(np.abs(res.exx[inner] - 0.01) < 0.002)
    assert abs(np.mean(res.eyy[inner])) < 0.0005
    assert abs(np.mean(res.rotation_deg[inner])) < 0.05
    slope_rad_per_nm = np.mean(res.phase_gradient_per_px[0, ..., 0][inner]) / PX * 1000.0
    assert slope_rad_per_nm == pytest.approx(-0.161, abs=0.003)
    exact = 2 * np.pi * (1 / (1.01 * 390.53) - 1 / 390.53) * 1000.0
    assert slope_rad_per_nm == pytest.approx(exact, rel=0.005)


def test_pure_rotation():
    # Check 9: a rigid 1 deg rotation gives eps = 0 and omega = 1 deg (+- 0.05 deg); positive
    # from +x towards +y, the sense of Lattice.orientation_deg.
    th = np.radians(1.0)
    _, img = _frame((A_STO * np.cos(th), A_STO * np.sin(th)),
                    (-A_STO * np.sin(th), A_STO * np.cos(th)), rng=np.random.default_rng(6))
    res = gpa_strain(img, np.array([[0.0, A_STO], [A_STO, 0.0]]))
    inner = _interior(res)
    assert np.mean(res.rotation_deg[inner]) == pytest.approx(1.0, abs=0.05)
    for name in ("exx", "eyy", "exy"):
        assert abs(np.mean(getattr(res, name)[inner])) < 0.0005, name


def test_column_strain_and_gpa_agree_on_a_synthetic_field():
    # Analytic field (rows, cols): u_y = 0.003 x (shear + rotation), u_x = 0.002 x + k x^2 / 2
    # (a strain gradient); the same frame analysed from its columns and by GPA, against the
    # same handbook reference, must agree cell by cell to within the Poisson noise of GPA.
    x0, k = SIZE / 2, 6e-5

    def field(r):
        x = r[:, 1] - x0
        return np.column_stack([0.003 * x, 0.002 * x + k * x**2 / 2])

    sites, img = _frame((A_STO, 0.0), (0.0, A_STO), field=field, rng=np.random.default_rng(8))
    sto = MaterialConstants("SrTiO3", 390.53, 390.53)
    cells = compute_cells(make_columns(sites), lattice_for((A_STO, 0), (0, A_STO), (-20, -20)),
                          pixel_size_pm=PX, material=sto, reference="material", image=img)
    ok = np.isfinite(cells.gpa_exx)
    assert ok.sum() >= 50
    assert np.ptp(cells.exx[ok]) > 0.008  # the gradient spans a real range
    for name, tol in (("exx", 2e-3), ("eyy", 2e-3), ("exy", 2e-3), ("rotation_deg", 0.1)):
        diff = cells.values["gpa_" + name][ok] - cells.values[name][ok]
        assert np.max(np.abs(diff)) < tol, name
        assert abs(np.median(diff)) < tol / 4, name
    info = cells.summary()["gpa"]
    assert info["computed"] and info["n_cells_inside"] == ok.sum()


def test_gpa_input_errors():
    basis = np.array([[0.0, 10.0], [10.0, 0.0]])
    with pytest.raises(ValueError, match="2D"):
        gpa_strain(np.zeros(50), basis)
    img = np.zeros((64, 64))
    img[3, 3] = np.nan
    with pytest.raises(ValueError, match="NaN"):
        gpa_strain(img, basis)
    with pytest.raises(ValueError, match="parallel"):
        gpa_strain(np.zeros((64, 64)), np.array([[0.0, 10.0], [0.0, 20.0]]))
    with pytest.raises(ValueError, match="non-collinear"):
        gpa_strain(np.zeros((64, 64)), basis, reflections=((1, 0), (2, 0)))
    with pytest.raises(ValueError, match="mask_sigma_fraction"):
        gpa_strain(np.zeros((64, 64)), basis, mask_sigma_fraction=0.6)
    with pytest.raises(ValueError, match="Nyquist"):
        gpa_strain(np.zeros((64, 64)), np.array([[0.0, 1.5], [1.5, 0.0]]))


def test_gpa_follows_the_cell_axes_not_the_reported_basis():
    # An equivalent lattice basis (a + b, b) must not change the per-cell GPA strain: the
    # reflections are taken from the indexed cells, the same axes the reference describes.
    x0 = SIZE / 2

    def field(r):
        return np.column_stack([np.zeros(len(r)), 0.004 * (r[:, 1] - x0)])

    sites, img = _frame((A_STO, 0.0), (0.0, A_STO), field=field, rng=np.random.default_rng(9))
    cols = make_columns(sites)
    plain = lattice_for((A_STO, 0), (0, A_STO), (-20, -20))
    skew = lattice_for((A_STO, A_STO), (0, A_STO), (-20, -20))
    c1 = compute_cells(cols, plain, pixel_size_pm=PX, image=img)
    c2 = compute_cells(cols, skew, pixel_size_pm=PX, image=img)
    ok = np.isfinite(c1.gpa_exx)
    assert ok.sum() > 30
    np.testing.assert_allclose(c2.gpa_exx, c1.gpa_exx, atol=1e-9, equal_nan=True)
    assert abs(np.median(c1.gpa_exx[ok] - c1.exx[ok])) < 5e-4


def test_the_stacked_2x2_inverse_matches_numpy():
    """Reference: ``np.linalg.inv`` on the same stack (LU with pivoting)."""
    from livequant.analysis.gpa import _inverse_2x2

    rng = np.random.default_rng(6)
    m = rng.normal(size=(40, 30, 2, 2)) + 3.0 * np.eye(2)  # conditioned like local g's
    assert np.allclose(_inverse_2x2(m), np.linalg.inv(m), rtol=1e-12, atol=1e-14)
    singular = np.ones((1, 2, 2))
    assert not np.isfinite(_inverse_2x2(singular)).any()


def test_the_single_precision_transform_moves_no_strain(monkeypatch):
    """GPA transforms the frame in single precision.  Reference: the same
    analysis with a double-precision transform (scipy's rfft2 on float64);
    the maps agree to 1e-7 in strain, four orders below the 0.05 % a strain
    map resolves."""
    from livequant.analysis import gpa

    rng = np.random.default_rng(8)
    _, img = _frame((A_STO * 1.01, 0.0), (0.0, A_STO), rng=rng)
    basis = np.array([[0.0, A_STO], [A_STO, 0.0]])
    single = gpa_strain(img, basis)
    rfft2 = gpa.sp_fft.rfft2

    class _Double:
        @staticmethod
        def rfft2(x, workers=None):
            return rfft2(np.asarray(x, dtype=np.float64), workers=workers)

    monkeypatch.setattr(gpa, "sp_fft", _Double)
    double = gpa_strain(img, basis)
    for name in ("exx", "eyy", "exy"):
        assert np.nanmax(np.abs(getattr(single, name) - getattr(double, name))) < 1e-7
    assert np.nanmax(np.abs(single.rotation_deg - double.rotation_deg)) < 1e-5
