"""``livequant analyze`` end to end: files in, columns.csv and summary.json out, exit codes."""

import json
import subprocess
import sys

import numpy as np
import pytest

from livequant.cli import main
from livequant.frames import write_frame
from livequant.outputs import COLUMN_EXTRA_FIELDS, COLUMN_FIELDS, read_columns_csv
from livequant.synthetic import perovskite_frame


def _run(args, capsys):
    code = main(args)
    out, err = capsys.readouterr()
    return code, out, err


def test_analyze_writes_outputs_and_json(tmp_path, capsys):
    f = perovskite_frame((320, 320), pixel_size_pm=9.37, rotation_deg=15.0, seed=4)
    p = write_frame(tmp_path / "in", "scan-001", f.pixels.astype(np.uint16),
                    {"pixel_size_pm": 9.37, "detector": "HAADF"})
    code, out, err = _run(["analyze", str(p), "--out", str(tmp_path / "out"), "--json"], capsys)
    assert code == 0, err
    doc = json.loads(out)                          # one JSON object on stdout (DESIGN.md)
    fr = doc["frames"][0]
    assert fr["frame_id"] == "scan-001" and fr["status"] == "ok"
    assert fr["n_columns"] > 80   # ~7.7 x 7.7 cells, A and B, minus the border
    # SrTiO3 a = 390.53 pm (CHECK-VALUES section 1)
    assert fr["lattice"]["a_pm"] == pytest.approx(390.5, abs=0.5)
    assert {"lattice", "detect", "refine", "total"} <= set(fr["timings_s"])
    folder = tmp_path / "out" / "scan-001"
    cols = read_columns_csv(folder / "columns.csv")
    assert len(cols["x_px"]) == fr["n_columns"]
    header = (folder / "columns.csv").read_text().splitlines()[0].split(",")
    # DESIGN.md's columns first and unchanged, the fit-quality extras after them
    assert tuple(header) == COLUMN_FIELDS + COLUMN_EXTRA_FIELDS
    # x is the column axis, y the row axis; pm = px * pixel size
    assert np.allclose(cols["x_pm"], cols["x_px"] * 9.37, atol=0.01)
    summary = json.loads((folder / "summary.json").read_text())
    assert summary["n_columns"] == fr["n_columns"]
    assert err  # human text on stderr


def test_analyze_bad_and_no_lattice_exit_2(tmp_path, capsys):
    bad = tmp_path / "broken.tif"
    bad.write_bytes(b"II*\x00garbage")
    noise = write_frame(tmp_path, "noise", np.random.default_rng(0).poisson(50, (256, 256))
                        .astype(np.uint16), {"pixel_size_pm": 10.0})
    code, out, err = _run(["analyze", str(bad), str(noise), "--json"], capsys)
    assert code == 2
    doc = json.loads(out)
    assert [f["status"] for f in doc["frames"]] == ["bad-input", "no-lattice"]
    assert "broken.tif" in err and "no lattice" in err


def test_missing_pixel_size_is_explained(tmp_path, capsys):
    p = write_frame(tmp_path, "nopx", np.zeros((64, 64), np.uint16), None)
    code, _, err = _run(["analyze", str(p)], capsys)
    assert code == 2
    assert "nopx.tif" in err and "pixel_size_pm" in err


def test_usage_errors_exit_2(capsys):
    assert main(["analyze"]) == 2
    with pytest.raises(SystemExit) as exc:
        main(["analyze", "--no-such-flag"])
    assert exc.value.code == 2
    assert main(["analyze", "x.tif", "--set", "nonsense"]) == 2
    assert main(["analyze", "x.tif", "--set", "analysis.refine.max_iterations=0"]) == 2


def test_example_runs_as_console_script(tmp_path):
    """The README's first command path: `python -m livequant analyze --example`."""
    proc = subprocess.run([sys.executable, "-m", "livequant", "analyze", "--example", "--json",
                           "--reference-material", "SrTiO3", "--out", str(tmp_path)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    fr = json.loads(proc.stdout)["frames"][0]
    assert fr["calibration"]["relative_error"] == pytest.approx(0.0, abs=1e-3)
    assert (tmp_path / "example-srtio3" / "summary.json").exists()
