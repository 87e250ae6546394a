"""Plotting functions of the session report: arrays in, a matplotlib Figure out.

Every function builds a :class:`matplotlib.figure.Figure` directly (no
``pyplot``, no display, no global figure list, no change to the process's
backend), so it runs headless and in any thread; :func:`save_png` attaches
the Agg canvas and writes the PNG.

Colour maps (chosen to be perceptually uniform and readable with the common
colour-vision deficiencies):

* magnitudes -- ``viridis`` (and ``cividis`` for secondary quantities): both
  rise monotonically in lightness and were designed for red-green colour
  blindness (cividis specifically optimised for it: Nunez, Anderton & Renslow,
  PLoS ONE 13, e0199239 (2018) -- citation from memory);
* signed quantities (strain, rotation, tilt) -- ``coolwarm``, a diverging map
  built in a perceptual colour space with a neutral light centre and equal
  lightness ramps on both sides (Moreland, "Diverging color maps for scientific
  visualization", ISVC 2009 -- from memory); its two arms are blue and red,
  which stay apart for protan and deutan viewers because they differ along the
  blue-yellow axis those viewers keep.  ``RdBu``/``RdYlGn``-type maps with a
  green arm or a dark centre are avoided.  The colour range is symmetric about
  zero so white means zero;
* angles -- :func:`cyclic_direction_map`, a cyclic map of constant CIELAB
  lightness (L* = 58) and chroma (C* = 33, the most that stays inside sRGB at
  every hue) whose hue turns once around the
  circle, so 0 and 360 degrees meet and no direction is darker than another:
  arrows of every direction stay legible on the (lightened) image, where a
  map with a dark arm (``twilight`` near 180 degrees) vanishes on black.  Equal
  angle steps are equal hue steps at fixed L* and C*, about equal perceived
  steps (the construction of isoluminant cyclic maps in Kovesi, "Good colour
  maps: how to design them", arXiv:1509.03700 (2015) -- from memory).  The hue
  circle is turned so that opposite directions 0/180 degrees -- the two
  domains either side of a 180-degree wall -- fall on yellow and blue, which
  stay apart for protan and deutan viewers; the arrows' own direction is the
  first cue, colour the second;
* categories (sublattices, flag kinds, proposal states) -- the Okabe-Ito
  palette (Okabe & Ito, "Color Universal Design", 2008 -- from memory), always
  paired with a distinct marker or line style so colour is never the only cue.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Sequence

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import PolyCollection
from matplotlib.colors import BoundaryNorm, ListedColormap, Normalize
from matplotlib.figure import Figure
from matplotlib.patches import Polygon
from matplotlib.ticker import MaxNLocator

__all__ = ["CMAP_MAGNITUDE", "CMAP_SECONDARY", "CMAP_SIGNED", "CMAP_ANGLE", "CMAP_IMAGE",
           "OKABE_ITO", "save_png", "save_figure", "cyclic_direction_map", "image_with_columns", "displacement_arrows", "cell_maps",
           "wall_profile_figure", "winding_figure", "overview_figure", "drift_figure",
           "histograms_figure", "fit_quality_figure", "throughput_figure", "MapPanel",
           "nice_length", "winding_explanation", "lightened", "marker_size_pt"]

CMAP_MAGNITUDE = "viridis"
CMAP_SECONDARY = "cividis"
CMAP_SIGNED = "coolwarm"
CMAP_ANGLE = "livequant-direction"   # see cyclic_direction_map
CMAP_IMAGE = "gray"

#: Okabe-Ito colours: black, orange, sky blue, bluish green, yellow, blue, vermillion,
#: reddish purple.
OKABE_ITO = ("#000000", "#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00",
             "#CC79A7")

_SUBLATTICE_STYLE = {"A": (OKABE_ITO[1], "o"), "B": (OKABE_ITO[2], "s"),
                     "Oa": (OKABE_ITO[6], "^"), "Ob": (OKABE_ITO[7], "v"),
                     "?": (OKABE_ITO[4], "x")}
_PROPOSAL_STYLE = {"accepted": (OKABE_ITO[3], "-", 2.2), "open": (OKABE_ITO[1], "--", 1.4),
                   "rejected": (OKABE_ITO[7], ":", 1.4), "expired": ("#888888", ":", 1.0)}
_DPI = 100
#: Collections with more marks than this are drawn as images inside SVG/PDF figures.
RASTER_ABOVE = 300


def _lab_to_srgb(L, a, b, *, clip: bool = True) -> np.ndarray:
    """CIELAB (D65 white) to sRGB in 0..1 (CIE 1976 L*a*b*; IEC 61966-2-1 sRGB).

    With ``clip=False`` the linear values are returned unclipped, to check the gamut.
    """
    fy = (np.asarray(L, float) + 16.0) / 116.0
    fx, fz = fy + np.asarray(a, float) / 500.0, fy - np.asarray(b, float) / 200.0
    eps = 6.0 / 29.0

    def finv(t):
        return np.where(t > eps, t ** 3, 3 * eps ** 2 * (t - 4.0 / 29.0))

    xyz = np.stack([0.95047 * finv(fx), finv(fy), 1.08883 * finv(fz)], axis=-1)
    m = np.array([[3.2406, -1.5372, -0.4986], [-0.9689, 1.8758, 0.0415],
                  [0.0557, -0.2040, 1.0570]])
    lin = xyz @ m.T
    if not clip:
        return lin
    lin = np.clip(lin, 0.0, 1.0)
    return np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * lin ** (1 / 2.4) - 0.055)


def cyclic_direction_map(n: int = 256, *, lightness: float = 58.0, chroma: float = 33.0,
                         hue0_deg: float = 90.0) -> ListedColormap:
    """A cyclic colour map of constant CIELAB lightness and chroma for directions.

    Colour ``k / n`` of the map is CIELCh ``(lightness, chroma, hue0_deg + 360 k / n)``:
    direction 0 deg is yellow (hue 90), 180 deg blue (hue 270).  At these values every
    hue lies inside the sRGB gamut, so no colour is clipped and the lightness is the
    same all around.
    """
    h = np.radians(hue0_deg + 360.0 * np.arange(n) / n)
    rgb = _lab_to_srgb(np.full(n, lightness), chroma * np.cos(h), chroma * np.sin(h))
    return ListedColormap(rgb, name=CMAP_ANGLE)


def _angle_cmap():
    return cyclic_direction_map()


def save_figure(fig: Figure, path: str | Path, *, dpi: float = _DPI,
                vector: str | Path | None = None) -> Path:
    """Write `fig` as a PNG at `dpi` (Agg), and as SVG or PDF at `vector` (by its
    suffix) when given, then release it.

    Fonts are kept as text in SVG (``svg.fonttype = "none"``) so the labels stay
    editable and searchable on slides.  Collections of more than
    `RASTER_ABOVE` marks (cell maps, arrows, thousands of column markers) are
    embedded as images at `dpi` in the vector file: the axes, ticks and text
    stay vector, the file stays small and quick to write and to open.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    FigureCanvasAgg(fig)  # the Agg renderer, whatever backend the process has chosen
    fig.savefig(path, format="png", dpi=dpi)
    if vector is not None:
        vector = Path(vector)
        fmt = vector.suffix.lstrip(".").lower()
        if fmt not in ("svg", "pdf"):
            raise ValueError(f"vector figure {vector}: the suffix must be .svg or .pdf")
        from matplotlib.collections import Collection

        # the layout the PNG got holds for the vector copy (positions are fractions of
        # the figure, text sizes points): keep it instead of computing it again
        fig.set_layout_engine("none")

        for coll in fig.findobj(Collection):
            n = max(len(coll.get_paths()), len(coll.get_offsets()))
            if n > RASTER_ABOVE:
                coll.set_rasterized(True)
        with matplotlib.rc_context({"svg.fonttype": "none", "pdf.fonttype": 42}):
            fig.savefig(vector, format=fmt, dpi=dpi)
    fig.clear()
    return path


