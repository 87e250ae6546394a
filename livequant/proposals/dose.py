"""Electron dose: per frame from the beam current, and a cumulative map of the specimen.

The areal dose of a raster scan with probe current ``I``, per-pixel dwell ``t``
and square pixels of side ``p`` is

    D = I t / (e p^2)        electrons per unit area

(CHECK-VALUES section 9: 20 pA, 2 us, 10 pm pixels give 250 e/pixel and
2.5e4 e/A^2).  A frame spreads its dose over its footprint; the probe tail
and scan overshoot are ignored, so the map is a lower bound near frame edges.

:class:`DoseMap` accumulates frames in *specimen* coordinates -- the stage
region of each frame minus the drift at its time (see
:mod:`livequant.proposals.geometry`) -- so a region revisited after the
specimen drifted is counted where the specimen really was, not where the stage
pointed.  The map is a sparse set of square tiles of ``cell_nm`` cells, so a
session that wanders over a large specimen costs memory only where it looked.

Dose limits are the operator's and the facility's to set: the budget test here
only marks proposals that would exceed the budget the operator configured
(``proposals.dose_budget_e_per_a2``), and such a proposal is never accepted
automatically.  The dose of a proposal is an estimate from the nominal current
and dwell; the instrument's own readings and interlocks come first.
"""

from __future__ import annotations

import math

import numpy as np

from livequant.proposals.geometry import region_corners

__all__ = ["ELEMENTARY_CHARGE_C", "electrons_per_pixel", "dose_e_per_a2", "DoseMap"]

#: The elementary charge, coulomb (exact in the 2019 SI; CODATA 2018).
ELEMENTARY_CHARGE_C = 1.602176634e-19

_TILE = 128  # cells per tile side


def electrons_per_pixel(beam_current_pa: float, dwell_time_us: float) -> float:
    """Electrons delivered to one pixel: ``I t / e``.

    Parameters
    ----------
    beam_current_pa : float
        Probe current, picoamperes (> 0).
    dwell_time_us : float
        Per-pixel dwell, microseconds (> 0).
    """
    _positive(beam_current_pa, "beam_current_pa")
    _positive(dwell_time_us, "dwell_time_us")
    return beam_current_pa * 1e-12 * dwell_time_us * 1e-6 / ELEMENTARY_CHARGE_C


def dose_e_per_a2(beam_current_pa: float, dwell_time_us: float, pixel_size_pm: float) -> float:
    """Areal dose of a raster scan, electrons per square angstrom: ``I t / (e p^2)``.

    Examples
    --------
    >>> round(dose_e_per_a2(20.0, 2.0, 10.0))       # CHECK-VALUES section 9
    24966
    """
    _positive(pixel_size_pm, "pixel_size_pm")
    area_a2 = (pixel_size_pm / 100.0) ** 2          # 1 A = 100 pm
    return electrons_per_pixel(beam_current_pa, dwell_time_us) / area_a2


def _positive(v, name: str) -> None:
    if isinstance(v, bool) or not isinstance(v, (int, float, np.floating, np.integer)) \
            or not math.isfinite(v) or v <= 0:
        raise ValueError(f"`{name}` must be a positive finite number, got {v!r}")


