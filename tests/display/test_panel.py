"""The live panel: uses the terminal's width, shows each proposal's scan and dose,
and asks before an accept with the caution on screen."""

import io
from dataclasses import replace

import pytest
from rich.console import Console

from livequant.display.keys import PanelState
from livequant.display.status import proposals_table, render_status
from livequant.scan_dose import dose_e_per_A2, format_dose
from tests.daemon.test_display import _decision_snapshot

REASON = "vortex core (winding +1 on a loop of 3 cells) seen in two frames"


def _snapshot(beam_current_pa=20.0):
    snap = _decision_snapshot()
    props = tuple({**p, "rotation_deg": 90.0 if k % 2 else 0.0, "pixel_size_pm": 10.0,
                   "dwell_time_us": 4.0, "reason": REASON} for k, p in enumerate(snap.proposals))
    return replace(snap, proposals=props,
                   decisions={**snap.decisions, "beam_current_pa": beam_current_pa})


def _lines(renderable, width) -> list[str]:
    console = Console(file=io.StringIO(), width=width, color_system=None)
    console.print(renderable)
    return console.file.getvalue().rstrip("\n").split("\n")


def test_dose_is_current_times_dwell_over_charge_times_pixel_area():
    # 20 pA x 4 us = 8e-17 C = 499.3 electrons (e = 1.602176634e-19 C, exact in the 2019 SI)
    # on a (10 pm)^2 = 0.01 A^2 pixel: 4.993e4 e/A^2 (definition of areal dose, common practice)
    assert dose_e_per_A2(20.0, 4.0, 10.0) == pytest.approx(8e-17 / 1.602176634e-19 / 0.01)
    # halving the pixel size quadruples the dose; doubling the dwell doubles it
    assert dose_e_per_A2(20.0, 4.0, 5.0) == pytest.approx(4 * dose_e_per_A2(20.0, 4.0, 10.0))
    assert dose_e_per_A2(20.0, 8.0, 10.0) == pytest.approx(2 * dose_e_per_A2(20.0, 4.0, 10.0))
    for bad in ((None, 4.0, 10.0), (20.0, 0.0, 10.0), (20.0, 4.0, float("nan")), ("x", 1, 1)):
        assert dose_e_per_A2(*bad) is None
    assert format_dose(None) == "n/a" and format_dose(812.3) == "812"
    assert format_dose(49930.0) == "5.0e4" and format_dose(99990.0) == "1.0e5"


@pytest.mark.parametrize("width", [80, 100, 140])
def test_panel_uses_the_width_there_is_and_never_exceeds_it(width):
    lines = _lines(render_status(_snapshot(), width=width), width)
    assert max(len(line) for line in lines) <= width
    assert max(len(line) for line in lines) >= width - 2   # the panel spans the terminal
    text = "\n".join(lines)
    row = next(line for line in lines if "p0001" in line)
    for expected in ("0.80", "90°", "5.0e4", "-97.2, 66.5"):  # score, rotation, dose, centre
        assert expected in row, (width, expected)
    assert "dose" in text and "e/Å²" in text and "dwell" in text and "rot" in text
    # the reason gets what is left: cut at 80, whole from about 120 columns
    assert (REASON in row) == (width >= 120)
    assert "vortex core (winding" in row


def test_dose_without_a_known_current_reads_n_a():
    lines = _lines(render_status(_snapshot(beam_current_pa=None), width=100), 100)
    row = next(line for line in lines if "p0001" in line)
    assert " n/a " in row and "e4" not in row
    # a proposal's own current wins over the configured one
    rows = [{"id": "p1", "state": "open", "score": 0.5, "pixel_size_pm": 10.0,
             "dwell_time_us": 4.0, "beam_current_pa": 40.0, "reason": "r"}]
    text = "\n".join(_lines(proposals_table(rows, width=100, beam_current_pa=20.0), 100))
    assert "1.0e5" in text


def test_piped_table_has_no_width_limit_and_cuts_no_word():
    rows = [{"id": "p0007", "state": "open", "score": 0.9, "reason": REASON + " " + "x" * 90}]
    lines = _lines(proposals_table(rows, width=None, limit=10), 1000)
    row = next(line for line in lines if "p0007" in line)
    assert (REASON + " " + "x" * 90) in row and "…" not in row


def test_accept_key_shows_the_proposal_dose_and_caution_before_anything_is_sent():
    ui = PanelState(selected="p0001", pending=("accept", "p0001"))
    lines = _lines(render_status(_snapshot(), width=80, ui=ui), 80)
    assert max(len(line) for line in lines) <= 80
    text = " ".join(" ".join(lines).split())
    for expected in ("accept p0001?", "rotation 90°", "dwell 4 µs", "dose 5.0e4 e/Å²",
                     "caution:", "dose budget", "interlocks", "press y to accept p0001"):
        assert expected in text, expected
    # the question comes before the table so a 24-line terminal never crops it
    first = next(k for k, line in enumerate(lines) if "accept p0001?" in line)
    assert first < 24
    assert first < next(k for k, line in enumerate(lines) if "p0000" in line)


def test_keys_are_listed_and_the_choice_is_marked():
    lines = _lines(render_status(_snapshot(), width=100, ui=PanelState(selected="p0002")), 100)
    text = "\n".join(lines)
    assert "a accept" in text and "r reject" in text and "j/k" in text
    assert next(line for line in lines if "p0002" in line).startswith("› p0002")
    # without keys (no terminal) there is no key line and no marker
    plain = "\n".join(_lines(render_status(_snapshot(), width=100), 100))
    assert "a accept" not in plain and "›" not in plain
