"""Frame pixels <-> stage coordinates, and overlaps of rotated rectangles on the stage.

The geometry is that of a scan generator (and of ``sim_instrument``): image
columns (``x_px``) run along the fast scan, rows (``y_px``) along the slow
scan; with scan rotation θ the fast scan points along ``e_f = (cos θ, sin θ)``
on the stage and the slow scan along ``e_s = (-sin θ, cos θ)``; the frame
centre (pixel ``((cols - 1) / 2, (rows - 1) / 2)``) sits at the commanded
stage position.  So pixel ``(x, y)`` is commanded to::

    q = centre + (x - (cols - 1) / 2) p e_f + (y - (rows - 1) / 2) p e_s

with ``p`` the pixel size.  What the probe sees there is the specimen point
``q - d(t)``, ``d`` the drift at the time the probe passed: a feature seen at
``q`` in a frame of time ``t`` is at ``q + d(t') - d(t)`` at time ``t'``.

A stage region is a plain dict ``{center_x_nm, center_y_nm, width_nm,
height_nm, rotation_deg}`` (``rotation_deg`` turns the width axis from stage
+x towards +y), the form the rules' session context and the ledger use.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["FrameGeometry", "stage_region", "region_corners", "rect_corners", "polygon_area",
           "clip_polygon", "overlap_area", "overlap_fraction", "bounding_region",
           "shift_region"]


@dataclass(frozen=True)
class FrameGeometry:
    """Where one frame's pixels lie on the stage.

    Parameters
    ----------
    center_x_nm, center_y_nm : float
        Commanded stage position of the frame centre.
    pixel_size_nm : float
    rotation_deg : float
        Scan rotation (fast-scan axis from stage +x towards +y).
    shape : (rows, cols)
    """

    center_x_nm: float
    center_y_nm: float
    pixel_size_nm: float
    rotation_deg: float
    shape: tuple[int, int]

    def __post_init__(self):
        if not (self.pixel_size_nm > 0 and math.isfinite(self.pixel_size_nm)):
            raise ValueError(f"`pixel_size_nm` must be a positive number, got "
                             f"{self.pixel_size_nm!r}")
        rows, cols = (int(v) for v in self.shape)
        if rows < 1 or cols < 1:
            raise ValueError(f"`shape` must be positive (rows, cols), got {self.shape!r}")
        object.__setattr__(self, "shape", (rows, cols))

    @classmethod
    def from_view(cls, view) -> "FrameGeometry":
        """The geometry of a :class:`~livequant.rules.types.FrameView` (or FrameResult)."""
        m = view.meta
        return cls(center_x_nm=float(m.stage_x_nm), center_y_nm=float(m.stage_y_nm),
                   pixel_size_nm=float(m.pixel_size_pm) / 1000.0,
                   rotation_deg=float(m.scan_rotation_deg), shape=tuple(view.shape))

    @property
    def e_fast(self) -> np.ndarray:
        t = math.radians(self.rotation_deg)
        return np.array([math.cos(t), math.sin(t)])

    @property
    def e_slow(self) -> np.ndarray:
        t = math.radians(self.rotation_deg)
        return np.array([-math.sin(t), math.cos(t)])

    @property
    def center_nm(self) -> np.ndarray:
        return np.array([self.center_x_nm, self.center_y_nm])

    @property
    def size_nm(self) -> tuple[float, float]:
        """(width, height): extent along the fast and the slow axis."""
        return self.shape[1] * self.pixel_size_nm, self.shape[0] * self.pixel_size_nm

    def px_to_stage(self, x_px, y_px) -> np.ndarray:
        """Stage ``(x, y)`` nm of pixel positions; returns shape ``(..., 2)``."""
        rows, cols = self.shape
        u = (np.asarray(x_px, float) - (cols - 1) / 2) * self.pixel_size_nm
        v = (np.asarray(y_px, float) - (rows - 1) / 2) * self.pixel_size_nm
        return (self.center_nm + u[..., None] * self.e_fast + v[..., None] * self.e_slow)

    def stage_to_px(self, xy_nm) -> np.ndarray:
        """Pixel ``(x_px, y_px)`` of stage points ``(..., 2)``; returns ``(..., 2)``."""
        rows, cols = self.shape
        rel = np.asarray(xy_nm, float) - self.center_nm
        x = rel @ self.e_fast / self.pixel_size_nm + (cols - 1) / 2
        y = rel @ self.e_slow / self.pixel_size_nm + (rows - 1) / 2
        return np.stack([x, y], axis=-1)

    def footprint(self) -> dict:
        """The stage region the frame covers (pixel edges included)."""
        w, h = self.size_nm
        return {"center_x_nm": self.center_x_nm, "center_y_nm": self.center_y_nm,
                "width_nm": w, "height_nm": h, "rotation_deg": self.rotation_deg}

    def region_to_stage(self, region) -> dict:
        """A :class:`~livequant.rules.types.Region` of this frame as a stage region."""
        c = self.px_to_stage(region.x_px, region.y_px)
        return {"center_x_nm": float(c[0]), "center_y_nm": float(c[1]),
                "width_nm": region.width_px * self.pixel_size_nm,
                "height_nm": region.height_px * self.pixel_size_nm,
                "rotation_deg": _wrap_deg(self.rotation_deg + region.angle_deg)}


def _wrap_deg(a: float) -> float:
    return float((a + 180.0) % 360.0 - 180.0)


def stage_region(center_x_nm: float, center_y_nm: float, width_nm: float, height_nm: float,
                 rotation_deg: float = 0.0) -> dict:
    """A stage-region dict, checked."""
    vals = (center_x_nm, center_y_nm, width_nm, height_nm, rotation_deg)
    if not all(math.isfinite(float(v)) for v in vals):
        raise ValueError(f"a stage region needs finite numbers, got {vals}")
    if width_nm <= 0 or height_nm <= 0:
        raise ValueError(f"a stage region needs a positive size, got {width_nm} x {height_nm} nm")
    return {"center_x_nm": float(center_x_nm), "center_y_nm": float(center_y_nm),
            "width_nm": float(width_nm), "height_nm": float(height_nm),
            "rotation_deg": _wrap_deg(float(rotation_deg))}


def rect_corners(cx: float, cy: float, width: float, height: float,
                 angle_deg: float = 0.0) -> np.ndarray:
    """Corners (4, 2) of a rectangle by centre, size and the angle of its width axis.

    The angle turns the width axis from +x towards +y; the corners run
    counter-clockwise in (x, y) from the (-width, -height) one.  Any units.
    """
    t = math.radians(angle_deg)
    u = np.array([math.cos(t), math.sin(t)]) * width / 2
    v = np.array([-math.sin(t), math.cos(t)]) * height / 2
    c = np.array([cx, cy], dtype=float)
    return np.array([c - u - v, c + u - v, c + u + v, c - u + v])


def region_corners(region: dict) -> np.ndarray:
    """The four corners (4, 2) of a stage region, counter-clockwise."""
    return rect_corners(region["center_x_nm"], region["center_y_nm"], region["width_nm"],
                        region["height_nm"], region["rotation_deg"])


def polygon_area(poly: np.ndarray) -> float:
    """Area of a simple polygon (shoelace formula)."""
    if len(poly) < 3:
        return 0.0
    x, y = poly[:, 0], poly[:, 1]
    return 0.5 * abs(float(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def clip_polygon(subject: np.ndarray, clip: np.ndarray) -> np.ndarray:
    """Intersection of a polygon with a convex, counter-clockwise polygon.

    Sutherland-Hodgman clipping (Sutherland & Hodgman 1974, Commun. ACM 17, 32).
    """
    out = [tuple(p) for p in subject]
    n = len(clip)
    for k in range(n):
        if not out:
            break
        a, b = clip[k], clip[(k + 1) % n]
        edge = b - a

        def inside(p):
            return edge[0] * (p[1] - a[1]) - edge[1] * (p[0] - a[0]) >= -1e-12

        def cross_point(p, q):
            p, q = np.asarray(p), np.asarray(q)
            d = q - p
            den = edge[0] * d[1] - edge[1] * d[0]
            s = (edge[0] * (a[1] - p[1]) - edge[1] * (a[0] - p[0])) / den
            return tuple(p + s * d)

        inp, out = out, []
        for i, cur in enumerate(inp):
            prev = inp[i - 1]
            if inside(cur):
                if not inside(prev):
                    out.append(cross_point(prev, cur))
                out.append(cur)
            elif inside(prev):
                out.append(cross_point(prev, cur))
    return np.array(out, float).reshape(-1, 2)


def overlap_area(a: dict, b: dict) -> float:
    """Area (nm²) common to two stage regions."""
    return polygon_area(clip_polygon(region_corners(a), region_corners(b)))


def overlap_fraction(a: dict, b: dict) -> float:
    """Share of region `a` covered by region `b` (0..1)."""
    area = a["width_nm"] * a["height_nm"]
    return overlap_area(a, b) / area if area > 0 else 0.0


def bounding_region(regions, rotation_deg: float) -> dict:
    """The smallest rectangle at `rotation_deg` holding every region in `regions`."""
    pts = np.concatenate([region_corners(r) for r in regions])
    t = math.radians(rotation_deg)
    u = np.array([math.cos(t), math.sin(t)])
    v = np.array([-math.sin(t), math.cos(t)])
    pu, pv = pts @ u, pts @ v
    cu, cv = (pu.min() + pu.max()) / 2, (pv.min() + pv.max()) / 2
    c = cu * u + cv * v
    return stage_region(c[0], c[1], max(pu.max() - pu.min(), 1e-9),
                        max(pv.max() - pv.min(), 1e-9), rotation_deg)


def shift_region(region: dict, dxy_nm) -> dict:
    """The same region moved by ``(dx, dy)`` nm."""
    out = dict(region)
    out["center_x_nm"] = float(region["center_x_nm"] + dxy_nm[0])
    out["center_y_nm"] = float(region["center_y_nm"] + dxy_nm[1])
    return out
