"""Synthetic perovskite [001] lattices with known answers, for the descriptor tests.

``perovskite`` lays out A, B, Oa and Ob sites (the site convention of
``livequant.analysis.types``) under an analytic displacement field;
``make_columns`` turns them into :class:`Columns` with Gaussian position noise
of a known sigma; ``render`` draws them as a sum of Gaussians with optional
Poisson noise.  The tests at the bottom check the helpers themselves.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from livequant.analysis.types import Columns, Lattice, readonly


@dataclass
class Sites:
    positions_px: np.ndarray     # (N, 2) true (row, col)
    sublattice: np.ndarray       # (N,) str
    ij: np.ndarray               # (N, 2) int
    ideal_px: np.ndarray         # (N, 2) before any displacement


_OFFSETS = {"A": (0.0, 0.0), "B": (0.5, 0.5), "Oa": (0.5, 0.0), "Ob": (0.0, 0.5)}


def perovskite(ni, nj, *, a_xy_px=(20.0, 0.0), b_xy_px=(0.0, 20.0), origin_px=(15.0, 15.0),
               field=None, b_shift=None, o_shift=None, oxygen=False) -> Sites:
    """Sites of an ni x nj block of cells.

    Parameters
    ----------
    a_xy_px, b_xy_px : basis vectors in (x, y) = (col, row) pixels.
    field : callable (N, 2) row/col -> (N, 2) row/col displacement of every site.
    b_shift : callable (N, 2) ideal B row/col -> (N, 2) extra B-site displacement (row, col).
    o_shift : callable (ij, sublattice, ideal) -> (N, 2) extra O displacement (row, col).
    """
    a = np.array([a_xy_px[1], a_xy_px[0]], float)  # (d_row, d_col)
    b = np.array([b_xy_px[1], b_xy_px[0]], float)
    labels = ["A", "B"] + (["Oa", "Ob"] if oxygen else [])
    pos, lab, ijs = [], [], []
    ii, jj = np.meshgrid(np.arange(ni), np.arange(nj), indexing="ij")
    ii, jj = ii.ravel(), jj.ravel()
    for name in labels:
        fa, fb = _OFFSETS[name]
        pos.append(np.asarray(origin_px) + (ii + fa)[:, None] * a + (jj + fb)[:, None] * b)
        lab += [name] * ii.size
        ijs.append(np.column_stack([ii, jj]))
    ideal = np.concatenate(pos)
    lab = np.array(lab)
    ij = np.concatenate(ijs)
    true = ideal.copy()
    if field is not None:
        true = true + field(ideal)
    if b_shift is not None:
        sel = lab == "B"
        true[sel] += b_shift(ideal[sel])
    if o_shift is not None:
        sel = np.isin(lab, ["Oa", "Ob"])
        true[sel] += o_shift(ij[sel], lab[sel], ideal[sel])
    return Sites(positions_px=true, sublattice=lab, ij=ij, ideal_px=ideal)


def make_columns(sites: Sites, *, sigma_px=0.0, rng=None, amplitude=None) -> Columns:
    """Columns at the true positions plus N(0, sigma_px) noise, reporting sigma_px."""
    n = len(sites.sublattice)
    pos = sites.positions_px.copy()
    if sigma_px > 0:
        pos = pos + rng.normal(0.0, sigma_px, size=pos.shape)
    sig = np.full((n, 2), sigma_px if sigma_px > 0 else 1e-6)
    if amplitude is None:
        amplitude = np.where(sites.sublattice == "A", 1000.0,
                             np.where(sites.sublattice == "B", 400.0, 100.0))
    return Columns(
        positions_px=readonly(pos), sigma_positions_px=readonly(sig),
        amplitude=readonly(np.asarray(amplitude, float)),
        sigma_amplitude=readonly(np.full(n, 5.0)),
        width_px=readonly(np.full((n, 2), 2.0)), width_angle_deg=readonly(np.zeros(n)),
        background=readonly(np.zeros(n)), sublattice=readonly(sites.sublattice),
        ij=readonly(sites.ij.astype(np.int64)), converged=readonly(np.ones(n, bool)),
        reduced_chi2=readonly(np.ones(n)))


def lattice_for(a_xy_px=(20.0, 0.0), b_xy_px=(0.0, 20.0), origin_px=(15.0, 15.0)) -> Lattice:
    basis = np.array([[a_xy_px[1], a_xy_px[0]], [b_xy_px[1], b_xy_px[0]]], float)
    return Lattice(basis_px=basis, sigma_basis_px=np.full((2, 2), 1e-3),
                   origin_px=np.asarray(origin_px, float), quality=100.0, method="columns")


def render(sites: Sites, shape, *, width_px=2.5, peak=None, background=0.0, rng=None):
    """Sum of round Gaussians at the true positions; Poisson noise when `rng` is given."""
    if peak is None:
        peak = {"A": 1000.0, "B": 400.0, "Oa": 60.0, "Ob": 60.0}
    h, w = shape
    img = np.full(shape, float(background))
    half = int(np.ceil(5 * width_px))
    for (r, c), lab in zip(sites.positions_px, sites.sublattice):
        r0, c0 = int(round(r)), int(round(c))
        rs = slice(max(r0 - half, 0), min(r0 + half + 1, h))
        cs = slice(max(c0 - half, 0), min(c0 + half + 1, w))
        if rs.start >= rs.stop or cs.start >= cs.stop:
            continue
        yy, xx = np.mgrid[rs, cs]
        img[rs, cs] += peak[lab] * np.exp(-((yy - r) ** 2 + (xx - c) ** 2) / (2 * width_px**2))
    if rng is not None:
        img = rng.poisson(img).astype(float)
    return img


# ------------------------------------------------------------------ helper checks


def test_perovskite_site_convention():
    # Site convention of livequant.analysis.types: B at (i + 1/2) a + (j + 1/2) b.
    s = perovskite(2, 2, a_xy_px=(20.0, 0.0), b_xy_px=(0.0, 18.0), origin_px=(5.0, 7.0),
                   oxygen=True)
    b00 = s.positions_px[(s.sublattice == "B") & (s.ij[:, 0] == 0) & (s.ij[:, 1] == 0)][0]
    oa = s.positions_px[(s.sublattice == "Oa") & (s.ij[:, 0] == 1) & (s.ij[:, 1] == 0)][0]
    np.testing.assert_allclose(b00, [5.0 + 9.0, 7.0 + 10.0])
    np.testing.assert_allclose(oa, [5.0, 7.0 + 30.0])


def test_render_peak_is_where_the_site_is():
    s = perovskite(1, 1, origin_px=(10.3, 12.6))
    img = render(s, (40, 40), width_px=2.0)
    r, c = np.unravel_index(np.argmax(img), img.shape)
    assert (r, c) == (10, 13)
    assert img[r, c] > 900
