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


def test_no_lattice_frame_is_handled_and_bad_input_exits_2(tmp_path, capsys):
    """A frame with no lattice is a result (summary.json with status no-lattice, exit 0);
    only a frame that could not be read makes the batch exit 2 (documented in --help)."""
    noise = write_frame(tmp_path, "noise", np.random.default_rng(0).poisson(50, (256, 256))
                        .astype(np.uint16), {"pixel_size_pm": 10.0})
    good = perovskite_frame((256, 256), pixel_size_pm=9.37, seed=5)
    g = write_frame(tmp_path, "good", good.pixels.astype(np.uint16), {"pixel_size_pm": 9.37})
    out_dir = tmp_path / "out"
    code, out, err = _run(["analyze", str(g), str(noise), "--out", str(out_dir), "--json"],
                          capsys)
    assert code == 0, err
    doc = json.loads(out)
    assert [f["status"] for f in doc["frames"]] == ["ok", "no-lattice"]
    assert doc["n_no_lattice"] == 1 and doc["n_failed"] == 0
    summary = json.loads((out_dir / "noise" / "summary.json").read_text())
    assert summary["status"] == "no-lattice" and summary["n_columns"] == 0
    assert "noise (noise.tif): no-lattice" in err

    bad = tmp_path / "broken.tif"
    bad.write_bytes(b"II*\x00garbage")
    code, out, err = _run(["analyze", str(bad), str(noise), "--json"], capsys)
    assert code == 2
    doc = json.loads(out)
    assert [f["status"] for f in doc["frames"]] == ["bad-input", "no-lattice"]
    assert "broken.tif" in err and "no lattice" in err


def test_exit_codes_are_documented(capsys):
    with pytest.raises(SystemExit):
        main(["analyze", "--help"])
    text = capsys.readouterr().out
    assert "exit codes:" in text and "no-lattice" in text and "internal failure" in text


def test_a_missing_file_is_not_said_to_have_vanished(tmp_path, capsys):
    code, out, err = _run(["analyze", str(tmp_path / "nope.tif"), "--json"], capsys)
    assert code == 2
    assert "nope.tif: no such file" in err and "vanished" not in err
    assert json.loads(out)["frames"][0]["reason"] == "not-found"


def test_a_folder_is_not_said_to_have_vanished(tmp_path, capsys):
    (tmp_path / "frames").mkdir()
    code, out, err = _run(["analyze", str(tmp_path / "frames"), "--json"], capsys)
    assert code == 2
    assert "frames: is a folder, not a frame file" in err and "vanished" not in err
    assert "livequant reprocess" in err                 # says what to do instead
    assert json.loads(out)["frames"][0]["reason"] == "not-a-file"


def test_duplicate_frame_ids_never_overwrite(tmp_path, capsys):
    """Two sidecars giving one frame_id: both results are kept, the second under a new id,
    and the command says so; each result names its input file."""
    f1 = perovskite_frame((256, 256), pixel_size_pm=9.37, seed=6)
    f2 = perovskite_frame((256, 256), pixel_size_pm=9.37, seed=7, rotation_deg=10.0)
    a = write_frame(tmp_path / "in", "a", f1.pixels.astype(np.uint16),
                    {"pixel_size_pm": 9.37, "frame_id": "same"})
    b = write_frame(tmp_path / "in", "b", f2.pixels.astype(np.uint16),
                    {"pixel_size_pm": 9.37, "frame_id": "same"})
    out_dir = tmp_path / "out"
    code, out, err = _run(["analyze", str(a), str(b), "--out", str(out_dir), "--json"], capsys)
    assert code == 0, err
    doc = json.loads(out)
    ids = [f["frame_id"] for f in doc["frames"]]
    assert ids == ["same", "same~2"]
    assert [f["path"] for f in doc["frames"]] == [str(a), str(b)]
    assert doc["frames"][1]["frame_id_in_sidecar"] == "same"
    assert "already used by" in err and "'same~2'" in err
    assert "same (a.tif)" in err and "same~2 (b.tif)" in err
    s1 = json.loads((out_dir / "same" / "summary.json").read_text())
    s2 = json.loads((out_dir / "same~2" / "summary.json").read_text())
    # two different frames: the lattice orientations differ by the 10 degrees given
    assert abs(s1["lattice"]["orientation_deg"] - s2["lattice"]["orientation_deg"]) > 5


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
