"""Registration pieces against known shifts and offsets (synthetic truth)."""

import numpy as np
import pytest
from scipy import ndimage

from livequant.analysis.registration import (_warp_rows_linear, register_frame, residual_chi2,
                                             rigid_shift, smooth_line_offsets, warp_frame)
from livequant.synthetic import render_columns


def _lattice(shift=(0.0, 0.0), *, size=256, amp=50.0, noise=True, seed=0):
    g = np.arange(-2, size + 2, 20.0)
    r, c = np.meshgrid(g, g, indexing="ij")
    pos = np.c_[r.ravel(), c.ravel()] + 3.3 * np.sin(np.c_[c.ravel(), r.ravel()] / 37.0)
    pos = pos + np.asarray(shift, float)
    return render_columns((size, size), pos, amp, 2.5, background=5.0,
                          rng=np.random.default_rng(seed), noise=noise)


def test_rigid_shift_finds_a_known_shift_and_agrees_with_scikit_image_sign():
    """Content moved by (+3.4, -5.7) px: rigid_shift reports it (the opposite of
    scikit-image's registering shift, by design) to 0.05 px."""
    ref = _lattice(noise=False)
    mov = _lattice((3.4, -5.7), noise=False)
    s = rigid_shift(ref, mov, upsample_factor=20).shift_px
    assert np.allclose(s, (3.4, -5.7), atol=0.05)
    near = rigid_shift(ref, mov, near_px=(3.0, -5.0)).shift_px
    assert np.allclose(near, (3.4, -5.7), atol=0.15)


def test_warp_convention_and_fast_linear_path():
    """warp_frame samples at q + shift: warping the moved image by its shift gives back
    the reference; the row-wise linear path equals map_coordinates(order=1)."""
    ref = _lattice(noise=False)
    mov = _lattice((3.4, -5.7), noise=False)
    back, valid = warp_frame(mov, shift_px=(3.4, -5.7))
    inner = ndimage.binary_erosion(valid, iterations=8)
    assert np.abs(back - ref)[inner].max() < 0.02 * ref.max()
    rng = np.random.default_rng(1)
    o = rng.normal(0, 1, (256, 2))
    a, va = warp_frame(mov, shift_px=(1.2, -0.7), line_offsets_px=o, order=1)
    b, vb = _warp_rows_linear(mov, (1.2, -0.7), o)
    assert np.array_equal(va, vb) and np.nanmax(np.abs(a - b)) < 1e-9


def test_smooth_line_offsets_recover_a_smooth_curve_and_fast_axis_jitter():
    """Measurements = smooth curve + white jitter (0.3 px, columns only) + noise
    (0.1 px): the smooth part comes back within the noise, the jitter estimate
    within 20 %, and no jitter is invented across the lines."""
    rng = np.random.default_rng(4)
    n = 512
    t = np.arange(n)
    smooth = np.c_[0.8 * np.sin(t / 90.0), 1.5 * np.cos(t / 140.0)]
    jitter = np.c_[np.zeros(n), rng.normal(0, 0.3, n)]
    noise = rng.normal(0, 0.1, (n, 2))
    lo = smooth_line_offsets(smooth + jitter + noise, np.full((n, 2), 0.01))
    assert lo.jitter_px[0] == 0.0
    assert lo.jitter_px[1] == pytest.approx(0.3, rel=0.2)
    err = lo.offsets_px - (smooth + jitter)
    assert np.sqrt(np.mean(err[:, 0] ** 2)) < 0.05
    # with the jitter kept, the error is below the jitter itself by the shrinkage
    assert np.sqrt(np.mean(err[:, 1] ** 2)) < 0.5 * 0.3


def test_register_frame_removes_per_line_jitter():
    """A frame whose scan lines are shifted along the fast axis (0.8 px rms,
    white) and whose content moved by (2, 1.4) px: the per-line model recovers
    the line offsets to a quarter of the jitter and the residual falls to
    the shot noise, where the rigid step alone leaves it well above.  A
    fractional shift across the lines (2.5 rows) is undone as well: each scan
    line is moved back along itself before the lines are resampled."""
    rng = np.random.default_rng(7)
    n = 256
    offs = np.c_[np.zeros(n), rng.normal(0, 0.8, n)]
    ref = _lattice(amp=200.0, seed=1)
    # line l of the frame shows the content moved by (2, 1.4) + offs[l]: F(q) = clean(q - o)
    clean, _ = warp_frame(_lattice((2.0, 1.4), amp=200.0, noise=False), line_offsets_px=-offs)
    mov = rng.poisson(np.nan_to_num(clean, nan=5.0)).astype(float)
    rigid = register_frame(ref, mov, nonrigid=False, gain=1.0)
    reg = register_frame(ref, mov, gain=1.0)
    assert np.allclose(rigid.shift_px, (2.0, 1.4 + offs[:, 1].mean()), atol=0.2)
    got = reg.line_offsets_px + reg.shift_px - (2.0, 1.4)
    # grid row q samples the frame's line q + 2
    inner = np.arange(20, n - 20)
    err = got[inner] - offs[inner + 2]
    assert np.sqrt(np.mean(err[:, 1] ** 2)) < 0.25 * 0.8
    assert np.sqrt(np.mean(err[:, 0] ** 2)) < 0.05
    assert reg.jitter_px[1] == pytest.approx(0.8, rel=0.15)
    assert reg.residual_chi2 < 1.3 and rigid.residual_chi2 > 3.0
    clean, _ = warp_frame(_lattice((2.5, 1.4), amp=200.0, noise=False), line_offsets_px=-offs)
    half = register_frame(ref, rng.poisson(np.nan_to_num(clean, nan=5.0)).astype(float))
    assert half.residual_chi2 < 1.3
    assert half.jitter_px[1] == pytest.approx(0.8, rel=0.15)


def test_residual_is_about_one_for_pure_shot_noise():
    """Two Poisson realisations of one image: the blurred residual is ~1 (gain 1)."""
    clean = _lattice(noise=False)
    rng = np.random.default_rng(3)
    a, b = rng.poisson(clean).astype(float), rng.poisson(clean).astype(float)
    chi2 = residual_chi2(a, b, np.ones(a.shape, bool), gain=1.0, n_reference=1)
    assert chi2 == pytest.approx(1.0, abs=0.2)
