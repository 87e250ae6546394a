"""The lattice of a frame: two basis vectors from the Fourier transform, then
refined from the fitted columns.

The Fourier step only has to be good enough to index columns; the values we
report come from a least-squares fit of the refined A-site positions to
``origin + i a + j b``.
"""

from __future__ import annotations

import functools

import numpy as np
from scipy import fft as sfft
from scipy import ndimage as ndi

from livequant.analysis import _filters
from livequant.analysis.types import Columns, Lattice, readonly

__all__ = ["NoLatticeError", "find_lattice", "lattice_from_columns", "fractional"]

#: Largest square crop used for the Fourier step (pixels).  The Fourier basis
#: only indexes columns (reported values come from the fitted columns), and a
#: 512 crop still holds tens of cells at any sampling we accept; the cost of
#: the ring background scales with the crop area.
_MAX_FFT_SIZE = 512

#: Highest Miller index at which the three strongest Fourier peaks may sit on a
#: candidate basis.  On a perovskite along [001] they are low orders such as
#: (1, 1), (1, 0) or (3, 1); a "basis" that makes them 5th orders is a superperiod.
_MAX_STRONG_ORDER = 3


class NoLatticeError(ValueError):
    """The frame holds no periodic lattice (blank, noise, amorphous, ...)."""


def find_lattice(image, *, min_spacing_px=4.0, max_spacing_fraction=0.25, min_quality=15.0,
                 expected_spacings_px=None):
    """Find the two shortest lattice vectors of a 2D periodic image.

    Parameters
    ----------
    image : (H, W) array
    min_spacing_px : float
        Shortest lattice spacing to consider, pixels.
    max_spacing_fraction : float
        Longest spacing to consider, as a fraction of the (cropped) frame size.
    min_quality : float
        A Fourier peak counts when its locally averaged power is at least this
        many times the median power at the same spatial frequency.
    expected_spacings_px : (float, float), optional
        The material's two in-plane lattice parameters in pixels (from its
        handbook values and the pixel size).  When the Fourier basis is the
        centred cell (a / sqrt 2 along the diagonals: A and B columns alike,
        as on ABF frames or where their (1, 0) reflection nearly cancels) or a
        doubled one (an octahedral-rotation superstructure), the basis among
        those related to it by centring or halving that matches these lengths
        within 12 % is taken instead.

    Returns
    -------
    Lattice
        ``method="fft"``; `sigma_basis_px` from the scatter of the harmonic
        peaks about the fitted reciprocal basis.

    Raises
    ------
    NoLatticeError
        When fewer than two non-collinear peaks reach `min_quality`.
    ValueError
        For an image that is not 2D or is too small.
    """
    image = np.asarray(image, dtype=np.float64)
    if image.ndim != 2:
        raise ValueError(f"`image` must be 2D, got shape {image.shape}")
    crop = _central_crop(image, _MAX_FFT_SIZE)
    h, w = crop.shape
    if min(h, w) < 4 * min_spacing_px:
        raise ValueError(f"`image` of shape {image.shape} is too small for `min_spacing_px`="
                         f"{min_spacing_px}")
    if not np.ptp(crop) > 0:
        raise NoLatticeError("frame is constant: no contrast, no lattice")

    power, kr, kc = _power_spectrum(crop)
    k_max = 1.0 / min_spacing_px
    k_min = 1.0 / (max_spacing_fraction * min(h, w))
    ratio = _whitened(power, kr, kc, k_min, k_max)
    peaks = _peaks(ratio, power, kr, kc, min_quality)
    if len(peaks) < 2:
        best = float(ratio.max()) if ratio.size else 0.0
        raise NoLatticeError(f"no lattice: fewer than two periodic peaks reach {min_quality:g}x "
                             f"the background (strongest {best:.1f}x)")
    g1, g2, qual, sigma_g = _reciprocal_basis(peaks, min_quality)
    if g1 is None:
        raise NoLatticeError("no lattice: the periodic peaks are all collinear (fringes, not "
                             "columns)")
    basis = np.linalg.inv(np.stack([g1, g2])).T  # rows a, b: a_i . g_j = delta_ij
    sigma_basis = _propagate(np.stack([g1, g2]), sigma_g)
    basis, sigma_basis = _divide_superperiods(crop, basis, sigma_basis, min_spacing_px)
    if expected_spacings_px is not None:
        basis, sigma_basis = _match_expected(basis, sigma_basis, expected_spacings_px)
    basis, sigma_basis = _order_basis(basis, sigma_basis)
    return Lattice(basis_px=readonly(basis), sigma_basis_px=readonly(sigma_basis),
                   origin_px=readonly(np.array([image.shape[0] / 2.0, image.shape[1] / 2.0])),
                   quality=float(qual), method="fft")


