"""Local lattice parameters and the strain tensor from the A-site columns.

Each unit cell ``(i, j)`` is the plaquette of A columns ``A(i, j)``,
``A(i+1, j)``, ``A(i, j+1)``, ``A(i+1, j+1)`` (the B column sits at its
centre).  Its local basis vectors are the means of the two parallel edges:

    a_loc = (A(i+1, j) - A(i, j) + A(i+1, j+1) - A(i, j+1)) / 2
    b_loc = (A(i, j+1) - A(i, j) + A(i+1, j+1) - A(i+1, j)) / 2

Against a reference basis ``R = [a_ref b_ref]`` (columns, (x, y)), the
deformation gradient is ``F = [a_loc b_loc] R^-1`` and the distortion
``e = F - I``; the strain is ``eps = (e + e^T) / 2`` and the local rotation
``omega = atan2(F_yx - F_xy, F_xx + F_yy)`` (about ``(e_yx - e_xy) / 2`` for
small distortions).  This is the same lattice-vector definition that geometric
phase analysis gives (:mod:`livequant.analysis.gpa`), so the two can be
compared cell by cell.

Sign convention: x = image column, y = image row (pointing down on the
screen).  A positive rotation turns ``a`` from +x towards +y, the sense of
:attr:`Lattice.orientation_deg`; on a screen with row 0 at the top that is
clockwise.

All uncertainties are linear (Jacobian) propagation of the independent
column-position sigmas; the reference basis is taken as exact (it is a median
over many cells, or a handbook value).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["LocalLattice", "Strain", "local_lattice", "strain_from_corners", "reference_basis",
           "CORNER_OFFSETS"]

#: Cell-index offsets of the four A corners, in the order used throughout.
CORNER_OFFSETS = np.array([[0, 0], [1, 0], [0, 1], [1, 1]])
_ALPHA = np.array([-0.5, 0.5, -0.5, 0.5])   # weights of the corners in a_loc
_BETA = np.array([-0.5, -0.5, 0.5, 0.5])    # weights of the corners in b_loc


@dataclass(frozen=True)
class LocalLattice:
    """Local basis of every cell, with lengths in pm.

    ``a_xy_px``/``b_xy_px`` are the local vectors in ``(x, y)`` pixels.
    ``b_over_a`` keeps the frame's labelling of the axes (it drops below 1 in
    a domain whose long axis lies along ``a``); ``c_over_a`` is the
    orientation-free tetragonality ``max(|a|, |b|) / min(|a|, |b|)``.
    """

    a_xy_px: np.ndarray
    b_xy_px: np.ndarray
    a_pm: np.ndarray
    sigma_a_pm: np.ndarray
    b_pm: np.ndarray
    sigma_b_pm: np.ndarray
    b_over_a: np.ndarray
    sigma_b_over_a: np.ndarray
    c_over_a: np.ndarray
    sigma_c_over_a: np.ndarray


@dataclass(frozen=True)
class Strain:
    """Strain tensor and local rotation per cell against one reference basis."""

    exx: np.ndarray
    sigma_exx: np.ndarray
    eyy: np.ndarray
    sigma_eyy: np.ndarray
    exy: np.ndarray
    sigma_exy: np.ndarray
    rotation_deg: np.ndarray
    sigma_rotation_deg: np.ndarray


def _corners_xy(a4_px, sigma_a4_px):
    a4 = np.asarray(a4_px, float)
    sa4 = np.asarray(sigma_a4_px, float)
    if a4.ndim != 3 or a4.shape[1:] != (4, 2) or sa4.shape != a4.shape:
        raise ValueError(f"`a4_px` and `sigma_a4_px` must both have shape (N, 4, 2), got "
                         f"{a4.shape} and {sa4.shape}")
    return a4[..., ::-1], sa4[..., ::-1]


def local_lattice(a4_px, sigma_a4_px, *, pixel_size_pm) -> LocalLattice:
    """Local basis vectors and lattice parameters of each cell.

    Parameters
    ----------
    a4_px, sigma_a4_px : array_like, shape (N, 4, 2)
        ``(row, col)`` of the A corners in :data:`CORNER_OFFSETS` order, and
        their one-sigma uncertainties, pixels.
    pixel_size_pm : float

    Returns
    -------
    LocalLattice
    """
    p, s = _corners_xy(a4_px, sigma_a4_px)
    px = float(pixel_size_pm)
    a = np.einsum("c,ncd->nd", _ALPHA, p)
    b = np.einsum("c,ncd->nd", _BETA, p)
    la, lb = np.hypot(*a.T), np.hypot(*b.T)
    with np.errstate(invalid="ignore", divide="ignore"):
        na, nb = a / la[:, None], b / lb[:, None]
        # d|a| = sum_c alpha_c n_a . dp_c, with independent x and y errors.
        var_la = np.einsum("c,ncd->n", _ALPHA**2, na[:, None, :] ** 2 * s**2)
        var_lb = np.einsum("c,ncd->n", _BETA**2, nb[:, None, :] ** 2 * s**2)
        # r = |b| / |a|; dr / r = sum_c dp_c . (beta_c n_b / |b| - alpha_c n_a / |a|); the two
        # lengths share corners, so propagate through the corners, not the lengths.
        coef = (_BETA[None, :, None] * nb[:, None, :] / lb[:, None, None]
                - _ALPHA[None, :, None] * na[:, None, :] / la[:, None, None])
        ratio = lb / la
        sig_ratio = ratio * np.sqrt(np.sum(coef**2 * s**2, axis=(1, 2)))
        c_over_a = np.where(ratio >= 1, ratio, 1.0 / ratio)
        sig_c_over_a = c_over_a * sig_ratio / ratio
    return LocalLattice(a_xy_px=a, b_xy_px=b, a_pm=la * px, sigma_a_pm=np.sqrt(var_la) * px,
                        b_pm=lb * px, sigma_b_pm=np.sqrt(var_lb) * px, b_over_a=ratio,
                        sigma_b_over_a=sig_ratio, c_over_a=c_over_a, sigma_c_over_a=sig_c_over_a)


def strain_from_corners(a4_px, sigma_a4_px, reference_xy_px) -> Strain:
    """Strain tensor and rotation of each cell against `reference_xy_px`.

    Parameters
    ----------
    a4_px, sigma_a4_px : array_like, shape (N, 4, 2)
        A corners, ``(row, col)`` pixels, :data:`CORNER_OFFSETS` order.
    reference_xy_px : array_like, shape (2, 2)
        Reference basis as columns ``[a_ref b_ref]`` in ``(x, y)`` pixels
        (see :func:`reference_basis`).

    Returns
    -------
    Strain
    """
    p, s = _corners_xy(a4_px, sigma_a4_px)
    ref = np.asarray(reference_xy_px, float)
    if ref.shape != (2, 2) or not np.all(np.isfinite(ref)):
        raise ValueError(f"`reference_xy_px` must be a finite (2, 2) basis, got {ref!r}")
    det = np.linalg.det(ref)
    if abs(det) < 1e-9 * np.sum(ref**2):
        raise ValueError("`reference_xy_px` is singular: its two basis vectors are parallel")
    rinv = np.linalg.inv(ref)
    # F_ij = sum_c p_ci gamma_cj: F is linear in the corner positions.
    gamma = _ALPHA[:, None] * rinv[0][None, :] + _BETA[:, None] * rinv[1][None, :]  # (4, 2)
    f = np.einsum("nci,cj->nij", p, gamma)
    sx2, sy2 = s[..., 0] ** 2, s[..., 1] ** 2
    var_xx = sx2 @ gamma[:, 0] ** 2
    var_yy = sy2 @ gamma[:, 1] ** 2
    var_shear = (sx2 @ gamma[:, 1] ** 2 + sy2 @ gamma[:, 0] ** 2) / 4.0
    rot = np.arctan2(f[:, 1, 0] - f[:, 0, 1], f[:, 0, 0] + f[:, 1, 1])
    return Strain(exx=f[:, 0, 0] - 1.0, sigma_exx=np.sqrt(var_xx),
                  eyy=f[:, 1, 1] - 1.0, sigma_eyy=np.sqrt(var_yy),
                  exy=(f[:, 0, 1] + f[:, 1, 0]) / 2.0, sigma_exy=np.sqrt(var_shear),
                  rotation_deg=np.degrees(rot), sigma_rotation_deg=np.degrees(np.sqrt(var_shear)))


def reference_basis(local: LocalLattice, *, reference="median", pixel_size_pm=None,
                    material=None, cell_mask=None) -> tuple[np.ndarray, str]:
    """Choose the reference basis the strain is measured against.

    Parameters
    ----------
    local : LocalLattice
    reference : {"median", "material", "region"}
        ``"median"``: component-wise median of the local basis over all cells.
        ``"region"``: the same median over the cells where `cell_mask` is
        true (a substrate, a region the user marked).  ``"material"``: the
        handbook lattice parameters of `material`, laid along the frame's
        median directions (``b`` at right angles to ``a``, keeping the
        frame's handedness); ``b`` takes ``c_pm`` when the frame's median
        ``|b|/|a|`` is closer to ``c/a`` than to 1, else ``a_pm``.
    pixel_size_pm : float
        Needed for ``"material"``.
    material : MaterialConstants-like
        Needs ``a_pm`` and ``c_pm``.
    cell_mask : array_like of bool, shape (N,)
        Needed for ``"region"``.

    Returns
    -------
    reference_xy_px : ndarray, shape (2, 2)
        Columns ``[a_ref b_ref]``, ``(x, y)`` pixels.
    description : str
        What was used, for the summary.
    """
    a, b = local.a_xy_px, local.b_xy_px
    finite = np.all(np.isfinite(a), axis=1) & np.all(np.isfinite(b), axis=1)
    if reference == "region":
        if cell_mask is None:
            raise ValueError("`reference='region'` needs `cell_mask` (which cells are reference)")
        cell_mask = np.asarray(cell_mask, bool)
        if cell_mask.shape != finite.shape:
            raise ValueError(f"`cell_mask` must have one entry per cell ({finite.shape[0]}), "
                             f"got shape {cell_mask.shape}")
        finite = finite & cell_mask
        if not finite.any():
            raise ValueError("the reference region holds no complete cell; select a larger "
                             "region or use reference='median'")
    elif reference not in ("median", "material"):
        raise ValueError(f"`reference` must be 'median', 'material' or a region mask, got "
                         f"{reference!r}")
    if not finite.any():
        raise ValueError("no complete cell to define a strain reference")
    a_med = np.median(a[finite], axis=0)
    b_med = np.median(b[finite], axis=0)
    if reference in ("median", "region"):
        n = int(finite.sum())
        return np.column_stack([a_med, b_med]), f"{reference} of {n} cells"
    if material is None or pixel_size_pm is None:
        raise ValueError("`reference='material'` needs `material` (with a_pm, c_pm) and "
                         "`pixel_size_pm`; set analysis.material in the configuration")
    px = float(pixel_size_pm)
    ua = a_med / np.hypot(*a_med)
    hand = np.sign(a_med[0] * b_med[1] - a_med[1] * b_med[0]) or 1.0
    ub = hand * np.array([-ua[1], ua[0]])
    ratio = np.hypot(*b_med) / np.hypot(*a_med)
    tetra = material.c_pm / material.a_pm
    b_len = material.c_pm if abs(ratio - tetra) < abs(ratio - 1.0) else material.a_pm
    ref = np.column_stack([ua * material.a_pm / px, ub * b_len / px])
    return ref, (f"material {getattr(material, 'name', '?')}: a = {material.a_pm} pm, "
                 f"b = {b_len} pm along the frame's median directions")
