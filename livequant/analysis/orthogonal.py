"""Two frames with orthogonal fast-scan directions, combined into one undistorted image.

A drifting specimen distorts a scanned frame along its slow-scan direction:
every line is recorded ``t_line`` after the one before, so the line's content
is displaced by the drift accumulated meanwhile (CHECK-VALUES section 6,
linear-drift model).  Two frames of the same region recorded with the scan
rotated by 90 degrees carry that error along perpendicular directions; the
drift that makes them agree is the one that distorted them.  The method
follows Ophus, Ciston & Nelson, "Correcting nonlinear drift distortion of
scanning probe and scanning transmission electron microscopies from image
pairs with orthogonal scan directions", Ultramicroscopy 162, 1 (2016)
(bibliographic data from memory, CHECK-VALUES section 6):

1. **linear drift search**: over a grid of drift velocities, undo the
   drift in both frames (each with its own time map), align them rigidly and
   score how well they agree (correlation over the overlap); the best
   velocity is refined on finer grids (on binned images: it is a coarse step);
2. **per-line refinement**: each frame's scan lines get their own offsets,
   measured against the other frame (whose line errors run across them and
   average out along each line) and regularised (a smooth part plus
   fast-axis jitter, :func:`~livequant.analysis.registration.smooth_line_offsets`),
   repeated until both agree;
3. the two corrected frames, resampled on one grid, are summed.

Orientation: the result is on the grid of the first frame (scan rotation
``theta``); the second (``theta + 90``) is turned into that orientation first
(``np.rot90(image, -1)``: its fast axis then runs along the first frame's rows).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from livequant.analysis.registration import (_SmoothedReference, _bin, measure_line_offsets,
                                             rigid_shift, smooth_line_offsets)

__all__ = ["OrthogonalResult", "correct_orthogonal_pair", "to_first_orientation"]


@dataclass(frozen=True)
class OrthogonalResult:
    """The corrected pair.

    Attributes
    ----------
    summed : 2D array
        Sum of both corrected frames over ``box`` (row0, row1, col0, col1) of
        the first frame's grid (so it reads as a frame of twice the dose).
    velocity_px_per_s : (2,) array
        Drift (row, col) in the first frame's pixels per second.
    shift_px : (2,) array
        Where the second frame's content sits against the first's, after
        the drift is undone (the drift between the two acquisitions).
    line_offsets_px : (2, n, 2) array
        Per-line offsets (row, col) of each frame on top of the linear drift:
        ``[0]`` per row of the first, ``[1]`` per column (its scan lines) of
        the turned second frame.
    agreement : float
        Correlation of the two corrected frames over their overlap.
    agreement_uncorrected : float
        The same without any correction (rigid alignment only).
    """

    summed: np.ndarray
    box: tuple
    velocity_px_per_s: np.ndarray
    shift_px: np.ndarray
    line_offsets_px: np.ndarray
    agreement: float
    agreement_uncorrected: float
    info: dict = field(default_factory=dict)


def to_first_orientation(image_90) -> np.ndarray:
    """The second frame (scan rotated +90 degrees) turned onto the first frame's axes."""
    return np.rot90(np.asarray(image_90), -1)


def _time_maps(n: int, line_time_s: float, dwell_s: float):
    """Acquisition time of every pixel of both frames, on the first frame's grid, centred."""
    i = np.arange(n, dtype=float)[:, None]
    j = np.arange(n, dtype=float)[None, :]
    t0 = i * line_time_s + j * dwell_s
    # turned second frame: its pixel (r1, c1) = (n - 1 - j, i)
    t1 = (n - 1 - j) * line_time_s + i * dwell_s
    return t0 - t0.mean(), t1 - t1.mean()


def _sample(img, rr, cc, order):
    n0, n1 = img.shape
    valid = (rr >= 0) & (rr <= n0 - 1) & (cc >= 0) & (cc <= n1 - 1)
    out = ndimage.map_coordinates(img, [rr, cc], order=order, mode="nearest",
                                  prefilter=order > 1)
    return out, valid


