"""Test helpers: independent truth computations (not used by the package)."""

from __future__ import annotations

import numpy as np


def fisher_crlb_position(*, sigma_px, amplitude, background, radius_px, elliptical=True,
                         subpixel=(0.0, 0.0), gain=1.0, tilted=False):
    """Cramér-Rao bound of the column centre for the Gaussian-plus-background model.

    Fisher information under Poisson noise, I = sum_pixels (1/m) dm/dθ dm/dθ^T
    (Van Aert et al., IEEE Trans. Instrum. Meas. 51, 611 (2002)), over the
    same circular window the fitter uses, with every nuisance parameter
    (amplitude, background, widths; with `tilted` the background's two
    slopes too) free.  Derivatives by central differences
    of the model, so this shares no code with the fitter.

    Returns the bound on the standard deviation of (row, col), pixels.
    """
    rc = int(np.ceil(radius_px))
    off = np.arange(-rc, rc + 1)
    rr, cc = np.meshgrid(off, off, indexing="ij")
    disk = rr**2 + cc**2 <= radius_px**2 + 1e-9
    rr, cc = rr[disk].astype(float), cc[disk].astype(float)
    mu_r, mu_c = subpixel

    n_shape = 7 if elliptical else 5

    def model(t):
        if elliptical:
            r0, c0, A, B, sr, sc, rho = t[:n_shape]
            dr, dc = (rr - r0) / sr, (cc - c0) / sc
            e = -(dr**2 - 2 * rho * dr * dc + dc**2) / (2 * (1 - rho**2))
        else:
            r0, c0, A, B, s = t[:n_shape]
            e = -((rr - r0) ** 2 + (cc - c0) ** 2) / (2 * s**2)
        slope_r, slope_c = t[n_shape:] if tilted else (0.0, 0.0)
        return B + A * np.exp(e) + slope_r * rr + slope_c * cc

    if elliptical:
        t0 = np.array([mu_r, mu_c, amplitude, background, sigma_px, sigma_px, 0.0])
    else:
        t0 = np.array([mu_r, mu_c, amplitude, background, sigma_px])
    if tilted:
        t0 = np.concatenate([t0, [0.0, 0.0]])
    m = model(t0)
    grads = []
    for k in range(len(t0)):
        h = 1e-5 * max(1.0, abs(t0[k]))
        tp, tm = t0.copy(), t0.copy()
        tp[k] += h
        tm[k] -= h
        grads.append((model(tp) - model(tm)) / (2 * h))
    D = np.array(grads)
    fisher = (D / (gain * m)) @ D.T
    cov = np.linalg.inv(fisher)
    return np.sqrt(np.diag(cov)[:2])


def thompson_sigma(*, s, a, n_photons, b):
    """Thompson, Larson & Webb, Biophys. J. 82, 2775 (2002), eq. for <dx^2> per coordinate.

    s: spot standard deviation, a: pixel size, n_photons: counts in the spot,
    b: background noise per pixel (std dev).  Same length unit for s and a.
    """
    return np.sqrt((s**2 + a**2 / 12) / n_photons
                   + 8 * np.pi * s**4 * b**2 / (a**2 * n_photons**2))


def isolated_grid(n_side, spacing_px, *, margin_px, rng):
    """Centres on a square grid with random sub-pixel offsets, (row, col)."""
    g = margin_px + spacing_px * np.arange(n_side)
    r, c = np.meshgrid(g, g, indexing="ij")
    pos = np.stack([r.ravel(), c.ravel()], axis=1).astype(float)
    return pos + rng.uniform(-0.5, 0.5, size=pos.shape)
