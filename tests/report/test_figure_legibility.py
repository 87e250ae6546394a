"""Every kind of report figure, drawn from realistic synthetic inputs, is legible:
no piece of text overlaps another (tick labels, axis labels, titles, colour-bar labels,
legends, notes) and none is clipped by the figure's edge.

Boxes come from matplotlib's own text layout (`Text.get_window_extent` with the
figure's Agg renderer, after constrained layout has run).  Truth: a figure whose texts
overlap by construction is caught (the checker's own test below).
"""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.text import Text

from livequant.report import figures as F
from livequant.report.maps import CellGrid, cell_grid, smooth_cells, winding_map

TOLERANCE_PX = 1.0


def _drawn_texts(fig: Figure) -> list[Text]:
    """Every text the figure draws: visible, non-empty, and (for tick labels) in view."""
    FigureCanvasAgg(fig)
    fig.canvas.draw()
    ticks_in_view = set()
    all_tick_labels = set()
    for ax in fig.axes:
        for axis in (ax.xaxis, ax.yaxis):
            if not ax.axison:          # axes switched off draw no ticks at all
                for tick in axis.get_major_ticks() + axis.get_minor_ticks():
                    all_tick_labels.update((id(tick.label1), id(tick.label2)))
                continue
            for tick in axis.get_major_ticks() + axis.get_minor_ticks():
                all_tick_labels.update((id(tick.label1), id(tick.label2)))
            for tick in axis._update_ticks():   # the ticks drawn (inside the view)
                ticks_in_view.update((id(tick.label1), id(tick.label2)))
    out = []
    for t in fig.findobj(Text):
        if not t.get_visible() or not t.get_text().strip():
            continue
        if id(t) in all_tick_labels and id(t) not in ticks_in_view:
            continue
        out.append(t)
    return out


def text_problems(fig: Figure) -> list[str]:
    """Pairs of texts whose boxes overlap, and texts reaching outside the figure."""
    texts = _drawn_texts(fig)
    renderer = fig.canvas.get_renderer()
    boxes = [t.get_window_extent(renderer) for t in texts]
    W, H = fig.bbox.width, fig.bbox.height
    problems = []
    for t, b in zip(texts, boxes):
        if b.x0 < -TOLERANCE_PX or b.y0 < -TOLERANCE_PX or b.x1 > W + TOLERANCE_PX or \
                b.y1 > H + TOLERANCE_PX:
            problems.append(f"clipped by the figure's edge: {t.get_text()!r}")
    if len(boxes) < 2:
        return problems
    b = np.array([[x.x0, x.y0, x.x1, x.y1] for x in boxes])
    dx = np.minimum(b[:, None, 2], b[None, :, 2]) - np.maximum(b[:, None, 0], b[None, :, 0])
    dy = np.minimum(b[:, None, 3], b[None, :, 3]) - np.maximum(b[:, None, 1], b[None, :, 1])
    hit = (dx > TOLERANCE_PX) & (dy > TOLERANCE_PX)
    for k1, k2 in zip(*np.nonzero(np.triu(hit, 1))):
        problems.append(f"{texts[k1].get_text()!r} overlaps {texts[k2].get_text()!r}")
    return problems


def test_the_checker_finds_overlapping_and_clipped_text():
    fig = Figure(figsize=(4, 3))
    ax = fig.add_subplot()
    ax.text(0.5, 0.5, "first label", transform=ax.transAxes)
    ax.text(0.52, 0.5, "second label", transform=ax.transAxes)
    ax.set_ylabel("a y label pushed off the page", labelpad=80)
    problems = text_problems(fig)
    assert any("'first label' overlaps 'second label'" in p for p in problems)
    assert any("clipped" in p and "pushed off" in p for p in problems)
    clean = Figure(figsize=(4, 3), layout="constrained")
    ax = clean.add_subplot()
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    assert text_problems(clean) == []


# ----------------------------------------------------------------- synthetic frame

