"""Built-in rule ``anomalies``: cells unlike the rest of the session.

What it flags
    ``anomaly`` for a cluster of cells whose descriptor lies far from the
    session's running robust statistics (``context.stats``: median and
    ``1.4826 x MAD`` of the recent cells of earlier frames).  The session's
    scale holds the typical measurement noise as well as the specimen's own
    spread, so each cell is judged against the specimen's spread plus its
    own uncertainty:

        z = (v - median) / sqrt(intrinsic^2 + sigma_v^2),
        intrinsic^2 = max(scale^2 - median_sigma^2, 0)

    and a cell that is merely poorly measured is not an anomaly.  Cells with
    ``z > k_cell`` (high) or ``z < -k_cell`` (low) are clustered on the
    ``(i, j)`` grid (8-connected, ``scipy.ndimage.label``), and a cluster of at
    least ``min_cells`` cells is flagged when its combined score ``sum(z) /
    sqrt(var)`` (Stouffer) exceeds ``k_sigma``: a few neighbouring cells at 3-4
    sigma together are as telling as one far out.  ``var`` is ``n`` plus twice
    the correlations of the member pairs (0.5 for cells sharing an edge, 0.25
    a corner): neighbouring cells share corner columns, so one misplaced
    column moves them together, and counting them as independent made noise
    clusters of 3-7 cells pass at 6 sigma.  Typical finds: chemical
    expansion around a defect (``a_pm``, ``b_pm`` high), a vacancy
    (``ratio_b_a`` low), a suppressed polar displacement (``d_pm`` low), a
    domain of another orientation (``a_pm`` and ``b_pm`` swapped).

    No flags until the session's statistics hold ``min_session_cells`` cells
    of that descriptor: the first frames set the reference.

Region
    The axis-aligned box around the cluster's cells, grown by
    ``margin_cells``.

Score
    ``1 - k_sigma / z_combined`` (0 at the threshold, towards 1 far beyond it).

Thresholds (``[rules.anomalies]``)
    ``descriptors``, ``k_cell``, ``k_sigma``, ``min_cells``,
    ``min_session_cells``, ``margin_cells``, ``max_flags`` (per frame,
    descriptor and direction).

Evidence
    ``descriptor``, ``direction`` ("high"/"low"), ``n_cells``,
    ``z_combined``, ``z_max``, ``value`` and ``sigma`` (at the peak cell),
    ``session_median``, ``session_scale``, ``session_n``, ``i``, ``j`` (the
    peak cell).
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from livequant.config import AnomalyRuleSettings
from livequant.rules.builtin._grid import check_descriptor_names
from livequant.rules.hookspecs import hookimpl
from livequant.rules.types import Flag, Region

__all__ = ["AnomalyRule"]


#: Correlation of two cells' errors by how they touch: sharing an edge, a corner.
CORRELATION_EDGE, CORRELATION_CORNER = 0.5, 0.25


def _sum_variance(labels: np.ndarray, n_lab: int, size: np.ndarray) -> np.ndarray:
    """Variance of the sum of unit-variance scores over each cluster of correlated cells."""
    var = size.astype(float)
    for (di, dj), rho in (((1, 0), CORRELATION_EDGE), ((0, 1), CORRELATION_EDGE),
                          ((1, 1), CORRELATION_CORNER), ((1, -1), CORRELATION_CORNER)):
        a = labels[:labels.shape[0] - di, max(0, -dj):labels.shape[1] - max(0, dj)]
        b = labels[di:, max(0, dj):labels.shape[1] + min(0, dj) or None]
        same = (a == b) & (a > 0)
        var += 2.0 * rho * np.bincount(a[same], minlength=n_lab + 1)[1:]
    return var


class AnomalyRule:
    """Flags clusters of outlying cells (see the module docstring)."""

    def __init__(self, settings: AnomalyRuleSettings | None = None):
        self.cfg = settings or AnomalyRuleSettings()

    @hookimpl
    def livequant_configure(self, config):
        self.cfg = config.rules.anomalies
        check_descriptor_names(self.cfg.descriptors, "rules.anomalies.descriptors")

    @hookimpl
    def livequant_frame_rules(self, view, context):
        cells = view.cells
        if cells is None or len(cells["i"]) == 0:
            return []
        cfg = self.cfg
        grid = view.cell_grid
        flags = []
        for name in cfg.descriptors:
            st = context.stats.get(name)
            if st is None or st.n < cfg.min_session_cells or not np.isfinite(st.median):
                continue
            v = np.asarray(cells[name], float)
            s = np.asarray(cells.get("sigma_" + name, np.zeros_like(v)), float)
            s = np.where(np.isfinite(s), s, 0.0)
            # The session's scale holds the typical measurement noise already; judge each
            # cell against the specimen's own spread plus its own sigma instead.
            s = np.where(s > 0, s, st.median_sigma if np.isfinite(st.median_sigma) else 0.0)
            with np.errstate(invalid="ignore", divide="ignore"):
                z = (v - st.median) / np.sqrt(st.intrinsic_scale**2 + s**2)
            z = np.where(np.isfinite(z), z, 0.0)
            for sign in (1.0, -1.0):
                flags.extend(self._clusters(name, sign * z, v, s, st, grid, cells))
        flags.sort(key=lambda f: -f.score)
        return flags

    def _clusters(self, name, z, v, s, st, grid, cells) -> list[Flag]:
        """Flags for the clusters of cells with ``z > k_cell`` whose combined score passes."""
        cfg = self.cfg
        member = z > cfg.k_cell
        if not member.any():
            return []
        labels, n_lab = ndimage.label(grid.dense(member, fill=False), structure=np.ones((3, 3)))
        cell_lab = np.where(member, labels[grid.gi, grid.gj], 0)   # cluster of each cell
        idx = np.arange(1, n_lab + 1)
        size = np.bincount(cell_lab, minlength=n_lab + 1)[1:]
        # Stouffer's combination of the members' scores (Stouffer et al., The American
        # Soldier (1949)): a few cells at 3 sigma together are as telling as one at 6.
        # Neighbouring cells share corner columns, so their errors are correlated (about
        # 0.5 for cells sharing an edge, 0.25 a corner: one misplaced column moves every
        # cell around it); the sum's variance counts the member pairs.
        combined = ndimage.sum_labels(z, cell_lab, idx) / np.sqrt(
            np.maximum(_sum_variance(labels, n_lab, size), 1.0))
        peak = np.array([p[0] for p in ndimage.maximum_position(z, cell_lab, idx)], int)
        keep = np.flatnonzero((combined > cfg.k_sigma) & (size >= cfg.min_cells))
        keep = keep[np.argsort(-combined[keep])][:cfg.max_flags]
        out = []
        for k in keep:
            members = cell_lab == k + 1
            p = peak[k]
            region = Region.around(cells["x_px"][members], cells["y_px"][members],
                                   margin_px=cfg.margin_cells * grid.cell_px,
                                   min_size_px=grid.cell_px)
            evidence = {"descriptor": name, "n_cells": int(size[k]),
                        "z_combined": float(combined[k]), "z_max": float(z[p]),
                        "direction": "high" if v[p] > st.median else "low",
                        "value": float(v[p]), "sigma": float(s[p]),
                        "session_median": st.median, "session_scale": st.scale,
                        "session_n": st.n, "i": int(cells["i"][p]), "j": int(cells["j"][p])}
            msg = (f"anomaly: {name} {evidence['direction']} ({v[p]:.4g} against a session "
                   f"median {st.median:.4g}) in {int(size[k])} cell(s), combined "
                   f"{combined[k]:.1f} robust sigmas")
            out.append(Flag("anomaly", 1.0 - cfg.k_sigma / float(combined[k]), region, msg,
                            evidence))
        return out
