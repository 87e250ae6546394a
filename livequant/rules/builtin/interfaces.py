"""Built-in rule ``interfaces``: a step of a descriptor across lattice rows.

What it flags
    ``interface`` where the local lattice parameter (``a_pm``, ``b_pm``,
    ``c_over_a``) or the column intensity ratio (``ratio_b_a``) steps from one
    level to another across a row of cells: a heterostructure interface, the
    edge of a chemically different layer.  Epitaxial interfaces run along a
    lattice direction, so the profile perpendicular to the step is the
    sequence of row medians along ``i`` (rows of constant ``i``) or along
    ``j``; both are searched for every descriptor in ``descriptors``.

    For each boundary between two rows, the step is the difference of the
    mean row medians over ``window_rows`` rows on either side, its standard
    error from the rows' own scatter (``1.2533 x 1.4826 MAD / sqrt(n)`` per
    row median, the large-sample efficiency of the median; common practice).
    Boundaries are taken in order of significance, at least ``window_rows``
    rows apart; the interface lies where the row profile crosses half-way
    between the two levels (interpolated between rows).  The same interface
    seen in several descriptors is one flag, also when they step at rows up to
    ``2 window_rows - 1/2`` apart (the most significant places it).

Region
    A band along the interface, over the cells either side of it,
    ``band_cells`` cells across; ``angle_deg`` is the direction along it.

Score
    ``t^2 / (t^2 + (2 t_min)^2)`` for the most significant descriptor,
    ``t`` the step over its standard error and ``t_min = min_significance``
    (1/5 at the threshold, 1/2 at twice it).

Thresholds (``[rules.interfaces]``)
    ``descriptors``, ``window_rows``, ``min_significance``,
    ``min_relative_step``, ``band_cells``.

Evidence
    ``x_px, y_px`` (a point on the interface), ``axis`` ("i" or "j": the
    index that changes across it), ``row`` (fractional index), the best
    ``descriptor`` with ``below``/``above`` levels, ``step``,
    ``relative_step`` and ``significance``, and ``descriptors`` (all that
    step there).
"""

from __future__ import annotations

import math
import warnings

import numpy as np

from livequant.config import InterfaceRuleSettings
from livequant.rules.builtin._grid import CellGrid, check_descriptor_names
from livequant.rules.hookspecs import hookimpl
from livequant.rules.manager import MAD_TO_SIGMA
from livequant.rules.types import Flag, Region

__all__ = ["InterfaceRule", "row_steps"]

#: Standard error of a sample median over that of the mean, normal data, large n.
MEDIAN_EFFICIENCY = math.sqrt(math.pi / 2.0)


def _row_profile(g: np.ndarray):
    """Median, its standard error and count of each row (axis 0) of a grid with NaNs."""
    ok = np.isfinite(g)
    n = ok.sum(axis=1)
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows: handled below
        med = np.nanmedian(g, axis=1)
        mad = np.nanmedian(np.abs(g - med[:, None]), axis=1)
    se = MEDIAN_EFFICIENCY * MAD_TO_SIGMA * mad / np.sqrt(np.maximum(n, 1))
    bad = n < 3
    med[bad], se[bad] = np.nan, np.nan
    return med, se, n


def row_steps(g: np.ndarray, *, window_rows: int):
    """Step, standard error and significance at every boundary between rows of `g`.

    Element ``k`` is the boundary between rows ``k - 1`` and ``k``, for ``k``
    in ``window_rows .. nrows - window_rows``.

    Returns
    -------
    ks, step, se, left, right, med : ndarrays
        ``med`` is the row-median profile.
    """
    med, se, _ = _row_profile(g)
    W = int(window_rows)
    nr = med.size
    if nr < 2 * W:
        e = np.zeros(0)
        return np.zeros(0, int), e, e, e, e, med
    ks = np.arange(W, nr - W + 1)
    win = np.lib.stride_tricks.sliding_window_view
    m_w, s_w = win(med, W), win(se, W)      # windows starting at each row
    left, right = m_w[ks - W].mean(axis=1), m_w[ks].mean(axis=1)
    err = np.sqrt((s_w[ks - W] ** 2).sum(axis=1) + (s_w[ks] ** 2).sum(axis=1)) / W
    return ks, right - left, err, left, right, med


def _crossing(med: np.ndarray, k: int, W: int, left: float, right: float) -> float:
    """Fractional row where the profile crosses (left + right) / 2 near boundary k."""
    half = 0.5 * (left + right)
    lo, hi = max(k - W, 0), min(k + W, med.size)
    seg = med[lo:hi] - half
    rows = np.arange(lo, hi, dtype=float)
    ok = np.isfinite(seg)
    seg, rows = seg[ok], rows[ok]
    sign = np.sign(seg) * np.sign(right - left)
    flips = np.flatnonzero((sign[:-1] <= 0) & (sign[1:] > 0))
    if flips.size == 0:
        return k - 0.5
    f = flips[np.argmin(np.abs(rows[flips] + 0.5 - k))]
    r0, r1, v0, v1 = rows[f], rows[f + 1], seg[f], seg[f + 1]
    return float(r0 + (r1 - r0) * (-v0) / (v1 - v0)) if v1 != v0 else float(r0)


