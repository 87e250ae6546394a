"""Report options against truth: the smoothing, progress, resolution and vector copies."""

from __future__ import annotations

import io

import numpy as np
import pytest
from matplotlib.image import imread

from livequant.daemon import Ledger
from livequant.report import build_report
from livequant.report import figures as F
from livequant.report.maps import cell_grid, smooth_cells
from livequant.report.progress import console_progress, line_progress


def _grid(n=40):
    i, j = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    i, j = i.ravel(), j.ravel()
    cells = {"i": i, "j": j, "x_pm": 390.0 * i + 3.0 * j, "y_pm": 390.0 * j - 2.0 * i}
    return cells, cell_grid(cells)


def test_smoothing_keeps_constants_and_ramps_even_at_edges_and_holes():
    """A normalised Gaussian average returns a constant unchanged everywhere (edges and
    holes included) and a linear ramp unchanged away from the edge (a symmetric kernel
    averages a linear function to its centre value)."""
    cells, grid = _grid()
    const = np.full(cells["i"].size, 7.5)
    const[::7] = np.nan                     # holes
    out = smooth_cells(grid, const, 1.5)
    # never a wrong value; holes are filled from their neighbours, except on the edge
    # where the neighbours may carry less than half of the kernel's weight (a corner
    # about a quarter): those stay empty
    fin = np.isfinite(out)
    assert np.allclose(out[fin], 7.5)
    inside = (cells["i"] > 0) & (cells["i"] < 39) & (cells["j"] > 0) & (cells["j"] < 39)
    assert fin[inside].all() and np.isnan(const[inside]).any()
    corner = (cells["i"] == 0) & (cells["j"] == 0)
    assert np.isnan(const[corner]).all() and np.isnan(out[corner]).all()
    ramp = 0.3 * cells["i"] - 0.1 * cells["j"]
    out = smooth_cells(grid, ramp, 1.0)
    inner = (cells["i"] > 5) & (cells["i"] < 34) & (cells["j"] > 5) & (cells["j"] < 34)
    assert np.allclose(out[inner], ramp[inner], atol=1e-9)
    assert np.array_equal(smooth_cells(grid, ramp, 0.0), ramp)


def test_smoothing_cuts_white_noise_by_the_stated_factor():
    """White noise of unit variance averaged with Gaussian weights of sigma s cells keeps
    variance sum(w^2) / (sum w)^2 ~ 1 / (4 pi s^2): noise drops by 2 sqrt(pi) s
    (3.5-fold at s = 1; the factor the caption states)."""
    cells, grid = _grid(n=120)
    rng = np.random.default_rng(11)
    noise = rng.normal(0.0, 1.0, cells["i"].size)
    inner = (cells["i"] > 8) & (cells["i"] < 111) & (cells["j"] > 8) & (cells["j"] < 111)
    for s in (1.0, 2.0):
        std = np.std(smooth_cells(grid, noise, s)[inner])
        assert std == pytest.approx(1.0 / (2 * np.sqrt(np.pi) * s), rel=0.08), s


def test_line_progress_writes_one_line_per_step():
    out = io.StringIO()
    p = line_progress("report", out)
    p("session tables", 0, 3)
    p("frame survey_00001", 1, 3)
    p("done", 3, 3)
    lines = out.getvalue().splitlines()
    assert lines[0].startswith("report: [1/3] session tables (")
    assert lines[1].startswith("report: [2/3] frame survey_00001 (")
    assert lines[2].startswith("report: [3/3] done (")
    with console_progress("report", file=io.StringIO()) as p2:   # not a terminal: lines
        p2("x", 0, 1)


def _tiny_session(tmp_path):
    session = tmp_path / "s"
    session.mkdir()
    Ledger(session / "ledger.sqlite").close()
    return session


