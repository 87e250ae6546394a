"""``python -m sim_instrument``: help, a short survey, and clear errors."""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np

from livequant.frames import read_frame
from sim_instrument.__main__ import main

ROOT = Path(__file__).resolve().parents[2]


def test_help_names_the_modes():
    proc = subprocess.run([sys.executable, "-m", "sim_instrument", "--help"], cwd=ROOT,
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0
    for word in ("survey", "replay", "serve", "drift", "ground truth"):
        assert word in proc.stdout


def test_survey_writes_frames_and_truth(tmp_path, capsys):
    out = tmp_path / "frames"
    code = main(["survey", "--out", str(out), "--frames", "2", "--cadence-s", "0",
                 "--shape", "64x96", "--fov-nm", "3", "--rotation-deg", "5", "--dwell-us", "4",
                 "--seed", "3"])
    assert code == 0
    frames = sorted(out.glob("*.tif"))
    assert [f.stem for f in frames] == ["sim_00001", "sim_00002"]
    frame = read_frame(frames[1])
    assert frame.shape == (64, 96)
    assert frame.meta.dwell_time_us == 4.0 and frame.meta.scan_rotation_deg == 5.0
    assert frame.meta.pixel_size_pm == 3000.0 / 96
    # Second frame one field of view to the right of the first (serpentine raster).
    first = read_frame(frames[0])
    assert frame.meta.stage_x_nm - first.meta.stage_x_nm == 3.0
    assert frame.meta.stage_y_nm == first.meta.stage_y_nm
    truth = json.loads((tmp_path / "frames-truth" / "sim_00002.json").read_text())
    assert truth["commanded_center_nm"] == [frame.meta.stage_x_nm, frame.meta.stage_y_nm]
    assert np.isfinite(truth["drift"]["offset_end_nm"]).all()
    assert "2 frame(s) sent" in capsys.readouterr().err


def test_malformed_scenario_exits_2_naming_the_key(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text('name = "x"\nsize_nm = [10.0, 10.0]\nreference_material = "SrTiO3"\n'
                   '[[layers]]\nmaterial = "SrTiO3"\nthickness_nm = 3\n', encoding="utf-8")
    code = main(["survey", "--out", str(tmp_path / "o"), "--scenario", str(bad), "--frames", "1"])
    err = capsys.readouterr().err
    assert code == 2
    assert "`layers.0.thickness_nm` is not a scenario key" in err and str(bad) in err


def test_no_destination_is_a_usage_error(capsys):
    assert main(["survey", "--frames", "1"]) == 2
    assert "--out DIR and/or --zmq" in capsys.readouterr().err


def test_bad_shape_is_a_usage_error(capsys):
    try:
        main(["survey", "--out", "x", "--shape", "big"])
    except SystemExit as exc:
        assert exc.code == 2
    assert "expected N or ROWSxCOLS" in capsys.readouterr().err
