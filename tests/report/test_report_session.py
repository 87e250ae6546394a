"""The session report from a real daemon session on simulated demo frames.

The session (see _session.py): three frames of the simulated demo specimen
(one across a 180-degree wall, one plain domain with a 10-degree scan
rotation, one near the vortex pair), one unreadable frame the daemon
quarantines, and flag / proposal / decision / drift rows added through the
ledger API.  One frame's image file is deleted before the report is made.
Truth for the table checks is the ledger itself, read independently here.
"""

from __future__ import annotations

import json
import re
from pathlib import Path
from urllib.parse import urlparse

import numpy as np
import pytest
from matplotlib.image import imread

from livequant.daemon import Ledger
from livequant.report import build_report
from livequant.report.data import fmt_time

from ._html import read_page, table_dicts
from ._session import make_session

pytestmark = pytest.mark.slow  # a daemon run plus ~20 figures: 15-30 s on a shared machine

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    root = tmp_path_factory.mktemp("report-session")
    session, ids = make_session(root)
    gone = root / "watch" / f"{ids[1]}.tif"
    gone.unlink()  # the image of the plain frame is gone: its maps must still be drawn
    result = build_report(session, max_frames=6)
    html = (session / "report" / "index.html").read_text(encoding="utf-8")
    return {"session": session, "ids": ids, "result": result, "html": html,
            "page": read_page(html), "gone": ids[1]}


def _ledger(session):
    with Ledger(session / "ledger.sqlite", readonly=True) as led:
        return {"counts": led.counts(), "rows": led.rows(), "flags": led.flags(),
                "proposals": list(led.proposals()), "decisions": led.decisions()}


def test_every_figure_exists_and_is_a_valid_png(made):
    out = made["session"] / "report"
    figures = made["result"]["figures"]
    srcs = [v for k, v in made["page"].links if k == "src"]
    assert sorted(srcs) == sorted(figures)
    assert len(figures) >= 5 + 3 * 5   # session figures + at least 5 maps per frame
    for src in srcs:
        path = out / src
        assert path.read_bytes()[:8] == PNG_SIGNATURE, src
        pixels = imread(path)  # decodes the whole file
        assert pixels.ndim == 3 and pixels.shape[0] > 100 and pixels.shape[1] > 100, src
        assert float(np.ptp(pixels[..., :3])) > 0.1, f"{src} is blank"
    # nothing else in figures/: no stale files from earlier runs
    assert sorted(p.name for p in (out / "figures").iterdir()) == \
        sorted(Path(f).name for f in figures + made["result"]["vector_figures"])


def test_every_png_has_its_vector_copy_linked_beside_it(made):
    """SVG beside every PNG (the default), each a parsable SVG document with its text kept
    as text, and linked from the figure's caption."""
    import xml.etree.ElementTree as ET

    out = made["session"] / "report"
    figures, vectors = made["result"]["figures"], made["result"]["vector_figures"]
    assert [Path(v).with_suffix(".png").as_posix() for v in vectors] == figures
    for v in vectors:
        root = ET.parse(out / v).getroot()
        assert root.tag.endswith("svg"), v
        assert any(el.tag.endswith("text") for el in root.iter()), f"{v}: labels are not text"
        assert f'href="{v}"' in made["html"], v


def test_html_refers_only_to_files_that_exist(made):
    out = made["session"] / "report"
    page = made["page"]
    assert page.links, "the page links nothing"
    for attr, value in page.links:
        parsed = urlparse(value)
        assert not parsed.scheme and not parsed.netloc, f"{attr}={value!r} leaves the report"
        if value.startswith("#"):
            assert value[1:] in page.ids, f"{attr}={value!r}: no element with that id"
            continue
        assert not value.startswith("/"), f"{attr}={value!r} is absolute"
        target = (out / value).resolve()
        assert target.is_file(), f"{attr}={value!r} does not exist"
        assert out.resolve() in target.parents
    # self-contained: inline CSS, no scripts, no external stylesheets
    assert "style" in page.tags and "script" not in page.tags and "link" not in page.tags