def _corrected(img0, img1, v, t0, t1, shift, o0, o1, order):
    """Both frames with drift `v` (px/s), the shift and per-line offsets undone."""
    n = img0.shape[0]
    r = np.arange(n, dtype=float)[:, None]
    c = np.arange(n, dtype=float)[None, :]
    rr0 = r + v[0] * t0 + o0[:, 0:1]
    cc0 = c + v[1] * t0 + o0[:, 1:2]
    rr1 = r + shift[0] + v[0] * t1 + o1[None, :, 0]
    cc1 = c + shift[1] + v[1] * t1 + o1[None, :, 1]
    a, va = _sample(img0, rr0, cc0, order)
    b, vb = _sample(img1, rr1, cc1, order)
    return a, b, va & vb


def _agreement(a, b, valid) -> float:
    if valid.sum() < 64:
        return -1.0
    x, y = a[valid], b[valid]
    x = x - x.mean()
    y = y - y.mean()
    den = math.sqrt(float((x * x).sum() * (y * y).sum()))
    return float((x * y).sum() / den) if den > 0 else -1.0


def _inner(valid, border: int = 2):
    return ndimage.minimum_filter(valid.astype(np.uint8), size=2 * border + 1, mode="constant",
                                  cval=0) > 0


def _score(img0, img1, v, t0, t1, zeros):
    a, _, va = _corrected(img0, img0, v, t0, t0, (0.0, 0.0), zeros, zeros, 1)
    b, _, vb = _corrected(img1, img1, v, t1, t1, (0.0, 0.0), zeros, zeros, 1)
    fill_a, fill_b = a[va].mean(), b[vb].mean()
    s = rigid_shift(np.where(va, a, fill_a), np.where(vb, b, fill_b), upsample_factor=4).shift_px
    a, b, valid = _corrected(img0, img1, v, t0, t1, s, zeros, zeros, 1)
    return _agreement(a, b, _inner(valid)), s


