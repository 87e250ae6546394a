"""The data the decision loop passes around: regions, flags and frame views.

These are the contracts between the worker processes (which build a
:class:`FrameView` from each analysed frame), the rules (which turn a view
into :class:`Flag` objects) and the proposal stage (which turns flags into
scan regions in stage coordinates).  All are frozen and picklable; arrays are
read-only.

Coordinates: regions of a frame are in that frame's pixels, ``x_px`` along
the image columns (fast scan) and ``y_px`` along the rows (slow scan), the
centre of the top-left pixel at (0, 0) -- the file convention of DESIGN.md.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any, Mapping

import numpy as np

from livequant.analysis.types import readonly
from livequant.frames import FrameMeta

__all__ = ["Region", "Flag", "FrameView", "bin_image", "THUMBNAIL_MAX_SIDE_PX"]

#: Longest side of the binned copy of a frame kept for drift estimation, pixels.
THUMBNAIL_MAX_SIDE_PX = 512


@dataclass(frozen=True)
class Region:
    """A rectangle in one frame's pixels: centre, size and rotation.

    ``angle_deg`` turns the rectangle's width axis from +x towards +y.
    """

    x_px: float
    y_px: float
    width_px: float
    height_px: float
    angle_deg: float = 0.0

    def __post_init__(self):
        for name in ("x_px", "y_px", "width_px", "height_px", "angle_deg"):
            v = getattr(self, name)
            if not isinstance(v, (int, float, np.floating, np.integer)) or not math.isfinite(v):
                raise ValueError(f"`{name}` of a region must be a finite number, got {v!r}")
            object.__setattr__(self, name, float(v))
        if self.width_px <= 0 or self.height_px <= 0:
            raise ValueError(f"a region needs a positive size, got {self.width_px} x "
                             f"{self.height_px} px")

    @classmethod
    def around(cls, x_px, y_px, *, margin_px: float, min_size_px: float = 1.0) -> "Region":
        """The axis-aligned box around points (arrays of x and y), grown by `margin_px`."""
        x = np.asarray(x_px, dtype=float).ravel()
        y = np.asarray(y_px, dtype=float).ravel()
        if x.size == 0 or x.size != y.size:
            raise ValueError("`Region.around` needs the same, non-zero number of x and y values")
        x0, x1, y0, y1 = x.min(), x.max(), y.min(), y.max()
        return cls(x_px=(x0 + x1) / 2, y_px=(y0 + y1) / 2,
                   width_px=max(x1 - x0 + 2 * margin_px, min_size_px),
                   height_px=max(y1 - y0 + 2 * margin_px, min_size_px))

    def to_json(self) -> dict:
        return {"x_px": self.x_px, "y_px": self.y_px, "width_px": self.width_px,
                "height_px": self.height_px, "angle_deg": self.angle_deg}

    @classmethod
    def from_json(cls, d: Mapping[str, Any]) -> "Region":
        return cls(x_px=d["x_px"], y_px=d["y_px"], width_px=d["width_px"],
                   height_px=d["height_px"], angle_deg=d.get("angle_deg", 0.0))


@dataclass(frozen=True)
class Flag:
    """One finding of one rule on one frame.

    Attributes
    ----------
    kind : str
        What was found: ``"domain-wall"``, ``"vortex"``, ``"antivortex"``,
        ``"interface"``, ``"anomaly"`` for the built-in rules, any short
        lower-case word for a plugin's own.
    score : float
        0 (barely) to 1 (certainly worth a look).
    region : Region
        Where, in the frame's pixels.
    message : str
        One line for the operator.
    evidence : mapping
        The numbers behind the finding (JSON-ready: str, int, float, bool, None).
    rule : str
        Name of the rule that raised it (filled in by the rule manager).
    frame_id : str
        The frame it was found on (filled in by the rule manager).
    """

    kind: str
    score: float
    region: Region
    message: str
    evidence: Mapping[str, Any] = field(default_factory=dict)
    rule: str = ""
    frame_id: str = ""

    def __post_init__(self):
        if not isinstance(self.kind, str) or not self.kind:
            raise ValueError(f"a flag's `kind` must be a non-empty string, got {self.kind!r}")
        s = float(self.score)
        if not (0.0 <= s <= 1.0):
            raise ValueError(f"a flag's `score` must lie in [0, 1], got {self.score!r}")
        object.__setattr__(self, "score", s)
        if not isinstance(self.region, Region):
            raise TypeError(f"a flag's `region` must be a Region, got {type(self.region).__name__}")
        object.__setattr__(self, "evidence", dict(self.evidence))

    def to_json(self) -> dict:
        return {"kind": self.kind, "score": self.score, "region_px": self.region.to_json(),
                "message": self.message, "evidence": _jsonable(self.evidence),
                "rule": self.rule, "frame_id": self.frame_id}


def _jsonable(d: Mapping[str, Any]) -> dict:
    out = {}
    for k, v in d.items():
        if isinstance(v, (np.floating, float)):
            v = float(v)
            v = v if math.isfinite(v) else None
        elif isinstance(v, np.integer):
            v = int(v)
        elif isinstance(v, np.bool_):
            v = bool(v)
        elif isinstance(v, np.ndarray):
            v = [None if isinstance(x, float) and not math.isfinite(x) else x
                 for x in v.tolist()]
        out[str(k)] = v
    return out


def bin_image(image: np.ndarray, max_side_px: int = THUMBNAIL_MAX_SIDE_PX) -> tuple[np.ndarray, int]:
    """Block-mean `image` by the smallest integer factor that fits `max_side_px`.

    Returns the binned float32 image and the factor (1 when it already fits).
    Edge pixels that do not fill a block are dropped.
    """
    image = np.asarray(image)
    if image.ndim != 2:
        raise ValueError(f"`image` must be 2D, got shape {image.shape}")
    f = max(1, int(math.ceil(max(image.shape) / max_side_px)))
    h, w = (image.shape[0] // f) * f, (image.shape[1] // f) * f
    out = image[:h, :w].astype(np.float32).reshape(h // f, f, w // f, f).mean(axis=(1, 3))
    return out, f


@dataclass(frozen=True)
class FrameView:
    """What the decision loop sees of one analysed frame (small: no full image).

    Built in the worker by :meth:`from_result` and sent to the main process.

    Attributes
    ----------
    frame_id, meta, shape, status
        As in :class:`livequant.pipeline.FrameResult`.
    summary : dict
        The frame's ``summary.json`` content.
    cells : dict of str to ndarray, or None
        Columnar per-cell table: ``i``, ``j``, ``x_pm``, ``y_pm``, ``x_px``,
        ``y_px`` and every field of :data:`livequant.analysis.cells.VALUE_FIELDS`
        (NaN where not available).  None when the frame has no cells.
    columns : dict of str to ndarray, or None
        Columnar per-column table: ``x_px``, ``y_px``, ``sigma_x_px``,
        ``sigma_y_px``, ``amplitude``, ``background``, ``sublattice`` (str),
        ``i``, ``j``, ``converged`` (bool), ``reduced_chi2``.
    thumbnail : ndarray or None
        The frame block-averaged by ``thumbnail_bin`` (float32), for drift.
    thumbnail_bin : int
        Binning factor of `thumbnail` (thumbnail pixel = this many frame pixels).
    """

    frame_id: str
    meta: FrameMeta
    shape: tuple[int, int]
    status: str
    summary: dict
    cells: dict | None = None
    columns: dict | None = None
    thumbnail: np.ndarray | None = None
    thumbnail_bin: int = 1

    @property
    def pixel_size_pm(self) -> float:
        return self.meta.pixel_size_pm

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    @cached_property
    def cell_grid(self):
        """The cells on their dense ``(i, j)`` grid (a ``CellGrid``), None without cells.

        Built once per frame in the main process and shared by every rule that
        needs it.
        """
        from livequant.rules.builtin._grid import CellGrid

        return None if self.cells is None else CellGrid.from_cells(self.cells)

    @classmethod
    def from_result(cls, result, *, image: np.ndarray | None = None,
                    thumbnail_max_side_px: int = THUMBNAIL_MAX_SIDE_PX) -> "FrameView":
        """Condense a :class:`~livequant.pipeline.FrameResult` (and its image)."""
        cells = None
        if result.cells is not None and len(result.cells):
            c = result.cells
            px = result.pixel_size_pm
            cells = {"i": readonly(c.i, np.int64), "j": readonly(c.j, np.int64),
                     "x_pm": readonly(c.x_pm, float), "y_pm": readonly(c.y_pm, float),
                     "x_px": readonly(np.asarray(c.x_pm, float) / px),
                     "y_px": readonly(np.asarray(c.y_pm, float) / px)}
            for name, values in c.values.items():
                cells[name] = readonly(values, float)
        columns = None
        if result.columns is not None and len(result.columns):
            col = result.columns
            columns = {"x_px": readonly(col.positions_px[:, 1], float),
                       "y_px": readonly(col.positions_px[:, 0], float),
                       "sigma_x_px": readonly(col.sigma_positions_px[:, 1], float),
                       "sigma_y_px": readonly(col.sigma_positions_px[:, 0], float),
                       "amplitude": readonly(col.amplitude, float),
                       "background": readonly(col.background, float),
                       "sublattice": readonly(np.asarray(col.sublattice).astype(str)),
                       "i": readonly(col.ij[:, 0], np.int64),
                       "j": readonly(col.ij[:, 1], np.int64),
                       "converged": readonly(col.converged, bool),
                       "reduced_chi2": readonly(col.reduced_chi2, float)}
        thumb, f = (None, 1)
        if image is not None:
            thumb, f = bin_image(image, thumbnail_max_side_px)
            thumb = readonly(thumb)
        return cls(frame_id=result.frame_id, meta=result.meta, shape=tuple(result.shape),
                   status=result.status, summary=result.summary(), cells=cells,
                   columns=columns, thumbnail=thumb, thumbnail_bin=f)
