"""Sockets: loopback by default, CURVE beyond it, size limits, validated commands.

Every socket in these tests is on 127.0.0.1 (the non-loopback cases are refused
before anything binds).  Behaviour of ZeroMQ relied on, from the libzmq
documentation of zmq_setsockopt: ZMQ_MAXMSGSIZE "limits the size of the inbound
message; if a peer sends a message larger than ZMQ_MAXMSGSIZE it is
disconnected", and a CURVE server answers only clients its ZAP handler admits
(RFC 26/CurveZMQ, RFC 27/ZAP).
"""

import json
import os
import queue
import stat
import subprocess
import sys
import time

import numpy as np
import pytest
import zmq

from livequant.config import Settings
from livequant.daemon import Daemon, SetupError
from livequant.daemon.commands import CommandError, CommandServer, send_command
from livequant.daemon.security import (CurveClientKeys, apply_curve_client, bind_policy,
                                       is_loopback, load_client_keys, make_keys)
from livequant.daemon.sources import SocketSource
from livequant.wire import encode_frame_message

from tests.daemon._helpers import (fast_settings, lattice_image, running_daemon, sidecar,
                                   wait_for)

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def _cfg(**daemon):
    return Settings.model_validate({"daemon": daemon}).daemon


@pytest.mark.parametrize("host, loop", [("127.0.0.1", True), ("127.3.2.1", True),
                                        ("localhost", True), ("::1", True), ("[::1]", True),
                                        ("0.0.0.0", False), ("192.0.2.7", False),
                                        ("*", False), ("eth0", False), ("::", False)])
def test_loopback_addresses(host, loop):
    assert is_loopback(host) is loop


def test_default_binds_loopback_without_curve():
    assert Settings().daemon.host == "127.0.0.1"
    assert bind_policy(Settings().daemon) is None


def test_remote_host_needs_allow_remote_and_keys(tmp_path):
    """192.0.2.0/24 is reserved for documentation (RFC 5737): refused before binding."""
    with pytest.raises(SetupError, match="allow_remote"):
        bind_policy(_cfg(host="192.0.2.7"))
    with pytest.raises(SetupError, match="requires CURVE"):
        bind_policy(_cfg(host="0.0.0.0", allow_remote=True))
    keys = make_keys(tmp_path / "k")
    with pytest.raises(SetupError, match="no secret key"):
        bind_policy(_cfg(host="0.0.0.0", allow_remote=True,
                         curve_server_secret_key=str(keys["server_public"]),
                         curve_authorized_clients=str(keys["authorized_clients"])))
    (tmp_path / "empty").mkdir()
    with pytest.raises(SetupError, match="holds no public key"):
        bind_policy(_cfg(host="0.0.0.0", allow_remote=True,
                         curve_server_secret_key=str(keys["server_secret"]),
                         curve_authorized_clients=str(tmp_path / "empty")))
    ok = bind_policy(_cfg(host="0.0.0.0", allow_remote=True,
                          curve_server_secret_key=str(keys["server_secret"]),
                          curve_authorized_clients=str(keys["authorized_clients"])))
    assert ok is not None and len(ok.public) == 40  # a Z85 CURVE key is 40 characters


def test_daemon_refuses_a_remote_host_at_startup(tmp_path):
    d = Daemon(fast_settings(host="192.0.2.7"), session=tmp_path / "s", watch=None)
    with pytest.raises(SetupError, match="not a loopback address"):
        d.start()
    assert not (tmp_path / "s" / "daemon.json").exists()


def test_keys_command_writes_private_keys_and_refuses_to_overwrite(tmp_path):
    run = lambda *a: subprocess.run([sys.executable, "-m", "livequant", "keys", *a],  # noqa: E731
                                    cwd=REPO, capture_output=True, text=True, timeout=120)
    proc = run(str(tmp_path / "k"), "--json")
    assert proc.returncode == 0, proc.stderr
    paths = json.loads(proc.stdout)
    for role in ("server_secret", "client_secret"):
        assert stat.S_IMODE(os.stat(paths[role]).st_mode) == 0o600
    assert stat.S_IMODE(os.stat(tmp_path / "k").st_mode) == 0o700
    assert os.listdir(paths["authorized_clients"]) == ["client.key"]
    assert "allow_remote = true" in proc.stderr
    before = open(paths["server_secret"]).read()
    again = run(str(tmp_path / "k"))
    assert again.returncode == 2 and "--force" in again.stderr
    assert open(paths["server_secret"]).read() == before
    assert run(str(tmp_path / "k"), "--force").returncode == 0
    assert open(paths["server_secret"]).read() != before