def correct_orthogonal_pair(image, image_90, *, line_time_s: float, dwell_s: float = 0.0,
                            max_drift_px: float | None = None, n_grid: int = 7,
                            iterations: int = 4, smooth_lines: float = 32.0,
                            smooth_px: float = 2.0, gain: float = 1.0) -> OrthogonalResult:
    """Undo the drift distortion of an orthogonal pair and sum the two frames.

    Parameters
    ----------
    image : 2D array (square)
        The frame with scan rotation ``theta``.
    image_90 : 2D array (same shape)
        The frame of the same region with scan rotation ``theta + 90`` degrees,
        as recorded (it is turned here).
    line_time_s, dwell_s : float
        Scan timing of both frames (``line_time_s = cols * dwell + flyback``).
    max_drift_px : float, optional
        Largest drift over one frame searched, px (default a tenth of the frame).
    n_grid : int
        Grid points per axis of the linear search (refined twice around the best).
    iterations : int
        Rounds of the per-line refinement.
    smooth_lines, smooth_px, gain :
        Of the per-line model (see :func:`~livequant.analysis.registration.register_frame`).

    Returns
    -------
    OrthogonalResult
    """
    a = np.asarray(image, dtype=np.float64)
    b = to_first_orientation(np.asarray(image_90, dtype=np.float64)).copy()
    if a.ndim != 2 or a.shape[0] != a.shape[1]:
        raise ValueError(f"`image` must be a square 2D frame, got shape {a.shape}")
    if b.shape != a.shape:
        raise ValueError(f"`image_90` must have the shape of `image` {a.shape}, got "
                         f"{np.asarray(image_90).shape}")
    if not (line_time_s > 0):
        raise ValueError(f"`line_time_s` must be > 0, got {line_time_s!r}")
    n = a.shape[0]
    frame_s = n * line_time_s
    max_drift_px = 0.1 * n if max_drift_px is None else float(max_drift_px)
    if max_drift_px <= 0:
        raise ValueError(f"`max_drift_px` must be > 0, got {max_drift_px}")

    # 1. linear drift search on binned frames
    bn = max(1, n // 96)
    ab, bb = _bin(a, bn), _bin(b, bn)
    nb = ab.shape[0]
    t0b, t1b = _time_maps(nb, line_time_s * bn, dwell_s * bn)
    zeros_b = np.zeros((nb, 2))
    vmax_b = max_drift_px / bn / frame_s            # binned px per second
    centre = np.zeros(2)
    step = 2 * vmax_b / max(n_grid - 1, 1)
    best = (-2.0, centre, np.zeros(2))
    for _round in range(3):
        k = np.arange(n_grid) - (n_grid - 1) / 2
        for dr in k * step:
            for dc in k * step:
                v = centre + np.array([dr, dc])
                sc, s = _score(ab, bb, v, t0b, t1b, zeros_b)
                if sc > best[0]:
                    best = (sc, v, s)
        centre = best[1]
        step = step * 2.0 / max(n_grid - 1, 1)
        n_grid = 5
    v = best[1] * bn                                 # px/s on the full grid
    shift = best[2] * bn

    # 2. per-line refinement, each frame against the other
    t0, t1 = _time_maps(n, line_time_s, dwell_s)
    o0 = np.zeros((n, 2))
    o1 = np.zeros((n, 2))
    for _ in range(max(1, int(iterations))):
        c0, c1, valid = _corrected(a, b, v, t0, t1, shift, o0, o1, 1)
        fill = float(c0[valid].mean())
        ref1 = np.where(valid, c1, np.nan)
        ref0 = np.where(valid, c0, np.nan)
        # frame 0's lines are rows: measure them against frame 1
        d0, var0 = measure_line_offsets(ref1, np.where(valid, c0, fill), valid,
                                        _ref=_SmoothedReference(ref1, smooth_px, gain=gain))
        o0 = smooth_line_offsets(o0 + d0, var0, smooth_lines=smooth_lines).offsets_px
        # frame 1's lines are columns: transpose, measure against frame 0
        d1, var1 = measure_line_offsets(ref0.T, np.where(valid, c1, fill).T, valid.T,
                                        _ref=_SmoothedReference(ref0.T, smooth_px, gain=gain))
        # transposed (row, col) = common (col, row); its fast axis is column 1 there
        d1 = d1[:, ::-1]
        var1 = var1[:, ::-1]
        o1 = smooth_line_offsets(o1 + d1, var1, smooth_lines=smooth_lines,
                                 jitter_axes=(0,)).offsets_px
        # the common translation is free: keep it in `shift`, split evenly
        mean0, mean1 = o0.mean(axis=0), o1.mean(axis=0)
        shift = shift + mean1 - mean0
        o0 -= mean0
        o1 -= mean1
    # The per-line offsets took up what the grid search left of the linear
    # drift: frame 0's rows carry v t (t = row t_line), frame 1's columns
    # v t (t = (n - 1 - col) t_line); fold their common slope into v.
    idx = np.arange(n, dtype=float) - (n - 1) / 2
    slope0 = idx @ o0 / float(idx @ idx)            # px per row
    slope1 = -(idx @ o1) / float(idx @ idx)         # px per column, sign of the time map
    v_total = v + 0.5 * (slope0 + slope1) / line_time_s
    c0, c1, valid = _corrected(a, b, v, t0, t1, shift, o0, o1, 3)
    agree = _agreement(c0, c1, _inner(valid))
    zeros = np.zeros((n, 2))
    s_raw = rigid_shift(a, b, upsample_factor=4, bin_to_px=512).shift_px
    u0, u1, uvalid = _corrected(a, b, np.zeros(2), t0, t1, s_raw, zeros, zeros, 3)
    agree_raw = _agreement(u0, u1, _inner(uvalid))
    from livequant.analysis.series import _full_box

    box = _full_box(valid)
    r0, r1, q0, q1 = box
    summed = (c0 + c1)[r0:r1, q0:q1]
    return OrthogonalResult(summed=summed, box=box,
                            velocity_px_per_s=np.asarray(v_total, float),
                            shift_px=np.asarray(shift, float),
                            line_offsets_px=np.stack([o0, o1]), agreement=agree,
                            agreement_uncorrected=agree_raw,
                            info={"drift_over_frame_px": [float(x) * frame_s for x in v_total],
                                  "search_binning": bn,
                                  "search_velocity_px_per_s": [float(x) for x in v]})