def save_png(fig: Figure, path: str | Path) -> Path:
    """Write `fig` as a PNG (Agg) at the default resolution and release it."""
    return save_figure(fig, path)


def nice_length(span: float) -> float:
    """A round length (1, 2 or 5 times a power of ten) near a fifth of `span`."""
    if not (span > 0 and math.isfinite(span)):
        return 1.0
    target = span / 5.0
    base = 10.0 ** math.floor(math.log10(target))
    for m in (5.0, 2.0, 1.0):
        if m * base <= target:
            return m * base
    return base


def _scale_bar(ax, span_nm: float) -> None:
    """A scale bar in nm at the lower left of an axes whose data units are nm."""
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    length = nice_length(span_nm)
    label = f"{length:g} nm"
    bar = AnchoredSizeBar(ax.transData, length, label, "lower left", pad=0.4, color="white",
                          frameon=True, size_vertical=span_nm / 150.0, label_top=True,
                          sep=2)
    bar.patch.set_facecolor("black")
    bar.patch.set_alpha(0.6)
    ax.add_artist(bar)


def _frame_figsize(extent_nm, width_in: float) -> tuple[float, float]:
    """A figure size that follows the frame's aspect (a long, narrow revisit scan too)."""
    x0, x1, y1, y0 = extent_nm
    aspect = abs(y1 - y0) / max(abs(x1 - x0), 1e-12)
    return width_in, float(np.clip(width_in * aspect * 0.85 + 1.0, 2.8, 8.0))


def _frame_axes(ax, extent_nm, *, title: str, image=None) -> None:
    """Image-like axes in nm, rows down (as the frame is shown), with the image if given."""
    x0, x1, y1, y0 = extent_nm
    if image is not None:
        ax.imshow(image, cmap=CMAP_IMAGE, extent=extent_nm, origin="upper",
                  interpolation="nearest")
    else:
        ax.set_facecolor("#dddddd")
    ax.set_xlim(x0, x1)
    ax.set_ylim(y1, y0)
    ax.set_aspect("equal")
    ax.set_xlabel("x (nm, image columns)")
    ax.set_ylabel("y (nm, image rows)")
    ax.set_title(title, fontsize=10)
    _scale_bar(ax, abs(x1 - x0))


