"""The compiled filters of detection and lattice finding against the scipy/numpy
functions they replace (reference libraries: same results, to rounding or exactly)."""

import numpy as np
import pytest
from scipy import ndimage as ndi

from livequant.analysis import _filters
from livequant.analysis._kernels import _select


@pytest.mark.parametrize("shape", [(37, 53), (128, 96)])
@pytest.mark.parametrize("sigma", [0.7, 2.9, 6.0])
def test_gaussian_matches_scipy_nearest(shape, sigma):
    rng = np.random.default_rng(1)
    img = rng.poisson(30.0, shape).astype(float)
    img[5:9, 7:12] += 400.0   # an edge-crossing feature would show a wrong boundary rule
    img[0:3, 0:4] += 200.0
    ref = ndi.gaussian_filter(img, sigma, mode="nearest")
    got = _filters.gaussian_nearest(img, sigma)
    assert np.allclose(got, ref, rtol=1e-12, atol=1e-12 * np.abs(ref).max())


@pytest.mark.parametrize("size", [3, 5, 9])
def test_local_maxima_match_scipy(size):
    rng = np.random.default_rng(2)
    img = ndi.gaussian_filter(rng.normal(size=(61, 70)), 1.5)
    img[10:13, 20:23] = img.max() + 1.0       # a plateau: every pixel of it is a maximum
    ref = img == ndi.maximum_filter(img, size=size, mode="nearest")
    assert np.array_equal(_filters.local_maxima(img, size), ref)
    with pytest.raises(ValueError, match="`size`"):
        _filters.local_maxima(img, 4)


@pytest.mark.parametrize("factor", [1, 4, 7])
def test_block_minimum_matches_edge_padded_reshape(factor):
    rng = np.random.default_rng(3)
    img = rng.normal(size=(45, 52))
    h, w = img.shape
    hc, wc = -(-h // factor), -(-w // factor)
    padded = np.pad(img, [(0, hc * factor - h), (0, wc * factor - w)], mode="edge")
    ref = padded.reshape(hc, factor, wc, factor).min(axis=(1, 3))
    assert np.array_equal(_filters.block_minimum(img, factor), ref)


def test_band_quantiles_match_numpy_quantile():
    rng = np.random.default_rng(4)
    values = rng.exponential(size=3000)
    values[100:200] = 1.5  # ties
    lo = np.sort(rng.integers(0, 2900, 200))
    hi = lo + rng.integers(0, 80, 200)
    out = np.empty(200)
    _filters.band_quantiles(values, lo, hi, 0.25, out)
    ref = [np.quantile(values[a:b], 0.25) if b > a else 0.0 for a, b in zip(lo, hi)]
    assert np.array_equal(out, ref)


def test_select_is_the_kth_order_statistic():
    rng = np.random.default_rng(5)
    for trial in range(500):
        n = int(rng.integers(1, 150))
        k = int(rng.integers(0, n))
        a = rng.integers(0, 4, n).astype(float) if trial % 2 else rng.normal(size=n)
        assert _select(a.copy(), n, k) == np.partition(a, k)[k]
    flat = np.full(101, 7.0)  # all tied: every kth is the one value
    assert all(_select(flat.copy(), 101, k) == 7.0 for k in (0, 50, 100))


@pytest.mark.parametrize("shape, every", [((2048, 96), 4), ((64, 33), 4), ((7, 5), 1), ((9, 3), 1)])
@pytest.mark.parametrize("kind", ["counts", "floats"])
def test_second_difference_mad_is_numpys_to_the_bit(shape, every, kind):
    """Reference: numpy's median of the absolute deviation of the row-wise
    second differences, the expression it replaces.  Integer counts bring
    many ties (a quickselect's worst case)."""
    rng = np.random.default_rng(4)
    img = (rng.poisson(20.0, shape).astype(float) if kind == "counts"
           else rng.normal(5.0, 2.0, shape))
    rows = img[::every]
    d2 = rows[:, 2:] - 2 * rows[:, 1:-1] + rows[:, :-2]
    ref = np.median(np.abs(d2 - np.median(d2)))
    assert _filters.second_difference_mad(img, every) == ref
    with pytest.raises(ValueError, match="3 pixels"):
        _filters.second_difference_mad(img[:, :2], every)


@pytest.mark.parametrize("shape, fraction", [((300, 257), 0.01), ((5, 7), 0.5), ((0, 4), 0.5),
                                             ((4, 0), 0.5), ((6, 6), 0.0), ((6, 6), 1.0)])
def test_nonzero_2d_matches_numpy(shape, fraction):
    """Reference: ``np.nonzero``, same positions in the same order."""
    mask = np.random.default_rng(5).random(shape) < fraction
    rr, cc = _filters.nonzero_2d(mask)
    ref_r, ref_c = np.nonzero(mask)
    assert np.array_equal(rr, ref_r) and np.array_equal(cc, ref_c)
    with pytest.raises(ValueError, match="2-D"):
        _filters.nonzero_2d(mask.reshape(-1))


@pytest.mark.parametrize("shift", [(6.3, 0.2), (-3.15, 5.01), (0.0, 0.0), (2.0, -7.9), (40.0, 0.0)])
def test_shifted_correlation_matches_an_order_one_spline_shift(shift):
    """Reference: scipy.ndimage.shift with order 1 (bilinear) and numpy's
    corrcoef over the same overlap (the margin the function leaves)."""
    rng = np.random.default_rng(9)
    crop = ndi.gaussian_filter(rng.normal(size=(64, 72)), 2.0) + 0.1 * rng.normal(size=(64, 72))
    got = _filters.shifted_correlation(crop, shift)
    m = int(np.ceil(max(abs(shift[0]), abs(shift[1])))) + 1
    if 2 * m >= min(crop.shape):
        assert got == 0.0
        return
    moved = ndi.shift(crop, (-shift[0], -shift[1]), order=1, mode="nearest")
    inner = (slice(m, crop.shape[0] - m), slice(m, crop.shape[1] - m))
    ref = np.corrcoef(crop[inner].ravel(), moved[inner].ravel())[0, 1]
    assert got == pytest.approx(ref, abs=1e-12)
