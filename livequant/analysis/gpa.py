"""Strain by geometric phase analysis (GPA), from the image alone.

Method: Hytch, Snoeck & Kilaas, "Quantitative measurement of displacement and
strain fields from HREM micrographs", Ultramicroscopy 74, 131 (1998); phase
relation ``P_g = -2 pi g . u`` as discussed in "Theoretical discussions on
the geometrical phase analysis", Ultramicroscopy (2005),
DOI 10.1016/j.ultramic.2005.06.001.

Recipe (notation of the project's check values, section 5):

1. Bragg-filter the image around two non-collinear reflections ``g1, g2``
   with a Gaussian mask: ``H_g = IFFT[M_g FFT[I]]``.
2. Geometric phase ``P_g(r) = arg H_g(r) - 2 pi g . r``.
3. Local reciprocal vectors ``g(r) = g + grad P_g / (2 pi)``; the gradient is
   taken from the phase difference of neighbouring grid nodes,
   ``arg(z(r + h) conj(z(r - h))) / 2h`` with ``z = exp(i P_g)``, which needs
   no phase unwrapping.
4. The local real-space basis is the dual of the local reciprocal pair, and
   the deformation gradient against the reference basis ``R`` is
   ``F = [a_loc b_loc] R^-1`` -- the same lattice-vector definition as the
   column-based strain (:mod:`livequant.analysis.strain`), so the two maps
   are directly comparable.  ``eps = (F + F^T)/2 - I``,
   ``omega = atan2(F_yx - F_xy, F_xx + F_yy)``.

Speed: the masked spectrum is band-limited around ``g``, so instead of
inverse-transforming the whole frame the spectrum is cut to a small window
centred on ``g`` and inverse-transformed there.  That is the same Bragg
image, demodulated and sampled on a coarse grid (steps of a fraction of the
filter width), and costs one real FFT plus two small inverse FFTs; strain
values at arbitrary points are interpolated from that grid (cubic).

The spatial resolution is set by the mask: a Gaussian of standard deviation
``s`` (cycles/pixel) in Fourier space smooths the maps with a real-space
Gaussian of ``1 / (2 pi s)`` pixels.  Values within ``margin_px`` of the frame
edge are marked invalid, because the FFT treats the frame as periodic.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft as sp_fft
from scipy import ndimage

from livequant.analysis import _filters

__all__ = ["GPAResult", "gpa_strain"]

#: Border, in real-space filter sigmas, inside which GPA values are not trusted (the
#: edge error fell from 5e-3 at 2.5 sigmas to below 1e-4 at 4 on rendered lattices).
_MARGIN_SIGMAS = 4.0

#: Half-width of the spectrum window kept around each reflection, in mask sigmas.
_WINDOW_SIGMAS = 6.0


@dataclass(frozen=True)
class GPAResult:
    """Strain maps on a coarse grid covering the frame, and what made them.

    Grid node ``[p, q]`` sits at pixel ``(row, col) = (p * step_px[0], q * step_px[1])``.

    Attributes
    ----------
    exx, eyy, exy, rotation_deg : ndarray, shape (ny, nx)
        Strain components (x = column axis, y = row axis) and local rotation
        against `reference_xy_px`.
    phase : ndarray, shape (2, ny, nx)
        Geometric phase of each reflection, radians, wrapped to (-pi, pi].
    phase_gradient_per_px : ndarray, shape (2, ny, nx, 2)
        ``(d/dx, d/dy)`` of each geometric phase, radians per pixel.
    amplitude : ndarray, shape (2, ny, nx)
        Modulus of each Bragg-filtered image (low where the lattice fades).
    step_px : tuple of float
        Grid spacing ``(rows, cols)`` in pixels.
    shape : tuple of int
        Shape of the analysed frame.
    g_xy_per_px : ndarray, shape (2, 2)
        The two reflections (rows), ``(x, y)`` cycles per pixel.
    reference_xy_px : ndarray, shape (2, 2)
        Reference basis (columns), ``(x, y)`` pixels.
    mask_sigma_per_px : float
        Standard deviation of the Gaussian Bragg mask, cycles per pixel.
    margin_px : float
        Width of the border where values are not trusted.
    """

    exx: np.ndarray
    eyy: np.ndarray
    exy: np.ndarray
    rotation_deg: np.ndarray
    phase: np.ndarray
    phase_gradient_per_px: np.ndarray
    amplitude: np.ndarray
    step_px: tuple
    shape: tuple
    g_xy_per_px: np.ndarray
    reference_xy_px: np.ndarray
    mask_sigma_per_px: float
    margin_px: float

    @property
    def resolution_px(self) -> float:
        """Real-space standard deviation of the smoothing the mask implies."""
        return 1.0 / (2.0 * np.pi * self.mask_sigma_per_px)

    def inside(self, positions_px) -> np.ndarray:
        """True for ``(row, col)`` positions farther than `margin_px` from every edge."""
        pos = np.asarray(positions_px, float).reshape(-1, 2)
        h, w = self.shape
        m = self.margin_px
        with np.errstate(invalid="ignore"):
            return (np.all(np.isfinite(pos), axis=1) & (pos[:, 0] >= m) & (pos[:, 0] <= h - 1 - m)
                    & (pos[:, 1] >= m) & (pos[:, 1] <= w - 1 - m))

    def sample(self, positions_px, names=("exx", "eyy", "exy", "rotation_deg")):
        """Maps at ``(row, col)`` positions (shape (N, 2)), cubic interpolation.

        Positions within `margin_px` of an edge read as NaN.
        """
        pos = np.asarray(positions_px, float).reshape(-1, 2)
        ok = self.inside(pos)
        coords = (np.where(ok[:, None], pos, 0.0) / np.asarray(self.step_px)).T
        out = {}
        for name in names:
            grid = getattr(self, name)
            values = ndimage.map_coordinates(grid, coords, order=3, mode="grid-wrap")
            out[name] = np.where(ok, values, np.nan)
        return out


def _phase_gradient(z: np.ndarray, axis: int) -> np.ndarray:
    """d(arg z)/d(node) along `axis` from neighbour phase differences (periodic grid)."""
    ahead = np.roll(z, -1, axis=axis)
    behind = np.roll(z, 1, axis=axis)
    return np.angle(ahead * np.conj(behind)) / 2.0


def _spectrum_window(half, rows, cols, width):
    """Entries ``S[rows, cols]`` of the full spectrum of a real image from its ``rfft2``.

    ``S[p, q] = conj(S[-p, -q])`` for a real image, so the half spectrum
    (columns ``0 .. width // 2``) holds everything; it costs half the full FFT.
    """
    h = half.shape[0]
    r, c = np.meshgrid(rows % h, cols % width, indexing="ij")
    direct = c <= width // 2
    out = np.empty(r.shape, dtype=complex)
    out[direct] = half[r[direct], c[direct]]
    mirror = ~direct
    out[mirror] = np.conj(half[(-r[mirror]) % h, width - c[mirror]])
    return out


def _inverse_2x2(m):
    """Inverses of a stack of 2 x 2 matrices ``(..., 2, 2)`` by the adjugate
    over the determinant: ``np.linalg.inv`` on a map's worth of them took a
    quarter of the GPA time.  Singular matrices give non-finite entries."""
    a, b = m[..., 0, 0], m[..., 0, 1]
    c, d = m[..., 1, 0], m[..., 1, 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_det = 1.0 / (a * d - b * c)
    out = np.empty_like(m)
    out[..., 0, 0] = d * inv_det
    out[..., 0, 1] = -b * inv_det
    out[..., 1, 0] = -c * inv_det
    out[..., 1, 1] = a * inv_det
    return out


def _window_size(n_pixels: int, half_width_bins: float) -> int:
    """Even window length holding +-half_width_bins, at most the full axis."""
    n = int(2 * np.ceil(half_width_bins) + 2)
    n += n % 2
    return min(n, n_pixels - n_pixels % 2 if n_pixels > 2 else n_pixels)


def gpa_strain(image, basis_px, *, reference_xy_px=None, reflections=((1, 0), (0, 1)),
               mask_sigma_fraction=0.2) -> GPAResult:
    """Strain maps of `image` by geometric phase analysis.

    Parameters
    ----------
    image : array_like, shape (H, W)
    basis_px : array_like, shape (2, 2)
        Lattice basis, rows ``a`` and ``b`` as ``(d_row, d_col)`` pixels (as
        in :class:`Lattice`); it places the Bragg masks.
    reference_xy_px : array_like, shape (2, 2), optional
        Reference basis for the strain as columns ``[a_ref b_ref]`` in
        ``(x, y)`` pixels.  Defaults to `basis_px` itself.
    reflections : pair of (h, k)
        Miller indices (on the ``a``, ``b`` basis) of the two reflections.
        (1, 0) and (0, 1) suit HAADF perovskites, where the A and B columns
        scatter differently; use (1, 1) and (1, -1) when they do not.
    mask_sigma_fraction : float
        Standard deviation of the Gaussian mask as a fraction of the shorter
        ``|g|``.  Larger: finer spatial resolution, more noise.

    Returns
    -------
    GPAResult

    Raises
    ------
    ValueError
        For a non-2D or non-finite image, a singular basis, collinear
        reflections or a mask that would reach the neighbouring reflection.
    """
    img = np.asarray(image, dtype=np.float64)
    if img.ndim != 2 or min(img.shape) < 8:
        raise ValueError(f"`image` must be a 2D array of at least 8 x 8 pixels, got shape "
                         f"{img.shape}")
    if not np.all(np.isfinite(img)):
        raise ValueError("`image` contains NaN or infinite pixels; GPA needs a complete frame")
    basis = np.asarray(basis_px, float)
    if basis.shape != (2, 2):
        raise ValueError(f"`basis_px` must have shape (2, 2), got {basis.shape}")
    r0 = basis[:, ::-1].T  # columns a, b in (x, y)
    if abs(np.linalg.det(r0)) < 1e-6 * np.sum(r0**2):
        raise ValueError("`basis_px` is singular: its two vectors are parallel")
    ref = r0 if reference_xy_px is None else np.asarray(reference_xy_px, float)
    if ref.shape != (2, 2) or abs(np.linalg.det(ref)) < 1e-6 * np.sum(ref**2):
        raise ValueError("`reference_xy_px` must be a non-singular (2, 2) basis (columns a, b)")
    hkl = np.asarray(reflections, float)
    if hkl.shape != (2, 2) or abs(np.linalg.det(hkl)) < 1e-9:
        raise ValueError(f"`reflections` must be two non-collinear (h, k) pairs, got "
                         f"{reflections!r}")
    if not 0 < mask_sigma_fraction <= 0.35:
        raise ValueError(f"`mask_sigma_fraction` must be in (0, 0.35] (larger masks reach the "
                         f"next reflection), got {mask_sigma_fraction!r}")

    g = hkl @ np.linalg.inv(r0)  # rows g1, g2 in (x, y), cycles per pixel
    if np.any(np.abs(g) >= 0.5):
        raise ValueError("a reflection lies beyond the Nyquist frequency: the lattice spacing "
                         "is under 2 pixels; use lower-order `reflections`")
    sigma_k = mask_sigma_fraction * float(np.min(np.hypot(*g.T)))
    h, w = img.shape
    # single precision: half the time of the largest step of GPA, and its
    # rounding (1e-7 of the frame's norm per bin) is far below the shot noise
    # of any bin the masks keep; everything after it runs in double precision
    half = sp_fft.rfft2((img - img.mean()).astype(np.float32),
                        workers=_filters.compute_threads())
    ny = _window_size(h, _WINDOW_SIGMAS * sigma_k * h)
    nx = _window_size(w, _WINDOW_SIGMAS * sigma_k * w)
    step = (h / ny, w / nx)
    dp = np.fft.fftfreq(ny, d=1.0 / ny).astype(int)   # bin offsets in FFT order
    dq = np.fft.fftfreq(nx, d=1.0 / nx).astype(int)
    rows = np.arange(ny)[:, None] * step[0]
    cols = np.arange(nx)[None, :] * step[1]

    phase = np.empty((2, ny, nx))
    grad = np.empty((2, ny, nx, 2))
    amp = np.empty((2, ny, nx))
    for k in range(2):
        gx, gy = g[k]
        cy, cx = int(round(gy * h)), int(round(gx * w))
        fy = (cy + dp)[:, None] / h
        fx = (cx + dq)[None, :] / w
        window = _spectrum_window(half, cy + dp, cx + dq, w)
        mask = np.exp(-((fx - gx) ** 2 + (fy - gy) ** 2) / (2.0 * sigma_k**2))
        # Inverse transform of the window = the Bragg image demodulated by the bin frequency
        # (cy/h, cx/w), sampled every `step` pixels; then remove the rest of g exactly.
        z = np.fft.ifft2(window * mask) * (ny * nx) / (h * w)
        z = z * np.exp(-2j * np.pi * ((gx - cx / w) * cols + (gy - cy / h) * rows))
        amp[k] = np.abs(z)
        phase[k] = np.angle(z)
        grad[k, ..., 0] = _phase_gradient(z, axis=1) / step[1]
        grad[k, ..., 1] = _phase_gradient(z, axis=0) / step[0]

    # Local reciprocal vectors (rows per reflection), then F = inv(G_loc) H R^-1.
    g_loc = g[:, None, None, :] + grad / (2.0 * np.pi)          # (2, ny, nx, 2)
    g_loc = np.moveaxis(g_loc, 0, 2)                              # (ny, nx, refl, xy)
    f = _inverse_2x2(g_loc) @ (hkl @ np.linalg.inv(ref))
    exx = f[..., 0, 0] - 1.0
    eyy = f[..., 1, 1] - 1.0
    exy = (f[..., 0, 1] + f[..., 1, 0]) / 2.0
    rot = np.degrees(np.arctan2(f[..., 1, 0] - f[..., 0, 1], f[..., 0, 0] + f[..., 1, 1]))
    margin = _MARGIN_SIGMAS / (2.0 * np.pi * sigma_k)
    return GPAResult(exx=exx, eyy=eyy, exy=exy, rotation_deg=rot, phase=phase,
                     phase_gradient_per_px=grad, amplitude=amp, step_px=step, shape=(h, w),
                     g_xy_per_px=g, reference_xy_px=ref, mask_sigma_per_px=sigma_k,
                     margin_px=float(margin))