def _draw_regions(ax, regions: Sequence[tuple[np.ndarray, str]]) -> None:
    for corners, label in regions:
        ax.add_patch(Polygon(corners, closed=True, fill=False, edgecolor=OKABE_ITO[6], lw=1.8,
                             ls="--"))
        ax.annotate(label, corners[0], color=OKABE_ITO[6], fontsize=8, va="bottom",
                    bbox=dict(boxstyle="round,pad=0.15", fc="white", alpha=0.7, lw=0))


#: Column markers span this fraction of the typical distance between columns.
MARKER_FRACTION = 0.45
#: Frames wider than this get a detail panel where the markers can be seen, nm.
DETAIL_ABOVE_NM = 8.0
DETAIL_NM = 4.0


def marker_size_pt(spacing_nm: float, span_nm: float, axes_width_in: float) -> float:
    """Marker diameter in points: `MARKER_FRACTION` of the column spacing as drawn.

    A marker drawn at a fixed size in points covers more of the image the more
    columns the frame holds; sized from the spacing on screen it stays a ring
    around each column whatever the frame size (clamped to 0.8..14 pt).
    """
    pt_per_nm = axes_width_in * 72.0 / max(span_nm, 1e-9)
    return float(np.clip(MARKER_FRACTION * spacing_nm * pt_per_nm, 0.8, 14.0))


def _mark_columns(ax, x, y, sub, *, spacing_nm: float, span_nm: float, axes_width_in: float,
                  legend: bool) -> None:
    d = marker_size_pt(spacing_nm, span_nm, axes_width_in)
    lw = float(np.clip(d / 6.0, 0.25, 1.0))
    for name, (colour, marker) in _SUBLATTICE_STYLE.items():
        m = sub == name
        if m.any():
            ax.scatter(x[m], y[m], s=d ** 2, marker=marker,
                       facecolors="none" if marker not in ("x",) else colour,
                       edgecolors=colour, linewidths=lw, label=f"{name} ({int(m.sum())})")
    if legend and len(sub):
        ax.legend(loc="upper right", fontsize=7, framealpha=0.8, title="sublattice",
                  title_fontsize=7, markerscale=max(1.0, 6.0 / d))


def image_with_columns(image, extent_nm, x_nm, y_nm, sublattice, *, title: str,
                       regions: Sequence[tuple[np.ndarray, str]] = ()) -> Figure:
    """The frame with every fitted column marked by sublattice, and flag regions.

    Markers are sized to the column spacing on screen (:func:`marker_size_pt`),
    so they ring the columns without hiding them.  A frame wider than
    `DETAIL_ABOVE_NM` gets a second panel, a `DETAIL_NM` square around the
    first flagged region (else the centre), where each column can be seen.
    `image` may be None (file gone): the columns are drawn on a grey ground.
    `regions` are ``(corners_nm (4, 2), label)`` in the same nm frame.
    """
    x0, x1, y1, y0 = extent_nm
    span = abs(x1 - x0)
    x, y = np.asarray(x_nm, float), np.asarray(y_nm, float)
    sub = np.asarray(sublattice).astype(str)
    spacing = _typical_spacing(x, y) if len(x) > 1 else 1.0
    detail = span > DETAIL_ABOVE_NM and len(x) > 0
    w_in = 11.5 if detail else 6.4
    fig = Figure(figsize=(w_in, _frame_figsize(extent_nm, 6.4)[1]), layout="constrained")
    ax = fig.add_subplot(1, 2, 1) if detail else fig.add_subplot()
    _frame_axes(ax, extent_nm, title=title, image=image)
    axes_w = (w_in / 2 if detail else w_in) * 0.8
    _mark_columns(ax, x, y, sub, spacing_nm=spacing, span_nm=span, axes_width_in=axes_w,
                  legend=not detail)
    _draw_regions(ax, regions)
    if detail:
        centre = (regions[0][0].mean(axis=0) if regions else
                  np.array([(x0 + x1) / 2, (y0 + y1) / 2]))
        h = DETAIL_NM / 2
        cx = float(np.clip(centre[0], min(x0, x1) + h, max(x0, x1) - h))
        cy = float(np.clip(centre[1], min(y0, y1) + h, max(y0, y1) - h))
        ax.add_patch(Polygon([(cx - h, cy - h), (cx + h, cy - h), (cx + h, cy + h),
                              (cx - h, cy + h)], closed=True, fill=False, edgecolor="white",
                             lw=1.2))
        ax2 = fig.add_subplot(1, 2, 2)
        _frame_axes(ax2, extent_nm, title=f"detail: {DETAIL_NM:g} nm square (white box)",
                    image=image)
        ax2.set_xlim(cx - h, cx + h)
        ax2.set_ylim(cy + h, cy - h)
        ax2.artists[-1].remove()          # the scale bar of the whole frame
        _scale_bar(ax2, DETAIL_NM)
        inside = (np.abs(x - cx) <= h * 1.05) & (np.abs(y - cy) <= h * 1.05)
        _mark_columns(ax2, x[inside], y[inside], sub[inside], spacing_nm=spacing,
                      span_nm=DETAIL_NM, axes_width_in=axes_w, legend=True)
        ax2.set_ylabel("")
    return fig


