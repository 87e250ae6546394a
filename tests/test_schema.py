"""The output schema covers every field written, and docs/outputs.md is generated from it."""

import json
from pathlib import Path

import numpy as np
import pytest

from livequant import schema as S
from livequant.analysis.cells import RENAMED, VALUE_FIELDS
from livequant.analysis.walls import UNIT_KEYS, WallFit
from livequant.cli import main
from livequant.frames import write_frame
from livequant.outputs import COLUMN_EXTRA_FIELDS, COLUMN_FIELDS
from livequant.synthetic import perovskite_frame

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def outputs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("schema")
    f = perovskite_frame((256, 256), pixel_size_pm=9.37, seed=3)
    p = write_frame(tmp / "in", "f1", f.pixels.astype(np.uint16), {"pixel_size_pm": 9.37})
    assert main(["analyze", str(p), "--out", str(tmp / "out"), "--material", "PbTiO3",
                 "--reference-material", "SrTiO3"]) == 0
    return tmp / "out" / "f1"


def _covered(key: str, documented: list[str]) -> bool:
    return key in documented or any(d.endswith(".*") and (key.startswith(d[:-1]) or
                                                           key == d[:-2]) for d in documented)


def _flatten(d: dict, prefix=""):
    for k, v in d.items():
        key = f"{prefix}{k}"
        if isinstance(v, dict) and v and not _covered(key + ".x", S.field_names("summary.json")):
            yield from _flatten(v, key + ".")
        else:
            yield key


def test_every_csv_column_written_has_an_entry(outputs):
    for name in ("columns.csv", "cells.csv"):
        header = (outputs / name).read_text().splitlines()[0].split(",")
        assert header, name
        missing = [h for h in header if h not in S.field_names(name)]
        assert not missing, f"{name}: no schema entry for {missing}"
        assert len(set(S.field_names(name))) == len(S.field_names(name)), f"{name}: a twin entry"
    assert S.field_names("columns.csv") == list(COLUMN_FIELDS + COLUMN_EXTRA_FIELDS)
    assert S.field_names("cells.csv") == ["i", "j", "x_pm", "y_pm", *VALUE_FIELDS]
    for entry in S.schema()["files"].values():
        assert all(r["unit"] and len(r["definition"]) > 10 for r in entry)


def test_every_summary_key_written_has_an_entry(outputs):
    summary = json.loads((outputs / "summary.json").read_text())
    documented = S.field_names("summary.json")
    missing = [k for k in _flatten(summary) if not _covered(k, documented)]
    assert not missing, f"summary.json: no schema entry for {missing}"
    # the wall keys (no wall in this frame): every key of a fit's JSON
    wall = WallFit(x0=1.0, sigma_x0=0.1, width=300.0, sigma_width=9.0, p0=20.0, sigma_p0=1.0,
                   reduced_chi2=1.1, n_points=40, axis_deg=90.0, normal_deg=0.0,
                   sigma_normal_deg=1.0, x_pm=0.0, y_pm=0.0).to_json()
    missing = [k for k in wall if f"cells.wall.{k}" not in documented]
    assert not missing, f"cells.wall: no schema entry for {missing}"


def test_renamed_fields_keep_the_old_names_for_one_release(outputs):
    assert RENAMED == S.RENAMED_CELL_FIELDS
    assert {k: f"{k}_pm" for k in UNIT_KEYS} == S.RENAMED_WALL_KEYS
    cells = (outputs / "cells.csv").read_text().splitlines()
    header = cells[0].split(",")
    rows = np.array([line.split(",") for line in cells[1:]], dtype=object)
    for old, new in RENAMED.items():
        for a, b in ((old, new), ("sigma_" + old, "sigma_" + new)):
            assert list(rows[:, header.index(a)]) == list(rows[:, header.index(b)])
    wall = WallFit(x0=1.0, sigma_x0=0.1, width=300.0, sigma_width=9.0, p0=20.0, sigma_p0=1.0,
                   reduced_chi2=1.1, n_points=40).to_json()
    assert wall["width_pm"] == wall["width"] == 300.0
    assert wall["correlation_length_pm"] == pytest.approx(300.0 / np.sqrt(2))  # w = sqrt(2) xi
    deprecated = {r["name"] for rows_ in S.schema()["files"].values() for r in rows_
                  if "deprecated" in r}
    assert {"c_over_a", "sigma_ratio_b_a", "cells.wall.width"} <= deprecated
    todo = (ROOT / "TODO.md").read_text()
    assert all(name in todo for name in ("c_over_a", "ratio_b_a", "correlation_length"))


def test_schema_json_is_written_beside_the_csvs(outputs):
    assert json.loads((outputs / "schema.json").read_text()) == S.schema()


def test_docs_page_is_generated_from_the_schema():
    page = (ROOT / "docs" / "outputs.md").read_text()
    assert page == S.markdown(), \
        "docs/outputs.md is stale: python -m livequant.schema --markdown > docs/outputs.md"
