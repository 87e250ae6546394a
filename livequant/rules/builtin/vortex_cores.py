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

import numpy as np

from livequant.analysis.topology import find_loop_cores, loop_windings  # shared with the cells
from livequant.config import VortexRuleSettings
from livequant.rules.hookspecs import hookimpl
from livequant.rules.types import Flag, Region

__all__ = ["VortexCoreRule", "loop_windings"]


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
        cores, snr = find_loop_cores(
            grid.dense(cells["x_px"]), grid.dense(cells["y_px"]), grid.dense(cells["dx_pm"]),
            grid.dense(cells["dy_pm"]), grid.dense(cells["sigma_d_pm"]), cell_size=grid.cell_px,
            loop_cells=L, smooth_cells=cfg.smooth_cells, min_snr=cfg.min_snr,
            max_step_deg=cfg.max_step_deg, min_loops=cfg.min_loops, handedness=grid.handedness)
        flags = [self._flag(c.kind, c.winding, c.x, c.y, c.n_loops, grid, snr, cells)
                 for c in cores]
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