def displacement_arrows(image, extent_nm, x_nm, y_nm, dx_pm, dy_pm, *, title: str,
                        exaggeration: float | None = None) -> Figure:
    """B-site displacement of every cell as an arrow on the frame, coloured by direction.

    Arrows are drawn `exaggeration` times their true length (chosen so the median
    arrow is ~0.4 of a cell when None); the key arrow gives the true length in pm.
    """
    x, y = np.asarray(x_nm, float), np.asarray(y_nm, float)
    dx, dy = np.asarray(dx_pm, float), np.asarray(dy_pm, float)
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(dx) & np.isfinite(dy)
    fig = Figure(figsize=_frame_figsize(extent_nm, 6.8), layout="constrained")
    ax = fig.add_subplot()
    # the frame lightened beneath the arrows, so arrows of every direction stand out
    _frame_axes(ax, extent_nm, title=title, image=None if image is None else
                lightened(image))
    if image is not None:
        ax.images[-1].set_clim(0.0, 1.0)
    ax.set_title(title, fontsize=10, loc="left")
    ax.set_title("", loc="center")
    if ok.sum() == 0:
        ax.text(0.5, 0.5, "no cell with a B-site displacement", transform=ax.transAxes,
                ha="center", va="center")
        return fig
    mag = np.hypot(dx[ok], dy[ok])
    med = float(np.median(mag)) or 1.0
    if exaggeration is None:
        spacing_nm = _typical_spacing(x[ok], y[ok])
        exaggeration = 0.7 * spacing_nm / (med / 1000.0)
    ang = np.degrees(np.arctan2(dy[ok], dx[ok])) % 360.0
    # data units are nm with y pointing down on screen; the arrows keep the image's sense
    q = ax.quiver(x[ok], y[ok], dx[ok] / 1000.0 * exaggeration, dy[ok] / 1000.0 * exaggeration,
                  ang, cmap=_angle_cmap(), norm=Normalize(0, 360), angles="xy",
                  scale_units="xy", scale=1.0, width=0.004, pivot="middle",
                  edgecolor="#202020", linewidth=0.25)
    key_pm = float(nice_length(med * 5.0)) if med > 0 else 10.0
    ax.quiverkey(q, 0.70, 1.025, key_pm / 1000.0 * exaggeration,
                 f"{key_pm:g} pm (arrows x{exaggeration:.0f})", labelpos="E",
                 coordinates="axes", color="black", fontproperties={"size": 8})
    cb = fig.colorbar(q, ax=ax, shrink=0.8)
    cb.set_label("direction, atan2(dy, dx) (deg)")
    return fig


def lightened(image, *, floor: float = 0.62) -> np.ndarray:
    """The image scaled into ``floor..1`` (grey on white) between its 1st and 99th
    percentiles, for drawing coloured marks on top (show with clim 0..1)."""
    im = np.asarray(image, float)
    fin = np.isfinite(im)
    if not fin.any():
        return np.ones_like(im)
    lo, hi = np.percentile(im[fin], [1, 99])
    v = np.clip((im - lo) / (hi - lo if hi > lo else 1.0), 0.0, 1.0)
    return floor + (1.0 - floor) * np.where(fin, v, 1.0)


def _typical_spacing(x, y) -> float:
    if len(x) < 2:
        return 1.0
    area = max(np.ptp(x) * np.ptp(y), 1e-12)
    return float(math.sqrt(area / len(x)))


class MapPanel:
    """One per-cell map: a title, the values on the cell grid, a kind and a unit.

    `kind` is ``"magnitude"`` (viridis), ``"secondary"`` (cividis), ``"signed"``
    (coolwarm, symmetric about zero) or ``"angle"`` (constant-lightness cyclic map,
    0..360 deg).
    """

    def __init__(self, title: str, values: np.ndarray, *, kind: str, unit: str,
                 scale: float = 1.0):
        if kind not in ("magnitude", "secondary", "signed", "angle"):
            raise ValueError(f"`kind` must be magnitude, secondary, signed or angle, got {kind!r}")
        self.title, self.values, self.kind, self.unit, self.scale = (title, values, kind, unit,
                                                                    scale)


def cell_maps(polygons, panels: Sequence[MapPanel], *, extent_nm, title: str,
              image=None, ncols: int = 2) -> Figure:
    """Per-cell maps, one per panel: cell ``k`` is the quadrilateral ``polygons[k]``
    (``(N, 4, 2)``, nm) filled with ``panel.values[k]``.

    NaN cells are left empty.  Colour bars carry the unit; signed maps are centred on zero
    with a range set by the 99th percentile of |value| (outliers saturate).
    """
    n = len(panels)
    ncols = min(ncols, n) or 1
    nrows = int(math.ceil(n / ncols)) or 1
    fig = Figure(figsize=(4.6 * ncols, 4.3 * nrows), layout="constrained")
    fig.suptitle(title, fontsize=11)
    for k, panel in enumerate(panels):
        ax = fig.add_subplot(nrows, ncols, k + 1)
        _frame_axes(ax, extent_nm, title=panel.title, image=image)
        v = np.asarray(panel.values, float) * panel.scale
        fin = np.isfinite(v)
        if not fin.any():
            ax.text(0.5, 0.5, "not available", transform=ax.transAxes, ha="center",
                    va="center")
            continue
        cmap, norm = _cmap_norm(panel.kind, v[fin])
        coll = PolyCollection(np.asarray(polygons)[fin], array=v[fin], cmap=cmap, norm=norm,
                              edgecolors="face", linewidths=0.3,
                              alpha=0.85 if image is not None else 1.0)
        ax.add_collection(coll)
        cb = fig.colorbar(coll, ax=ax, shrink=0.85)
        cb.set_label(panel.unit)
    return fig


