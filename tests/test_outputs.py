"""Per-frame output files: columns.csv keeps DESIGN.md's columns first, extras after."""

from __future__ import annotations

import numpy as np
import pytest

from livequant.frames import FrameMeta, frame_from_array
from livequant.outputs import (COLUMN_EXTRA_FIELDS, COLUMN_FIELDS, read_columns_csv,
                               write_frame_outputs)
from livequant.pipeline import analyze_frame
from livequant.synthetic import perovskite_frame

# DESIGN.md, "Per-frame outputs": the contract's columns, in this order
DESIGN_COLUMNS = ("x_px", "y_px", "x_pm", "y_pm", "sigma_x_pm", "sigma_y_pm", "amplitude",
                  "width_pm", "sublattice", "i", "j")


@pytest.fixture(scope="module")
def result():
    syn = perovskite_frame((256, 256), pixel_size_pm=10.0, background=20.0, seed=3)
    frame = frame_from_array(syn.pixels, FrameMeta(frame_id="out-1", pixel_size_pm=10.0))
    res = analyze_frame(frame)
    assert res.ok and len(res.columns) > 20
    return res, syn


def test_columns_csv_design_fields_first_then_fit_quality(result, tmp_path):
    res, syn = result
    folder = write_frame_outputs(res, tmp_path)
    header = (folder / "columns.csv").read_text().splitlines()[0].split(",")
    assert tuple(header[:len(DESIGN_COLUMNS)]) == DESIGN_COLUMNS == COLUMN_FIELDS
    assert tuple(header[len(DESIGN_COLUMNS):]) == COLUMN_EXTRA_FIELDS == (
        "background", "reduced_chi2", "significance")
    cols = read_columns_csv(folder / "columns.csv")
    # the extras are the fit's own values, to the printed precision
    assert cols["background"] == pytest.approx(np.asarray(res.columns.background), rel=1e-5)
    assert cols["reduced_chi2"] == pytest.approx(np.asarray(res.columns.reduced_chi2), rel=1e-5)
    ok_sig = np.isfinite(np.asarray(res.columns.sigma_amplitude))
    assert cols["significance"][ok_sig] == pytest.approx(
        np.abs(res.columns.amplitude[ok_sig]) / res.columns.sigma_amplitude[ok_sig], rel=1e-3)
    # truth: the synthetic frame's constant background is 20 counts per pixel
    ok = np.asarray(res.columns.converged)
    assert np.median(cols["background"][ok]) == pytest.approx(syn.background, abs=3.0)
    # Poisson noise on the exact model: reduced chi-square near 1 (common practice)
    assert np.median(cols["reduced_chi2"][ok]) == pytest.approx(1.0, abs=0.25)


def test_old_columns_csv_without_extras_reads_as_nan(result, tmp_path):
    res, _ = result
    folder = write_frame_outputs(res, tmp_path)
    lines = (folder / "columns.csv").read_text().splitlines()
    n = len(DESIGN_COLUMNS)
    old = tmp_path / "old.csv"
    old.write_text("\n".join(",".join(line.split(",")[:n]) for line in lines) + "\n")
    cols = read_columns_csv(old)
    assert len(cols["x_px"]) == len(res.columns)
    assert np.isnan(cols["background"]).all() and np.isnan(cols["reduced_chi2"]).all()


def test_columns_csv_missing_a_design_field_is_a_clear_error(tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("x_px,y_px\n1,2\n")
    with pytest.raises(ValueError, match="lacks the column.*x_pm"):
        read_columns_csv(bad)
