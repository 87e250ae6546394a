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
           "band_quantiles"]


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