def _cmap_norm(kind: str, finite_values: np.ndarray):
    if kind == "angle":
        return _angle_cmap(), Normalize(0.0, 360.0)
    if kind == "signed":
        lim = float(np.percentile(np.abs(finite_values), 99)) or 1e-12
        return CMAP_SIGNED, Normalize(-lim, lim)
    lo, hi = np.percentile(finite_values, [1, 99])
    if hi <= lo:
        lo, hi = lo - 0.5 * abs(lo or 1.0), hi + 0.5 * abs(hi or 1.0)
    return (CMAP_MAGNITUDE if kind == "magnitude" else CMAP_SECONDARY), Normalize(lo, hi)


def wall_profile_figure(s_nm, p_pm, sigma_p_pm, fit: dict, *, title: str,
                        accepted: bool) -> Figure:
    """Cells against their distance from the wall, with the fitted ``P0 tanh(s / w)``."""
    s, p, sp = (np.asarray(a, float) for a in (s_nm, p_pm, sigma_p_pm))
    fig = Figure(figsize=(7.0, 4.4), layout="constrained")
    ax = fig.add_subplot()
    ax.errorbar(s, p, yerr=np.where(np.isfinite(sp), sp, 0.0), fmt="o", ms=3,
                color=OKABE_ITO[5], ecolor="#9ab", elinewidth=0.6, label="cells")
    p0, w = float(fit.get("p0", np.nan)), float(fit.get("width", np.nan))
    if np.isfinite(p0) and np.isfinite(w) and w > 0 and s.size:
        xs = np.linspace(s.min(), s.max(), 400)
        ax.plot(xs, p0 * np.tanh(xs / (w / 1000.0)), color=OKABE_ITO[6], lw=2,
                label="P0 tanh(s / w)")
    ax.axhline(0, color="#888", lw=0.6)
    ax.axvline(0, color="#888", lw=0.6, ls=":")
    ax.set_xlabel("distance from the wall along its normal, s (nm)")
    ax.set_ylabel("B-site displacement along the polar axis (pm)")
    state = "accepted" if accepted else f"rejected: {fit.get('rejected', 'poor fit')}"
    ax.set_title(f"{title}\nwall fit ({state})", fontsize=10)
    lines = [f"w = {_pm(fit.get('width'))} ± {_pm(fit.get('sigma_width'))} pm "
             "(half-width, w = √2 ξ)",
             f"-0.8→+0.8 P0 width = {_pm(fit.get('width_80'))} pm",
             f"P0 = {_pm(fit.get('p0'))} ± {_pm(fit.get('sigma_p0'))} pm",
             f"normal = {_pm(fit.get('normal_deg'))} ± {_pm(fit.get('sigma_normal_deg'))} deg,"
             f" polar axis = {_pm(fit.get('axis_deg'))} deg",
             f"reduced χ² = {_num(fit.get('reduced_chi2'), 3)}, n = {fit.get('n_points', '?')}"]
    if fit.get("p0_C_per_m2") is not None:
        lines.append(f"P0 = {_num(fit.get('p0_C_per_m2'), 3)} ± "
                     f"{_num(fit.get('sigma_p0_C_per_m2'), 2)} C/m²")
    ax.text(0.02, 0.98, "\n".join(lines), transform=ax.transAxes, va="top", fontsize=8,
            bbox=dict(boxstyle="round", fc="white", alpha=0.85, lw=0.5))
    ax.legend(loc="lower right", fontsize=8)
    return fig


def _pm(v) -> str:
    return _num(v, 1)


def _num(v, digits: int) -> str:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return "n/a"
    if not math.isfinite(f):
        return "n/a"
    return f"{f:.{digits}f}" if abs(f) >= 10 ** -digits or f == 0 else f"{f:.{digits}g}"


def winding_explanation(n_plaquettes: int, n_valid: int, n_winding: int, *,
                        min_snr: float, n_flagged: int = 0) -> str:
    """One sentence saying why a winding map shows no core ('' when it shows some).

    Parameters
    ----------
    n_plaquettes : int
        Plaquettes of the cell grid.
    n_valid : int
        Plaquettes whose four cells all have ``|d| / sigma >= min_snr``.
    n_winding : int
        Valid plaquettes with a non-zero winding number.
    min_snr : float
    n_flagged : int
        Cores flagged by the rules (found on larger, smoothed loops).
    """
    if n_winding > 0:
        return ""
    flagged = (f" The {n_flagged} core(s) marked were found by the rules on larger, smoothed "
               "loops." if n_flagged else "")
    if n_plaquettes == 0:
        return "Too few cells on a grid for any plaquette: no winding number can be counted."
    if n_valid == 0:
        return (f"No core shown: no plaquette has four cells with |d| ≥ {min_snr:g} σ, so the "
                "displacement directions are too uncertain here (weak polarization or too little "
                "dose) to count windings." + flagged)
    frac = n_valid / n_plaquettes
    if frac < 0.5:
        pct = "< 1" if frac < 0.01 else f"{100 * frac:.0f}"
        return (f"No core shown: only {n_valid} of {n_plaquettes} plaquettes ({pct} %) "
                f"have four cells with |d| ≥ {min_snr:g} σ, and none of them winds; a core "
                "(where |d| vanishes) cannot be seen at this signal-to-noise. A longer dwell "
                "would show more." + flagged)
    return (f"No core in this frame: all {n_valid} plaquettes with trustworthy directions have "
            "winding 0 (the displacement turns by less than half a turn around each)." + flagged)


