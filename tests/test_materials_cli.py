"""Materials on the command line: unknown names, the user's own table, the missing-material note."""

import json

import numpy as np
import pytest

from livequant.cli import main
from livequant.config import ConfigError, get_material, load_materials, load_settings
from livequant.frames import write_frame
from livequant.synthetic import perovskite_frame

MY_TABLE = """
[MyFilm]
a_pm = 395.0
c_pm = 405.0
z_a = 82
z_b = 22
born_b = 6.71
p_sign_b_vs_a = -1
source = "invented for this test"
"""


@pytest.fixture
def frame_path(tmp_path):
    f = perovskite_frame((256, 256), pixel_size_pm=9.37, seed=11)
    return write_frame(tmp_path / "in", "f", f.pixels.astype(np.uint16), {"pixel_size_pm": 9.37})


def test_unknown_material_is_a_clear_error_not_a_traceback(frame_path, capsys):
    assert main(["analyze", str(frame_path), "--material", "PTO"]) == 2
    err = capsys.readouterr().err
    assert "unknown material `PTO`" in err and "PbTiO3" in err and "SrTiO3" in err
    assert "--materials FILE" in err and "source" in err
    assert "Traceback" not in err and "site-packages" not in err and "edit" not in err
    assert main(["run", "--watch", str(frame_path.parent), "--material", "PTO",
                 "--session", str(frame_path.parent.parent / "s")]) == 2
    assert "unknown material `PTO`" in capsys.readouterr().err


def test_a_users_material_file_is_used_and_validated(tmp_path, frame_path, capsys):
    table = tmp_path / "mine.toml"
    table.write_text(MY_TABLE)
    mats = load_materials(user_file=table)
    assert mats["MyFilm"].a_pm == 395.0 and mats["MyFilm"].status == "user file"
    assert "SrTiO3" in mats  # the shipped table is still there
    out = tmp_path / "out"
    assert main(["analyze", str(frame_path), "--material", "MyFilm", "--materials", str(table),
                 "--out", str(out)]) == 0
    summary = json.loads((out / "f" / "summary.json").read_text())
    assert summary["cells"]["material"] == "MyFilm"
    assert summary["cells"]["polarization"]["computed"] is True
    # the same through the configuration key
    s = load_settings(overrides={"analysis.materials_file": str(table),
                                 "analysis.material": "MyFilm"}, environ={})
    assert get_material("MyFilm", user_file=s.analysis.materials_file).c_pm == 405.0
    # `source` is required
    table.write_text(MY_TABLE.replace('source = "invented for this test"\n', ""))
    with pytest.raises(ConfigError, match="material `MyFilm`: `source` is required"):
        load_materials(user_file=table)
    table.write_text(MY_TABLE.replace("a_pm = 395.0", "a_pm = -1"))
    with pytest.raises(ConfigError, match="`a_pm` = -1"):
        load_materials(user_file=table)
    assert main(["analyze", str(frame_path), "--material", "MyFilm", "--materials",
                 str(tmp_path / "nope.toml")]) == 2
    assert "materials file" in capsys.readouterr().err


def test_missing_material_is_said_once(tmp_path, frame_path, capsys):
    second = write_frame(tmp_path / "in", "g", np.asarray(
        perovskite_frame((256, 256), pixel_size_pm=9.37, seed=12).pixels, np.uint16),
        {"pixel_size_pm": 9.37})
    assert main(["analyze", str(frame_path), str(second)]) == 0
    err = capsys.readouterr().err
    assert err.count("no material given") == 1 and "pol_*" in err
    assert main(["analyze", str(frame_path), "--material", "SrTiO3"]) == 0
    assert "no material given" not in capsys.readouterr().err