def _divide_superperiods(crop, basis, sigma_basis, min_spacing_px):
    """Divide a basis vector by n (2..5) when v / n is a lattice translation too.

    Where two lattice parameters meet (a film on its substrate) the Fourier peaks
    of the two split, and a split pair can pass for the harmonics of a period
    two or three times the cell's.  A true basis vector v maps the image onto
    itself while v / n does not (v / 2 moves perovskite A columns onto empty O
    sites), so a v whose n-th part matches the image about as well as v itself
    is a superperiod.
    """
    basis = np.array(basis, dtype=float)
    sigma_basis = np.array(sigma_basis, dtype=float)
    for k in range(2):
        v = basis[k]
        full = _filters.shifted_correlation(crop, v)
        if not full > 0.2:
            continue
        for n in (5, 4, 3, 2):  # the finest sub-period that is a translation too
            if (np.hypot(*v) / n >= min_spacing_px
                    and _filters.shifted_correlation(crop, v / n) > 0.8 * full):
                basis[k] = v / n
                sigma_basis[k] = sigma_basis[k] / n
                break
    return basis, sigma_basis


def _match_expected(basis, sigma_basis, expected, tolerance=0.12):
    """The basis related to `basis` by centring, de-centring, halving or doubling whose
    lengths match the `expected` pair best (unchanged when `basis` already
    matches, or when none of them does)."""
    expected = np.sort(np.asarray(expected, dtype=float))

    def mismatch(b):
        lengths = np.sort(np.hypot(b[:, 0], b[:, 1]))
        return float(np.max(np.abs(lengths / expected - 1.0)))

    if mismatch(basis) <= tolerance:
        return basis, sigma_basis
    v1, v2 = basis
    s1, s2 = sigma_basis
    s_sum = np.sqrt(s1**2 + s2**2)
    candidates = [
        (np.stack([v1 + v2, v1 - v2]), np.stack([s_sum, s_sum])),        # centred -> primitive
        (np.stack([(v1 + v2) / 2, (v1 - v2) / 2]), np.stack([s_sum, s_sum]) / 2),  # doubled
        (np.stack([v1 / 2, v2 / 2]), sigma_basis / 2),
        # every column alike (ABF, O as dark as the cations): the half cell
        (np.stack([2 * v1, 2 * v2]), 2 * sigma_basis),
        (np.stack([v1, v2 / 2]), np.stack([s1, s2 / 2])),
        (np.stack([v1 / 2, v2]), np.stack([s1 / 2, s2])),
    ]
    best = min(candidates, key=lambda c: mismatch(c[0]))
    if mismatch(best[0]) <= tolerance:
        return best
    return basis, sigma_basis


