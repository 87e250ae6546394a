"""Compiled image filters of column detection (numba), parallel over rows.

``scipy.ndimage`` runs one thread and, for a 2048 x 2048 frame, its Gaussian
and maximum filters took most of the detection time.  These give the same
results (Gaussian: to rounding; local maxima and block minima: exactly) with
the edge handled as scipy's ``mode="nearest"`` (the edge pixel repeated).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from livequant.analysis._kernels import _select

__all__ = ["compute_threads", "gaussian_nearest", "local_maxima", "block_minimum", "gaussian_weights",
           "band_quantiles", "second_difference_mad", "nonzero_2d", "shifted_correlation"]


def compute_threads() -> int:
    """The number of threads the compiled kernels use in this thread (numba's
    setting, see ``livequant.pipeline.limit_threads``); FFTs use the same."""
    import numba

    return int(numba.get_num_threads())


def gaussian_weights(sigma, truncate=4.0) -> np.ndarray:
    """The 1-D kernel of ``scipy.ndimage.gaussian_filter``: ``exp(-x^2 / 2 sigma^2)``
    over ``|x| <= int(truncate sigma + 0.5)``, normalised to sum 1."""
    radius = int(truncate * float(sigma) + 0.5)
    x = np.arange(-radius, radius + 1, dtype=np.float64)
    w = np.exp(-0.5 * x * x / float(sigma) ** 2)
    return w / w.sum()


@njit(cache=True, parallel=True, fastmath={"contract"})
def _rows(image, w, out):
    """Correlate every row with the symmetric kernel `w` (nearest edge)."""
    h, n = image.shape
    r = (w.shape[0] - 1) // 2
    for i in prange(h):
        row = image[i]
        pad = np.empty(n + 2 * r)
        for j in range(r):
            pad[j] = row[0]
            pad[n + r + j] = row[n - 1]
        pad[r:r + n] = row
        o = out[i]
        for j in range(n):
            o[j] = w[r] * pad[j + r]
        for k in range(1, r + 1):
            wk = w[r + k]
            for j in range(n):
                o[j] += wk * (pad[j + r - k] + pad[j + r + k])


@njit(cache=True, parallel=True, fastmath={"contract"})
def _cols(image, w, out):
    """Correlate every column with the symmetric kernel `w` (nearest edge),
    a whole row at a time so the inner loop runs along memory."""
    h, n = image.shape
    r = (w.shape[0] - 1) // 2
    for i in prange(h):
        o = out[i]
        src = image[i]
        for j in range(n):
            o[j] = w[r] * src[j]
        for k in range(1, r + 1):
            wk = w[r + k]
            a = image[max(i - k, 0)]
            b = image[min(i + k, h - 1)]
            for j in range(n):
                o[j] += wk * (a[j] + b[j])


def gaussian_nearest(image, sigma, truncate=4.0) -> np.ndarray:
    """``scipy.ndimage.gaussian_filter(image, sigma, mode="nearest")``, float64."""
    image = np.ascontiguousarray(image, dtype=np.float64)
    w = gaussian_weights(sigma, truncate)
    tmp = np.empty_like(image)
    _rows(image, w, tmp)
    out = np.empty_like(image)
    _cols(tmp, w, out)
    return out


@njit(cache=True, parallel=True)
def _row_max(a, half, out):
    """Running maximum over ``2 half + 1`` pixels along every row (nearest edge),
    one offset at a time so the inner loop runs along memory."""
    h, n = a.shape
    for i in prange(h):
        row = a[i]
        pad = np.empty(n + 2 * half)
        for j in range(half):
            pad[j] = row[0]
            pad[n + half + j] = row[n - 1]
        pad[half:half + n] = row
        o = out[i]
        o[:] = row
        for k in range(2 * half + 1):
            for j in range(n):
                o[j] = max(o[j], pad[j + k])


@njit(cache=True, parallel=True)
def _col_max_equal(a, rowmax, half, out):
    """`out` = (`a` equals the maximum of `rowmax` over ``2 half + 1`` rows)."""
    h, n = a.shape
    for i in prange(h):
        m = rowmax[i].copy()
        for k in range(max(i - half, 0), min(i + half, h - 1) + 1):
            src = rowmax[k]
            for j in range(n):
                m[j] = max(m[j], src[j])
        src = a[i]
        o = out[i]
        for j in range(n):
            o[j] = src[j] == m[j]


def local_maxima(image, size) -> np.ndarray:
    """``image == scipy.ndimage.maximum_filter(image, size, mode="nearest")`` for odd `size`."""
    if size % 2 != 1:
        raise ValueError(f"`size` must be odd, got {size}")
    a = np.ascontiguousarray(image, dtype=np.float64)
    rowmax = np.empty_like(a)
    _row_max(a, size // 2, rowmax)
    out = np.empty(a.shape, dtype=np.bool_)
    _col_max_equal(a, rowmax, size // 2, out)
    return out


@njit(cache=True, parallel=True)
def _block_minimum(a, factor, out):
    h, n = a.shape
    hc, wc = out.shape
    for bi in prange(hc):
        for bj in range(wc):
            m = np.inf
            for i in range(bi * factor, min((bi + 1) * factor, h)):
                for j in range(bj * factor, min((bj + 1) * factor, n)):
                    if a[i, j] < m:
                        m = a[i, j]
            out[bi, bj] = m


def block_minimum(image, factor) -> np.ndarray:
    """Minimum over ``factor x factor`` blocks; the last blocks are cut at the edge
    (the same as padding with the edge value, which is already in the block)."""
    a = np.ascontiguousarray(image, dtype=np.float64)
    h, w = a.shape
    out = np.empty((-(-h // factor), -(-w // factor)))
    _block_minimum(a, int(factor), out)
    return out


@njit(cache=True, parallel=True)
def band_quantiles(values, lo, hi, q, out):
    """``out[k] = np.quantile(values[lo[k]:hi[k]], q)`` (numpy's default linear
    method, its interpolation formula included); 0 for an empty band."""
    for k in prange(lo.shape[0]):
        n = hi[k] - lo[k]
        if n <= 0:
            out[k] = 0.0
            continue
        a = values[lo[k]:hi[k]].copy()
        pos = q * (n - 1)
        i = int(math.floor(pos))
        t = pos - i
        v0 = _select(a, n, i)
        v1 = v0
        if i + 1 < n:
            v1 = a[i + 1]
            for m in range(i + 2, n):
                if a[m] < v1:
                    v1 = a[m]
        d = v1 - v0
        out[k] = v1 - d * (1.0 - t) if t >= 0.5 else v0 + d * t


def _median_inplace(a):
    """``np.median(a)`` of a 1-D float array, reordering `a` in place (numpy's
    median partitions a copy).  numpy's introselect, not `_select`: detector
    counts are integers, and a quickselect's partition degrades to quadratic
    time on that many ties."""
    n = a.shape[0]
    k = (n - 1) // 2
    if n % 2 == 1:
        a.partition(k)
        return float(a[k])
    a.partition((k, k + 1))
    return float((a[k] + a[k + 1]) / 2.0)


@njit(cache=True, parallel=True)
def _second_differences(image, every, out):
    """``out[i] = r[2:] - 2 r[1:-1] + r[:-2]`` of row ``r = image[i * every]``
    (in numpy's order of operations, so the values are numpy's to the bit)."""
    w = image.shape[1]
    for i in prange(out.shape[0]):
        r = image[i * every]
        o = out[i]
        for j in range(w - 2):
            o[j] = (r[j + 2] - 2.0 * r[j + 1]) + r[j]


def second_difference_mad(image, every) -> float:
    """The median absolute deviation of the second differences along every
    `every`-th row: ``np.median(np.abs(d2 - np.median(d2)))`` with ``d2 =
    rows[:, 2:] - 2 rows[:, 1:-1] + rows[:, :-2]``, to the bit.  numpy's two
    medians of a million values (it partitions copies) took a quarter of the
    detection time on a 2048 frame."""
    a = np.ascontiguousarray(image, dtype=np.float64)
    n_rows = -(-a.shape[0] // every)
    if a.shape[1] < 3 or n_rows == 0:
        raise ValueError(f"need at least one row of 3 pixels, got shape {a.shape}")
    d2 = np.empty((n_rows, a.shape[1] - 2))
    _second_differences(a, int(every), d2)
    flat = d2.reshape(-1)
    centre = _median_inplace(flat)
    np.abs(np.subtract(flat, centre, out=flat), out=flat)
    return float(_median_inplace(flat))


@njit(cache=True, parallel=True)
def _row_counts(mask, counts):
    for i in prange(mask.shape[0]):
        c = 0
        row = mask[i]
        for j in range(mask.shape[1]):
            c += row[j]
        counts[i] = c


@njit(cache=True, parallel=True)
def _row_positions(mask, first, rr, cc):
    for i in prange(mask.shape[0]):
        at = first[i]
        row = mask[i]
        for j in range(mask.shape[1]):
            if row[j]:
                rr[at] = i
                cc[at] = j
                at += 1


def nonzero_2d(mask):
    """``np.nonzero(mask)`` of a 2-D boolean array (the same order, row by
    row), parallel over rows: for a sparse 2048 x 2048 mask numpy's took 15 ms,
    more than finding the maxima in it."""
    m = np.ascontiguousarray(mask, dtype=np.bool_)
    if m.ndim != 2:
        raise ValueError(f"`mask` must be 2-D, got shape {m.shape}")
    counts = np.empty(m.shape[0], np.int64)
    _row_counts(m, counts)
    first = np.zeros(m.shape[0] + 1, np.int64)
    np.cumsum(counts, out=first[1:])
    rr = np.empty(first[-1], np.int64)
    cc = np.empty(first[-1], np.int64)
    _row_positions(m, first, rr, cc)
    return rr, cc


@njit(cache=True, parallel=True, fastmath={"contract"})
def _shifted_sums(crop, m, i0, j0, fr, fc, centre_a, centre_b, sums):
    """Per row of the overlap: sums of ``a`` and ``b`` (first pass, centres
    0) or of ``a a``, ``b b`` and ``a b`` about the given centres (second
    pass), ``a`` the crop inside a margin `m` and ``b`` the crop moved by
    ``(i0 + fr, j0 + fc)``, bilinear."""
    h, w = crop.shape
    for i in prange(m, h - m):
        s_a = 0.0
        s_b = 0.0
        s_ab = 0.0
        r0 = crop[i + i0]
        r1 = crop[i + i0 + 1]
        ra = crop[i]
        for j in range(m, w - m):
            c = j + j0
            b = ((1 - fr) * ((1 - fc) * r0[c] + fc * r0[c + 1])
                 + fr * ((1 - fc) * r1[c] + fc * r1[c + 1])) - centre_b
            a = ra[j] - centre_a
            if sums.shape[1] == 2:
                s_a += a
                s_b += b
            else:
                s_a += a * a
                s_b += b * b
                s_ab += a * b
        sums[i - m, 0] = s_a
        sums[i - m, 1] = s_b
        if sums.shape[1] == 3:
            sums[i - m, 2] = s_ab


def shifted_correlation(crop, shift_rc) -> float:
    """Correlation coefficient of `crop` with itself moved by `shift_rc`
    (pixels, bilinear: what an order-1 spline shift gives inside the frame)
    over the part where the two overlap; 0 when they barely do.  Two compiled
    passes (means, then centred sums) instead of numpy's eight frame-sized
    temporaries."""
    crop = np.ascontiguousarray(crop, dtype=np.float64)
    dr, dc = float(shift_rc[0]), float(shift_rc[1])
    h, w = crop.shape
    m = int(np.ceil(max(abs(dr), abs(dc)))) + 1
    if 2 * m >= min(h, w):
        return 0.0
    i0, j0 = int(np.floor(dr)), int(np.floor(dc))
    fr, fc = dr - i0, dc - j0
    count = (h - 2 * m) * (w - 2 * m)
    first = np.empty((h - 2 * m, 2))
    _shifted_sums(crop, m, i0, j0, fr, fc, 0.0, 0.0, first)
    mean_a, mean_b = first.sum(axis=0) / count
    second = np.empty((h - 2 * m, 3))
    _shifted_sums(crop, m, i0, j0, fr, fc, mean_a, mean_b, second)
    s_aa, s_bb, s_ab = second.sum(axis=0)
    den = float(np.sqrt(s_aa * s_bb))
    return float(s_ab / den) if den > 0 else 0.0
