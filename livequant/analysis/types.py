"""Result types shared by the analysis stages.

Conventions (see DEVELOPERS.md):

* Positions inside the code are ``(row, col)`` arrays of shape ``(N, 2)`` in
  pixels.  ``x`` is the column axis and ``y`` the row axis; the swap to
  ``x_px, y_px`` happens only where files are written.
* Every estimated quantity travels with its one-sigma uncertainty in a field
  named ``sigma_<quantity>``.
* The results are frozen dataclasses holding read-only numpy arrays, so they
  can cross thread and process boundaries without being changed on the way.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["Lattice", "Columns", "SUBLATTICES", "readonly"]

#: Sublattice labels used for perovskites viewed along [001]: ``A`` cation
#: columns at the cell corners ``origin + i a + j b``; ``B`` cation (B-O)
#: columns at the cell centre ``origin + (i + 1/2) a + (j + 1/2) b``; pure
#: oxygen columns ``Oa`` at ``origin + (i + 1/2) a + j b`` (half way between two
#: A columns along ``a``, and between two B columns along ``b``) and ``Ob`` at
#: ``origin + i a + (j + 1/2) b``.  ``?`` marks a column that fits no site.
SUBLATTICES = ("A", "B", "Oa", "Ob", "?")


def readonly(array, dtype=None) -> np.ndarray:
    """Return a C-contiguous copy-if-needed of `array` with its write flag off."""
    out = np.ascontiguousarray(array, dtype=dtype)
    if out.flags.writeable:
        if out.base is not None or not out.flags.owndata:
            out = out.copy()
        out.flags.writeable = False
    return out


@dataclass(frozen=True)
class Lattice:
    """The two in-plane basis vectors of a frame's lattice.

    Attributes
    ----------
    basis_px : ndarray, shape (2, 2)
        Row 0 is the vector ``a``, row 1 the vector ``b``, each as
        ``(d_row, d_col)`` in pixels.  ``a`` is the shorter of the two (or the
        one closer to the +x axis when they are equal within noise), and the
        pair is right-handed in the (x, y) = (col, row) frame.
    sigma_basis_px : ndarray, shape (2, 2)
        One-sigma uncertainty of each component of `basis_px`.
    origin_px : ndarray, shape (2,)
        ``(row, col)`` of one lattice point (an A-site column when columns are
        known; the phase origin of the Fourier peaks otherwise).
    quality : float
        Signal-to-background ratio of the weaker of the two Fourier peaks;
        a frame with no lattice has a low value.
    method : str
        How the vectors were found (``"fft"`` or ``"columns"``).
    """

    basis_px: np.ndarray
    sigma_basis_px: np.ndarray
    origin_px: np.ndarray
    quality: float
    method: str = "fft"

    @property
    def a_px(self) -> float:
        return float(np.hypot(*self.basis_px[0]))

    @property
    def b_px(self) -> float:
        return float(np.hypot(*self.basis_px[1]))

    @property
    def sigma_a_px(self) -> float:
        return _sigma_length(self.basis_px[0], self.sigma_basis_px[0])

    @property
    def sigma_b_px(self) -> float:
        return _sigma_length(self.basis_px[1], self.sigma_basis_px[1])

    @property
    def angle_deg(self) -> float:
        """Angle between ``a`` and ``b`` in degrees (90 for a square lattice)."""
        a, b = self.basis_px
        cosang = np.dot(a, b) / (np.hypot(*a) * np.hypot(*b))
        return float(np.degrees(np.arccos(np.clip(cosang, -1.0, 1.0))))

    @property
    def sigma_angle_deg(self) -> float:
        # Linear propagation: the angle of each vector carries sigma_perp / length.
        out = 0.0
        for v, s in zip(self.basis_px, self.sigma_basis_px):
            length = np.hypot(*v)
            perp = np.array([-v[1], v[0]]) / length
            out += float(np.dot(perp**2, s**2)) / length**2
        return float(np.degrees(np.sqrt(out)))

    @property
    def orientation_deg(self) -> float:
        """Direction of ``a`` in the (x, y) = (col, row) frame, degrees in (-180, 180]."""
        d_row, d_col = self.basis_px[0]
        return float(np.degrees(np.arctan2(d_row, d_col)))


def _sigma_length(v, s) -> float:
    length = np.hypot(*v)
    return float(np.sqrt(np.dot((v / length) ** 2, np.asarray(s) ** 2)))


@dataclass(frozen=True)
class Columns:
    """Refined atomic columns of one frame.

    All arrays have ``N`` rows, one per column, and are read-only.

    Attributes
    ----------
    positions_px : (N, 2) float
        Refined ``(row, col)`` centre, pixels.
    sigma_positions_px : (N, 2) float
        One-sigma uncertainty of the centre from the fit covariance (Poisson
        weighted), pixels.
    amplitude : (N,) float
        Peak height above the local background, detector counts.
    sigma_amplitude : (N,) float
    width_px : (N, 2) float
        Gaussian standard deviations along the principal axes (major, minor).
    width_angle_deg : (N,) float
        Direction of the major axis in the (x, y) frame.
    background : (N,) float
        Local constant background under each column, counts per pixel.
    sublattice : (N,) str
        One of :data:`SUBLATTICES`.
    ij : (N, 2) int
        Cell indices along ``a`` and ``b`` of the cell the column belongs to.
        The site positions per sublattice are given with :data:`SUBLATTICES`.
    converged : (N,) bool
        The fit of this column converged and its parameters are physical.
    reduced_chi2 : (N,) float
        Poisson-weighted residual sum of squares per degree of freedom in the
        column's fit window (about 1 for a good model).
    """

    positions_px: np.ndarray
    sigma_positions_px: np.ndarray
    amplitude: np.ndarray
    sigma_amplitude: np.ndarray
    width_px: np.ndarray
    width_angle_deg: np.ndarray
    background: np.ndarray
    sublattice: np.ndarray
    ij: np.ndarray
    converged: np.ndarray
    reduced_chi2: np.ndarray
    message: str = ""
    extra: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return int(self.positions_px.shape[0])

    def select(self, mask) -> "Columns":
        """Return the subset of columns where boolean `mask` is true."""
        mask = np.asarray(mask, dtype=bool)
        kw = {}
        for name in _COLUMN_ARRAYS:
            kw[name] = readonly(getattr(self, name)[mask])
        return Columns(**kw, message=self.message, extra=dict(self.extra))

    def of(self, sublattice: str) -> "Columns":
        """Columns of one sublattice (``"A"``, ``"B"``, ``"Oa"``, ``"Ob"``)."""
        return self.select(self.sublattice == sublattice)


_COLUMN_ARRAYS = (
    "positions_px",
    "sigma_positions_px",
    "amplitude",
    "sigma_amplitude",
    "width_px",
    "width_angle_deg",
    "background",
    "sublattice",
    "ij",
    "converged",
    "reduced_chi2",
)