def winding_figure(w, polygons, cores: Sequence[dict], *, extent_nm, title: str,
                   image=None, note: str = "", min_snr: float = 3.0) -> Figure:
    """Winding number of every plaquette (-1, 0, +1, other), with the cores marked.

    `w` (M,) and `polygons` (M, 4, 2) nm: one value and one quadrilateral per
    plaquette.  `cores` are ``summary.json`` core dicts (``x_pm, y_pm, kind``).
    When no plaquette winds, a sentence under the map says why
    (:func:`winding_explanation`).
    """
    w = np.asarray(w, float).ravel()
    fin = np.isfinite(w)
    n_flagged = sum(1 for c in cores if "flagged" in str(c.get("kind", "")))
    why = winding_explanation(w.size, int(fin.sum()), int((fin & (w != 0)).sum()),
                              min_snr=min_snr, n_flagged=n_flagged)
    fig = Figure(figsize=(7.4, 6.6 if why else 6.0), layout="constrained")
    if why:
        ax, ax_why = fig.subplots(2, 1, height_ratios=[1.0, 0.13])
        ax_why.axis("off")
        import textwrap

        ax_why.text(0.0, 1.0, textwrap.fill(why, 88), transform=ax_why.transAxes, va="top",
                    ha="left", fontsize=9, color="#7a2e00")
    else:
        ax = fig.add_subplot()
    _frame_axes(ax, extent_nm, title=title, image=image)
    if fin.any():
        clipped = np.clip(w[fin], -2, 2)
        # discrete colours from the diverging map; 0 is its neutral centre
        cmap = ListedColormap([matplotlib.colormaps[CMAP_SIGNED](f)
                               for f in (0.0, 0.2, 0.5, 0.8, 1.0)])
        norm = BoundaryNorm([-2.5, -1.5, -0.5, 0.5, 1.5, 2.5], cmap.N)
        coll = PolyCollection(np.asarray(polygons)[fin], array=clipped, cmap=cmap, norm=norm,
                              edgecolors="#777777", linewidths=0.2,
                              alpha=0.75 if image is not None else 1.0)
        ax.add_collection(coll)
        cb = fig.colorbar(coll, ax=ax, shrink=0.7, ticks=[-2, -1, 0, 1, 2])
        cb.ax.set_yticklabels(["≤ -2", "-1 antivortex", "0", "+1 vortex,\nsource, sink",
                               "≥ +2"], fontsize=8)
        cb.set_label("winding number per plaquette")
    markers = {"vortex": ("o", OKABE_ITO[0]), "antivortex": ("X", OKABE_ITO[6]),
               "source": ("^", OKABE_ITO[5]), "sink": ("v", OKABE_ITO[5]),
               "higher-order": ("*", OKABE_ITO[7]),
               "vortex (flagged)": ("s", OKABE_ITO[1]),
               "antivortex (flagged)": ("D", OKABE_ITO[3])}
    seen = set()
    for c in cores:
        try:
            cx, cy = float(c["x_pm"]) / 1000.0, float(c["y_pm"]) / 1000.0
        except (KeyError, TypeError, ValueError):
            continue
        kind = str(c.get("kind", "?"))
        marker, colour = markers.get(kind, ("P", OKABE_ITO[4]))
        ax.scatter([cx], [cy], s=120, marker=marker, facecolors="none" if marker in "o^vsD"
                   else colour, edgecolors=colour, linewidths=2,
                   label=None if kind in seen else kind)
        seen.add(kind)
    if seen:
        ax.legend(loc="upper right", fontsize=8, title="cores", title_fontsize=8)
    if note:
        ax.set_title(f"{title}\n{note}", fontsize=9)
    return fig


