"""The command socket: every request gets one reply, bad ones an error, never a crash."""

import json

import pytest
import zmq

from livequant.daemon.commands import CommandError, CommandServer, send_command


def _server(ctx, handlers=None):
    def boom(req):
        raise RuntimeError("bug")

    handlers = handlers or {"status": lambda req: {"state": "running"},
                            "echo": lambda req: {"arg": req["arg"]}, "boom": boom}
    return CommandServer(ctx, "tcp://127.0.0.1:0", handlers)


@pytest.mark.parametrize("raw, error", [
    (b"not json", "not UTF-8 JSON"),
    (b"\xff\xfe", "not UTF-8 JSON"),
    (b"[1, 2]", "JSON object"),
    (b'{"cmd": 3}', "string `cmd`"),
    (b'{"cmd": "fly"}', "unknown command 'fly'"),
    (b'{"cmd": "echo"}', "echo: 'arg'"),
    (b'{"cmd": "boom"}', "internal error: RuntimeError: bug"),
    (b"x" * 70_000, "larger than"),
])
def test_bad_requests_get_an_error_reply(raw, error):
    reply = _server(None).answer(raw)
    assert reply["ok"] is False
    assert error in reply["error"]


def test_round_trip_and_survives_garbage():
    with zmq.Context() as ctx:
        server = _server(ctx)
        endpoint = server.start()
        try:
            assert send_command(endpoint, {"cmd": "status"}, context=ctx) == {
                "ok": True, "state": "running"}
            raw = ctx.socket(zmq.REQ)
            raw.setsockopt(zmq.LINGER, 0)
            raw.connect(endpoint)
            raw.send(b"{{{")
            assert raw.poll(5000)
            assert json.loads(raw.recv())["ok"] is False
            raw.close(linger=0)
            assert server.is_alive()
            assert send_command(endpoint, {"cmd": "echo", "arg": 5}, context=ctx)["arg"] == 5
        finally:
            server.stop()
    assert not server.is_alive()


def test_no_daemon_is_a_timeout_not_a_hang():
    with zmq.Context() as ctx:
        probe = ctx.socket(zmq.REP)
        port = probe.bind_to_random_port("tcp://127.0.0.1")
        probe.close(linger=0)  # nothing listens on `port` any more
        with pytest.raises(CommandError, match="no reply"):
            send_command(f"tcp://127.0.0.1:{port}", {"cmd": "status"}, timeout_s=0.3,
                         context=ctx)


def test_decision_commands_are_validated_before_their_handlers():
    from livequant.daemon.commands import DECISION_SCHEMAS, CommandServer

    seen = []
    server = CommandServer(None, "tcp://127.0.0.1:0",
                           {"accept": lambda req: seen.append(req) or {"done": True},
                            "reject": lambda req: seen.append(req) or {"done": True}},
                           schemas=DECISION_SCHEMAS)
    bad = server.answer(b'{"cmd": "accept", "id": 7}')
    assert bad["ok"] is False and "`id`" in bad["error"]
    assert server.answer(b'{"cmd": "reject", "id": "p1", "why": 3}')["ok"] is False
    assert server.answer(b'{"cmd": "accept", "id": "p1", "extra": 1}')["ok"] is False
    assert seen == []
    assert server.answer(b'{"cmd": "accept", "id": "p1", "note": "ok"}')["ok"] is True
    assert seen == [{"cmd": "accept", "id": "p1", "note": "ok"}]
