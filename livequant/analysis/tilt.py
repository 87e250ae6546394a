"""Octahedral rotation about the viewing axis, from the oxygen columns.

Along [001] each B-O column is surrounded by four pure-O columns half way to
its four B neighbours.  A rotation of the BO6 octahedron by ``phi`` about
[001] moves each of them off the B-B line by ``delta``, and for that bond

    phi = atan(2 delta / |B - B'|),   i.e.  phi = (180 deg - angle B-O-B) / 2

(projected-tilt geometry of the project's check values, section 8: SrTiO3,
``phi = 2.1 deg`` gives ``delta = 7.2 pm``).  The tilt of one cell is the mean
of its four bond angles, each measured from that cell's B column.

Sign convention: positive for a rotation of the O square from +x towards +y in
the (x, y) = (col, row) frame of the image (the sense of
:attr:`Lattice.orientation_deg`).  With y pointing down the rows, as an image is
displayed, that is *clockwise on the screen*; in a right-handed frame with y up
it is a rotation about the beam pointing into the screen.

Neighbouring octahedra share their O corners, so within one layer a rotation
about the beam alternates from cell to cell: a checkerboard of +phi / -phi;
``staggered`` multiplies by ``(-1)^(i + j)`` so that it reads as one uniform
value (its sign depends on which cell the indexing starts from).  What the
projection shows depends on how the layers along the beam stack (Glazer,
Acta Cryst. B28, 3384 (1972)): an in-phase rotation (a0a0c+) keeps the same
sign in every layer of a column and shows the full +phi / -phi checkerboard; an
antiphase rotation about the viewing axis (a0a0c-) alternates layer by layer,
so each projected O column holds +delta and -delta atoms and reads as no net
rotation -- only elongated O columns.  (Checked against multislice frames of
both stackings, ``tests/analysis/test_multislice_accuracy.py``; the project's
check values, section 12.)

Only meaningful where the O columns are imaged (ABF, inverted BF) and
resolved.  Uncertainties: linear propagation from all nine columns involved
(the centre B, four B neighbours, four O columns).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Tilt", "octahedral_tilt", "O_DETECTORS", "NEIGHBOUR_OFFSETS"]

#: Detectors that image the oxygen columns (compared upper-case).
O_DETECTORS = frozenset({"ABF", "BF", "IBF", "IABF", "INVERTED-BF", "INVERTED-ABF", "IDPC"})

#: For B cell (i, j): (offset of the neighbouring B cell, O sublattice, offset of that O column).
#: Ob(i+1, j) lies half way to B(i+1, j); Ob(i, j) to B(i-1, j); Oa(i, j+1) to B(i, j+1);
#: Oa(i, j) to B(i, j-1) -- the site convention of livequant.analysis.types.
NEIGHBOUR_OFFSETS = (((1, 0), "Ob", (1, 0)), ((-1, 0), "Ob", (0, 0)),
                     ((0, 1), "Oa", (0, 1)), ((0, -1), "Oa", (0, 0)))


@dataclass(frozen=True)
class Tilt:
    """Octahedral rotation per cell, degrees."""

    tilt_deg: np.ndarray
    sigma_tilt_deg: np.ndarray
    staggered_deg: np.ndarray


def _perp(v):
    return np.stack([-v[..., 1], v[..., 0]], axis=-1)


def octahedral_tilt(b_px, sigma_b_px, bn_px, sigma_bn_px, o_px, sigma_o_px, *, ij) -> Tilt:
    """Rotation of the O square around each B column.

    Parameters
    ----------
    b_px, sigma_b_px : array_like, shape (N, 2)
        ``(row, col)`` of each cell's B column and its sigma, pixels.
    bn_px, sigma_bn_px : array_like, shape (N, 4, 2)
        The four neighbouring B columns (order of :data:`NEIGHBOUR_OFFSETS`).
    o_px, sigma_o_px : array_like, shape (N, 4, 2)
        The O column between the cell's B and each neighbour, same order.
    ij : array_like of int, shape (N, 2)
        Cell indices, for the checkerboard sign.

    Returns
    -------
    Tilt
        NaN where any of the nine columns is missing.
    """
    # (x, y) frame: the sign of the cross product then follows the x -> y sense.
    b = np.asarray(b_px, float)[:, None, ::-1]
    sb = np.asarray(sigma_b_px, float)[:, ::-1]
    bn = np.asarray(bn_px, float)[..., ::-1]
    sbn = np.asarray(sigma_bn_px, float)[..., ::-1]
    o = np.asarray(o_px, float)[..., ::-1]
    so = np.asarray(sigma_o_px, float)[..., ::-1]
    if bn.shape != o.shape or bn.shape[1:] != (4, 2) or b.shape[0] != bn.shape[0]:
        raise ValueError(f"`bn_px` and `o_px` must be (N, 4, 2) with N = len(b_px); got "
                         f"{bn.shape}, {o.shape} for N = {b.shape[0]}")
    v = bn - b                      # B -> B' (N, 4, 2)
    w = o - b                       # B -> O
    v2 = np.sum(v**2, axis=-1)
    cross = v[..., 0] * w[..., 1] - v[..., 1] * w[..., 0]
    g = 2.0 * cross / v2            # = 2 delta / |v|
    phi = np.arctan(g)
    scale = 1.0 / (1.0 + g**2)
    # d cross / d w = perp(v); d cross / d v = -perp(w); d|v|^2 / d v = 2 v.
    j_o = scale[..., None] * 2.0 * _perp(v) / v2[..., None]
    j_bn = scale[..., None] * (-2.0 * _perp(w) / v2[..., None]
                               - 4.0 * cross[..., None] * v / v2[..., None] ** 2)
    j_b = -(j_o + j_bn).sum(axis=1)          # the centre B enters all four bonds
    var = (np.sum(j_o**2 * so**2, axis=(1, 2)) + np.sum(j_bn**2 * sbn**2, axis=(1, 2))
           + np.sum(j_b**2 * sb**2, axis=1)) / 16.0
    tilt = np.degrees(phi.mean(axis=1))
    parity = np.where(np.sum(np.asarray(ij), axis=1) % 2 == 0, 1.0, -1.0)
    return Tilt(tilt_deg=tilt, sigma_tilt_deg=np.degrees(np.sqrt(var)), staggered_deg=tilt * parity)