class DoseMap:
    """Cumulative areal dose over the specimen (e/A^2), on a sparse grid in specimen nm.

    Parameters
    ----------
    cell_nm : float
        Side of one map cell, nm.  A region is counted on the cells whose
        centres it covers.
    """

    def __init__(self, cell_nm: float = 0.5):
        _positive(cell_nm, "cell_nm")
        self.cell_nm = float(cell_nm)
        self._tiles: dict[tuple[int, int], np.ndarray] = {}
        self.n_frames = 0
        self.total_electrons = 0.0

    # -------------------------------------------------------------- cells

    def _cells(self, region: dict):
        """Global cell indices (ix, iy) whose centres lie inside a stage/specimen region."""
        corners = region_corners(region)
        c = self.cell_nm
        lo = np.floor(corners.min(axis=0) / c).astype(int)
        hi = np.ceil(corners.max(axis=0) / c).astype(int)
        ix, iy = np.meshgrid(np.arange(lo[0], hi[0] + 1), np.arange(lo[1], hi[1] + 1),
                             indexing="ij")
        px, py = (ix + 0.5) * c, (iy + 0.5) * c
        t = math.radians(region["rotation_deg"])
        u = (px - region["center_x_nm"]) * math.cos(t) + (py - region["center_y_nm"]) * math.sin(t)
        v = -(px - region["center_x_nm"]) * math.sin(t) + (py - region["center_y_nm"]) * math.cos(t)
        inside = (np.abs(u) <= region["width_nm"] / 2) & (np.abs(v) <= region["height_nm"] / 2)
        return ix[inside], iy[inside]

    def _split(self, ix, iy):
        tx, ty = np.floor_divide(ix, _TILE), np.floor_divide(iy, _TILE)
        return tx, ty, ix - tx * _TILE, iy - ty * _TILE

    # -------------------------------------------------------------- public

    def add(self, region: dict, dose_e_per_a2_: float) -> None:
        """Add a scan of `region` (specimen coordinates) at the given areal dose."""
        if not (math.isfinite(dose_e_per_a2_) and dose_e_per_a2_ >= 0):
            raise ValueError(f"a dose must be a finite number >= 0, got {dose_e_per_a2_!r}")
        ix, iy = self._cells(region)
        tx, ty, lx, ly = self._split(ix, iy)
        for key in set(zip(tx.tolist(), ty.tolist())):
            sel = (tx == key[0]) & (ty == key[1])
            tile = self._tiles.get(key)
            if tile is None:
                tile = self._tiles[key] = np.zeros((_TILE, _TILE))
            tile[lx[sel], ly[sel]] += dose_e_per_a2_
        self.n_frames += 1
        self.total_electrons += dose_e_per_a2_ * region["width_nm"] * region["height_nm"] * 100.0

    def values_in(self, region: dict) -> np.ndarray:
        """Dose of every map cell inside `region` (specimen coordinates), e/A^2."""
        ix, iy = self._cells(region)
        out = np.zeros(ix.size)
        tx, ty, lx, ly = self._split(ix, iy)
        for key in set(zip(tx.tolist(), ty.tolist())):
            tile = self._tiles.get(key)
            if tile is not None:
                sel = (tx == key[0]) & (ty == key[1])
                out[sel] = tile[lx[sel], ly[sel]]
        return out

    def max_in(self, region: dict) -> float:
        """Highest cumulative dose inside `region`, e/A^2 (0 where nothing was scanned)."""
        v = self.values_in(region)
        return float(v.max()) if v.size else 0.0

    def image(self):
        """``(array, extent_nm)``: the map on one dense grid for display.

        ``array[iy, ix]`` (rows along specimen y), ``extent_nm = (x0, x1, y0,
        y1)`` of the cell edges; None when nothing was added.
        """
        if not self._tiles:
            return None
        keys = np.array(list(self._tiles))
        t0, t1 = keys.min(axis=0), keys.max(axis=0)
        nx, ny = (t1 - t0 + 1) * _TILE
        out = np.zeros((nx, ny))
        for (kx, ky), tile in self._tiles.items():
            ox, oy = (kx - t0[0]) * _TILE, (ky - t0[1]) * _TILE
            out[ox:ox + _TILE, oy:oy + _TILE] = tile
        used_x = np.flatnonzero(out.any(axis=1))
        used_y = np.flatnonzero(out.any(axis=0))
        out = out[used_x[0]:used_x[-1] + 1, used_y[0]:used_y[-1] + 1]
        c = self.cell_nm
        x0 = (t0[0] * _TILE + used_x[0]) * c
        y0 = (t0[1] * _TILE + used_y[0]) * c
        return out.T, (x0, x0 + out.shape[0] * c, y0, y0 + out.shape[1] * c)

    def summary(self) -> dict:
        img = self.image()
        peak = float(img[0].max()) if img is not None else 0.0
        return {"frames": self.n_frames, "max_e_per_a2": peak,
                "total_electrons": self.total_electrons, "cell_nm": self.cell_nm}
