"""Column candidates: local maxima of a lightly smoothed frame, sized by the lattice.

Noise peaks are removed in two steps: here by prominence against the local
background in units of the smoothed noise, and later (``sublattice``) by
requiring lattice neighbours at the basis vectors.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from livequant.analysis.types import Lattice, readonly

__all__ = ["Candidates", "detect_columns", "noise_sigma"]


@dataclass(frozen=True)
class Candidates:
    """Column candidates.

    positions_px : (N, 2) sub-pixel (row, col) from a 3x3 centroid
    height : (N,) smoothed peak value above the local background
    prominence_sigma : (N,) `height` in units of the smoothed noise
    inverted : bool, the frame was searched for minima (ABF, BF)
    smoothing_px : float, the Gaussian smoothing used
    """

    positions_px: np.ndarray
    height: np.ndarray
    prominence_sigma: np.ndarray
    inverted: bool
    smoothing_px: float

    def __len__(self) -> int:
        return int(self.positions_px.shape[0])


def noise_sigma(image) -> float:
    """Robust per-pixel noise estimate from differences of neighbouring pixels.

    The MAD of the second difference along rows, scaled for its variance
    (6 sigma^2 for independent noise), ignores smooth signal.
    """
    image = np.asarray(image, dtype=np.float64)
    d2 = image[:, 2:] - 2 * image[:, 1:-1] + image[:, :-2]
    mad = np.median(np.abs(d2 - np.median(d2)))
    return float(1.4826 * mad / np.sqrt(6.0))


def detect_columns(image, lattice: Lattice, *, min_distance_fraction=0.3,
                   min_prominence_sigma=3.0, border_fraction=0.35, inverted=False) -> Candidates:
    """Find column candidates guided by the lattice spacing.

    Parameters
    ----------
    image : (H, W) array
    lattice : Lattice
        From :func:`~livequant.analysis.lattice.find_lattice`; its shorter
        spacing sets the smoothing, the minimum separation and the border.
    min_distance_fraction : float
        Minimum separation of two candidates as a fraction of the shorter
        lattice spacing (0.3 keeps oxygen columns at half a spacing).
    min_prominence_sigma : float
        Candidates must rise this many smoothed-noise sigmas above the local
        background (the smoothed minimum within one spacing).
    border_fraction : float
        Drop candidates closer to the frame edge than this fraction of a spacing.
    inverted : bool
        Search for minima (dark columns on a bright background: ABF, BF).
    """
    image = np.asarray(image, dtype=np.float64)
    if not 0 < min_distance_fraction < 1:
        raise ValueError(f"`min_distance_fraction` must be in (0, 1), got {min_distance_fraction}")
    spacing = min(lattice.a_px, lattice.b_px)
    work = -image if inverted else image
    # A Gaussian of a tenth of the spacing is narrower than any column at the
    # sampling we accept, so it removes shot noise without merging columns.
    smoothing = max(0.7, 0.1 * spacing)
    smooth = ndi.gaussian_filter(work, smoothing, mode="nearest")
    min_dist = max(1, int(min_distance_fraction * spacing))
    size = 2 * min_dist + 1
    is_max = (smooth == ndi.maximum_filter(smooth, size=size, mode="nearest"))
    # Local background: the minimum within one spacing, smoothed.  (A moving
    # percentile would be more robust but costs seconds on a 2048 frame; the
    # minimum of an already smoothed image is stable enough.)
    bg_size = max(3, int(round(spacing)))
    background = ndi.gaussian_filter(ndi.minimum_filter(smooth, size=bg_size, mode="nearest"),
                                     0.5 * spacing, mode="nearest")
    sigma_s = noise_sigma(work) / (2.0 * np.sqrt(np.pi) * smoothing)
    height_map = smooth - background
    rr, cc = np.nonzero(is_max & (height_map > min_prominence_sigma * max(sigma_s, 1e-12)))
    border = border_fraction * spacing
    h, w = image.shape
    keep = (rr >= border) & (rr <= h - 1 - border) & (cc >= border) & (cc <= w - 1 - border)
    rr, cc = rr[keep], cc[keep]
    # plateaus of equal maxima: keep one per connected group of pixels
    rr, cc = _one_per_plateau(rr, cc, image.shape)
    pos = _centroid3(height_map, rr, cc)
    height = height_map[rr, cc]
    return Candidates(positions_px=readonly(pos), height=readonly(height),
                      prominence_sigma=readonly(height / max(sigma_s, 1e-12)),
                      inverted=bool(inverted), smoothing_px=float(smoothing))


def _one_per_plateau(rr, cc, shape):
    if len(rr) == 0:
        return rr, cc
    mask = np.zeros(shape, dtype=bool)
    mask[rr, cc] = True
    labels, n = ndi.label(mask, structure=np.ones((3, 3)))
    lab = labels[rr, cc]
    _, first = np.unique(lab, return_index=True)
    return rr[first], cc[first]


def _centroid3(values, rr, cc):
    """Sub-pixel centre from the 3x3 neighbourhood (values clipped at zero)."""
    h, w = values.shape
    off = np.array([-1, 0, 1])
    r_idx = np.clip(rr[:, None, None] + off[None, :, None], 0, h - 1)
    c_idx = np.clip(cc[:, None, None] + off[None, None, :], 0, w - 1)
    v = values[r_idx, c_idx]
    v = np.clip(v - v.min(axis=(1, 2), keepdims=True), 0, None)
    tot = v.sum(axis=(1, 2))
    tot = np.where(tot > 0, tot, 1.0)
    dr = (v * off[None, :, None]).sum(axis=(1, 2)) / tot
    dc = (v * off[None, None, :]).sum(axis=(1, 2)) / tot
    return np.stack([rr + dr, cc + dc], axis=1).astype(float)
