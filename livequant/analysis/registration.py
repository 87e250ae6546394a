"""Registration of scanned frames: rigid by phase correlation, then per scan line.

A fast STEM frame is a raster of lines recorded one after the other; between
two frames of a series the specimen has moved (drift: a rigid shift), and
inside each frame every line carries its own small error (scan jitter, the
drift's irregular part).  The trade's answer, followed here, is to register
each frame to a reference in two steps (Yankovich et al., Nat. Commun. 5, 4155
(2014); Berkels et al., Ultramicroscopy 138, 46 (2014); Jones et al., Adv.
Struct. Chem. Imaging 1, 8 (2015), the last from memory: CHECK-VALUES
sections 4 and 9).  The model below is our own formulation in that spirit:

1. **rigid**: the frame's shift against the reference by phase correlation
   (:func:`skimage.registration.phase_cross_correlation`, upsampled to a
   fraction of a pixel), on Hann-windowed images;
2. **per line**: a smooth-plus-jitter model of per-scan-line offsets
   ``o_l = (d_row, d_col)`` solved against the reference.  Each line's offset
   is measured by a Gauss-Newton step of the line against the reference
   (the data's own noise gives each measurement its variance), then
   regularised: a smooth part (a penalised second-difference smoother,
   Whittaker's) carries slow distortions, and what is left is kept only in
   the proportion that the line-to-line scatter exceeds the measurement
   noise (a shrinkage with the jitter variance estimated from the data).  The
   warp is re-made with the new offsets and the step repeated.

The offsets are solved on the frame's own scan lines (the reference is
resampled onto them), so each line's jitter is measured alone; the frame is
then put on the reference grid in two passes, each line moved back along
itself first, so neighbouring lines' jitters never mix (:func:`_per_line`).

Conventions: images are ``(row, col)``; a frame ``F`` registered to the
reference ``R`` satisfies ``F(q + shift + o(q_row)) ~ R(q)``, i.e. ``shift``
is how far the content moved from the reference to the frame.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage
from scipy.linalg import solveh_banded

__all__ = ["RigidShift", "LineOffsets", "FrameRegistration", "rigid_shift", "measure_line_offsets",
           "smooth_line_offsets", "warp_frame", "register_frame", "residual_chi2"]


@dataclass(frozen=True)
class RigidShift:
    """Result of :func:`rigid_shift`: ``shift_px`` (row, col) and the peak's quality.

    ``error`` is scikit-image's translation-invariant normalised RMS error.
    """

    shift_px: np.ndarray
    error: float


@dataclass(frozen=True)
class LineOffsets:
    """Per-line offsets (rows, 2) as ``(d_row, d_col)`` px, with the measurement variances."""

    offsets_px: np.ndarray
    variance_px2: np.ndarray
    jitter_px: np.ndarray  # (2,) estimated rms of the per-line part not explained by the smooth
    smooth_part_px: np.ndarray | None = None  # (rows, 2) the smooth part alone


@dataclass(frozen=True)
class FrameRegistration:
    """A frame registered to a reference.

    Attributes
    ----------
    shift_px : (2,) array
        Rigid shift (row, col) of the frame's content against the reference.
    line_offsets_px : (rows, 2) array
        Per-output-row offsets on top of the shift.
    warped : (rows, cols) array
        The frame resampled onto the reference grid (NaN where it has no data).
    valid : (rows, cols) bool array
    residual_chi2 : float
        Mean of ``(warped - reference)^2 / variance`` over the overlap, the
        variance being the Poisson variance of the difference (``gain`` times
        the reference level, plus the reference's own share).  About 1 for a
        frame of the same specimen, far above 1 when the content differs.
    rigid_error : float
        Of the phase correlation (see :class:`RigidShift`).
    jitter_px : (2,) array
        Estimated rms of the per-line jitter (row, col).
    """

    shift_px: np.ndarray
    line_offsets_px: np.ndarray
    warped: np.ndarray
    valid: np.ndarray
    residual_chi2: float
    rigid_error: float
    jitter_px: np.ndarray

    @property
    def total_shift_px(self) -> np.ndarray:
        """The rigid shift plus the mean per-line offset (the frame's mean displacement)."""
        return self.shift_px + self.line_offsets_px.mean(axis=0)


def _as_float(image, name) -> np.ndarray:
    a = np.asarray(image, dtype=np.float64)
    if a.ndim != 2:
        raise ValueError(f"`{name}` must be a 2D image, got shape {a.shape}")
    if min(a.shape) < 8:
        raise ValueError(f"`{name}` of shape {a.shape} is too small to register (need 8 x 8)")
    return a


def _hann(shape) -> np.ndarray:
    return np.outer(np.hanning(shape[0]), np.hanning(shape[1]))


def rigid_shift(reference, moving, *, upsample_factor: int = 20, bin_to_px: int | None = None,
                near_px=None, tie_fraction: float = 0.8) -> RigidShift:
    """Shift of `moving`'s content against `reference` by phase correlation.

    Both images have their mean removed and are multiplied by a Hann window
    (an edge that is not periodic would otherwise dominate the correlation).
    Plain cross-correlation (``normalization=None``) is used: low-dose frames
    are mostly noise at high spatial frequency, which the phase normalisation
    would amplify.

    Parameters
    ----------
    reference, moving : 2D arrays of one shape
    upsample_factor : int
        Sub-pixel precision ``1 / upsample_factor`` (of the binned images;
        Guizar-Sicairos et al., Opt. Lett. 33, 156 (2008), as implemented in
        scikit-image).
    bin_to_px : int, optional
        Sum blocks of pixels first so that the shorter side is at most this
        long (a coarse shift is all the per-line step needs).
    near_px : (2,), optional
        The shift expected (e.g. from the drift so far).  A crystal
        correlates almost equally well at every lattice vector, so noise can
        pick any of them; given `near_px`, the correlation peaks within
        `tie_fraction` of the highest are candidates and the one nearest
        `near_px` is taken (sub-pixel by a parabola; scikit-image's upsampled
        refinement is used without `near_px`).

    Returns
    -------
    RigidShift
        ``shift_px`` such that ``moving(q + shift_px) ~ reference(q)``.
    """
    from skimage.registration import phase_cross_correlation

    ref = _as_float(reference, "reference")
    mov = _as_float(moving, "moving")
    if ref.shape != mov.shape:
        raise ValueError(f"`reference` {ref.shape} and `moving` {mov.shape} must have one shape")
    if upsample_factor < 1:
        raise ValueError(f"`upsample_factor` must be >= 1, got {upsample_factor}")
    b = 1
    if bin_to_px is not None and min(ref.shape) > bin_to_px:
        b = int(math.ceil(min(ref.shape) / bin_to_px))
        ref, mov = _bin(ref, b), _bin(mov, b)
    win = _hann(ref.shape)
    a = (ref - ref.mean()) * win
    m = (mov - mov.mean()) * win
    if near_px is None:
        shift, error, _ = phase_cross_correlation(a, m, upsample_factor=int(upsample_factor),
                                                  normalization=None)
        # binning by b maps pixel centres c -> (c - (b - 1) / 2) / b; a shift scales by b
        return RigidShift(shift_px=-np.asarray(shift, float) * b, error=float(error))
    shift = _peak_near(a, m, np.asarray(near_px, float).reshape(2) / b, tie_fraction)
    return RigidShift(shift_px=shift * b, error=float("nan"))


def _peak_near(a, m, near, tie_fraction) -> np.ndarray:
    """Of the cross-correlation peaks within `tie_fraction` of the highest, the one
    nearest `near` (a lattice correlates almost equally well at every lattice
    vector; the drift so far says which one is meant), to a fraction of a
    pixel by a parabola through the peak and its neighbours along each axis."""
    xc = np.fft.ifft2(np.fft.fft2(m) * np.conj(np.fft.fft2(a))).real
    peaks = (xc == ndimage.maximum_filter(xc, size=3, mode="wrap")) & (
        xc >= tie_fraction * xc.max())
    idx = np.argwhere(peaks)
    shape = np.array(xc.shape)
    # wrap peak indices to signed shifts, then to the copy nearest `near`
    sig = (idx + shape // 2) % shape - shape // 2
    sig = sig + np.round((near - sig) / shape) * shape
    k = int(np.argmin(np.hypot(*(sig - near).T)))
    r, c = idx[k]
    out = sig[k].astype(float)
    for axis, (i0, j0) in enumerate(((r, c), (r, c))):
        lo = xc[(i0 - 1) % shape[0], j0] if axis == 0 else xc[i0, (j0 - 1) % shape[1]]
        hi = xc[(i0 + 1) % shape[0], j0] if axis == 0 else xc[i0, (j0 + 1) % shape[1]]
        mid = xc[i0, j0]
        den = lo - 2 * mid + hi
        if den < 0:
            out[axis] += 0.5 * (lo - hi) / den
    return out


def _bin(img: np.ndarray, b: int) -> np.ndarray:
    r, c = (img.shape[0] // b) * b, (img.shape[1] // b) * b
    return img[:r, :c].reshape(r // b, b, c // b, b).sum(axis=(1, 3))


def warp_frame(frame, *, shift_px=(0.0, 0.0), line_offsets_px=None, extra_px=None,
               order: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """Resample `frame` at ``q + shift + o(q_row) (+ extra(q))`` for every output pixel q.

    Parameters
    ----------
    frame : 2D array
    shift_px : (2,)
    line_offsets_px : (rows, 2) array, optional
        Per-output-row offsets.
    extra_px : (2, rows, cols) array, optional
        Any further displacement field (e.g. the drift shear).
    order : int
        Spline order of :func:`scipy.ndimage.map_coordinates`.

    Returns
    -------
    warped : 2D array (NaN outside the frame)
    valid : 2D bool array
    """
    f = _as_float(frame, "frame")
    rows, cols = f.shape
    rr = np.arange(rows, dtype=float)[:, None] + float(shift_px[0])
    cc = np.arange(cols, dtype=float)[None, :] + float(shift_px[1])
    if line_offsets_px is not None:
        o = np.asarray(line_offsets_px, float)
        if o.shape != (rows, 2):
            raise ValueError(f"`line_offsets_px` must have shape ({rows}, 2), got {o.shape}")
        rr = rr + o[:, 0:1]
        cc = cc + o[:, 1:2]
    rr, cc = np.broadcast_arrays(rr, cc)
    if extra_px is not None:
        rr = rr + extra_px[0]
        cc = cc + extra_px[1]
    valid = (rr >= 0) & (rr <= rows - 1) & (cc >= 0) & (cc <= cols - 1)
    out = ndimage.map_coordinates(f, [rr, cc], order=order, mode="nearest", prefilter=order > 1)
    out = np.where(valid, out, np.nan)
    return out, valid


class _SmoothedReference:
    """The reference blurred once along the lines, with its gradients (reused by every
    Gauss-Newton round).

    The blur runs along the scan lines only: across them it would mix the
    offsets of neighbouring lines, and white line jitter would average away
    before it is measured.
    """

    def __init__(self, reference: np.ndarray, smooth_px: float, *, gain: float = 1.0,
                 n_reference: int = 1, noise_factor=None):
        self.smooth_px = float(smooth_px)
        ref = np.asarray(reference, float)
        self.fill = float(np.nanmean(ref)) if np.isfinite(ref).any() else 0.0
        self.valid = np.isfinite(ref)
        r = np.where(self.valid, ref, self.fill)
        self.r = self.blur(r)
        self.gy, self.gx = np.gradient(self.r)
        # Shot noise of the reference inflates sum(g g^T) and so shrinks every
        # Gauss-Newton step towards zero (errors in the variables).  Its
        # expected share per pixel: Poisson variance gain * level / n, through
        # the blur along the line (variance / (2 sqrt(pi) s), correlation
        # exp(-d^2 / 4 s^2)) and the central differences: along the line
        # var_b (1 - exp(-1 / s^2)) / 2, across the lines var_b / 2.
        s_b = max(self.smooth_px, 0.5)
        var = gain * np.maximum(self.r, 0.0) / max(int(n_reference), 1)
        if noise_factor is not None:   # a resampled reference: less noise per pixel
            var = var * np.asarray(noise_factor, float).reshape(-1, 1)
        var_b = var / (2.0 * math.sqrt(math.pi) * s_b) if self.smooth_px > 0 else var
        self.noise_gx2 = var_b * (1.0 - math.exp(-1.0 / s_b**2)) / 2.0
        self.noise_gy2 = var_b / 2.0

    def blur(self, img: np.ndarray) -> np.ndarray:
        if self.smooth_px <= 0:
            return img
        return ndimage.gaussian_filter1d(img, self.smooth_px, axis=1, truncate=3.0)


def _warp_rows_linear(f: np.ndarray, shift_px, offsets_px) -> tuple[np.ndarray, np.ndarray]:
    """:func:`warp_frame` with ``order=1`` and no extra field, by rows.

    With one offset per output row, every pixel of a row samples the same
    source row position, and the row is shifted as a whole: a linear
    interpolation between two source rows, then along the row.  The same
    values as ``map_coordinates(order=1)``, several times faster.
    """
    rows, cols = f.shape
    y = np.arange(rows) + float(shift_px[0]) + offsets_px[:, 0]
    x0 = float(shift_px[1]) + offsets_px[:, 1]
    i = np.floor(y).astype(int)
    fy = y - i
    ok_r = (y >= 0) & (y <= rows - 1)
    i0 = np.clip(i, 0, rows - 1)
    i1 = np.clip(i + 1, 0, rows - 1)
    band = f[i0] * (1 - fy)[:, None] + f[i1] * fy[:, None]
    x = np.arange(cols)[None, :] + x0[:, None]
    j = np.floor(x).astype(int)
    fx = x - j
    j0 = np.clip(j, 0, cols - 1)
    j1 = np.clip(j + 1, 0, cols - 1)
    out = (np.take_along_axis(band, j0, axis=1) * (1 - fx)
           + np.take_along_axis(band, j1, axis=1) * fx)
    valid = ok_r[:, None] & (x >= 0) & (x <= cols - 1)
    return np.where(valid, out, np.nan), valid


def measure_line_offsets(reference, warped, valid, *, smooth_px: float = 2.0,
                         _ref: _SmoothedReference | None = None):
    """One Gauss-Newton step per line: the offset that best maps `warped` onto `reference`.

    With ``warped(q) ~ reference(q - d)`` the linearised least squares per line
    is ``d = -(sum g g^T)^-1 sum g e``, ``e = warped - reference``, ``g`` the
    gradient of the reference.  Both images are smoothed along the lines by
    a Gaussian of `smooth_px` first (a shift commutes with the blur, the
    noise does not).
    The variance of ``d`` is ``c s^2 (sum g g^T)^-1`` with ``s^2`` the line's
    residual variance and ``c = 2 sqrt(pi) smooth_px`` the correlation length
    the blur gives the noise along the line.

    Returns
    -------
    delta : (rows, 2) array, the update of the offsets (NaN where unmeasurable)
    variance : (rows, 2) array
    """
    R = _ref if _ref is not None else _SmoothedReference(reference, smooth_px)
    valid = valid & R.valid
    w = R.blur(np.where(valid, warped, R.fill))
    m = valid
    # Pixels whose blur reached outside the overlap are unreliable.
    if R.smooth_px > 0:
        m = ndimage.minimum_filter1d(m.astype(np.uint8),
                                     size=2 * int(math.ceil(2 * R.smooth_px)) + 1, axis=1) > 0
    m = m.astype(float)
    gx, gy = R.gx * m, R.gy * m
    e = (w - R.r) * m
    gxx_raw = (gx * gx).sum(axis=1)
    gyy_raw = (gy * gy).sum(axis=1)
    gxx = np.maximum(gxx_raw - (R.noise_gx2 * m).sum(axis=1), 0.1 * gxx_raw)
    gyy = np.maximum(gyy_raw - (R.noise_gy2 * m).sum(axis=1), 0.1 * gyy_raw)
    gxy = (gx * gy).sum(axis=1)
    bx = (gx * e).sum(axis=1)
    by = (gy * e).sum(axis=1)
    det = gxx * gyy - gxy * gxy
    n = m.sum(axis=1)
    ok = (n > 8) & (det > 1e-12 * np.maximum(gxx * gyy, 1e-300))
    safe = np.where(ok, det, 1.0)
    d_col = -(gyy * bx - gxy * by) / safe
    d_row = -(gxx * by - gxy * bx) / safe
    # residual variance per line after the fit
    resid = e + gx * d_col[:, None] + gy * d_row[:, None]
    s2 = (resid**2).sum(axis=1) / np.maximum(n - 2, 1)
    c = max(1.0, 2.0 * math.sqrt(math.pi) * R.smooth_px)
    var_col = c * s2 * gyy / safe
    var_row = c * s2 * gxx / safe
    delta = np.stack([d_row, d_col], axis=1)
    var = np.stack([var_row, var_col], axis=1)
    delta[~ok] = np.nan
    var[~ok] = np.inf
    return delta, var


def _whittaker(y, w, lam):
    """argmin_s sum w (y - s)^2 + lam sum (second difference of s)^2 (banded solve)."""
    n = len(y)
    if n < 3 or lam <= 0:
        return np.where(w > 0, y, 0.0)
    # D^T D for second differences: pentadiagonal, upper form for solveh_banded
    main = np.full(n, 6.0)
    main[[0, -1]] = 1.0
    main[[1, -2]] = 5.0
    off1 = np.full(n - 1, -4.0)
    off1[[0, -1]] = -2.0
    off2 = np.ones(n - 2)
    ab = np.zeros((3, n))
    ab[0, 2:] = lam * off2
    ab[1, 1:] = lam * off1
    ab[2] = lam * main + w + 1e-12 * max(lam, 1.0)
    return solveh_banded(ab, w * y)


def smooth_line_offsets(raw_px, variance_px2, *, smooth_lines: float = 32.0,
                        n_rounds: int = 3, jitter_axes=(1,)) -> LineOffsets:
    """Regularise per-line offsets: a smooth part plus the per-line jitter the data support.

    Each axis separately: the measurement ``m_l = s_l + j_l + noise`` (noise
    variance `variance_px2`, jitter ``j`` white with variance ``t^2``).  The
    smooth part is the Whittaker smoother of ``m`` with weights
    ``1 / (variance + t^2)`` and a second-difference penalty whose scale is
    `smooth_lines` lines; the jitter estimate is the residual shrunk by
    ``t^2 / (t^2 + variance)``.  ``t^2`` is estimated from the residuals (their
    variance beyond the measurement noise), alternating with the smooth fit.

    Per-line jitter is allowed only along `jitter_axes` (0 rows, 1 columns;
    by default along the fast scan, where scan jitter acts): offsets across
    the lines are measured through the blur that joins neighbouring lines,
    so their line-to-line scatter is not independent noise and would be
    mistaken for jitter; across the lines only the smooth part is kept.

    Lines without a measurement (NaN, infinite variance) take the smooth
    value.  Returns :class:`LineOffsets`.
    """
    raw = np.asarray(raw_px, float)
    var = np.asarray(variance_px2, float)
    if raw.ndim != 2 or raw.shape[1] != 2 or var.shape != raw.shape:
        raise ValueError(f"`raw_px` and `variance_px2` must be (rows, 2), got {raw.shape}, "
                         f"{var.shape}")
    if smooth_lines <= 0:
        raise ValueError(f"`smooth_lines` must be > 0, got {smooth_lines}")
    out = np.zeros_like(raw)
    smooth = np.zeros_like(raw)
    jit = np.zeros(2)
    for k in range(2):
        m = raw[:, k]
        v = var[:, k]
        have = np.isfinite(m) & np.isfinite(v) & (v > 0)
        if have.sum() < 3:
            continue
        m0 = np.where(have, m, 0.0)
        v0 = np.where(have, v, np.inf)
        t2 = 0.0
        for _ in range(n_rounds):
            w = np.where(have, 1.0 / (v0 + t2), 0.0)
            lam = smooth_lines**4 * float(w[have].mean())
            s = _whittaker(m0, w, lam)
            r = (m0 - s)[have]
            # robust: median of squares / 0.455 is the variance for Gaussian residuals
            excess = np.median(r**2) / 0.455 - np.median(v0[have])
            t2 = max(0.0, float(excess)) if k in jitter_axes else 0.0
        j = np.where(have, (m0 - s) * t2 / (t2 + v0), 0.0)
        out[:, k] = s + j
        smooth[:, k] = s
        jit[k] = math.sqrt(t2)
    return LineOffsets(offsets_px=out, variance_px2=var, jitter_px=jit, smooth_part_px=smooth)


def residual_chi2(reference, warped, valid, *, gain: float = 1.0, n_reference: int = 1,
                  border_px: int = 4, smooth_px: float = 2.0, n_bands: int = 8) -> float:
    """How far the registered frame differs from the reference, in units of shot noise.

    Both are blurred by a Gaussian of `smooth_px` first: the shot noise drops
    by ``4 pi smooth_px^2`` while a misplaced column, being as wide as the
    probe, keeps most of its difference, so a moved specimen or a changed
    focus stands out even at a few counts per pixel.  The noise variance of
    the blurred difference is ``gain * level * (1 + 1 / n_reference) /
    (4 pi smooth_px^2)`` (Poisson counts are ``gain`` times electrons, as in
    the column fit; the reference averages `n_reference` frames).  The mean
    ratio is taken in `n_bands` bands of scan lines and the largest is
    returned, so a jump half-way through a frame is not diluted by its good
    half.  About 1 for a frame of the same specimen (a little less: the
    resampling smooths the frame's noise); well above 1 when the content
    differs.  Pixels within `border_px` of the overlap's edge are left out.
    """
    m = np.asarray(valid, bool)
    fill = float(np.nanmean(np.where(m, reference, np.nan))) if m.any() else 0.0
    ref = np.where(m, reference, fill)
    d = np.where(m, np.asarray(warped, float) - ref, 0.0)
    factor = 1.0
    if smooth_px > 0:
        d = ndimage.gaussian_filter(d, smooth_px, truncate=3.0)
        ref = ndimage.gaussian_filter(ref, smooth_px, truncate=3.0)
        factor = 1.0 / (4.0 * math.pi * smooth_px**2)
        border_px = max(int(border_px), int(math.ceil(3 * smooth_px)))
    if border_px > 0:
        # a square erosion, separable (much cheaper than an iterated binary erosion)
        m = ndimage.minimum_filter(m.astype(np.uint8), size=2 * int(border_px) + 1,
                                   mode="constant", cval=0) > 0
    if not m.any():
        return float("inf")
    var = gain * np.maximum(ref, 1.0) * (1.0 + 1.0 / max(n_reference, 1)) * factor
    ratio = np.where(m, d * d / var, 0.0)
    rows = np.arange(ratio.shape[0])
    band = np.minimum(rows * max(int(n_bands), 1) // ratio.shape[0], max(int(n_bands), 1) - 1)
    num = np.bincount(band, weights=ratio.sum(axis=1))
    den = np.bincount(band, weights=m.sum(axis=1).astype(float))
    use = den >= max(16, 0.1 * den.max())
    return float((num[use] / den[use]).max())


def register_frame(reference, frame, *, n_reference: int = 1, gain: float = 1.0,
                   upsample_factor: int = 20, nonrigid: bool = True, iterations: int = 3,
                   smooth_lines: float = 32.0, smooth_px: float = 2.0,
                   initial_shift_px=None, near_px=None) -> FrameRegistration:
    """Register `frame` to `reference`: rigid shift, then per-line offsets.

    Parameters
    ----------
    reference : 2D array
        The running average of the series (or its first frame).
    frame : 2D array of the same shape
    n_reference : int
        Frames averaged in `reference` (its share of the residual variance).
    gain : float
        Detector counts per electron (for the residual's Poisson variance).
    upsample_factor : int
        Of the phase correlation.
    nonrigid : bool
        Whether to solve per-line offsets after the rigid step.
    iterations : int
        Gauss-Newton rounds of the per-line model.
    smooth_lines : float
        Length scale (lines) of the smooth part of the per-line model.
    smooth_px : float
        Gaussian blur (px) applied before measuring per-line offsets.
    initial_shift_px : (2,), optional
        Skip the phase correlation and start from this shift.
    near_px : (2,), optional
        The expected shift: of near-equal correlation peaks, the nearest is
        taken (see :func:`rigid_shift`).

    Returns
    -------
    FrameRegistration
    """
    ref = _as_float(reference, "reference")
    f = _as_float(frame, "frame")
    if ref.shape != f.shape:
        raise ValueError(f"`reference` {ref.shape} and `frame` {f.shape} must have one shape; "
                         "a series must keep its frame size")
    if initial_shift_px is None:
        # The per-line step refines the shift to a fraction of a pixel; the
        # rigid one only has to bring the frame within its reach.
        rigid = rigid_shift(ref, f, upsample_factor=2 if nonrigid else upsample_factor,
                            bin_to_px=512 if nonrigid else None, near_px=near_px)
        shift, rigid_error = rigid.shift_px, rigid.error
    else:
        shift, rigid_error = np.asarray(initial_shift_px, float).reshape(2), float("nan")
    rows = f.shape[0]
    offsets = np.zeros((rows, 2))
    jitter = np.zeros(2)
    if nonrigid:
        warped, valid, offsets, jitter = _per_line(ref, f, shift, gain=gain,
                                                   n_reference=n_reference,
                                                   iterations=iterations,
                                                   smooth_lines=smooth_lines,
                                                   smooth_px=smooth_px)
    else:
        warped, valid = warp_frame(f, shift_px=shift, order=3)
    chi2 = residual_chi2(ref, warped, valid, gain=gain, n_reference=n_reference)
    return FrameRegistration(shift_px=np.asarray(shift, float), line_offsets_px=offsets,
                             warped=warped, valid=valid, residual_chi2=chi2, rigid_error=rigid_error,
                             jitter_px=jitter)


def _per_line(ref, f, shift, *, gain, n_reference, iterations, smooth_lines, smooth_px):
    """The per-line model, solved on the frame's own scan lines.

    ``F(l, c) = R(l - Y_l, c - X_l)``: line ``l`` of the frame shows the
    reference displaced by ``(Y_l, X_l)`` = the rigid shift + a smooth part
    + fast-axis jitter.  Each round resamples the (less noisy) reference onto
    the frame's lines and measures every line against it, so each scan line's
    jitter is measured alone, never mixed with its neighbour's.  The frame is
    then put on the reference grid in two passes: each line is moved back
    along itself by its jitter (a 1D cubic spline along the line), then the
    smooth part is undone by a 2D cubic resampling.  (Line jitter is a fraction of
    a pixel: the first pass interpolates linearly.)

    Returns ``warped, valid, offsets (per grid row, minus the shift), jitter rms``.
    """
    rows, cols = f.shape
    Y = np.tile(np.asarray(shift, float), (rows, 1))
    smooth = Y.copy()
    jitter = np.zeros(2)
    for _ in range(max(1, int(iterations))):
        r_f, valid = _warp_rows_linear(ref, (0.0, 0.0), -Y)
        # linear interpolation at fractions (fr, fc) leaves (1-f)^2 + f^2 of the variance
        fr, fc = np.mod(-Y[:, 0], 1.0), np.mod(-Y[:, 1], 1.0)
        factor = ((1 - fr) ** 2 + fr**2) * ((1 - fc) ** 2 + fc**2)
        sref = _SmoothedReference(np.where(valid, r_f, np.nan), smooth_px, gain=gain,
                                  n_reference=n_reference, noise_factor=factor)
        delta, var = measure_line_offsets(r_f, f, valid, _ref=sref)
        lo = smooth_line_offsets(Y + delta, var, smooth_lines=smooth_lines)
        Y, smooth, jitter = lo.offsets_px, lo.smooth_part_px, lo.jitter_px
    jit_c = Y[:, 1] - smooth[:, 1]
    # pass 1: each scan line moved back along itself by its jitter (a fraction of a
    # pixel: linear interpolation along the line; rows stay whole)
    c_idx = np.arange(cols, dtype=float)[None, :]
    d, _ = _warp_rows_linear(f, (0.0, 0.0), np.stack([np.zeros(rows), jit_c], axis=1))
    d = np.where(np.isfinite(d), d, f)
    # pass 2: grid row q shows line l with l - S_r(l) = q (S smooth, so two fixed-point steps)
    q = np.arange(rows, dtype=float)
    lines = np.arange(rows, dtype=float)
    l_of_q = q + np.interp(q, lines, smooth[:, 0])
    l_of_q = q + np.interp(l_of_q, lines, smooth[:, 0])
    s_c = np.interp(l_of_q, lines, smooth[:, 1])
    rr = np.broadcast_to(l_of_q[:, None], (rows, cols))
    cc2 = c_idx + s_c[:, None]
    warped = ndimage.map_coordinates(d, [rr, cc2], order=3, mode="nearest")
    # the frame's own pixels behind each grid pixel: the line's jitter moved them too
    jit_q = np.interp(l_of_q, lines, jit_c)[:, None]
    valid = ((rr >= 0) & (rr <= rows - 1) & (cc2 >= 0) & (cc2 <= cols - 1)
             & (cc2 + jit_q >= 0) & (cc2 + jit_q <= cols - 1))
    warped = np.where(valid, warped, np.nan)
    offsets = np.stack([np.interp(l_of_q, lines, Y[:, 0]), np.interp(l_of_q, lines, Y[:, 1])],
                       axis=1) - np.asarray(shift, float)[None, :]
    return warped, valid, offsets, jitter
