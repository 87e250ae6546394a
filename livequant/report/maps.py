"""Arrays for the per-frame maps: the cell grid, winding numbers, the wall profile.

Pure numerics over the contents of ``cells.csv`` and ``summary.json``; the
plotting functions take what these return.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from livequant.analysis.topology import winding_numbers

__all__ = ["CellGrid", "cell_grid", "winding_map", "wall_profile", "WallProfile",
           "smooth_cells", "DEFAULT_SMOOTH_CELLS"]

#: Gaussian smoothing of the survey maps, standard deviation in cells (0 = off).
from livequant.report.defaults import DEFAULT_SMOOTH_CELLS  # noqa: E402  (one place)


@dataclass(frozen=True)
class CellGrid:
    """Cells on their ``(i, j)`` grid, with finite centres everywhere for drawing.

    ``x_nm, y_nm`` (ni, nj): cell centres, from an affine fit ``r = r0 + i a + j b``
    to the cells present (so holes and missing cells still have a place);
    ``present`` (ni, nj): which cells exist; ``index`` (ni, nj): row of each
    cell in the ``cells.csv`` arrays, -1 where absent; ``a_nm, b_nm``: the
    fitted steps along i and j as ``(x, y)``.
    """

    i0: int
    j0: int
    x_nm: np.ndarray
    y_nm: np.ndarray
    present: np.ndarray
    index: np.ndarray
    a_nm: np.ndarray
    b_nm: np.ndarray

    def dense(self, values) -> np.ndarray:
        """Per-cell `values` (in ``cells.csv`` order) on the grid, NaN where no cell."""
        v = np.asarray(values, float)
        out = np.full(self.index.shape, np.nan)
        out[self.present] = v[self.index[self.present]]
        return out

    def cell_polygons(self, x_nm, y_nm) -> np.ndarray:
        """Quadrilaterals ``(N, 4, 2)`` around cell centres ``(x_nm, y_nm)``: each centre
        plus and minus half the fitted steps, so neighbouring cells tile the map."""
        c = np.column_stack([np.asarray(x_nm, float), np.asarray(y_nm, float)])
        ha, hb = self.a_nm / 2.0, self.b_nm / 2.0
        return np.stack([c - ha - hb, c + ha - hb, c + ha + hb, c - ha + hb], axis=1)

    def plaquette_polygons(self) -> np.ndarray:
        """The ``(ni - 1) * (nj - 1)`` plaquettes as ``(M, 4, 2)``: their corners are the
        four cell centres, in the order of :func:`winding_map`'s ``w.ravel()``."""
        r = np.stack([self.x_nm, self.y_nm], axis=-1)
        return np.stack([r[:-1, :-1], r[1:, :-1], r[1:, 1:], r[:-1, 1:]],
                        axis=2).reshape(-1, 4, 2)

    @property
    def handedness(self) -> int:
        """+1 when ``a x b > 0`` in the (x, y) = (col, row) frame (as the analysis uses)."""
        cross = self.a_nm[0] * self.b_nm[1] - self.a_nm[1] * self.b_nm[0]
        return 1 if cross >= 0 else -1


def cell_grid(cells: dict[str, np.ndarray]) -> CellGrid | None:
    """The :class:`CellGrid` of a ``cells.csv`` table (None with fewer than 3 cells)."""
    i = np.asarray(cells["i"], np.int64)
    j = np.asarray(cells["j"], np.int64)
    x = np.asarray(cells["x_pm"], float) / 1000.0
    y = np.asarray(cells["y_pm"], float) / 1000.0
    ok = np.isfinite(x) & np.isfinite(y)
    if ok.sum() < 3:
        return None
    design = np.column_stack([np.ones(ok.sum()), i[ok], j[ok]])
    coef, *_ = np.linalg.lstsq(design, np.column_stack([x[ok], y[ok]]), rcond=None)
    if np.linalg.matrix_rank(design) < 3:
        return None  # all cells on one line: no 2D grid
    i0, j0 = int(i.min()), int(j.min())
    ni, nj = int(i.max()) - i0 + 1, int(j.max()) - j0 + 1
    gi, gj = np.meshgrid(np.arange(ni) + i0, np.arange(nj) + j0, indexing="ij")
    xg = coef[0, 0] + gi * coef[1, 0] + gj * coef[2, 0]
    yg = coef[0, 1] + gi * coef[1, 1] + gj * coef[2, 1]
    index = np.full((ni, nj), -1, np.int64)
    index[i - i0, j - j0] = np.arange(len(i))
    present = index >= 0
    # measured centres where known: the map sits where the cells really are
    xg[i[ok] - i0, j[ok] - j0] = x[ok]
    yg[i[ok] - i0, j[ok] - j0] = y[ok]
    return CellGrid(i0=i0, j0=j0, x_nm=xg, y_nm=yg, present=present, index=index,
                    a_nm=coef[1], b_nm=coef[2])