def test_numbers_in_the_tables_match_the_ledger(made):
    led = _ledger(made["session"])
    page = made["page"]
    counts = {r["quantity"]: r["value"] for r in table_dicts(page, "session-counts")}
    for state, n in led["counts"].items():
        assert counts[f"frames {state}"] == str(n), state
    assert led["counts"]["done"] == 3 and led["counts"]["quarantined"] == 1
    assert counts["frames known"] == str(len(led["rows"]))
    # the daemon's own rules may add flags and proposals beside the three of each made here
    assert counts["flags"] == str(len(led["flags"])) and len(led["flags"]) >= 3
    assert counts["proposals"] == str(len(led["proposals"])) and len(led["proposals"]) >= 3
    assert counts["decisions"] == str(len(led["decisions"])) == "2"
    assert counts["proposals accepted"] == "1" and counts["proposals rejected"] == "1"
    assert counts.get("proposals open", "0") == str(sum(p["state"] == "open"
                                                        for p in led["proposals"]))

    t0 = min(r.complete_at for r in led["rows"])
    flags = table_dicts(page, "flags")
    assert [int(f["id"]) for f in flags] == [f["id"] for f in led["flags"]]
    for row, flag in zip(flags, led["flags"]):
        assert row["frame"] == flag["frame_id"] and row["kind"] == flag["kind"]
        assert row["rule"] == flag["rule"]
        assert row["raised"] == fmt_time(flag["created_at"], t0)

    proposals = {p["id"]: p for p in table_dicts(page, "proposals")}
    assert set(proposals) == {p["id"] for p in led["proposals"]}
    for p in led["proposals"]:
        assert proposals[p["id"]]["state"] == p["state"]
    assert float(proposals["p-1"]["centre x (nm)"]) == pytest.approx(-40.0)
    p1 = next(p for p in led["proposals"] if p["id"] == "p-1")
    assert proposals["p-1"]["dwell (µs)"] == "4"
    assert proposals["p-1"]["flags"] == ", ".join(str(i) for i in p1["payload"]["flag_ids"])

    decisions = table_dicts(page, "decisions")
    assert len(decisions) == len(led["decisions"])
    for row, d in zip(decisions, led["decisions"]):
        assert (int(row["id"]), row["proposal"], row["decision"], row["by"]) == \
            (d["id"], d["proposal_id"], d["decision"], d["decided_by"])
        assert row["decided"] == fmt_time(d["decided_at"], t0)
        assert re.fullmatch(r"\d{4}-\d\d-\d\d \d\d:\d\d:\d\d \(\+\d+\.\d s\)", row["decided"])

    quarantined = table_dicts(page, "quarantined")
    assert len(quarantined) == 1 and quarantined[0]["frame"] in ("", "broken")
    assert quarantined[0]["reason"] == next(r.reason for r in led["rows"]
                                           if r.state == "quarantined")
    # report.json carries the same numbers
    saved = json.loads((made["session"] / "report" / "report.json").read_text())
    assert saved["frames"] == led["counts"]
    assert saved["n_decisions"] == 2 and [d["id"] for d in saved["decisions"]] == [1, 2]


def test_frames_of_interest_flagged_first_and_each_gets_its_maps(made):
    result, ids = made["result"], made["ids"]
    wall_frame, plain_frame, vortex_frame = ids
    # the vortex frame has two flags, the wall frame one, the plain frame none
    assert result["frames_drawn"] == [vortex_frame, wall_frame, plain_frame]
    figures = set(result["figures"])
    for fid in ids:
        for kind in ("columns", "displacement", "polarization", "strain", "winding"):
            assert f"figures/{fid}-{kind}.png" in figures, (fid, kind)
    # the simulated wall (demo scenario, half-width 0.5 nm at x = -40 nm) is fitted
    assert f"figures/{wall_frame}-wall.png" in figures
    summary = json.loads((made["session"] / "frames" / wall_frame / "summary.json").read_text())
    assert summary["cells"]["wall"]["width"] == pytest.approx(500.0, rel=0.25)


def test_a_frame_whose_image_is_gone_still_gets_maps_and_a_note(made):
    gone = made["gone"]
    assert f"figures/{gone}-polarization.png" in made["result"]["figures"]
    section = made["html"].split(f'id="frame-{gone}"')[1].split("</section>")[0]
    assert "is gone; maps are drawn without it" in section


def test_text_from_the_ledger_is_escaped_and_the_caution_is_shown(made):
    html = made["html"]
    assert "<b>not markup</b>" not in html and "&lt;b&gt;not markup&lt;/b&gt;" in html
    assert "plugin<script>" not in html and "plugin&lt;script&gt;" in html
    assert "&lt;fit&gt; &amp; width" in html
    proposals = html.split('id="proposals"')[1].split("</section>")[0]
    assert "dose budgets" in proposals and "interlocks come first" in proposals


def test_cli_report_json_and_out_dir(made, tmp_path, capsys):
    from livequant.cli import main

    out = tmp_path / "elsewhere"
    code = main(["report", str(made["session"]), "--out", str(out), "--frames",
                 made["ids"][0], "no-such-frame", "--json"])
    captured = capsys.readouterr()
    assert code == 0
    result = json.loads(captured.out)
    assert result["frames_drawn"] == [made["ids"][0]]
    assert any("no-such-frame" in n for n in result["notes"])
    assert (out / "index.html").is_file()
    assert all((out / f).is_file() for f in result["figures"])
    assert "report written" in captured.err