def _central_crop(image, size):
    h, w = image.shape
    r0 = max(0, (h - size) // 2)
    c0 = max(0, (w - size) // 2)
    return image[r0:r0 + min(h, size), c0:c0 + min(w, size)]


def _power_spectrum(crop):
    h, w = crop.shape
    win, kr, kc = _spectrum_layout(h, w)
    f = sfft.fft2((crop - crop.mean()) * win, workers=_filters.compute_threads())
    power = sfft.fftshift(np.abs(f) ** 2)
    return power, kr, kc


@functools.lru_cache(maxsize=4)
def _spectrum_layout(h, w):
    """Window and frequency grids of an ``h x w`` crop (the same for every frame
    of a session, so made once)."""
    win = np.outer(np.hanning(h), np.hanning(w))
    kr = sfft.fftshift(sfft.fftfreq(h))[:, None] * np.ones((1, w))
    kc = np.ones((h, 1)) * sfft.fftshift(sfft.fftfreq(w))[None, :]
    return readonly(win), readonly(kr), readonly(kc)


@functools.lru_cache(maxsize=4)
def _ring_layout(h, w, half_width):
    """Frequency rings of an ``h x w`` spectrum: ring index per bin, the bins in
    ring order, and where each band of ``2 half_width + 1`` rings starts and ends
    in that order (made once per crop shape)."""
    _, kr, kc = _spectrum_layout(h, w)
    step = 1.0 / min(h, w)
    kmag = np.hypot(kr, kc)
    ring = np.rint(kmag / step).astype(np.int64)
    n_rings = int(ring.max()) + 1
    order = np.argsort(ring, axis=None, kind="stable")
    r_sorted = ring.ravel()[order]
    lo = np.searchsorted(r_sorted, np.arange(n_rings) - half_width, side="left")
    hi = np.searchsorted(r_sorted, np.arange(n_rings) + half_width, side="right")
    return readonly(kmag), readonly(ring), readonly(order), readonly(lo), readonly(hi)


def _whitened(power, kr, kc, k_min, k_max):
    """Locally averaged power divided by the typical power at its spatial frequency.

    Averaging over 3x3 bins turns the exponential speckle of noise power into a
    narrow distribution (a Gamma law of shape 9), so a fixed ratio threshold
    separates lattice peaks from noise for any frame size; dividing by the
    background of its frequency ring removes the isotropic ring of an
    amorphous region.  The background is a low quantile over five adjacent
    rings, so the lattice peaks themselves (which can fill much of a small
    ring near the centre) do not raise it; dividing by 0.77, the lower
    quartile of that Gamma law relative to its mean, makes noise ratio ~1.
    """
    smooth = ndi.uniform_filter(power, size=3, mode="wrap")
    h, w = power.shape
    kmag, ring, order, lo, hi = _ring_layout(h, w, 2)
    background = _ring_quantile(smooth, order, lo, hi, q=0.25) / 0.77
    ratio = smooth / np.maximum(background[ring], np.finfo(float).tiny)
    ratio[(kmag < k_min) | (kmag > k_max)] = 0.0
    return ratio


def _ring_quantile(values, order, lo, hi, *, q):
    """``np.quantile`` (linear) of `values` over each ring band of `_ring_layout`,
    the bands in parallel (compiled)."""
    v_sorted = np.ascontiguousarray(values.ravel()[order])
    out = np.zeros(len(lo))
    _filters.band_quantiles(v_sorted, np.asarray(lo, np.int64), np.asarray(hi, np.int64),
                            float(q), out)
    return out


def _peaks(ratio, power, kr, kc, min_quality):
    """Local maxima of `ratio` above `min_quality` in the upper half plane:
    rows of (k_row, k_col, ratio, raw power).

    Each peak is then located on the raw power (the ring normalisation can
    shift the maximum by a bin) and refined to sub-bin precision by a
    parabola through the logarithm of the power, which is exact for a
    Gaussian main lobe and close for the Hann window's.
    """
    maxed = ndi.maximum_filter(ratio, size=5, mode="wrap")
    cand = (ratio == maxed) & (ratio >= min_quality)
    # keep one of each +/-g pair: upper half plane (kr > 0, or kr == 0 and kc > 0)
    cand &= (kr > 0) | ((kr == 0) & (kc > 0))
    rr, cc = np.nonzero(cand)
    if len(rr) == 0:
        return np.zeros((0, 4))
    h, w = ratio.shape
    # move to the raw-power maximum within +/-2 bins
    offs = np.arange(-2, 3)
    orow, ocol = np.meshgrid(offs, offs, indexing="ij")
    nr = (rr[:, None] + orow.ravel()[None, :]) % h
    nc = (cc[:, None] + ocol.ravel()[None, :]) % w
    best = np.argmax(power[nr, nc], axis=1)
    rr = nr[np.arange(len(rr)), best]
    cc = nc[np.arange(len(cc)), best]
    logp = np.log(np.maximum(power, np.finfo(float).tiny))

    def _vertex(m, z, p):
        den = m - 2 * z + p
        with np.errstate(divide="ignore", invalid="ignore"):
            d = np.where(den < 0, 0.5 * (m - p) / den, 0.0)
        return np.clip(d, -0.5, 0.5)

    d_r = _vertex(logp[(rr - 1) % h, cc], logp[rr, cc], logp[(rr + 1) % h, cc])
    d_c = _vertex(logp[rr, (cc - 1) % w], logp[rr, cc], logp[rr, (cc + 1) % w])
    dkr = kr[1, 0] - kr[0, 0]
    dkc = kc[0, 1] - kc[0, 0]
    out = np.stack([kr[rr, cc] + dkr * d_r, kc[rr, cc] + dkc * d_c, ratio[rr, cc],
                    power[rr, cc]], axis=1)
    out = out[np.argsort(-out[:, 2])]
    # the move to the raw maximum can merge two candidates: keep the first of each bin
    _, first = np.unique(np.rint(out[:, :2] / [dkr, dkc]), axis=0, return_index=True)
    return out[np.sort(first)][:64]


def _reciprocal_basis(peaks, min_quality=15.0):
    """Choose g1, g2 among the peaks and refine them on all indexed harmonics."""
    k = peaks[:, :2]
    strength = peaks[:, 2]
    # Consider the strong peaks only (at least 0.1 % of the strongest in ratio; the
    # (1,0) reflection of A and B columns of similar brightness is weak), then the
    # two shortest non-collinear ones generate the lattice (2D successive minima).
    # A peak far above the noise (three times the detection threshold: the 3x3-
    # averaged noise power never gets there) counts however much stronger the
    # others are: in a clean, thick-enough frame the A and B columns' integrated
    # intensities can nearly cancel in (1,0) -- multislice SrTiO3 HAADF puts it at
    # 2e-4 of (1,1) -- and without it the centred a/sqrt(2) cell would win.
    strong = strength >= max(min(strength.max() * 1e-3, 3.0 * min_quality), strength.min())
    ks = k[strong]
    order = np.argsort(np.hypot(ks[:, 0], ks[:, 1]))
    ks = ks[order]
    # The strongest reflections of atomic columns are low orders of the true lattice.
    # A slow intensity modulation (a layer of heavier cations, a thickness step)
    # adds weak low-frequency peaks that would otherwise pass for a fundamental and
    # make the "lattice" a superperiod of several cells: skip a shortest candidate
    # under which the strongest peaks come out as high harmonics.
    # (by raw power: the whitened ratio of a high order can be the largest of all
    # where the background at its frequency is nearly nothing, e.g. a noiseless
    # frame; the columns' form factor makes raw power fall with order)
    top = k[np.argsort(-peaks[:, 3])[:3]] if peaks.shape[1] > 3 else k[np.argsort(-strength)[:3]]
    g1 = g2 = None
    for first in range(len(ks) - 1):
        c1 = ks[first]
        c2 = None
        for cand in ks[first + 1:]:
            sin = abs(c1[0] * cand[1] - c1[1] * cand[0]) / (np.hypot(*c1) * np.hypot(*cand))
            if sin > 0.34:  # more than 20 degrees from collinear
                c2 = cand
                break
        if c2 is None:
            break
        c1, c2 = _gauss_reduce(c1, c2)
        basis = np.stack([c1, c2])
        hk = top @ np.linalg.inv(basis)
        hk_int = np.rint(hk)
        miss = np.hypot(*((hk - hk_int) @ basis).T)
        if (np.abs(hk_int).max() <= _MAX_STRONG_ORDER
                and np.all(miss < 0.15 * min(np.hypot(*c1), np.hypot(*c2)))):
            g1, g2 = c1, c2
            break
    if g2 is None:
        return None, None, 0.0, None
    G = np.stack([g1, g2])
    weights = strength
    # Index every peak against (g1, g2) and refine G on all of them; start with a
    # loose tolerance (the fundamentals alone are a bin or so off) and tighten.
    for frac in (0.25, 0.12, 0.06):
        hk = k @ np.linalg.inv(G)
        hk_int = np.rint(hk)
        resid = np.hypot(*((hk - hk_int) @ G).T)
        tol = frac * min(np.hypot(*G[0]), np.hypot(*G[1]))
        on = (resid < tol) & (np.abs(hk_int).sum(axis=1) > 0)
        X, Y, wts = hk_int[on], k[on], weights[on]
        if len(X) < 2 or np.linalg.matrix_rank(X) < 2:
            break
        wsq = np.sqrt(wts)[:, None]
        G, *_ = np.linalg.lstsq(X * wsq, Y * wsq, rcond=None)
    G_fit = G
    if len(X) > 2:
        res = Y - X @ G_fit
        dof = max(len(X) - 2, 1)
        s2 = (wts[:, None] * res**2).sum(axis=0) / dof / wts.mean()
        cov_diag = np.linalg.inv((X * wts[:, None]).T @ X / wts.mean()).diagonal()
        sigma_g = np.sqrt(np.outer(cov_diag, s2))
    else:
        # two peaks only: about a tenth of a frequency bin each
        sigma_g = np.full((2, 2), 0.1 * tol / 0.06 / 1e3)
    on_strength = wts
    g1, g2 = G_fit
    qual = min(_strength_near(k, strength, g1), _strength_near(k, strength, g2))
    if qual == 0.0:  # a fundamental inferred from harmonics only
        qual = float(on_strength.min())
    return g1, g2, qual, sigma_g


def _strength_near(k, strength, g):
    d = np.minimum(np.hypot(*(k - g).T), np.hypot(*(k + g).T))
    j = np.argmin(d)
    return float(strength[j]) if d[j] < 0.1 * np.hypot(*g) else 0.0


def _gauss_reduce(u, v):
    """Lagrange-Gauss reduction: the shortest basis of the 2D lattice spanned by u, v."""
    u, v = np.asarray(u, float), np.asarray(v, float)
    if np.dot(u, u) > np.dot(v, v):
        u, v = v, u
    for _ in range(32):
        m = np.rint(np.dot(u, v) / np.dot(u, u))
        if m == 0:
            break
        v = v - m * u
        if np.dot(v, v) < np.dot(u, u):
            u, v = v, u
        else:
            break
    return u, v


def _propagate(G, sigma_g):
    """Linear propagation of reciprocal-vector errors to the real-space basis."""
    A = np.linalg.inv(G).T
    sigma = np.zeros((2, 2))
    eps = 1e-7
    for i in range(2):
        for j in range(2):
            dG = np.zeros_like(G)
            dG[i, j] = eps
            dA = (np.linalg.inv(G + dG).T - A) / eps
            sigma += (dA * sigma_g[i, j]) ** 2
    return np.sqrt(sigma)


def _order_basis(basis, sigma):
    """Make ``a`` the shorter vector (ties: the one nearer +x) and the pair right-handed."""
    a, b = basis
    sa, sb = sigma
    la, lb = np.hypot(*a), np.hypot(*b)
    if abs(la - lb) < 0.01 * max(la, lb):
        # equal lengths within 1 %: pick the vector closest to the +x (column) direction
        cand = [a, -a, b, -b]
        ang = [abs(np.arctan2(v[0], v[1])) for v in cand]
        k = int(np.argmin(ang))
        first = cand[k]
        second = b if k < 2 else a
        sa, sb = (sa, sb) if k < 2 else (sb, sa)
        a, b = first, second
    elif lb < la:
        a, b, sa, sb = b, a, sb, sa
    # right-handed in (x, y) = (col, row)
    if a[1] * b[0] - a[0] * b[1] < 0:
        b = -b
    return np.stack([a, b]), np.stack([sa, sb])


def fractional(positions_px, lattice: Lattice, origin_px=None) -> np.ndarray:
    """Fractional coordinates ``(f_a, f_b)`` of positions in the lattice basis."""
    origin = lattice.origin_px if origin_px is None else np.asarray(origin_px, float)
    M = np.asarray(lattice.basis_px).T  # columns a, b
    return (np.asarray(positions_px, float) - origin) @ np.linalg.inv(M).T


def lattice_from_columns(columns: Columns, *, fallback: Lattice, sublattice: str = "A",
                         min_columns: int = 6) -> Lattice:
    """Least-squares basis from refined positions: ``r = origin + i a + j b``.

    Uses converged columns of `sublattice` (falls back to every converged
    column with an index); outliers beyond 5 robust sigmas are dropped once.
    Uncertainties are the standard errors of the regression, which include
    real lattice distortion as well as noise.
    """
    sel = columns.converged & (columns.sublattice == sublattice)
    if sel.sum() < min_columns:
        return fallback
    ij = columns.ij[sel].astype(float)
    pos = columns.positions_px[sel]
    X = np.column_stack([np.ones(len(ij)), ij])
    coef, res_ok = _robust_lstsq(X, pos)
    if coef is None or len(res_ok) <= 3:
        return fallback
    X_ok = X[res_ok]
    resid = pos[res_ok] - X_ok @ coef
    dof = max(len(X_ok) - 3, 1)
    s2 = (resid**2).sum(axis=0) / dof
    cov = np.linalg.inv(X_ok.T @ X_ok)
    sigma = np.sqrt(np.outer(np.diag(cov), s2))  # (3, 2): origin, a, b
    basis = coef[1:3]
    return Lattice(basis_px=readonly(basis), sigma_basis_px=readonly(sigma[1:3]),
                   origin_px=readonly(coef[0]), quality=fallback.quality, method="columns")


def _robust_lstsq(X, Y):
    coef, *_ = np.linalg.lstsq(X, Y, rcond=None)
    r = np.hypot(*(Y - X @ coef).T)
    mad = np.median(r) * 1.4826 + 1e-12
    ok = r < 5 * mad + 1e-9
    if ok.sum() < 4:
        return None, np.zeros(0, int)
    coef, *_ = np.linalg.lstsq(X[ok], Y[ok], rcond=None)
    return coef, np.nonzero(ok)[0]
