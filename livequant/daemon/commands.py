"""The command socket (REP) and its client.

Requests are JSON objects ``{"cmd": NAME, ...}``; every request gets exactly
one JSON reply: ``{"ok": true, ...}`` or ``{"ok": false, "error": "..."}``.
Malformed JSON, an unknown command or a handler that raises all get an error
reply; the server thread never dies of a request.

The server thread alone owns the REP socket.  Handlers run on that thread, so
they must be thread-safe (the daemon's handlers only read an immutable status
snapshot or set events).
"""

from __future__ import annotations

import json
import logging
from typing import Callable

from livequant.daemon._socket_thread import SocketThread

__all__ = ["CommandServer", "send_command", "CommandError"]

log = logging.getLogger(__name__)

MAX_REQUEST_BYTES = 64 * 1024


class CommandError(RuntimeError):
    """No reply from the daemon (not running, or not answering in time)."""


class CommandServer(SocketThread):
    """Answer JSON commands on a REP socket.

    Parameters
    ----------
    context : zmq.Context
    endpoint : str
        e.g. ``tcp://127.0.0.1:5603`` (port 0 = any free port).
    handlers : dict
        Command name -> callable taking the request dict and returning a dict
        (merged into ``{"ok": true}``).  A handler raises ``ValueError`` for a
        bad argument; the message becomes the error reply.
    """

    thread_name = "commands"
    label = "command socket"

    def __init__(self, context, endpoint: str, handlers: dict[str, Callable[[dict], dict]]):
        self.context = context
        self._init_thread(endpoint)
        self.handlers = dict(handlers)
        self.n_requests = 0
        self.n_errors = 0

    def answer(self, raw: bytes) -> dict:
        """The reply to one raw request (pure apart from the handlers; tested directly)."""
        if len(raw) > MAX_REQUEST_BYTES:
            return {"ok": False, "error": f"request of {len(raw)} bytes is larger than "
                                          f"{MAX_REQUEST_BYTES}"}
        try:
            request = json.loads(raw.decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            return {"ok": False, "error": f"request is not UTF-8 JSON ({exc}); send "
                                          "{\"cmd\": \"status\"}"}
        if not isinstance(request, dict) or not isinstance(request.get("cmd"), str):
            return {"ok": False, "error": "request must be a JSON object with a string `cmd`, "
                                          f"one of {sorted(self.handlers)}"}
        cmd = request["cmd"]
        handler = self.handlers.get(cmd)
        if handler is None:
            return {"ok": False, "error": f"unknown command {cmd!r}; known: "
                                          f"{', '.join(sorted(self.handlers))}"}
        try:
            reply = handler(request)
        except (ValueError, KeyError) as exc:
            return {"ok": False, "error": f"{cmd}: {exc}"}
        except Exception as exc:  # noqa: BLE001 - logged with traceback, reported to the client
            log.exception("command %r failed", cmd)
            return {"ok": False, "error": f"{cmd}: internal error: {type(exc).__name__}: {exc}"}
        return {"ok": True, **(reply or {})}

    def _run(self) -> None:
        import zmq

        from livequant.daemon.sources import _bind

        try:
            sock = self.context.socket(zmq.REP)
            sock.setsockopt(zmq.LINGER, 0)
            sock.setsockopt(zmq.SNDTIMEO, 2000)
            self.bound_endpoint = _bind(sock, self.endpoint)
        except BaseException as exc:
            self._error = exc
            self._ready.set()
            return
        self._ready.set()
        try:
            while not self._stop.is_set():
                if not sock.poll(200):
                    continue
                parts = sock.recv_multipart()
                self.n_requests += 1
                reply = self.answer(parts[0] if len(parts) == 1 else b"<multipart>")
                if not reply.get("ok"):
                    self.n_errors += 1
                try:
                    sock.send(json.dumps(reply, default=str).encode("utf-8"))
                except zmq.Again:
                    log.warning("command reply could not be sent (client gone)")
        finally:
            sock.close(linger=0)


def send_command(endpoint: str, request: dict, *, timeout_s: float = 3.0,
                 context=None) -> dict:
    """Send one command and return the decoded reply.

    Raises
    ------
    CommandError
        When no reply arrives within `timeout_s` (no daemon there, or it hangs).
    """
    import zmq

    ctx = context or zmq.Context.instance()
    sock = ctx.socket(zmq.REQ)
    sock.setsockopt(zmq.LINGER, 0)
    try:
        sock.connect(endpoint)
        sock.send(json.dumps(request).encode("utf-8"))
        if not sock.poll(int(timeout_s * 1000)):
            raise CommandError(f"no reply from {endpoint} within {timeout_s:g} s")
        return json.loads(sock.recv().decode("utf-8"))
    finally:
        sock.close(linger=0)
