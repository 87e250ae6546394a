"""Column candidates: local maxima of a lightly smoothed frame, sized by the lattice.

Noise peaks are removed in two steps: here by prominence against the local
background in units of the smoothed noise, and later (``sublattice``) by
requiring lattice neighbours at the basis vectors.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi
from scipy.spatial import cKDTree

from livequant.analysis import _filters
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
    # every 4th row is plenty for a median and a quarter of the cost
    mad = _filters.second_difference_mad(image, 4 if image.shape[0] >= 64 else 1)
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
    smooth = _filters.gaussian_nearest(work, smoothing)  # = ndi.gaussian_filter, mode "nearest"
    min_dist = max(1.0, min_distance_fraction * spacing)
    # Local maxima in a small footprint (a tenth of a spacing), then the minimum
    # separation among them.  A footprint as wide as the separation would let the
    # shoulder of a bright column hide a dim neighbour (an O column beside A).
    size = 2 * max(1, int(0.1 * spacing)) + 1
    is_max = _filters.local_maxima(smooth, size)  # smooth == ndi.maximum_filter(smooth, size)
    # Local background: the minimum within one spacing, smoothed over half a
    # spacing.  It varies on the scale of a cell, so it is computed on a grid
    # coarsened by a quarter spacing and interpolated back (a full-resolution
    # filter of that size cost most of the detection time on a 2048 frame).
    sigma_s = noise_sigma(work) / (2.0 * np.sqrt(np.pi) * smoothing)
    rr, cc = _filters.nonzero_2d(is_max)
    border = border_fraction * spacing
    h, w = image.shape
    keep = (rr >= border) & (rr <= h - 1 - border) & (cc >= border) & (cc <= w - 1 - border)
    rr, cc = rr[keep], cc[keep]
    height = smooth[rr, cc] - _coarse_background_at(smooth, spacing, rr, cc)
    keep = height > min_prominence_sigma * max(sigma_s, 1e-12)
    rr, cc, height = rr[keep], cc[keep], height[keep]
    # plateaus of equal maxima: keep one per connected group of pixels
    rr, cc, height = _one_per_plateau(rr, cc, height, image.shape)
    rr, cc, height = _enforce_separation(rr, cc, height, min_dist)
    # the background is flat on a 3x3 scale, so the centroid can use `smooth`
    pos = _centroid3(smooth, rr, cc)
    return Candidates(positions_px=readonly(pos), height=readonly(height),
                      prominence_sigma=readonly(height / max(sigma_s, 1e-12)),
                      inverted=bool(inverted), smoothing_px=float(smoothing))


def _coarse_background_at(smooth, spacing, rr, cc):
    """The background at pixels (rr, cc) only: interpolating the coarse grid back
    to every pixel of a 2048 frame cost more than everything else in detection."""
    factor = max(1, int(spacing / 4))
    coarse = _filters.block_minimum(smooth, factor)
    size = max(3, int(round(spacing / factor)))
    coarse = ndi.gaussian_filter(ndi.minimum_filter(coarse, size=size, mode="nearest"),
                                 0.5 * spacing / factor, mode="nearest")
    # bilinear, sampling the coarse grid at the pixel centres
    coords = np.stack([(rr + 0.5) / factor - 0.5, (cc + 0.5) / factor - 0.5])
    return ndi.map_coordinates(coarse, coords, order=1, mode="nearest")


def _enforce_separation(rr, cc, height, min_dist):
    """Of two maxima closer than `min_dist`, drop the lower one."""
    if len(rr) < 2:
        return rr, cc, height
    pairs = cKDTree(np.stack([rr, cc], 1)).query_pairs(min_dist, output_type="ndarray")
    if len(pairs) == 0:
        return rr, cc, height
    lower = np.where(height[pairs[:, 0]] < height[pairs[:, 1]], pairs[:, 0], pairs[:, 1])
    keep = np.ones(len(rr), bool)
    keep[lower] = False
    return rr[keep], cc[keep], height[keep]


def _one_per_plateau(rr, cc, height, shape):
    if len(rr) == 0:
        return rr, cc, height
    mask = np.zeros(shape, dtype=bool)
    mask[rr, cc] = True
    # nearly always every maximum stands alone: then there is nothing to label
    pr = np.pad(mask, 1)
    touching = np.zeros(len(rr), bool)
    for dr in (-1, 0, 1):
        for dc in (-1, 0, 1):
            if dr or dc:
                touching |= pr[rr + 1 + dr, cc + 1 + dc]
    if not touching.any():
        return rr, cc, height
    labels, n = ndi.label(mask, structure=np.ones((3, 3)))
    lab = labels[rr, cc]
    _, first = np.unique(lab, return_index=True)
    return rr[first], cc[first], height[first]


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
