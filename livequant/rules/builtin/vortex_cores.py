"""Built-in rule ``vortex_cores``: vortex and antivortex cores from winding numbers.

What it flags
    ``vortex`` (winding +1) and ``antivortex`` (winding -1) cores of the
    in-plane B-site displacement field.  The winding number of a closed loop
    of cells is ``(1 / 2 pi) sum wrap(theta_{k+1} - theta_k)`` with
    ``theta = atan2(dy, dx)``, the convention of
    :mod:`livequant.analysis.topology` (loop ``(i, j) -> (i+L, j) -> (i+L,
    j+L) -> (i, j+L)``, corrected for the handedness of the cell basis).  With
    ``loop_cells = 1`` these are exactly the plaquette windings of the cells
    summary.

    Why larger loops: at a core the displacement falls to zero, so the cells
    around it have no trustworthy direction and a one-cell plaquette there is
    never valid at ordinary doses.  A loop ``L`` cells across, on a field
    box-averaged over ``smooth_cells``, runs where the displacement has
    recovered; every loop that encloses the core winds.  Overlapping loops of
    one winding are one core, placed at the zero of an affine fit ``u = A r +
    c`` to the raw displacements within ``L/2 + 1`` cells of the loops' mean
    centre (``sign(det A)`` must equal the winding; else the mean centre is
    used).

    A loop counts only when every cell on it has ``|u| / sigma(|u|) >=
    min_snr`` (after smoothing) and the direction turns by at most
    ``max_step_deg`` between neighbours on it: a loop across a 180-degree
    wall, where the direction flips, is ambiguous and skipped.

Region
    A square of ``region_cells`` cells around the core (axis-aligned).

Score
    ``min(1, n_loops / L^2)``: the fraction of the ``L^2`` loops of side ``L``
    that enclose a point core and see its winding (a core seen by every
    enclosing loop scores 1; one seen by a few loops at a frame's edge, or
    through noisy cells, less).

Thresholds (``[rules.vortex_cores]``)
    ``loop_cells``, ``smooth_cells``, ``min_snr``, ``max_step_deg``,
    ``min_loops``, ``region_cells``, ``max_flags``.

Evidence
    ``winding``, ``x_px``, ``y_px`` (the core), ``n_loops``, ``loop_cells``,
    ``smooth_cells``, ``median_snr_frame`` (of the frame's smoothed cells), ``i``, ``j`` (the
    nearest cell).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from livequant.analysis.topology import _wrap  # the same angle convention as the cells
from livequant.config import VortexRuleSettings
from livequant.rules.hookspecs import hookimpl
from livequant.rules.types import Flag, Region

__all__ = ["VortexCoreRule", "loop_windings"]


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


def _box_mean(values, ok, size: int):
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


def _core_position(x_mean, y_mean, winding, radius_px, x, y, dx, dy):
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


class VortexCoreRule:
    """Flags cores of winding +1 and -1 (see the module docstring)."""

    def __init__(self, settings: VortexRuleSettings | None = None):
        self.cfg = settings or VortexRuleSettings()

    @hookimpl
    def livequant_configure(self, config):
        self.cfg = config.rules.vortex_cores

    @hookimpl
    def livequant_frame_rules(self, view):
        cells = view.cells
        cfg = self.cfg
        L = cfg.loop_cells
        if cells is None or len(cells["i"]) < (L + 1) ** 2:
            return []
        grid = view.cell_grid
        dx, dy = grid.dense(cells["dx_pm"]), grid.dense(cells["dy_pm"])
        sd = grid.dense(cells["sigma_d_pm"])
        ok = np.isfinite(dx) & np.isfinite(dy) & np.isfinite(sd) & (sd > 0)
        ux, n = _box_mean(dx, ok, cfg.smooth_cells)
        uy, _ = _box_mean(dy, ok, cfg.smooth_cells)
        # The sigma of a box mean of n cells (neighbouring cells share corners, so this is a
        # little optimistic; the threshold is a gate, not a significance).
        s_mean, _ = _box_mean(sd, ok, cfg.smooth_cells)
        with np.errstate(invalid="ignore", divide="ignore"):
            snr = np.hypot(ux, uy) / (s_mean / np.sqrt(np.maximum(n, 1.0)))
        valid = np.isfinite(snr) & (snr >= cfg.min_snr)
        w = loop_windings(ux, uy, loop_cells=L, valid=valid,
                          max_step_rad=math.radians(cfg.max_step_deg),
                          handedness=grid.handedness)
        if w.size == 0:
            return []
        x, y = grid.dense(cells["x_px"]), grid.dense(cells["y_px"])
        ni, nj = w.shape
        cx = (x[:ni, :nj] + x[L:, :nj] + x[:ni, L:] + x[L:, L:]) / 4.0
        cy = (y[:ni, :nj] + y[L:, :nj] + y[:ni, L:] + y[L:, L:]) / 4.0
        flags = []
        for winding, kind in ((1, "vortex"), (-1, "antivortex")):
            hit = (w == winding) & np.isfinite(cx) & np.isfinite(cy)
            labels, n_lab = ndimage.label(hit, structure=np.ones((3, 3)))
            if n_lab == 0:
                continue
            idx = np.arange(1, n_lab + 1)
            count = ndimage.sum_labels(hit, labels, idx)
            mx = ndimage.mean(cx, labels, idx)
            my = ndimage.mean(cy, labels, idx)
            for k in np.flatnonzero(count >= cfg.min_loops):
                # Handedness: the winding is measured in the (i, j) loop order; the affine
                # fit's determinant is in (x, y), where it carries the winding's sign.
                px_, py_ = _core_position(float(mx[k]), float(my[k]), winding,
                                          (0.5 * L + 1.0) * grid.cell_px, x, y, dx, dy)
                flags.append(self._flag(kind, winding, px_, py_, int(count[k]), grid, snr,
                                        cells))
        flags.sort(key=lambda f: -f.score)
        return flags[:cfg.max_flags]

    def _flag(self, kind, winding, x_px, y_px, n_loops, grid, snr, cells) -> Flag:
        cfg = self.cfg
        L = cfg.loop_cells
        side = cfg.region_cells * grid.cell_px
        near = int(np.argmin(np.hypot(cells["x_px"] - x_px, cells["y_px"] - y_px)))
        ring = np.isfinite(snr)
        median_snr = float(np.median(snr[ring])) if ring.any() else float("nan")
        evidence = {"winding": winding, "x_px": x_px, "y_px": y_px, "n_loops": n_loops,
                    "loop_cells": L, "smooth_cells": cfg.smooth_cells, "median_snr_frame": median_snr,
                    "i": int(cells["i"][near]), "j": int(cells["j"][near])}
        msg = (f"{kind} core (winding {winding:+d}) seen by {n_loops} loop(s) of "
               f"{L} cells near cell ({evidence['i']}, {evidence['j']})")
        return Flag(kind, min(1.0, n_loops / (L * L)),
                    Region(x_px=x_px, y_px=y_px, width_px=side, height_px=side), msg, evidence)