def overview_figure(footprints: Sequence[tuple[np.ndarray, float]],
                    flags: Sequence[tuple[np.ndarray, str]],
                    proposals: Sequence[tuple[np.ndarray, str, str]], *,
                    time_label: str = "minutes since the session started",
                    title: str = "Frames on the specimen (stage coordinates)") -> Figure:
    """Every frame's footprint coloured by time, flags and proposals on top.

    `footprints`: ``(corners_nm (4, 2), time since the start)`` (unit in
    `time_label`); `flags`:
    ``(corners_nm, label)``; `proposals`: ``(corners_nm, state, label)`` with
    accepted ones drawn solid and thick, open dashed, rejected/expired dotted.
    """
    fig = Figure(figsize=(8.0, 6.6), layout="constrained")
    ax = fig.add_subplot()
    if footprints:
        times = np.array([t for _, t in footprints], float)
        norm = Normalize(float(times.min()), float(max(times.max(), times.min() + 1e-9)))
        coll = PolyCollection([c for c, _ in footprints], array=times, cmap=CMAP_MAGNITUDE,
                              norm=norm, alpha=0.45, edgecolors="face", linewidths=0.8)
        ax.add_collection(coll)
        cb = fig.colorbar(coll, ax=ax, shrink=0.85)
        cb.set_label(f"found complete: {time_label}")
    for corners, label in flags:
        ax.add_patch(Polygon(corners, closed=True, fill=False, edgecolor=OKABE_ITO[6], lw=1.2))
        centre = corners.mean(axis=0)
        ax.plot(*centre, marker="x", color=OKABE_ITO[6], ms=6, mew=1.5)
    for corners, state, label in proposals:
        colour, ls, lw = _PROPOSAL_STYLE.get(state, ("#444444", "-.", 1.0))
        ax.add_patch(Polygon(corners, closed=True, fill=False, edgecolor=colour, ls=ls, lw=lw,
                             hatch="//" if state == "accepted" else None))
        ax.annotate(label, corners[2], fontsize=7, color=colour)
    # legend proxies: colour and line style together
    from matplotlib.lines import Line2D

    handles = [Line2D([], [], color=OKABE_ITO[6], marker="x", lw=1.2, label="flag (region)")]
    for state in ("accepted", "open", "rejected", "expired"):
        colour, ls, lw = _PROPOSAL_STYLE[state]
        handles.append(Line2D([], [], color=colour, ls=ls, lw=lw, label=f"proposal, {state}"))
    # outside the axes, below the x label: constrained layout makes room for it
    fig.legend(handles=handles, loc="outside lower center", ncol=3, fontsize=7,
               framealpha=0.85)
    pts = [c for c, _ in footprints] + [c for c, _ in flags] + [c for c, _, _ in proposals]
    if pts:
        allp = np.concatenate(pts)
        lo, hi = allp.min(axis=0), allp.max(axis=0)
        pad = 0.08 * max(float(np.max(hi - lo)), 1e-3)
        ax.set_xlim(lo[0] - pad, hi[0] + pad)
        ax.set_ylim(lo[1] - pad, hi[1] + pad)
    else:
        ax.text(0.5, 0.5, "no frame with known stage position", ha="center", va="center",
                transform=ax.transAxes)
    ax.set_aspect("equal", adjustable="box")
    ax.set_xlabel("stage x (nm)")
    ax.set_ylabel("stage y (nm)")
    ax.set_title(title, fontsize=10)
    return fig


def drift_figure(t, dx_nm, dy_nm, sigma_nm=None, *,
                 time_label: str = "minutes since the session started") -> Figure:
    """Specimen drift d(t) in stage coordinates against time (unit in `time_label`)."""
    t = np.asarray(t, float)
    fig = Figure(figsize=(7.0, 3.8), layout="constrained")
    ax = fig.add_subplot()
    if t.size == 0:
        ax.text(0.5, 0.5, "no drift measurements in the ledger", ha="center", va="center",
                transform=ax.transAxes)
    else:
        err = None if sigma_nm is None else np.where(np.isfinite(np.asarray(sigma_nm, float)),
                                                     np.asarray(sigma_nm, float), 0.0)
        ax.errorbar(t, dx_nm, yerr=err, fmt="o-", ms=3, color=OKABE_ITO[5], label="dx (stage)")
        ax.errorbar(t, dy_nm, yerr=err, fmt="s--", ms=3, color=OKABE_ITO[6], label="dy (stage)")
        ax.legend(fontsize=8)
    ax.set_xlabel(time_label)
    ax.set_ylabel("drift d(t) (nm)")
    ax.set_title("Specimen drift", fontsize=10)
    return fig


def histograms_figure(series: Sequence[tuple[str, np.ndarray, str]], *, title: str) -> Figure:
    """One histogram per descriptor: ``(name, values, unit)``; NaN values are dropped."""
    n = max(len(series), 1)
    ncols = min(3, n)
    nrows = int(math.ceil(n / ncols))
    fig = Figure(figsize=(4.0 * ncols, 3.0 * nrows), layout="constrained")
    fig.suptitle(title, fontsize=11)
    for k, (name, values, unit) in enumerate(series):
        ax = fig.add_subplot(nrows, ncols, k + 1)
        v = np.asarray(values, float)
        v = v[np.isfinite(v)]
        if v.size:
            lo, hi = np.percentile(v, [0.5, 99.5])
            if hi <= lo:
                lo, hi = lo - 0.5, hi + 0.5
            ax.hist(np.clip(v, lo, hi), bins=40, range=(lo, hi), color=OKABE_ITO[5])
            ax.xaxis.set_major_locator(MaxNLocator(5))
            ax.axvline(float(np.median(v)), color=OKABE_ITO[6], ls="--", lw=1)
            u = "" if unit in ("ratio", "c/a") else f" {unit}"
            ax.set_title(f"{name} (n = {v.size}, median {np.median(v):.3g}{u})", fontsize=8)
        else:
            ax.text(0.5, 0.5, "no values", ha="center", va="center", transform=ax.transAxes)
            ax.set_title(name, fontsize=8)
        ax.set_xlabel(unit)
        ax.set_ylabel("cells")
    return fig


