"""The notebook API: livequant.analyze and livequant.open_session."""

from __future__ import annotations

import doctest
import runpy
import sys
from pathlib import Path

import numpy as np
import pytest

import livequant
from livequant.cli import main
from livequant.frames import FrameError, write_frame
from livequant.synthetic import perovskite_frame

ROOT = Path(__file__).resolve().parents[1]
A_SRTIO3_PM = 390.53  # CHECK-VALUES section 1


def _example():
    return perovskite_frame(shape=(256, 256), a_pm=A_SRTIO3_PM, pixel_size_pm=9.37,
                            rotation_deg=12.0, sigma_pm=42.0, peak_a=300.0, peak_b=120.0,
                            background=30.0, seed=7)


def test_analyze_tables_against_truth_and_the_command_files(tmp_path):
    ex = _example()
    res = livequant.analyze(ex.pixels, pixel_size_pm=9.37, detector="HAADF",
                            material="SrTiO3", frame_id="nb", as_pandas=False)
    assert res.ok
    assert res.lattice["a_pm"] == pytest.approx(A_SRTIO3_PM, abs=3 * res.lattice["sigma_a_pm"]
                                                + 0.5)
    cols, cells = res.columns, res.cells
    assert isinstance(cols, np.recarray) and isinstance(cells, np.recarray)
    assert set(cols.dtype.names) >= {"x_pm", "sigma_x_pm", "sublattice", "i", "j"}
    assert set(np.unique(cols.sublattice)) == {"A", "B"}
    assert "dx_pm" in cells.dtype.names and "sigma_dx_pm" in cells.dtype.names
    # full-precision tables equal the rounded per-frame files the command writes
    image = write_frame(tmp_path / "in", "nb", ex.pixels.astype(np.float32),
                        {"frame_id": "nb", "pixel_size_pm": 9.37, "detector": "HAADF"})
    assert main(["analyze", str(image), "--out", str(tmp_path / "cli"),
                 "--material", "SrTiO3"]) == 0
    from livequant.outputs import read_columns_csv

    ref = read_columns_csv(tmp_path / "cli" / "nb" / "columns.csv")
    np.testing.assert_allclose(cols.x_pm, ref["x_pm"], atol=6e-4)  # written with %.3f
    np.testing.assert_array_equal(cols.sublattice, ref["sublattice"])
    assert res.write(tmp_path / "api").joinpath("columns.csv").read_bytes() == \
        (tmp_path / "cli" / "nb" / "columns.csv").read_bytes()


def test_analyze_bad_input_is_a_frame_error():
    with pytest.raises(FrameError) as exc:
        livequant.analyze(np.ones((4, 4)), pixel_size_pm=10.0)
    assert exc.value.reason == "too-small"
    with pytest.raises(FrameError) as exc:
        livequant.analyze(_example().pixels)
    assert exc.value.reason == "no-pixel-size"


def test_analyze_docstring_example_and_example_script(capsys, monkeypatch):
    import livequant.api

    finder = doctest.DocTestFinder()
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS)
    for t in finder.find(livequant.api.analyze, "analyze", globs={}):
        runner.run(t)
    assert runner.summarize(verbose=False).failed == 0
    monkeypatch.setattr(sys, "argv", ["notebook_api.py"])
    runpy.run_path(str(ROOT / "examples" / "notebook_api.py"), run_name="__main__")
    out = capsys.readouterr().out
    assert "SrTiO3: 390.53 pm" in out and "unit cells" in out


def test_import_livequant_stays_light():
    """The API is loaded on first use: importing livequant does not import the analysis."""
    import subprocess

    code = ("import sys, livequant; print(all(m not in sys.modules for m in "
            "('livequant.api', 'livequant.pipeline', 'numba', 'distributed', 'pyarrow')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         cwd=ROOT, check=True).stdout
    assert out.strip() == "True"
