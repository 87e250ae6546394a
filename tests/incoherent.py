"""Independent test images: incoherent Z-contrast imaging with a real probe.

Not our Gaussian renderer (``livequant.synthetic``) and not our fit model: an
aberration-free probe of a given convergence semi-angle (an Airy pattern, whose
intensity tails fall off as r^-3, not as a Gaussian), blurred by a Gaussian
source, convolved with an object made of one narrow Gaussian per atom weighted
by Z^n, and point-sampled at the probe positions.  This is the classical
incoherent-imaging approximation of HAADF STEM (Kirkland, *Advanced Computing
in Electron Microscopy*, 2nd ed., Springer 2010, ch. 5 on incoherent imaging);
it lacks channelling but has the long probe tails by which heavy columns
reach into their light neighbours' windows.  Multislice frames
(``tests/data/multislice``) are the physics reference; this one is cheap
enough to draw inside the test suite.

Coordinates: (x, y) in pm, x along the image columns, y along the rows, the
centre of pixel (row r, col c) at (x, y) = (c, r) * pixel_size_pm.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import j1

#: Relativistic electron wavelength at 200 kV, pm (h / sqrt(2 m e V (1 + e V / 2 m c^2))).
WAVELENGTH_200KV_PM = 2.5079


def probe_intensity(r_pm, *, alpha_mrad=22.0, wavelength_pm=WAVELENGTH_200KV_PM):
    """Airy intensity of an aberration-free probe, normalised to 1 at r = 0."""
    v = 2 * np.pi * (alpha_mrad * 1e-3) * np.asarray(r_pm, float) / wavelength_pm
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(v > 1e-9, (2 * j1(v) / np.where(v > 1e-9, v, 1.0)) ** 2, 1.0)
    return out


@dataclass(frozen=True)
class Atom:
    x_pm: float
    y_pm: float
    z: int


def render(atoms_x_pm, atoms_y_pm, atoms_z, *, shape, pixel_size_pm, exponent=1.7,
           thermal_pm=7.0, source_pm=12.0, alpha_mrad=22.0, fine_pm=4.0,
           background=0.02):
    """Noiseless incoherent image, arbitrary units (the brightest column ~ 1).

    Parameters
    ----------
    atoms_x_pm, atoms_y_pm, atoms_z : (N,) arrays
        Projected atom (column) positions and atomic numbers; a column of
        several atoms is several entries at nearly the same position.
    shape : (rows, cols)
    pixel_size_pm : float
    exponent : float
        Z^n contrast exponent (CHECK-VALUES section 9: 1.6-1.9 for HAADF).
    thermal_pm : float
        RMS spread of each atom's potential (thermal vibration), pm.
    source_pm : float
        RMS of the Gaussian effective source size, pm.
    fine_pm : float
        Sampling of the internal convolution grid (pixel_size_pm / fine_pm is
        rounded to an integer oversampling).
    background : float
        Constant added everywhere (detector offset, amorphous layers).
    """
    over = max(1, int(round(pixel_size_pm / fine_pm)))
    step = pixel_size_pm / over
    # pad so probe tails wrapping around the periodic FFT fall outside the frame
    pad = int(np.ceil(600.0 / step))
    H, W = shape[0] * over + 2 * pad, shape[1] * over + 2 * pad
    H, W = _fft_size(H), _fft_size(W)
    obj = np.zeros((H, W))
    # fine-grid coordinates: fine index f <-> position (f - pad) * step
    fx = np.asarray(atoms_x_pm, float) / step + pad
    fy = np.asarray(atoms_y_pm, float) / step + pad
    wz = np.asarray(atoms_z, float) ** exponent
    # deposit each atom by bilinear weights (sub-grid exact centroid); the
    # thermal Gaussian and the source blur are applied in Fourier space
    ix, iy = np.floor(fx).astype(int), np.floor(fy).astype(int)
    tx, ty = fx - ix, fy - iy
    for dy, wy in ((0, 1 - ty), (1, ty)):
        for dx, wx in ((0, 1 - tx), (1, tx)):
            np.add.at(obj, ((iy + dy) % H, (ix + dx) % W), wz * wx * wy)
    ky = np.fft.fftfreq(H, d=step)
    kx = np.fft.rfftfreq(W, d=step)
    k2 = ky[:, None] ** 2 + kx[None, :] ** 2
    blur = np.exp(-2 * np.pi**2 * k2 * (thermal_pm**2 + source_pm**2))
    # bilinear deposition is a triangle filter; undo it (sinc^2 per axis)
    tri = (np.sinc(ky * step)[:, None] ** 2) * (np.sinc(kx * step)[None, :] ** 2)
    yy = (np.arange(H) - H // 2) * step
    xx = (np.arange(W) - W // 2) * step
    probe = probe_intensity(np.hypot(yy[:, None], xx[None, :]), alpha_mrad=alpha_mrad)
    probe = np.fft.ifftshift(probe)
    probe /= probe.sum()
    img = np.fft.irfft2(np.fft.rfft2(obj) * np.fft.rfft2(probe) * blur / np.maximum(tri, 1e-3),
                        s=(H, W))
    img = img[pad:pad + shape[0] * over:over, pad:pad + shape[1] * over:over]
    img = img / img.max()
    return img + background


def _fft_size(n):
    m = 1
    while m < n:
        m *= 2
    return m if m - n < n // 4 else int(np.ceil(n / 64) * 64)


def perovskite_domains(*, n_cells_x, n_cells_y, a_x_pm, a_y_pm, z_a, z_b, origin_pm,
                       b_shift_x_pm, domain_rows=None, o_z=8):
    """Atoms of an ABO3 perovskite seen along [100] with B columns shifted along x.

    A at ``origin + (i a_x, j a_y)``; the B-O column at ``+ (1/2, 1/2)`` shifted
    by ``+b_shift_x_pm`` in cell rows where ``domain_rows(j)`` is true and by
    ``-b_shift_x_pm`` elsewhere (the B atom and the O atom of that column move
    together, so the column has one true position); O columns at ``(1/2, 0)``
    and ``(0, 1/2)``.  Returns (x, y, z) arrays and a truth dict.
    """
    ox, oy = origin_pm
    i, j = np.meshgrid(np.arange(n_cells_x), np.arange(n_cells_y), indexing="ij")
    i, j = i.ravel(), j.ravel()
    sign = np.ones(len(j)) if domain_rows is None else np.where(domain_rows(j), 1.0, -1.0)
    ax, ay = ox + i * a_x_pm, oy + j * a_y_pm
    bx, by = ax + 0.5 * a_x_pm + sign * b_shift_x_pm, ay + 0.5 * a_y_pm
    o1x, o1y = ax + 0.5 * a_x_pm, ay
    o2x, o2y = ax, ay + 0.5 * a_y_pm
    x = np.concatenate([ax, bx, bx, o1x, o2x])
    y = np.concatenate([ay, by, by, o1y, o2y])
    z = np.concatenate([np.full(len(i), z_a), np.full(len(i), z_b), np.full(len(i), o_z),
                        np.full(len(i), o_z), np.full(len(i), o_z)])
    truth = {"i": i, "j": j, "a_xy_pm": np.stack([ax, ay], 1), "b_xy_pm": np.stack([bx, by], 1),
             "b_shift_x_pm": sign * b_shift_x_pm}
    return x, y, z, truth
