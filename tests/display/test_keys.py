"""Keys on the live display: the pure key handler, and the reader on a pseudo-terminal."""

import os
import threading

import pytest

from livequant.display.keys import KeyReader, PanelState, handle_key, parse_keys

PROPS = ({"id": "p1", "state": "open"}, {"id": "p2", "state": "accepted"},
         {"id": "p3", "state": "open"}, {"id": "p4", "state": "open"})


def _press(keys, state=PanelState(), props=PROPS):
    actions = []
    for k in keys:
        state, action = handle_key(state, k, props)
        if action:
            actions.append(action)
    return state, actions


def test_arrows_move_over_open_proposals_only_and_wrap():
    state, _ = _press(["down"])
    assert state.selected == "p3"          # p2 is decided: skipped
    state, _ = _press(["down", "down", "down"])
    assert state.selected == "p1"          # wraps around
    state, _ = _press(["up"])
    assert state.selected == "p4"
    state, _ = _press(["j", "k"])
    assert state.selected == "p1"


def test_accept_needs_a_second_key_and_anything_else_cancels():
    state, actions = _press(["down", "a"])
    assert actions == [] and state.pending == ("accept", "p3")
    state, actions = _press(["y"], state)
    assert actions == [("accept", "p3")] and state.pending is None
    state, actions = _press(["a", "x"])
    assert actions == [] and state.pending is None and "cancelled" in state.message
    state, actions = _press(["r", "escape", "y"])
    assert actions == []
    _, actions = _press(["up", "r", "y"])
    assert actions == [("reject", "p4")]


def test_a_proposal_decided_elsewhere_meanwhile_is_not_sent():
    state, _ = _press(["a"])
    assert state.pending == ("accept", "p1")
    decided = ({"id": "p1", "state": "accepted"},) + PROPS[1:]
    state, actions = _press(["y"], state, decided)
    assert actions == [] and "no longer open" in state.message


def test_no_open_proposal_means_no_action():
    state, actions = _press(["down", "a", "y"], props=({"id": "p2", "state": "rejected"},))
    assert actions == [] and state.selected is None and "no open proposal" in state.message


def test_parse_keys_reads_arrow_sequences_escape_and_letters():
    assert parse_keys(b"\x1b[A\x1b[Bj\x1bOAY\x1b\r") == ["up", "down", "j", "up", "y", "escape",
                                                       "enter"]
    assert parse_keys(b"\xff") == []


@pytest.mark.skipif(not hasattr(os, "openpty"), reason="needs a pseudo-terminal")
def test_key_reader_on_a_pseudo_terminal_reads_keys_and_restores_the_terminal():
    import termios

    master, slave = os.openpty()
    try:
        before = termios.tcgetattr(slave)
        got, done = [], threading.Event()

        def on_key(k):
            got.append(k)
            if len(got) == 3:
                done.set()

        reader = KeyReader(on_key, slave).start()
        try:
            mode = termios.tcgetattr(slave)
            assert not mode[3] & termios.ICANON and not mode[3] & termios.ECHO  # cbreak
            assert mode[3] & termios.ISIG                                       # Ctrl+C works
            os.write(master, b"\x1b[Ba")
            os.write(master, b"y")
            assert done.wait(5.0), got
        finally:
            reader.stop()
        assert got == ["down", "a", "y"]
        assert termios.tcgetattr(slave) == before
    finally:
        os.close(master)
        os.close(slave)


def test_key_reader_refuses_a_file_that_is_no_terminal(tmp_path):
    with open(tmp_path / "f", "w") as f:
        with pytest.raises(OSError, match="not a terminal"):
            KeyReader(lambda k: None, f.fileno()).start()


def test_live_display_carries_out_a_confirmed_key_and_shows_the_outcome():
    """The wrapper: `a` then `y` calls decide once with the chosen proposal; a refusal
    from the daemon (already decided) is shown, not raised."""
    import io

    from rich.console import Console

    from livequant.daemon.status import Snapshot
    from livequant.display.live import LiveDisplay, daemon_decider

    snap = Snapshot(state="running", session="/s", counts={}, proposals=PROPS)
    calls = []

    class Loop:
        def accept(self, pid, note=None):
            calls.append(("accept", pid, note))
            if pid == "p3":
                raise ValueError("proposal p3 is already accepted")
            return {"scan_request": {"fov_nm": 6.0, "scan_rotation_deg": 90.0}}

        def reject(self, pid, why=None):
            calls.append(("reject", pid, why))

    class FakeDaemon:
        decisions = Loop()

    display = LiveDisplay(lambda: snap, console=Console(file=io.StringIO(), width=100),
                          decide=daemon_decider(FakeDaemon()))
    for k in ("a", "y"):
        display.on_key(k)
    assert calls == [("accept", "p1", "accepted at the live display")]
    assert "p1 accepted: scan-request sent" in display.ui.message
    for k in ("down", "a", "y"):
        display.on_key(k)
    assert "already accepted" in display.ui.message
    for k in ("down", "r", "y"):
        display.on_key(k)
    assert calls[-1][:2] == ("reject", "p4") and display.ui.message == "p4 rejected"
    text = Console(file=io.StringIO(), width=100, color_system=None)
    text.print(display.render())
    assert "p4 rejected" in text.file.getvalue()