PX_NM = 0.039                  # 39 pm pixels (a 20 nm survey frame at 512 px)
SHAPE = (512, 512)
EXTENT = (-0.5 * PX_NM, (SHAPE[1] - 0.5) * PX_NM, (SHAPE[0] - 0.5) * PX_NM, -0.5 * PX_NM)
A_NM = 0.3905


def _cells(seed=3):
    """A 50 x 50 cell grid over the frame with a vortex-antivortex pair in the displacement
    and noise (the shape of a survey frame's cells.csv)."""
    rng = np.random.default_rng(seed)
    n = 40
    i, j = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    i, j = i.ravel(), j.ravel()
    x = 0.3 + i * A_NM
    y = 0.3 + j * A_NM
    # vortex at (6, 10) nm, antivortex at (14, 10) nm: d = 15 pm along the winding field
    ang = np.arctan2(y - 10, x - 6) + np.pi / 2 - (np.arctan2(y - 10, x - 14) + np.pi / 2)
    d = 15.0   # (a core's own |d| falls to zero; kept here so its plaquette counts)
    dx = d * np.cos(ang) + rng.normal(0, 2.0, n * n)
    # cores at (6, 10) and (14, 10) nm sit inside plaquettes, not on cell centres
    dy = d * np.sin(ang) + rng.normal(0, 2.0, n * n)
    cells = {"i": i, "j": j, "x_pm": x * 1000, "y_pm": y * 1000, "dx_pm": dx, "dy_pm": dy,
             "d_pm": np.hypot(dx, dy), "sigma_d_pm": np.full(n * n, 2.0),
             "sigma_dx_pm": np.full(n * n, 2.0), "sigma_dy_pm": np.full(n * n, 2.0)}
    for k in ("exx", "eyy", "exy"):
        cells[k] = rng.normal(0, 0.004, n * n)
    cells["rotation_deg"] = rng.normal(0, 0.2, n * n)
    cells["c_over_a"] = 1.06 + rng.normal(0, 0.005, n * n)
    return cells


def _columns(cells, seed=4):
    rng = np.random.default_rng(seed)
    x = cells["x_pm"] / 1000
    y = cells["y_pm"] / 1000
    xs = np.concatenate([x, x + A_NM / 2, x + A_NM / 2, x])
    ys = np.concatenate([y, y + A_NM / 2, y, y + A_NM / 2])
    sub = np.repeat(np.array(["A", "B", "Oa", "Ob"]), x.size)
    return xs + rng.normal(0, 0.002, xs.size), ys, sub


def _image(seed=5):
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:SHAPE[0], 0:SHAPE[1]] * PX_NM
    img = (np.cos(2 * np.pi * xx / A_NM) * np.cos(2 * np.pi * yy / A_NM)) ** 2
    return img + rng.normal(0, 0.3, SHAPE)


