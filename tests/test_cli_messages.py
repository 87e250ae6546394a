"""Pixel size from TIFF tags, the calibration's setting to apply, and message fixes."""

import json

import numpy as np
import pytest
import tifffile

from livequant.cli import main
from livequant.frames import read_frame, tiff_pixel_size_pm
from livequant.synthetic import perovskite_frame

PX = 9.37  # pm


@pytest.fixture(scope="module")
def pixels():
    return perovskite_frame((256, 256), pixel_size_pm=PX, rotation_deg=8.0, seed=4).pixels \
        .astype(np.uint16)


def test_pixel_size_from_tiff_resolution_tags(tmp_path, pixels):
    """TIFF 6.0 XResolution/YResolution are pixels per ResolutionUnit (3 = centimetre);
    ImageJ writes pixels per `unit` of its description with no ResolutionUnit."""
    cm = tmp_path / "cm.tif"
    tifffile.imwrite(cm, pixels, resolution=(1e10 / PX, 1e10 / PX), resolutionunit=3)
    ij = tmp_path / "ij.tif"
    tifffile.imwrite(ij, pixels, imagej=True, resolution=(1000 / PX, 1000 / PX),
                     metadata={"unit": "nm"})
    dpi = tmp_path / "dpi.tif"  # what general image software writes: not a pixel size
    tifffile.imwrite(dpi, pixels, resolution=(72, 72), resolutionunit=2)
    assert tiff_pixel_size_pm(cm)[0] == pytest.approx(PX, rel=1e-6)
    assert tiff_pixel_size_pm(ij)[0] == pytest.approx(PX, rel=1e-6)
    assert tiff_pixel_size_pm(dpi) is None
    f = read_frame(cm)
    assert f.meta.pixel_size_pm == pytest.approx(PX, rel=1e-6)
    assert "TIFF resolution tags" in f.meta.extra["pixel_size_source"]
    # a configured pixel size (set on purpose) wins over the tags, and says so
    g = read_frame(cm, defaults={"pixel_size_pm": 10.0})
    assert g.meta.pixel_size_pm == 10.0 and "configuration" in g.meta.extra["pixel_size_source"]
    with pytest.raises(Exception, match="no pixel size"):
        read_frame(dpi)


def test_analyze_says_where_the_pixel_size_came_from_and_offers_the_correction(
        tmp_path, pixels, capsys):
    cm = tmp_path / "cm.tif"
    wrong = PX * 1.02  # a 2 % calibration error
    tifffile.imwrite(cm, pixels, resolution=(1e10 / wrong, 1e10 / wrong), resolutionunit=3)
    assert main(["analyze", str(cm), "--reference-material", "SrTiO3", "--json"]) == 0
    out, err = capsys.readouterr()
    assert "pixel size 9.5574 pm from TIFF resolution tags" in err
    cal = json.loads(out)["frames"][0]["calibration"]
    # SrTiO3 a = 390.53 pm (CHECK-VALUES section 1): the implied size is the true one
    assert cal["implied_pixel_size_pm"] == pytest.approx(PX, rel=5e-4)
    assert cal["apply"].startswith("--pixel-size-pm 9.3")
    value = float(cal["apply"].split()[1])
    assert main(["analyze", str(cm), "--reference-material", "SrTiO3", "--json",
                 "--pixel-size-pm", str(value)]) == 0
    out, err = capsys.readouterr()
    assert abs(json.loads(out)["frames"][0]["calibration"]["relative_error"]) < 5e-4
    assert "configuration" in err and "± 0.00 " not in err


def test_pixel_size_spelling_is_the_same_on_every_command(tmp_path, capsys):
    for cmd in ("analyze", "run"):
        with pytest.raises(SystemExit):
            main([cmd, "--help"])
        text = capsys.readouterr().out
        assert "--pixel-size-pm PM, --pixel-size PM" in text, cmd
    from livequant.cli import build_parser

    p = build_parser()
    assert p.parse_args(["run", "--pixel-size", "9"]).pixel_size_pm == 9.0
    assert p.parse_args(["run", "--pixel-size-pm", "9"]).pixel_size_pm == 9.0
    assert p.parse_args(["analyze", "x.tif", "--pixel-size", "9"]).pixel_size_pm == 9.0


def test_help_texts_have_no_markup(capsys):
    for cmd in ("analyze", "bench", "demo", "run", "status", "proposals", "accept", "reject",
                "report", "keys"):
        with pytest.raises(SystemExit):
            main([cmd, "--help"])
        text = capsys.readouterr().out
        assert "``" not in text, cmd


def test_daemon_errors_name_the_command_once(monkeypatch, tmp_path, capsys):
    from livequant.commands import proposals as P

    monkeypatch.setattr(P, "ask_daemon", lambda *a, **k: {
        "ok": False, "error": "accept: no proposal with id 'p0999'"})
    assert main(["accept", "p0999", "--session", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "livequant accept: no proposal with id 'p0999'" in err
    assert "accept: accept:" not in err


def test_a_proposal_reason_names_the_kind_once():
    from livequant.proposals.geometry import FrameGeometry
    from livequant.proposals.propose import candidate_from_flag
    from livequant.rules import Flag, Region

    g = FrameGeometry(0.0, 0.0, 0.02, 0.0, (512, 512))
    said = Flag(kind="domain-wall", score=0.8, region=Region(100, 200, 50, 40),
                message="domain wall: P0 20.1 pm reverses", rule="domain_walls", frame_id="f")
    plain = Flag(kind="vortex", score=0.8, region=Region(100, 200, 50, 40),
                 message="winding +1", rule="topology", frame_id="f")
    assert candidate_from_flag(said, g, flag_id=1, t_seen_s=0.0, drift_nm=(0, 0)).reasons == (
        "domain wall: P0 20.1 pm reverses",)
    assert candidate_from_flag(plain, g, flag_id=2, t_seen_s=0.0, drift_nm=(0, 0)).reasons == (
        "vortex: winding +1",)
