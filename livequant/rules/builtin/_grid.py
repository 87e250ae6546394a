"""The per-cell table of a frame view as dense (i, j) grids, for the built-in rules."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["CellGrid"]


@dataclass(frozen=True)
class CellGrid:
    """Where each cell of ``view.cells`` sits on the dense ``(i, j)`` grid.

    ``gi, gj`` index the grid (``i - i0``, ``j - j0``); ``a_xy_px`` and
    ``b_xy_px`` are the median steps along ``i`` and ``j`` in frame pixels
    ``(x, y)``; ``cell_px`` their mean length.
    """

    gi: np.ndarray
    gj: np.ndarray
    i0: int
    j0: int
    shape: tuple[int, int]
    a_xy_px: np.ndarray
    b_xy_px: np.ndarray
    cell_px: float

    @classmethod
    def from_cells(cls, cells) -> "CellGrid":
        i = np.asarray(cells["i"], np.int64)
        j = np.asarray(cells["j"], np.int64)
        i0, j0 = int(i.min()), int(j.min())
        gi, gj = i - i0, j - j0
        shape = (int(gi.max()) + 1, int(gj.max()) + 1)
        x = np.full(shape, np.nan)
        y = np.full(shape, np.nan)
        x[gi, gj] = cells["x_px"]
        y[gi, gj] = cells["y_px"]
        with np.errstate(invalid="ignore"):
            a = np.array([_nanmedian(np.diff(x, axis=0)), _nanmedian(np.diff(y, axis=0))])
            b = np.array([_nanmedian(np.diff(x, axis=1)), _nanmedian(np.diff(y, axis=1))])
        lengths = [float(np.hypot(*v)) for v in (a, b) if np.all(np.isfinite(v))]
        cell = float(np.mean(lengths)) if lengths else float("nan")
        return cls(gi=gi, gj=gj, i0=i0, j0=j0, shape=shape, a_xy_px=a, b_xy_px=b, cell_px=cell)

    def dense(self, values, fill=np.nan) -> np.ndarray:
        """Per-cell `values` on the grid; `fill` where there is no cell."""
        values = np.asarray(values)
        out = np.full(self.shape, fill, dtype=np.result_type(values.dtype, type(fill)))
        out[self.gi, self.gj] = values
        return out

    @property
    def handedness(self) -> int:
        """+1 when ``a x b > 0`` in the (x, y) = (col, row) frame (see analysis.topology)."""
        a, b = self.a_xy_px, self.b_xy_px
        cross = a[0] * b[1] - a[1] * b[0]
        return 1 if not cross < 0 else -1


def _nanmedian(a) -> float:
    a = np.asarray(a, float)
    a = a[np.isfinite(a)]
    return float(np.median(a)) if a.size else float("nan")


def check_descriptor_names(names, key: str) -> None:
    """Raise ``ValueError`` naming `key` when `names` holds a column cells.csv does not have."""
    from livequant.analysis.cells import VALUE_FIELDS

    unknown = [d for d in names if d not in VALUE_FIELDS]
    if unknown:
        raise ValueError(f"`{key}`: unknown {', '.join(unknown)}; use names of cells.csv columns")