@pytest.fixture
def curve_daemon(tmp_path):
    """A daemon with CURVE on loopback (`daemon.curve = true`), and the keys."""
    keys = make_keys(tmp_path / "keys")
    d = Daemon(fast_settings(curve=True, curve_server_secret_key=str(keys["server_secret"]),
                             curve_authorized_clients=str(keys["authorized_clients"]),
                             frame_defaults={"pixel_size_pm": 20.0}),
               session=tmp_path / "session", watch=None)
    with running_daemon(d):
        yield d, keys


def test_curve_admits_the_authorised_client_only(tmp_path, curve_daemon):
    d, keys = curve_daemon
    assert d.socket_source.max_message_bytes == 2048 * 2**20  # daemon.max_message_mb
    ep = d.endpoints["commands"]
    good = load_client_keys(keys["client_secret"], keys["server_public"])
    info = json.loads((tmp_path / "session" / "daemon.json").read_text())
    assert info["curve_server_public"] == good.server_public.decode()
    assert send_command(ep, {"cmd": "status"}, timeout_s=10, curve=good)["ok"] is True
    # a stranger with a valid key pair of its own, and a client without CURVE: no reply
    pub, sec = zmq.curve_keypair()
    stranger = CurveClientKeys(public=pub, secret=sec, server_public=good.server_public)
    with pytest.raises(CommandError, match="no reply"):
        send_command(ep, {"cmd": "status"}, timeout_s=1.5, curve=stranger)
    with pytest.raises(CommandError, match="no reply"):
        send_command(ep, {"cmd": "status"}, timeout_s=1.5)
    # ingest: the stranger's frame never arrives, the authorised client's does
    ctx = zmq.Context()
    try:
        pushes = []
        for who, fid in ((stranger, "from_stranger"), (good, "from_client")):
            push = ctx.socket(zmq.PUSH)
            push.setsockopt(zmq.LINGER, 0)
            push.setsockopt(zmq.SNDTIMEO, 1000)
            apply_curve_client(push, who)
            push.connect(d.endpoints["ingest"])
            pushes.append(push)
            try:
                push.send_multipart(encode_frame_message(lattice_image(seed=len(pushes)),
                                                         sidecar(fid)))
            except zmq.Again:
                pass  # the handshake was refused: nowhere to send
        wait_for(lambda: d.snapshot.counts.get("done", 0) == 1, what="the client's frame")
        time.sleep(0.5)
        assert sorted(p.name for p in (tmp_path / "session" / "incoming").glob("*.tif")) == [
            "from_client.tif"]
    finally:
        for p in pushes:
            p.close(linger=0)
        ctx.term()
    assert send_command(ep, {"cmd": "status"}, timeout_s=10, curve=good)["ok"] is True


# ---------------------------------------------------------------- size limits


def _source(tmp_path, ctx, **kw):
    q = queue.Queue(maxsize=16)
    rejects = []
    (tmp_path / "incoming").mkdir(exist_ok=True)
    src = SocketSource(ctx, "tcp://127.0.0.1:0", tmp_path / "incoming", q, frame_defaults={},
                       on_reject=lambda r, m: rejects.append(r), **kw)
    return src, q, rejects


def test_oversize_frame_message_is_dropped_unread_and_the_next_one_accepted(tmp_path):
    ctx = zmq.Context()
    src, q, rejects = _source(tmp_path, ctx, max_message_bytes=64 * 1024)
    endpoint = src.start()
    push = ctx.socket(zmq.PUSH)
    push.setsockopt(zmq.LINGER, 0)
    try:
        push.connect(endpoint)
        big = encode_frame_message(lattice_image((512, 512), seed=1), sidecar("big"))
        assert len(big[2]) == 512 * 512 * 2 > 64 * 1024
        push.send_multipart(big)
        time.sleep(1.0)
        assert src.n_received == 0 and q.empty()  # dropped by ZeroMQ: never decoded
        small = encode_frame_message(lattice_image((64, 64), seed=2), sidecar("small"))
        push.send_multipart(small)  # after ZeroMQ reconnects, this one goes through
        cand = q.get(timeout=30)
        assert cand.path.endswith("small.tif") and src.is_alive()
        assert src.n_received == 1 and rejects == []
    finally:
        push.close(linger=0)
        src.stop()
        ctx.term()


def test_default_message_limit_is_the_largest_acceptable_frame(tmp_path):
    from livequant.frames import MAX_FRAME_PIXELS

    src, _, _ = _source(tmp_path, None)
    assert src.max_message_bytes >= MAX_FRAME_PIXELS * 8
    assert Settings().daemon.max_message_mb * 2**20 == MAX_FRAME_PIXELS * 8


