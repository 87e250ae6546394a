"""Topological charge of the in-plane displacement field.

Winding number of a plaquette with corners ``c1..c4`` taken counter-clockwise
(project check values, section 10):

    w = (1 / 2 pi) sum_k wrap(theta_{k+1} - theta_k),   wrap in (-pi, pi]

with ``theta = atan2(u_y, u_x)``.  A vortex (either circulation) and a source
or sink wind +1; a saddle -- the antivortex -- winds -1.  The circulation
sense (chirality) is a separate property: it is reported apart from the
winding number, from the line integral of the tangential component around the
plaquette, and the flux through it tells a circulating core from a diverging
one.

Frames: the plaquette ``(i, j) -> (i+1, j) -> (i+1, j+1) -> (i, j+1)`` runs
from ``a`` to ``b``, which is counter-clockwise in the (x, y) = (col, row)
frame when the basis is right-handed there (as :class:`Lattice` promises);
``handedness=-1`` handles the other case.  ``chirality = +1`` means
counter-clockwise circulation in the (x, y) = (col, row) frame, which on a
screen with row 0 at the top looks clockwise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

__all__ = ["winding_numbers", "Core", "find_cores", "loop_windings", "LoopCore",
           "find_loop_cores", "nonpolar_layer", "LOOP_DEFAULTS"]

#: Defaults of the loop-based core search, shared by the cells summary and the
#: ``vortex_cores`` rule (``[rules.vortex_cores]``) so both give one answer.
LOOP_DEFAULTS = {"loop_cells": 4, "smooth_cells": 5, "min_snr": 2.0, "max_step_deg": 90.0,
                 "min_loops": 2}


def _wrap(delta):
    """Wrap angles to (-pi, pi]."""
    return np.pi - np.mod(np.pi - delta, 2.0 * np.pi)


def _corners(field, periodic):
    """The four plaquette corners of a (ni, nj, ...) grid, counter-clockwise."""
    if periodic:
        return (field, np.roll(field, -1, axis=0), np.roll(np.roll(field, -1, axis=0), -1, axis=1),
                np.roll(field, -1, axis=1))
    return field[:-1, :-1], field[1:, :-1], field[1:, 1:], field[:-1, 1:]


def winding_numbers(ux, uy, *, valid=None, periodic=False, handedness=1) -> np.ndarray:
    """Winding number of every plaquette of a gridded vector field.

    Parameters
    ----------
    ux, uy : array_like, shape (ni, nj)
        Field components on the cell grid (index i along ``a``, j along ``b``).
    valid : array_like of bool, shape (ni, nj), optional
        Cells whose direction is trustworthy (e.g. ``|u|`` several sigmas);
        NaN components count as invalid too.
    periodic : bool
        Wrap around both edges (a torus), giving ``ni x nj`` plaquettes whose
        windings sum to zero.
    handedness : {1, -1}
        +1 when ``a x b > 0`` in the frame where the angles are measured.

    Returns
    -------
    ndarray of float, shape (ni - 1, nj - 1) (or (ni, nj) if periodic)
        Integer-valued; NaN for a plaquette with any invalid corner.

    Examples
    --------
    >>> y, x = np.mgrid[-2:2, -2:2] + 0.5
    >>> float(winding_numbers(-y.T, x.T)[1, 1])   # counter-clockwise vortex, i along x
    1.0
    """
    ux = np.asarray(ux, float)
    uy = np.asarray(uy, float)
    if ux.shape != uy.shape or ux.ndim != 2:
        raise ValueError(f"`ux` and `uy` must be 2D arrays of one shape, got {ux.shape}, {uy.shape}")
    if handedness not in (1, -1):
        raise ValueError(f"`handedness` must be +1 or -1, got {handedness!r}")
    ok = np.isfinite(ux) & np.isfinite(uy) & ((ux != 0) | (uy != 0))
    if valid is not None:
        ok &= np.asarray(valid, bool)
    theta = np.arctan2(uy, ux)
    c = _corners(theta, periodic)
    total = sum(_wrap(c[(k + 1) % 4] - c[k]) for k in range(4))
    w = np.round(total / (2.0 * np.pi)) * handedness
    good = np.logical_and.reduce(_corners(ok, periodic))
    return np.where(good, w, np.nan)


@dataclass(frozen=True)
class Core:
    """A plaquette with non-zero winding.

    ``i, j``: cell index of its first corner; ``x_pm, y_pm``: its centre;
    ``kind``: "vortex", "source", "sink", "antivortex" or "higher-order";
    ``chirality``: +1 counter-clockwise / -1 clockwise in the (x, y) = (col,
    row) frame, 0 when the core is not circulating; ``circulation_pm2`` and
    ``flux_pm2``: line integrals of the tangential and outward components of
    ``u`` around the plaquette.
    """

    i: int
    j: int
    x_pm: float
    y_pm: float
    winding: int
    kind: str
    chirality: int
    circulation_pm2: float
    flux_pm2: float

    def to_json(self) -> dict:
        return {"i": self.i, "j": self.j, "x_pm": self.x_pm, "y_pm": self.y_pm,
                "winding": self.winding, "kind": self.kind, "chirality": self.chirality,
                "circulation_pm2": self.circulation_pm2, "flux_pm2": self.flux_pm2}


def find_cores(x_pm, y_pm, ux, uy, *, i0=0, j0=0, valid=None, handedness=1):
    """Locate and classify every plaquette with non-zero winding.

    Parameters
    ----------
    x_pm, y_pm : array_like, shape (ni, nj)
        Cell centres on the grid (NaN where no cell).
    ux, uy : array_like, shape (ni, nj)
        The in-plane displacement field.
    i0, j0 : int
        Cell index of grid element [0, 0].
    valid, handedness
        As for :func:`winding_numbers`.

    Returns
    -------
    windings : ndarray, shape (ni - 1, nj - 1)
    cores : list of Core
    """
    w = winding_numbers(ux, uy, valid=valid, handedness=handedness)
    hit = np.argwhere(np.isfinite(w) & (w != 0))
    if hit.size == 0:
        return w, []
    xs, ys = (np.asarray(v, float) for v in (x_pm, y_pm))
    r = np.stack([xs, ys], axis=-1)
    u = np.stack([np.asarray(ux, float), np.asarray(uy, float)], axis=-1)
    rc = [c[hit[:, 0], hit[:, 1]] for c in _corners(r, False)]
    uc = [c[hit[:, 0], hit[:, 1]] for c in _corners(u, False)]
    circ = np.zeros(len(hit))
    flux = np.zeros(len(hit))
    for k in range(4):
        edge = rc[(k + 1) % 4] - rc[k]
        umid = (uc[(k + 1) % 4] + uc[k]) / 2.0
        circ += np.sum(umid * edge, axis=1)
        # Outward normal of a counter-clockwise loop: the edge turned by -90 degrees.
        flux += umid[:, 0] * edge[:, 1] - umid[:, 1] * edge[:, 0]
    circ *= handedness
    flux *= handedness
    centre = sum(rc) / 4.0
    cores = []
    for n, (a, b) in enumerate(hit):
        wn = int(w[a, b])
        if wn == 1:
            if abs(circ[n]) >= abs(flux[n]):
                kind, chir = "vortex", int(np.sign(circ[n]))
            else:
                kind, chir = ("source" if flux[n] > 0 else "sink"), 0
        elif wn == -1:
            kind, chir = "antivortex", 0
        else:
            kind, chir = "higher-order", 0
        cores.append(Core(i=int(a + i0), j=int(b + j0), x_pm=float(centre[n, 0]),
                          y_pm=float(centre[n, 1]), winding=wn, kind=kind, chirality=chir,
                          circulation_pm2=float(circ[n]), flux_pm2=float(flux[n])))
    return w, cores


# ---------------------------------------------------------------- cores seen by larger loops
#
# At a core the displacement falls to zero, so the cells around it have no
# trustworthy direction and a one-cell plaquette there is rarely valid at
# ordinary doses; across a 180-degree wall the direction flips by about pi and
# a plaquette's winding is decided by noise.  A loop L cells across, on a field
# box-averaged over `smooth_cells`, runs where the displacement has recovered;
# every loop that encloses a core winds, and a loop whose direction turns by
# more than `max_step_deg` between neighbours (across a wall) is ambiguous and
# skipped.


def _perimeter(L: int) -> np.ndarray:
    """Offsets (di, dj) of a square loop of side L, counter-clockwise for a right-handed basis."""
    k = np.arange(L)
    return np.concatenate([np.column_stack([k, np.zeros(L, int)]),
                           np.column_stack([np.full(L, L), k]),
                           np.column_stack([L - k, np.full(L, L)]),
                           np.column_stack([np.zeros(L, int), L - k])])


def loop_windings(ux, uy, *, loop_cells: int = 1, valid=None, max_step_rad: float = np.pi,
                  handedness: int = 1) -> np.ndarray:
    """Winding number of every square loop of side `loop_cells` on a gridded field.

    Parameters
    ----------
    ux, uy : ndarray, shape (ni, nj)
        The field on the cell grid (NaN where no cell).
    loop_cells : int
        Side of the loops, cells.
    valid : ndarray of bool, shape (ni, nj), optional
        Cells whose direction counts.
    max_step_rad : float
        A loop whose direction turns by more than this between two
        neighbouring cells on it is invalid (NaN).
    handedness : {1, -1}

    Returns
    -------
    ndarray, shape (ni - L, nj - L)
        Integer-valued windings, NaN for invalid loops; element ``[a, b]`` is
        the loop whose first corner is grid cell ``(a, b)``.
    """
    ux = np.asarray(ux, float)
    uy = np.asarray(uy, float)
    L = int(loop_cells)
    ni, nj = ux.shape
    if ni <= L or nj <= L:
        return np.full((max(ni - L, 0), max(nj - L, 0)), np.nan)
    ok = np.isfinite(ux) & np.isfinite(uy) & ((ux != 0) | (uy != 0))
    if valid is not None:
        ok &= np.asarray(valid, bool)
    theta = np.arctan2(uy, ux)
    a, b = np.meshgrid(np.arange(ni - L), np.arange(nj - L), indexing="ij")
    offsets = _perimeter(L)
    # Loop over the 4L perimeter steps only; every loop position is done at once.
    th = np.stack([theta[a + di, b + dj] for di, dj in offsets], axis=-1)
    good = np.logical_and.reduce([ok[a + di, b + dj] for di, dj in offsets])
    steps = _wrap(np.diff(np.concatenate([th, th[..., :1]], axis=-1), axis=-1))
    good &= np.all(np.abs(steps) <= max_step_rad, axis=-1)
    w = np.round(steps.sum(axis=-1) / (2.0 * np.pi)) * handedness
    return np.where(good, w, np.nan)


def box_mean(values, ok, size: int):
    """Mean over a size x size box of the cells present, and how many there were.

    Defined where at least half the box has cells, so an isolated missing
    cell (a B column not found at low dose) is bridged by its neighbours
    instead of breaking every loop through it.
    """
    if size <= 1:
        return np.where(ok, values, np.nan), np.where(ok, 1.0, 0.0)
    k = np.ones((size, size))
    n = ndimage.convolve(ok.astype(float), k, mode="constant")
    s = ndimage.convolve(np.where(ok, values, 0.0), k, mode="constant")
    enough = n >= 0.5 * size * size
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(enough, s / n, np.nan), np.where(enough, n, 0.0)


def core_position(x_mean, y_mean, winding, radius_px, x, y, dx, dy):
    """The zero of the affine fit ``u = A r + c`` to the cells near the loops' mean centre.

    Near a core of winding +-1 the field is to first order ``A (r - r0)`` with
    ``sign(det A)`` the winding, so ``r0 = -A^-1 c``.  The fit uses the
    unsmoothed displacements within `radius_px`, symmetric about the core
    whatever subset of the loops passed the validity gates (their mean centre
    is pulled towards the valid side).  Falls back to the mean centre when the
    fit is not a core of that winding or lands outside the neighbourhood.
    """
    near = np.hypot(x - x_mean, y - y_mean) <= radius_px
    near &= np.isfinite(x) & np.isfinite(y) & np.isfinite(dx) & np.isfinite(dy)
    if near.sum() < 6:
        return x_mean, y_mean
    design = np.column_stack([x[near] - x_mean, y[near] - y_mean, np.ones(near.sum())])
    coef, *_ = np.linalg.lstsq(design, np.column_stack([dx[near], dy[near]]), rcond=None)
    a = coef[:2].T                      # rows: (du_x/dx, du_x/dy), (du_y/dx, du_y/dy)
    det = float(np.linalg.det(a))
    if not np.isfinite(det) or np.sign(det) != winding:
        return x_mean, y_mean
    r0 = np.linalg.solve(a, -coef[2])
    if not np.hypot(*r0) <= radius_px:
        return x_mean, y_mean
    return float(x_mean + r0[0]), float(y_mean + r0[1])




def nonpolar_layer(dx, dy, sigma_d, *, box_cells: int = 5) -> np.ndarray:
    """Cells of a non-polar layer (an electrode, a paraelectric substrate) on a grid.

    A cell is low when the mean ``|d|`` of the ``box_cells`` x ``box_cells``
    cells around it is below twice their mean ``sigma_d`` (the noise of a
    non-polar cell's ``|d|`` is about 1.25 sigma); a layer is a region of low
    cells at least ``box_cells`` across (a morphological opening), so the
    narrow low band along a domain wall, a core, or scattered noisy cells are
    never one.  Returns a bool grid.
    """
    d = np.hypot(dx, dy)
    ok = np.isfinite(d) & np.isfinite(sigma_d)
    md, _ = box_mean(d, ok, box_cells)
    ms, _ = box_mean(sigma_d, ok, box_cells)
    with np.errstate(invalid="ignore"):
        # judged by the box, so a cell missing from the grid (a column not found at low
        # dose, about 1 in 10 in a substrate) does not perforate the layer
        low = np.isfinite(md) & np.isfinite(ms) & ~(md > 2.0 * ms)
    return ndimage.binary_opening(low, structure=np.ones((box_cells, box_cells)))


@dataclass(frozen=True)
class LoopCore:
    """A core seen by overlapping loops of one winding: position (same units as the
    inputs' x, y), ``winding`` (+1 / -1), ``kind`` ("vortex" / "antivortex") and
    ``n_loops``."""

    x: float
    y: float
    winding: int
    kind: str
    n_loops: int


def find_loop_cores(x, y, dx, dy, sigma_d, *, cell_size: float, handedness: int = 1,
                    loop_cells: int = LOOP_DEFAULTS["loop_cells"],
                    smooth_cells: int = LOOP_DEFAULTS["smooth_cells"],
                    min_snr: float = LOOP_DEFAULTS["min_snr"],
                    max_step_deg: float = LOOP_DEFAULTS["max_step_deg"],
                    min_loops: int = LOOP_DEFAULTS["min_loops"]):
    """Vortex (+1) and antivortex (-1) cores of a gridded displacement field.

    Parameters
    ----------
    x, y : ndarray, shape (ni, nj)
        Cell positions on the grid (NaN where no cell), any length unit.
    dx, dy, sigma_d : ndarray, shape (ni, nj)
        Displacement components and the sigma of its magnitude.
    cell_size : float
        One cell, in the unit of `x`, `y` (sets the neighbourhood of the
        core's affine fit).
    handedness, loop_cells, smooth_cells, min_snr, max_step_deg, min_loops
        See the comment above; ``min_snr`` gates each smoothed cell by
        ``|u| / (sigma / sqrt(n))``.

    Returns
    -------
    cores : list of LoopCore
    snr : ndarray, shape (ni, nj)
        The smoothed cells' signal-to-noise ratio (NaN where undefined).
    """
    L = int(loop_cells)
    ok = np.isfinite(dx) & np.isfinite(dy) & np.isfinite(sigma_d) & (sigma_d > 0)
    ux, n = box_mean(dx, ok, smooth_cells)
    uy, _ = box_mean(dy, ok, smooth_cells)
    # The sigma of a box mean of n cells (neighbouring cells share corners, so this is a
    # little optimistic; the threshold is a gate, not a significance).
    s_mean, _ = box_mean(sigma_d, ok, smooth_cells)
    with np.errstate(invalid="ignore", divide="ignore"):
        snr = np.hypot(ux, uy) / (s_mean / np.sqrt(np.maximum(n, 1.0)))
    # A loop through a non-polar layer is not around a core: where a wall ends on an
    # electrode, the up and down domains and the layer's noise close a false winding.
    valid = np.isfinite(snr) & (snr >= min_snr) & ~nonpolar_layer(dx, dy, sigma_d)
    w = loop_windings(ux, uy, loop_cells=L, valid=valid, max_step_rad=math.radians(max_step_deg),
                      handedness=handedness)
    cores: list[LoopCore] = []
    if w.size == 0:
        return cores, snr
    ni, nj = w.shape
    cx = (x[:ni, :nj] + x[L:, :nj] + x[:ni, L:] + x[L:, L:]) / 4.0
    cy = (y[:ni, :nj] + y[L:, :nj] + y[:ni, L:] + y[L:, L:]) / 4.0
    for winding, kind in ((1, "vortex"), (-1, "antivortex")):
        hit = (w == winding) & np.isfinite(cx) & np.isfinite(cy)
        labels, n_lab = ndimage.label(hit, structure=np.ones((3, 3)))
        if n_lab == 0:
            continue
        idx = np.arange(1, n_lab + 1)
        count = ndimage.sum_labels(hit, labels, idx)
        mx = ndimage.mean(cx, labels, idx)
        my = ndimage.mean(cy, labels, idx)
        for k in np.flatnonzero(count >= min_loops):
            # Handedness: the winding is measured in the (i, j) loop order; the affine
            # fit's determinant is in (x, y), where it carries the winding's sign.
            px_, py_ = core_position(float(mx[k]), float(my[k]), winding,
                                     (0.5 * L + 1.0) * cell_size, x, y, dx, dy)
            cores.append(LoopCore(px_, py_, winding, kind, int(count[k])))
    return cores, snr