def smooth_cells(grid: CellGrid, values, sigma_cells: float) -> np.ndarray:
    """Gaussian average of per-cell `values` over neighbouring cells, in ``cells.csv`` order.

    A normalised convolution on the cell grid: ``sum_k w_k v_k / sum_k w_k`` with
    Gaussian weights ``w_k = exp(-r_k^2 / (2 sigma^2))`` over the cells present
    and finite (``r_k`` in cells along i and j; the kernel is cut at 4 sigma), so
    holes, missing cells and the frame's edge do not pull the average towards
    zero.  A cell without a value of its own gets the average of its
    neighbours when they carry at least half of the kernel's weight (so the
    smoothed map has no speckle of holes); otherwise it stays NaN.  For shot-noise-limited maps the noise
    of each cell drops by about ``1 / (2 sqrt(pi) sigma)`` for ``sigma >= 1``
    (the effective number of cells averaged is ``4 pi sigma^2``), at the price of
    blurring features narrower than about 2 sigma cells.

    Parameters
    ----------
    grid : CellGrid
    values : array (N,)
        One value per row of ``cells.csv``.
    sigma_cells : float
        Standard deviation of the Gaussian in cells; 0 returns a copy.
    """
    from scipy.ndimage import gaussian_filter

    v = np.asarray(values, float)
    if not sigma_cells > 0:
        return v.copy()
    dense = grid.dense(v)
    ok = np.isfinite(dense)
    num = gaussian_filter(np.where(ok, dense, 0.0), sigma_cells, mode="constant", truncate=4.0)
    den = gaussian_filter(ok.astype(float), sigma_cells, mode="constant", truncate=4.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        smooth = np.where((ok & (den > 1e-12)) | (den >= 0.5), num / den, np.nan)
    out = np.full(v.shape, np.nan)
    out[grid.index[grid.present]] = smooth[grid.present]
    return out


def winding_map(grid: CellGrid, cells: dict[str, np.ndarray], *, min_snr: float = 3.0):
    """Winding numbers of the displacement field on the plaquettes of `grid`.

    The same rule as the analysis (:func:`livequant.analysis.topology.winding_numbers`,
    a cell counts where ``|d| / sigma_d >= min_snr``).  Returns the winding of each
    plaquette, ``(ni - 1, nj - 1)``, NaN where undefined (see
    :meth:`CellGrid.plaquette_polygons` for where each one is).
    """
    dx, dy = grid.dense(cells["dx_pm"]), grid.dense(cells["dy_pm"])
    with np.errstate(invalid="ignore", divide="ignore"):
        snr = grid.dense(cells["d_pm"]) / grid.dense(cells["sigma_d_pm"])
    valid = np.isfinite(snr) & (snr >= min_snr)
    return winding_numbers(dx, dy, valid=valid, handedness=grid.handedness)


@dataclass(frozen=True)
class WallProfile:
    """Cells projected across a fitted wall: distance from the wall along its normal
    (nm), the polar component (pm) with its sigma, and the fit to draw."""

    s_nm: np.ndarray
    p_pm: np.ndarray
    sigma_p_pm: np.ndarray
    fit: dict
    accepted: bool


def wall_profile(cells: dict[str, np.ndarray], wall: dict, *, accepted: bool) -> WallProfile | None:
    """Project every cell onto the wall normal of a ``summary.json`` wall fit.

    The fit (:func:`livequant.analysis.walls.find_wall`) is
    ``p(r) = P0 tanh(((r - r_wall) . n) / w)`` with ``p = d . axis``; this gives
    ``s = (r - r_wall) . n`` and ``p`` for each cell, so the measured points and
    the fitted curve ``P0 tanh(s / w)`` can be drawn on one axis.  None when the
    wall lacks its direction or position.
    """
    try:
        axis = math.radians(float(wall["axis_deg"]))
        normal = math.radians(float(wall["normal_deg"]))
        xw, yw = float(wall["x_pm"]), float(wall["y_pm"])
        float(wall["width"]), float(wall["p0"])
    except (KeyError, TypeError, ValueError):
        return None
    x, y = np.asarray(cells["x_pm"], float), np.asarray(cells["y_pm"], float)
    dx, dy = np.asarray(cells["dx_pm"], float), np.asarray(cells["dy_pm"], float)
    sdx, sdy = np.asarray(cells["sigma_dx_pm"], float), np.asarray(cells["sigma_dy_pm"], float)
    ca, sa = math.cos(axis), math.sin(axis)
    s = ((x - xw) * math.cos(normal) + (y - yw) * math.sin(normal)) / 1000.0
    p = dx * ca + dy * sa
    sp = np.sqrt((sdx * ca) ** 2 + (sdy * sa) ** 2)
    ok = np.isfinite(s) & np.isfinite(p)
    return WallProfile(s_nm=s[ok], p_pm=p[ok], sigma_p_pm=sp[ok], fit=dict(wall),
                       accepted=accepted)
