"""Small synthetic lattices with exact truth, for tests, examples and benchmarks.

This is deliberately the simplest honest image model — point-sampled 2D
Gaussians plus a constant background under Poisson noise — so that tests can
compare the fitter against the Cramér-Rao bound of exactly that model.  The
simulated instrument (``sim_instrument``) forms frames far more realistically.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["SyntheticFrame", "render_columns", "perovskite_frame"]


@dataclass(frozen=True)
class SyntheticFrame:
    pixels: np.ndarray          # (H, W) float counts
    positions_px: np.ndarray    # (N, 2) true (row, col)
    sublattice: np.ndarray      # (N,) "A" / "B" / "Oa" / "Ob"
    ij: np.ndarray              # (N, 2) cell indices
    amplitude: np.ndarray       # (N,) true peak heights, counts
    sigma_px: float
    background: float
    pixel_size_pm: float
    basis_px: np.ndarray        # (2, 2) rows a, b as (d_row, d_col)


def render_columns(shape, positions_px, amplitude, sigma_px, *, background=0.0, rng=None,
                   noise=True, radius_sigma=6.0) -> np.ndarray:
    """Render round Gaussian columns (point-sampled at pixel centres).

    Parameters
    ----------
    shape : (int, int)
    positions_px : (N, 2) array of (row, col)
    amplitude : (N,) array or float, peak height in counts
    sigma_px : float or (N,) array, Gaussian standard deviation
    background : float, constant counts per pixel
    rng : numpy Generator, used for Poisson noise when `noise` is true
    """
    positions_px = np.atleast_2d(np.asarray(positions_px, dtype=float))
    n = len(positions_px)
    amplitude = np.broadcast_to(np.asarray(amplitude, dtype=float), (n,))
    sigma = np.broadcast_to(np.asarray(sigma_px, dtype=float), (n,))
    h, w = shape
    image = np.full(shape, float(background))
    r = int(np.ceil(radius_sigma * sigma.max())) if n else 0
    off = np.arange(-r, r + 1)
    ctr = np.rint(positions_px).astype(int)
    rows = ctr[:, 0, None, None] + off[None, :, None]           # (N, P, 1)
    cols = ctr[:, 1, None, None] + off[None, None, :]           # (N, 1, P)
    dr = rows - positions_px[:, 0, None, None]
    dc = cols - positions_px[:, 1, None, None]
    val = amplitude[:, None, None] * np.exp(-0.5 * (dr**2 + dc**2) / sigma[:, None, None] ** 2)
    rows_b, cols_b = np.broadcast_arrays(rows, cols)
    inside = (rows_b >= 0) & (rows_b < h) & (cols_b >= 0) & (cols_b < w)
    flat = rows_b[inside] * w + cols_b[inside]
    image += np.bincount(flat, weights=val[inside], minlength=h * w).reshape(shape)
    if noise:
        rng = np.random.default_rng() if rng is None else rng
        image = rng.poisson(image).astype(float)
    return image


def perovskite_frame(shape=(256, 256), *, a_pm=390.53, c_pm=None, pixel_size_pm=10.0,
                     rotation_deg=0.0, sigma_pm=40.0, peak_a=400.0, peak_b=160.0,
                     peak_o=0.0, background=20.0, b_shift_pm=(0.0, 0.0), origin_px=None,
                     noise=True, seed=0, margin_px=None) -> SyntheticFrame:
    """An ABO3 [001] lattice: A at cell corners, B at centres (shifted by `b_shift_pm`).

    `b_shift_pm` is the B-site displacement as (d_row, d_col) in pm; `c_pm`
    (default `a_pm`) is the length of the second basis vector.  The lattice
    is rotated by `rotation_deg` (counter-clockwise in the x-right, y-down
    image frame means the usual mathematical sense with y flipped).
    """
    rng = np.random.default_rng(seed)
    c_pm = a_pm if c_pm is None else c_pm
    th = np.radians(rotation_deg)
    a_vec = np.array([np.sin(th), np.cos(th)]) * a_pm / pixel_size_pm       # (d_row, d_col)
    b_vec = np.array([np.cos(th), -np.sin(th)]) * c_pm / pixel_size_pm
    # make (a, b) right-handed in (x, y) = (col, row): a_x b_y - a_y b_x > 0
    if a_vec[1] * b_vec[0] - a_vec[0] * b_vec[1] < 0:
        b_vec = -b_vec
    h, w = shape
    centre = np.array([h / 2.0, w / 2.0]) if origin_px is None else np.asarray(origin_px, float)
    n = int(np.ceil(np.hypot(h, w) / min(np.hypot(*a_vec), np.hypot(*b_vec)))) + 2
    i, j = np.meshgrid(np.arange(-n, n + 1), np.arange(-n, n + 1), indexing="ij")
    i, j = i.ravel(), j.ravel()
    shift_px = np.asarray(b_shift_pm, float) / pixel_size_pm
    sites = [("A", 0.0, 0.0, peak_a, np.zeros(2)), ("B", 0.5, 0.5, peak_b, shift_px)]
    if peak_o > 0:
        sites += [("Oa", 0.5, 0.0, peak_o, np.zeros(2)), ("Ob", 0.0, 0.5, peak_o, np.zeros(2))]
    pos, lab, ijs, amp = [], [], [], []
    for name, fa, fb, peak, shift in sites:
        p = centre + np.outer(i + fa, a_vec) + np.outer(j + fb, b_vec) + shift
        pos.append(p)
        lab.append(np.full(len(p), name))
        ijs.append(np.stack([i, j], axis=1))
        amp.append(np.full(len(p), float(peak)))
    pos, lab, ijs, amp = (np.concatenate(x) for x in (pos, lab, ijs, amp))
    sigma_px = sigma_pm / pixel_size_pm
    m = 4 * sigma_px if margin_px is None else margin_px
    keep = (pos[:, 0] > -m) & (pos[:, 0] < h - 1 + m) & (pos[:, 1] > -m) & (pos[:, 1] < w - 1 + m)
    pos, lab, ijs, amp = pos[keep], lab[keep], ijs[keep], amp[keep]
    pixels = render_columns(shape, pos, amp, sigma_px, background=background, rng=rng, noise=noise)
    inside = (pos[:, 0] >= 0) & (pos[:, 0] <= h - 1) & (pos[:, 1] >= 0) & (pos[:, 1] <= w - 1)
    return SyntheticFrame(pixels=pixels, positions_px=pos[inside], sublattice=lab[inside],
                          ij=ijs[inside], amplitude=amp[inside], sigma_px=sigma_px,
                          background=background, pixel_size_pm=pixel_size_pm,
                          basis_px=np.stack([a_vec, b_vec]))