def test_build_report_reports_every_step_in_order_and_writes_vector_copies(tmp_path):
    session = _tiny_session(tmp_path)
    steps = []
    result = build_report(session, progress=lambda s, k, n: steps.append((s, k, n)), dpi=60,
                          vector="pdf")
    n = steps[-1][2]
    assert steps[-1] == ("done", n, n)
    ks = [k for _, k, _ in steps[1:]]
    assert ks == sorted(ks) and ks[-1] == n
    assert [s for s, *_ in steps[1:5]] == ["session tables", "overview and drift", "flags",
                                           "proposals"]
    assert result["vector_figures"] and result["dpi"] == 60
    for v in result["vector_figures"]:
        assert (session / "report" / v).read_bytes()[:5] == b"%PDF-"


def test_dpi_scales_the_png_and_bad_values_are_refused(tmp_path, capsys):
    from livequant.cli import main

    fig = F.drift_figure([0, 1], [0, 1], [0, 1])     # 7.0 x 3.8 inches
    F.save_figure(fig, tmp_path / "a.png", dpi=50)
    fig = F.drift_figure([0, 1], [0, 1], [0, 1])
    F.save_figure(fig, tmp_path / "b.png", dpi=200, vector=tmp_path / "b.svg")
    assert imread(tmp_path / "a.png").shape[:2] == (190, 350)
    assert imread(tmp_path / "b.png").shape[:2] == (760, 1400)
    assert (tmp_path / "b.svg").read_text().lstrip().startswith("<?xml")
    with pytest.raises(ValueError, match="suffix"):
        F.save_figure(F.drift_figure([], [], []), tmp_path / "c.png", vector=tmp_path / "c.eps")
    session = _tiny_session(tmp_path)
    assert main(["report", str(session), "--dpi", "5"]) == 2
    assert "--dpi must lie within 20..1200" in capsys.readouterr().err
    assert main(["report", str(session), "--smooth-cells", "50"]) == 2
    assert "--smooth-cells" in capsys.readouterr().err
    assert main(["report", str(session), "--dpi", "40", "--vector", "none"]) == 0
    err = capsys.readouterr().err
    assert "report: [1/" in err and "report written" in err      # progress lines, not a tty
    assert not list((session / "report" / "figures").glob("*.svg"))


def test_direction_map_is_cyclic_constant_in_lightness_and_inside_the_gamut():
    """CIELAB L* of every colour of the map is the same (58, to 0.5), its ends meet, and
    no colour had to be clipped to sRGB; 0 and 180 degrees fall on yellow and blue."""
    cmap = F.cyclic_direction_map()
    rgb = cmap(np.linspace(0, 1, 64))[:, :3]
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    Y = lin @ np.array([0.2126, 0.7152, 0.0722])          # sRGB -> relative luminance
    L = np.where(Y > (6 / 29) ** 3, 116 * np.cbrt(Y) - 16, Y * (29 / 3) ** 3)
    assert np.ptp(L) < 1.0 and L.mean() == pytest.approx(58.0, abs=0.5)
    h = np.radians(90.0 + np.arange(256) * 360.0 / 256)
    raw = F._lab_to_srgb(np.full(256, 58.0), 33 * np.cos(h), 33 * np.sin(h), clip=False)
    assert raw.min() >= 0.0 and raw.max() <= 1.0
    assert np.allclose(cmap(0.0), cmap(1.0 - 1e-9), atol=0.03)    # the ends meet
    r, g, b = cmap(0.0)[:3]
    assert r > b and g > b              # 0 deg: yellowish
    r, g, b = cmap(0.5)[:3]
    assert b > r and b > g              # 180 deg: blue


def test_markers_follow_the_column_spacing_on_screen():
    """A 5 nm frame in 5 inches: 72 pt/nm, 0.2 nm spacing -> 0.45 x 14.4 = 6.5 pt; the same
    spacing in a 20 nm frame is 4x smaller (clamped at 0.8 pt)."""
    assert F.marker_size_pt(0.2, 5.0, 5.0) == pytest.approx(6.48)
    assert F.marker_size_pt(0.2, 20.0, 5.0) == pytest.approx(1.62)
    assert F.marker_size_pt(0.2, 500.0, 5.0) == 0.8
