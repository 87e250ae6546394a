"""Pixel-size check against a reference material's lattice parameter."""

from __future__ import annotations

import numpy as np

from livequant.analysis.types import Lattice

__all__ = ["check_calibration"]


def check_calibration(lattice: Lattice, *, pixel_size_pm, reference_a_pm, reference_c_pm=None,
                      axis="mean", material="") -> dict:
    """Compare the measured lattice with a reference and report the implied error.

    Parameters
    ----------
    lattice : Lattice
        Measured basis (pixels); ``a`` is the shorter vector.
    pixel_size_pm : float
        The pixel size the frame claims.
    reference_a_pm, reference_c_pm : float
        Handbook lattice parameters (``c`` defaults to ``a`` for cubic cells).
    axis : {"a", "c", "mean"}
        Compare the short vector with ``a``, the long one with ``c``, or the
        mean of both with the mean of the references.

    Returns
    -------
    dict
        ``measured_pm``, ``sigma_measured_pm``, ``reference_pm``,
        ``relative_error`` (measured / reference - 1), ``implied_pixel_size_pm``
        and its sigma: the pixel size that would make the frame match.
    """
    if not pixel_size_pm > 0:
        raise ValueError(f"`pixel_size_pm` must be > 0, got {pixel_size_pm}")
    ref_c = reference_a_pm if reference_c_pm is None else reference_c_pm
    if axis == "a":
        length, sigma, ref = lattice.a_px, lattice.sigma_a_px, reference_a_pm
    elif axis == "c":
        length, sigma, ref = lattice.b_px, lattice.sigma_b_px, ref_c
    elif axis == "mean":
        length = 0.5 * (lattice.a_px + lattice.b_px)
        sigma = 0.5 * float(np.hypot(lattice.sigma_a_px, lattice.sigma_b_px))
        ref = 0.5 * (reference_a_pm + ref_c)
    else:
        raise ValueError(f"`axis` must be 'a', 'c' or 'mean', got {axis!r}")
    measured = length * pixel_size_pm
    return {
        "material": material,
        "axis": axis,
        "reference_pm": float(ref),
        "measured_pm": float(measured),
        "sigma_measured_pm": float(sigma * pixel_size_pm),
        "relative_error": float(measured / ref - 1.0),
        "implied_pixel_size_pm": float(ref / length),
        "sigma_implied_pixel_size_pm": float(ref / length**2 * sigma),
    }