def _figures():
    cells = _cells()
    grid = cell_grid(cells)
    assert isinstance(grid, CellGrid)
    polygons = grid.cell_polygons(cells["x_pm"] / 1000, cells["y_pm"] / 1000)
    image = _image()
    xs, ys, sub = _columns(cells)
    region = (np.array([[5.0, 9.0], [7.0, 9.0], [7.0, 11.0], [5.0, 11.0]]), "#3 vortex")
    w = winding_map(grid, cells, min_snr=3.0)
    sm = smooth_cells(grid, cells["exx"], 1.0)
    pol = [F.MapPanel("|P|", cells["d_pm"] * 0.02, kind="magnitude", unit="|P| (C/m²)"),
           F.MapPanel("|P|, Gaussian σ = 1 cell", smooth_cells(grid, cells["d_pm"], 1.0) * 0.02,
                      kind="magnitude", unit="|P| (C/m²)"),
           F.MapPanel("direction of P", np.degrees(np.arctan2(cells["dy_pm"], cells["dx_pm"]))
                      % 360, kind="angle", unit="atan2(Py, Px) (deg)"),
           F.MapPanel("direction, Gaussian σ = 1 cell",
                      np.degrees(np.arctan2(cells["dy_pm"], cells["dx_pm"])) % 360,
                      kind="angle", unit="atan2(Py, Px) (deg)")]
    strain = [F.MapPanel(lab, cells[k], kind="signed", unit=f"{lab} (%)", scale=100.0)
              for k, lab in (("exx", "εxx"), ("eyy", "εyy"), ("exy", "εxy"))]
    strain += [F.MapPanel("εxx, Gaussian σ = 1 cell", sm, kind="signed", unit="εxx (%)",
                          scale=100.0)] * 3
    strain += [F.MapPanel("lattice rotation", cells["rotation_deg"], kind="signed",
                          unit="rotation (deg)"),
               F.MapPanel("tetragonality c/a", cells["c_over_a"], kind="secondary",
                          unit="max(a, b) / min(a, b)"),
               F.MapPanel("octahedral tilt", cells["rotation_deg"], kind="signed",
                          unit="tilt (deg)")]
    rng = np.random.default_rng(8)
    s_nm = np.linspace(-4, 4, 200)
    wall = {"p0": 15.0, "width": 600.0, "sigma_width": 40.0, "width_80": 660.0,
            "sigma_p0": 0.5, "normal_deg": 0.0, "sigma_normal_deg": 0.4, "axis_deg": 90.0,
            "reduced_chi2": 1.1, "n_points": 200, "p0_C_per_m2": 0.61,
            "sigma_p0_C_per_m2": 0.02}
    foot = [(np.array([[x, 60.0], [x + 20, 60.0], [x + 20, 80.0], [x, 80.0]]), float(k * 3))
            for k, x in enumerate(np.arange(-106, -36, 14.0))]
    props = [(np.array([[-100.0, 62], [-94, 62], [-94, 68], [-100, 68]]), "accepted", "p0001"),
             (np.array([[-45.0, 62], [-39, 62], [-39, 68], [-45, 68]]), "open", "p0002")]
    flags = [(np.array([[-99.0, 63], [-95, 63], [-95, 67], [-99, 67]]), "#1")]
    hist = [(name, rng.normal(10, 2, 5000), unit) for name, unit in (
        ("B-site displacement |d|", "pm"), ("polarization |P|", "C/m²"), ("local a", "pm"),
        ("local b", "pm"), ("tetragonality c/a", "c/a"), ("strain εxx", "%"),
        ("strain εyy", "%"), ("shear strain εxy", "%"), ("octahedral tilt", "deg"),
        ("B / A column amplitude", "ratio"))]
    n_col = 4000
    sub_fit = np.repeat(np.array(["A", "B", "Oa", "Ob"]), n_col // 4)
    t = np.sort(rng.uniform(0, 600, 60))
    return {
        "columns, survey frame with detail": F.image_with_columns(
            image, EXTENT, xs, ys, sub, title="survey_00002: fitted columns", regions=[region]),
        "columns, small frame": F.image_with_columns(
            image[:128, :128], (EXTENT[0], 128 * PX_NM, 128 * PX_NM, EXTENT[3]),
            xs[xs < 5], ys[xs < 5], sub[xs < 5], title="req_p0001_00007: fitted columns"),
        "displacement arrows": F.displacement_arrows(
            image, EXTENT, cells["x_pm"] / 1000, cells["y_pm"] / 1000, cells["dx_pm"],
            cells["dy_pm"], title="survey_00002: B-site displacement"),
        "polarization maps": F.cell_maps(polygons, pol, extent_nm=EXTENT, image=image,
                                         title="survey_00002: polarization"),
        "strain maps": F.cell_maps(polygons, strain, extent_nm=EXTENT,
                                   title="survey_00002: strain and lattice", ncols=3),
        "wall profile": F.wall_profile_figure(
            s_nm, 15 * np.tanh(s_nm / 0.6) + rng.normal(0, 1, s_nm.size), np.ones(s_nm.size),
            wall, title="survey_00012: domain wall", accepted=True),
        "winding with cores": F.winding_figure(
            w.ravel(), grid.plaquette_polygons(),
            [{"x_pm": 6000, "y_pm": 10000, "kind": "vortex"},
             {"x_pm": 14000, "y_pm": 10000, "kind": "antivortex"},
             {"x_pm": 6100, "y_pm": 10100, "kind": "vortex (flagged)"}],
            extent_nm=EXTENT, image=image, title="survey_00002: winding numbers",
            note="cells count where |d| / σ(|d|) ≥ 3\n2 core(s) from the analysis, 1 flagged "
                 "by the rules"),
        "winding showing nothing": F.winding_figure(
            np.where(np.arange(w.size) % 50 == 0, 0.0, np.nan), grid.plaquette_polygons(),
            [{"x_pm": 6100, "y_pm": 10100, "kind": "antivortex (flagged)"}],
            extent_nm=EXTENT, image=image, title="survey_00002: winding numbers",
            note="cells count where |d| / σ(|d|) ≥ 3\n0 core(s) from the analysis, 1 flagged "
                 "by the rules"),
        "overview": F.overview_figure(foot, flags, props,
                                      time_label="seconds since the session started"),
        "drift": F.drift_figure(t, 0.01 * t, -0.005 * t, np.full(t.size, 0.05),
                                time_label="seconds since the session started"),
        "histograms": F.histograms_figure(hist, title="Per-cell descriptors across the "
                                                      "session"),
        "fit quality": F.fit_quality_figure(rng.uniform(1, 3, n_col), rng.uniform(1, 2, n_col),
                                            rng.uniform(0.8, 1.5, n_col), sub_fit),
        "throughput": F.throughput_figure(t, rng.uniform(1, 10, t.size),
                                          rng.uniform(1, 5, t.size)),
    }


# Drawing 13 full-size figures takes 10-20 s on the shared 2-core machine.
slow = pytest.mark.slow


@pytest.fixture(scope="module")
def rendered():
    return _figures()


@slow
def test_every_figure_kind_is_checked(rendered):
    """Guard: a new plotting function must be added to this test."""
    assert sorted(rendered) == sorted(KINDS)
    drawn = {"image_with_columns", "displacement_arrows", "cell_maps", "wall_profile_figure",
             "winding_figure", "overview_figure", "drift_figure", "histograms_figure",
             "fit_quality_figure", "throughput_figure"}
    made_by_module = {name for name in F.__all__ if name.endswith(("_figure", "_maps"))
                      or name in ("image_with_columns", "displacement_arrows")} - {"save_figure"}
    assert made_by_module <= drawn, made_by_module - drawn


KINDS = ["columns, survey frame with detail", "columns, small frame", "displacement arrows",
         "polarization maps", "strain maps", "wall profile", "winding with cores",
         "winding showing nothing", "overview", "drift", "histograms", "fit quality",
         "throughput"]


@slow
@pytest.mark.parametrize("kind", KINDS)
def test_no_text_overlaps_and_none_is_clipped(rendered, kind):
    problems = text_problems(rendered[kind])
    assert not problems, f"{kind}: " + "; ".join(problems[:8])


@slow
def test_winding_map_that_shows_nothing_says_why_on_the_figure(rendered):
    texts = " ".join(t.get_text().replace("\n", " ") for t in
                     rendered["winding showing nothing"].findobj(Text))
    assert "No core shown: only 31 of 1521 plaquettes (2 %)" in texts
    assert "found by the rules on larger, smoothed" in " ".join(texts.split())
    texts = " ".join(t.get_text() for t in rendered["winding with cores"].findobj(Text))
    assert "No core" not in texts
    assert "(< 1 %)" in F.winding_explanation(1000, 6, 0, min_snr=3.0)
    assert F.winding_explanation(1000, 0, 0, min_snr=3.0).startswith("No core shown: no plaquette")
    assert F.winding_explanation(1000, 900, 0, min_snr=3.0).startswith("No core in this frame")
    assert F.winding_explanation(1000, 900, 2, min_snr=3.0) == ""