class InterfaceRule:
    """Flags steps across lattice rows (see the module docstring)."""

    def __init__(self, settings: InterfaceRuleSettings | None = None):
        self.cfg = settings or InterfaceRuleSettings()

    @hookimpl
    def livequant_configure(self, config):
        self.cfg = config.rules.interfaces
        check_descriptor_names(self.cfg.descriptors, "rules.interfaces.descriptors")

    @hookimpl
    def livequant_frame_rules(self, view):
        cells = view.cells
        cfg = self.cfg
        if cells is None or len(cells["i"]) < 4 * cfg.window_rows:
            return []
        grid = view.cell_grid
        if not math.isfinite(grid.cell_px):
            return []
        W = cfg.window_rows
        found = []  # (axis, row, t, name, left, right, step)
        for axis in (0, 1):
            for name in cfg.descriptors:
                g = grid.dense(np.asarray(cells[name], float))
                if axis == 1:
                    g = g.T
                ks, step, se, left, right, med = row_steps(g, window_rows=W)
                if ks.size == 0:
                    continue
                with np.errstate(invalid="ignore", divide="ignore"):
                    t = np.abs(step) / se
                    rel = np.abs(step) / (0.5 * (np.abs(left) + np.abs(right)))
                cand = np.flatnonzero(np.isfinite(t) & (t >= cfg.min_significance)
                                      & (rel >= cfg.min_relative_step))
                taken: list[int] = []
                for c in cand[np.argsort(-t[cand])]:
                    if any(abs(ks[c] - k) < W for k in taken):
                        continue  # the flank of a step already taken
                    taken.append(int(ks[c]))
                    row = _crossing(med, int(ks[c]), W, left[c], right[c])
                    found.append((axis, row, float(t[c]), name, float(left[c]),
                                  float(right[c]), float(step[c]), float(rel[c])))
        return self._merge(found, grid, cells)

    def _merge(self, found, grid: CellGrid, cells) -> list[Flag]:
        cfg = self.cfg
        found.sort(key=lambda f: -f[2])
        groups: list[list] = []
        # Steps of any descriptors on one axis closer than 2 W - 1/2 rows share rows of their
        # windows: this rule cannot tell them apart, and they are one interface whose
        # descriptors change over different widths (a lattice parameter relaxing over a few
        # cells beside a sharp change of column intensity was flagged twice).
        near_rows = 2 * cfg.window_rows - 0.5
        for f in found:
            for g in groups:
                if g[0][0] == f[0] and abs(g[0][1] - f[1]) < near_rows:
                    g.append(f)
                    break
            else:
                groups.append([f])
        flags = []
        idx = (np.asarray(cells["i"]) - grid.i0, np.asarray(cells["j"]) - grid.j0)
        x, y = np.asarray(cells["x_px"], float), np.asarray(cells["y_px"], float)
        for g in groups:
            axis, row, t, name, left, right, step, rel = g[0]
            k = idx[axis]
            lo, hi = math.floor(row), math.floor(row) + 1
            sel_lo, sel_hi = k == lo, k == hi
            if not (sel_lo.any() and sel_hi.any()):
                continue
            p_lo = np.array([x[sel_lo].mean(), y[sel_lo].mean()])
            p_hi = np.array([x[sel_hi].mean(), y[sel_hi].mean()])
            point = p_lo + (row - lo) * (p_hi - p_lo)
            along = grid.b_xy_px if axis == 0 else grid.a_xy_px
            along = along / np.hypot(*along)
            both = sel_lo | sel_hi
            s = (np.column_stack([x[both], y[both]]) - point) @ along
            centre = point + 0.5 * (s.min() + s.max()) * along
            region = Region(x_px=centre[0], y_px=centre[1],
                            width_px=float(np.ptp(s)) + grid.cell_px,
                            height_px=cfg.band_cells * grid.cell_px,
                            angle_deg=math.degrees(math.atan2(along[1], along[0])))
            t_min = cfg.min_significance
            evidence = {"x_px": float(centre[0]), "y_px": float(centre[1]),
                        "axis": "ij"[axis], "row": row + (grid.i0, grid.j0)[axis],
                        "descriptor": name, "below": left, "above": right, "step": step,
                        "relative_step": rel, "significance": t,
                        "descriptors": sorted({f[3] for f in g})}
            msg = (f"interface: {name} steps {left:.4g} -> {right:.4g} ({100 * rel:.1f} %, "
                   f"{t:.0f} sigma) across {'ij'[axis]} = {evidence['row']:.1f}")
            flags.append(Flag("interface", t**2 / (t**2 + (2 * t_min) ** 2), region, msg,
                              evidence))
        return flags