def fit_quality_figure(sigma_pm, crlb_pm, reduced_chi2, sublattice) -> Figure:
    """Fitted position sigma against the Thompson bound, their ratio, and the residuals."""
    sig = np.asarray(sigma_pm, float)
    bound = np.asarray(crlb_pm, float)
    chi2 = np.asarray(reduced_chi2, float)
    sub = np.asarray(sublattice).astype(str)
    fig = Figure(figsize=(12.0, 3.9), layout="constrained")
    ax1, ax2, ax3 = fig.subplots(1, 3)
    ok = np.isfinite(sig) & np.isfinite(bound) & (bound > 0) & (sig > 0)
    for name, (colour, marker) in _SUBLATTICE_STYLE.items():
        m = ok & (sub == name)
        if m.any():
            ax1.scatter(bound[m], sig[m], s=8, marker=marker, color=colour,
                        label=f"{name} ({int(m.sum())})")
    if ok.any():
        hi = float(max(bound[ok].max(), sig[ok].max())) * 1.25
        ax1.plot([0, hi], [0, hi], color="black", lw=1, label="σ = bound")
        ax1.set_xlim(0, hi)
        ax1.set_ylim(0, hi)
        ax1.legend(fontsize=7)
        ratio = sig[ok] / bound[ok]
        hi_r = float(np.percentile(ratio, 99.5))
        ax2.hist(np.clip(ratio, 0, hi_r), bins=40, color=OKABE_ITO[5])
        ax2.axvline(1.0, color="black", lw=1)
        ax2.axvline(float(np.median(ratio)), color=OKABE_ITO[6], ls="--", lw=1)
        ax2.set_title(f"median σ / bound = {np.median(ratio):.2f}", fontsize=9)
    else:
        ax1.text(0.5, 0.5, "no converged column with a bound", ha="center", va="center",
                 transform=ax1.transAxes)
    ax1.set_xlabel("Cramér-Rao bound, Thompson et al. 2002 (pm)")
    ax1.set_ylabel("fitted position σ (pm)")
    ax2.set_xlabel("σ / bound")
    ax2.set_ylabel("columns")
    c = chi2[np.isfinite(chi2)]
    if c.size:
        hi_c = float(np.percentile(c, 99.5))
        ax3.hist(np.clip(c, 0, hi_c), bins=40, color=OKABE_ITO[3])
        ax3.axvline(float(np.median(c)), color=OKABE_ITO[6], ls="--", lw=1)
        ax3.set_title(f"median reduced χ² = {np.median(c):.2f}", fontsize=9)
    else:
        ax3.text(0.5, 0.5, "no reduced χ² in columns.csv\n(written by an older version)",
                 ha="center", va="center", transform=ax3.transAxes)
    ax3.set_xlabel("reduced χ² of each column's fit window")
    ax3.set_ylabel("columns")
    return fig


def throughput_figure(finished_s, lag_s, analyze_s, *, bin_s: float | None = None) -> Figure:
    """Frames finished per minute, and each frame's lag and analysis time, over the session.

    `finished_s`: when each frame was done, seconds since the session started
    (the axis is in minutes for sessions of 3 minutes or more).
    """
    t = np.asarray(finished_s, float)
    lag = np.asarray(lag_s, float)
    an = np.asarray(analyze_s, float)
    fig = Figure(figsize=(11.0, 3.8), layout="constrained")
    ax1, ax2 = fig.subplots(1, 2)
    minutes = t.size > 0 and float(np.nanmax(t)) >= 180.0
    unit = 60.0 if minutes else 1.0
    label = f"time since the session started ({'min' if minutes else 's'})"
    if t.size:
        span = float(np.ptp(t)) if t.size > 1 else 1.0
        # about five frames a bin at the session's mean rate, 1 s at least: a rate, not a comb
        width = bin_s or max(span / 30.0, 5.0 * span / max(t.size, 1), 1.0)
        edges = np.arange(t.min(), t.max() + width, width)
        if edges.size < 2:
            edges = np.array([t.min(), t.min() + width])
        counts, edges = np.histogram(t, bins=edges)
        ax1.stairs(counts / width * 60.0, edges / unit, color=OKABE_ITO[5], fill=True,
                   alpha=0.6)
        ax1.set_title(f"throughput ({t.size} frames done; bins of {width:.0f} s)", fontsize=9)
        ax2.plot(t / unit, lag, "o", ms=3, color=OKABE_ITO[6],
                 label="lag: complete on disk → done")
        ax2.plot(t / unit, an, "s", ms=3, color=OKABE_ITO[5], label="analysis time in the worker")
        ax2.legend(fontsize=7)
    else:
        for ax in (ax1, ax2):
            ax.text(0.5, 0.5, "no frame finished", ha="center", va="center",
                    transform=ax.transAxes)
    ax1.set_xlabel(label)
    ax1.set_ylabel("frames per minute")
    ax2.set_xlabel(label)
    ax2.set_ylabel("seconds")
    ax2.set_title("lag and analysis time per frame", fontsize=9)
    return fig
