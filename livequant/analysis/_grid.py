"""Dense (i, j) look-up grids of one sublattice's columns.

The descriptor stages need, for every unit cell, the columns of its
neighbours by cell index (the four A corners of a B site, the four O columns
around it, ...).  A dense array indexed by ``(i - i0, j - j0)`` turns each of
those look-ups into one vectorised fancy-index; missing sites read as NaN, so
a cell lacking a neighbour propagates NaN instead of a guessed value.

Coordinates stay in ``(row, col)`` pixels here, as everywhere inside the
analysis package.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from livequant.analysis.types import Columns

__all__ = ["SiteGrid", "site_grid", "index_box"]


@dataclass(frozen=True)
class SiteGrid:
    """Columns of one sublattice on a dense cell-index grid.

    Attributes
    ----------
    i0, j0 : int
        Cell index of grid element ``[0, 0]``.
    positions_px, sigma_positions_px : ndarray, shape (ni, nj, 2)
        ``(row, col)`` centre and its one-sigma uncertainty; NaN where no
        (converged) column of this sublattice has that index.
    amplitude, sigma_amplitude : ndarray, shape (ni, nj)
    present : ndarray of bool, shape (ni, nj)
    """

    i0: int
    j0: int
    positions_px: np.ndarray
    sigma_positions_px: np.ndarray
    amplitude: np.ndarray
    sigma_amplitude: np.ndarray
    present: np.ndarray

    @property
    def shape(self) -> tuple[int, int]:
        return self.present.shape

    def take(self, i, j):
        """Look up sites by absolute cell index.

        Parameters
        ----------
        i, j : array_like of int, same shape ``S``

        Returns
        -------
        positions_px, sigma_positions_px : ndarray, shape ``S + (2,)``
        amplitude, sigma_amplitude : ndarray, shape ``S``
            NaN wherever the site is missing or outside the grid.
        """
        i = np.asarray(i, dtype=np.int64) - self.i0
        j = np.asarray(j, dtype=np.int64) - self.j0
        ni, nj = self.shape
        inside = (i >= 0) & (i < ni) & (j >= 0) & (j < nj)
        ic = np.where(inside, i, 0)
        jc = np.where(inside, j, 0)
        pos = np.where(inside[..., None], self.positions_px[ic, jc], np.nan)
        sig = np.where(inside[..., None], self.sigma_positions_px[ic, jc], np.nan)
        amp = np.where(inside, self.amplitude[ic, jc], np.nan)
        samp = np.where(inside, self.sigma_amplitude[ic, jc], np.nan)
        return pos, sig, amp, samp


def index_box(columns: Columns) -> tuple[int, int, int, int]:
    """``(i0, j0, ni, nj)`` covering every cell index in `columns` plus one.

    The extra row and column let ``(i + 1, j + 1)`` look-ups of the last cell
    stay inside the grid (they read as missing).
    """
    if len(columns) == 0:
        return 0, 0, 1, 1
    ij = np.asarray(columns.ij, dtype=np.int64)
    i0, j0 = ij.min(axis=0)
    i1, j1 = ij.max(axis=0)
    return int(i0), int(j0), int(i1 - i0 + 2), int(j1 - j0 + 2)


def site_grid(columns: Columns, sublattice: str, box: tuple[int, int, int, int]) -> SiteGrid:
    """Place the converged columns of one `sublattice` on a dense grid.

    When two columns claim the same ``(i, j)`` (a misassignment upstream), the
    one with the smaller position uncertainty is kept: it is the better fit,
    and keeping exactly one avoids numpy's unspecified order for repeated
    fancy-index assignment.
    """
    i0, j0, ni, nj = box
    pos = np.full((ni, nj, 2), np.nan)
    sig = np.full((ni, nj, 2), np.nan)
    amp = np.full((ni, nj), np.nan)
    samp = np.full((ni, nj), np.nan)
    present = np.zeros((ni, nj), dtype=bool)
    mask = (np.asarray(columns.sublattice) == sublattice) & np.asarray(columns.converged, bool)
    mask &= np.all(np.isfinite(columns.positions_px), axis=1)
    mask &= np.all(np.isfinite(columns.sigma_positions_px), axis=1)
    if mask.any():
        ij = np.asarray(columns.ij, dtype=np.int64)[mask]
        ii, jj = ij[:, 0] - i0, ij[:, 1] - j0
        keep = (ii >= 0) & (ii < ni) & (jj >= 0) & (jj < nj)
        idx = np.flatnonzero(mask)[keep]
        ii, jj = ii[keep], jj[keep]
        quality = np.hypot(*np.asarray(columns.sigma_positions_px)[idx].T)
        order = np.lexsort((quality, jj, ii))
        flat = ii[order] * nj + jj[order]
        _, first = np.unique(flat, return_index=True)
        sel = order[first]
        idx, ii, jj = idx[sel], ii[sel], jj[sel]
        pos[ii, jj] = columns.positions_px[idx]
        sig[ii, jj] = columns.sigma_positions_px[idx]
        amp[ii, jj] = columns.amplitude[idx]
        samp[ii, jj] = columns.sigma_amplitude[idx]
        present[ii, jj] = True
    return SiteGrid(i0=i0, j0=j0, positions_px=pos, sigma_positions_px=sig,
                    amplitude=amp, sigma_amplitude=samp, present=present)