def test_oversize_command_is_dropped_and_the_server_answers_the_next():
    with zmq.Context() as ctx:
        server = CommandServer(ctx, "tcp://127.0.0.1:0", {"status": lambda r: {"s": 1}})
        ep = server.start()
        try:
            raw = ctx.socket(zmq.REQ)
            raw.setsockopt(zmq.LINGER, 0)
            raw.connect(ep)
            raw.send(b'{"cmd": "status", "pad": "' + b"x" * 100_000 + b'"}')
            assert not raw.poll(1000)  # disconnected, not answered: nothing was allocated
            raw.close(linger=0)
            assert server.is_alive() and server.n_requests == 0
            assert send_command(ep, {"cmd": "status"}, context=ctx, timeout_s=10)["s"] == 1
        finally:
            server.stop()


@pytest.mark.parametrize("request_, error", [
    ({"cmd": "status", "verbose": True}, "Extra inputs are not permitted"),
    ({"cmd": "pause", "for_s": 10}, "Extra inputs are not permitted"),
    ({"cmd": "status", **{f"k{i}": i for i in range(40)}}, "at most 32"),
    ({"cmd": "x" * 10_000}, "unknown command"),
])
def test_every_command_is_validated_before_its_handler(request_, error):
    called = []
    server = CommandServer(None, "tcp://127.0.0.1:0",
                           {"status": lambda r: called.append(r) or {}, "pause": lambda r: {}})
    reply = server.answer(json.dumps(request_).encode())
    assert reply["ok"] is False and error in reply["error"] and not called
    assert len(reply["error"]) < 500  # an absurd request does not make an absurd reply


def test_deep_nesting_is_an_error_reply_not_a_recursion_crash():
    server = CommandServer(None, "tcp://127.0.0.1:0", {"status": lambda r: {}})
    deep = b'{"cmd": "status", "a": ' + b"[" * 30_000 + b"]" * 30_000 + b"}"
    assert len(deep) < 64 * 1024  # within the size limit: the decoder itself must cope
    reply = server.answer(deep)
    assert reply["ok"] is False and "nested deeper" in reply["error"]
    nested = {"cmd": "status", "a": [[[[[[[[[[1]]]]]]]]]]}
    reply = server.answer(json.dumps(nested).encode())
    assert reply["ok"] is False and "nested deeper" in reply["error"]


def test_command_schemas_for_added_commands():
    from pydantic import BaseModel, ConfigDict, Field

    class Accept(BaseModel):
        model_config = ConfigDict(extra="forbid", strict=True)
        cmd: str
        id: str = Field(min_length=1, max_length=64)

    server = CommandServer(None, "tcp://127.0.0.1:0", {"accept": lambda r: {"id": r["id"]}},
                           schemas={"accept": Accept})
    assert server.answer(b'{"cmd": "accept", "id": "p-1"}') == {"ok": True, "id": "p-1"}
    for bad in (b'{"cmd": "accept"}', b'{"cmd": "accept", "id": 5}',
                b'{"cmd": "accept", "id": ""}', b'{"cmd": "accept", "id": "p", "x": 1}'):
        reply = server.answer(bad)
        assert reply["ok"] is False and "accept: invalid request" in reply["error"], bad


def test_a_handler_returning_nonsense_is_an_error_reply():
    server = CommandServer(None, "tcp://127.0.0.1:0", {"status": lambda r: [1, 2],
                                                       "nan": lambda r: {"v": object()}})
    assert "not a dict" in server.answer(b'{"cmd": "status"}')["error"]
    assert json.loads(server.reply_bytes(b'{"cmd": "nan"}'))["ok"] is True  # default=str


def test_operator_commands_reach_a_curve_daemon_with_their_client_key(tmp_path, curve_daemon,
                                                                      capsys):
    """`livequant status --client-key FILE` talks to a daemon that requires CURVE (the
    server's public key comes from daemon.json); without the key it says why it fell
    back to the ledger."""
    from livequant.cli import main

    d, keys = curve_daemon
    session = str(tmp_path / "session")
    assert main(["status", "--session", session, "--json", "--timeout", "10",
                 "--client-key", str(keys["client_secret"])]) == 0
    assert json.loads(capsys.readouterr().out)["source"] == "daemon"
    assert main(["status", "--session", session, "--json", "--timeout", "1.5"]) == 0
    fallback = json.loads(capsys.readouterr().out)
    assert fallback["source"] == "ledger" and "--client-key" in fallback["note"]
    assert main(["proposals", "--session", session, "--json", "--timeout", "10",
                 "--client-key", str(keys["client_secret"])]) == 0
    assert json.loads(capsys.readouterr().out)["source"] == "daemon"
