"""`livequant proposals | accept | reject` against a running daemon, and without one."""

import json

import pytest

from livequant.cli import main
from sim_instrument import ScanEngine, Specimen
from sim_instrument.engine import DriftModel as SimDrift
from tests.daemon._helpers import running_daemon, wait_for
from tests.daemon.test_decisions import _daemon
from tests.daemon._loop import write_sim


def _json(capsys) -> dict:
    return json.loads(capsys.readouterr().out)


def test_operator_commands_round_trip(tmp_path, capsys):
    """1. A frame with two flags far apart gives two proposals.
    2. `proposals --json` lists them; the human form shows ids and the caution.
    3. `accept` and `reject --why` work; an unknown id and a second decision exit 2.
    4. With the daemon stopped, `proposals` reads the ledger and `accept` exits 2."""
    eng = ScanEngine(Specimen.from_scenario("demo"), seed=1, drift=SimDrift.none())
    acq = eng.acquire((0, 20), 20.0, (256, 256))
    d, watch = _daemon(tmp_path)
    session = str(tmp_path / "session")
    with running_daemon(d):
        write_sim(watch, acq, test_flags=[{"x_px": 40, "y_px": 40, "score": 0.9},
                                          {"x_px": 200, "y_px": 210, "score": 0.6}])
        wait_for(lambda: len(list(d.ledger.proposals())) == 2, timeout_s=60, what="proposals")
        assert main(["proposals", "--session", session, "--json"]) == 0
        out = _json(capsys)
        assert out["source"] == "daemon" and len(out["proposals"]) == 2
        first, second = (p["id"] for p in out["proposals"])
        assert main(["proposals", "--session", session]) == 0
        err = capsys.readouterr().err
        assert first in err and "dose budget" in err
        assert main(["accept", first, "--session", session]) == 0
        err = capsys.readouterr().err
        assert "accepted" in err and "scan-request" in err and "interlocks" in err
        assert main(["reject", second, "--why", "too close to the edge", "--session", session,
                     "--json"]) == 0
        assert _json(capsys)["state"] == "rejected"
        assert main(["accept", "p0999", "--session", session]) == 2
        assert "no proposal with id 'p0999'" in capsys.readouterr().err
        assert main(["reject", first, "--session", session]) == 2
        assert "already accepted" in capsys.readouterr().err
        assert main(["proposals", "--session", session, "--state", "open", "--json"]) == 0
        assert _json(capsys)["proposals"] == []
    assert main(["proposals", "--session", session, "--json"]) == 0
    out = _json(capsys)
    assert out["source"] == "ledger"
    assert {p["id"]: p["state"] for p in out["proposals"]} == {first: "accepted",
                                                               second: "rejected"}
    assert main(["accept", first, "--session", session]) == 2
    assert "no daemon is running" in capsys.readouterr().err


def test_proposals_of_a_folder_that_is_no_session(tmp_path, capsys):
    assert main(["proposals", "--session", str(tmp_path / "nothing")]) == 2
    assert "no ledger" in capsys.readouterr().err


def test_bad_state_is_a_usage_error(tmp_path):
    with pytest.raises(SystemExit) as exc:
        main(["proposals", "--state", "maybe", "--session", str(tmp_path)])
    assert exc.value.code == 2
