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
        cap = capsys.readouterr()
        # piped: the table on stdout, one whole line per proposal; the caution on stderr
        line = next(t for t in cap.out.splitlines() if t.startswith(first))
        assert "open" in line and "…" not in line and "dose budget" in cap.err
        # 3a. no terminal to ask and no --yes: nothing is accepted, the caution was shown
        assert main(["accept", first, "--session", session]) == 2
        err = capsys.readouterr().err
        assert "--yes" in err and "interlocks" in err and first in err
        assert d.ledger.proposal(first)["state"] == "open"
        assert main(["accept", first, "--yes", "--session", session]) == 0
        err = capsys.readouterr().err
        # the caution comes before the outcome
        assert err.index("interlocks") < err.index(f"proposal {first}: accepted")
        assert "scan-request" in err
        assert main(["reject", second, "--why", "too close to the edge", "--session", session,
                     "--json"]) == 0
        assert _json(capsys)["state"] == "rejected"
        assert main(["accept", "p0999", "--yes", "--session", session]) == 2
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
    assert main(["accept", first, "--yes", "--session", session]) == 2
    assert "no daemon is running" in capsys.readouterr().err


def test_proposals_of_a_folder_that_is_no_session(tmp_path, capsys):
    assert main(["proposals", "--session", str(tmp_path / "nothing")]) == 2
    assert "no ledger" in capsys.readouterr().err


def test_bad_state_is_a_usage_error(tmp_path):
    with pytest.raises(SystemExit) as exc:
        main(["proposals", "--state", "maybe", "--session", str(tmp_path)])
    assert exc.value.code == 2


def test_accept_asks_after_showing_the_proposal_and_caution(monkeypatch, capsys):
    """At a terminal `accept` prints the proposal (rotation, dwell, dose) and the caution,
    then asks; only y sends the decision."""
    import argparse

    import livequant.commands.proposals as P
    from livequant.commands.accept import confirm_accept

    row = {"id": "p0002", "state": "open", "score": 0.8, "center_nm": [1.0, 2.0],
           "size_nm": [6.0, 4.0], "rotation_deg": 90.0, "pixel_size_pm": 10.0,
           "dwell_time_us": 4.0, "reason": "domain wall"}
    monkeypatch.setattr(P, "ask_daemon", lambda *a, **k: {"ok": True, "proposals": [row],
                                                          "beam_current_pa": 20.0})

    class Tty:
        def isatty(self):
            return True

    args = argparse.Namespace(id="p0002", session=".", timeout=1.0, yes=False)
    asked = []

    def ask(prompt):
        asked.append((prompt, capsys.readouterr().err))
        return "y"
    assert confirm_accept(args, ask=ask, stdin=Tty()) is None
    prompt, shown = asked[0]
    assert prompt == "accept p0002? [y/N] "
    assert "90°" in shown and "5.0e4" in shown and "interlocks" in shown
    assert confirm_accept(args, ask=lambda p: "", stdin=Tty()) == 2
    assert "not accepted" in capsys.readouterr().err
    args.id = "p0404"
    assert confirm_accept(args, ask=ask, stdin=Tty()) == 2
    assert "no proposal with id 'p0404'" in capsys.readouterr().err
