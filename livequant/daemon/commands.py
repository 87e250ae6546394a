"""The command socket (REP) and its client.

Requests are JSON objects ``{"cmd": NAME, ...}``; every request gets exactly
one JSON reply: ``{"ok": true, ...}`` or ``{"ok": false, "error": "..."}``.
Malformed JSON, an unknown command or a handler that raises all get an error
reply; the server thread never dies of a request.

Every request is validated before its handler runs: against the command's
pydantic model when it has one (the built-in commands take no arguments, so
any other key is an error), and always against general limits (string keys,
at most :data:`MAX_REQUEST_KEYS` keys, nesting at most :data:`MAX_DEPTH`).
A request larger than :data:`MAX_REQUEST_BYTES` never reaches memory: the
socket's ``MAXMSGSIZE`` drops the connection on the announced size.

The server thread alone owns the REP socket.  Handlers run on that thread, so
they must be thread-safe (the daemon's handlers only read an immutable status
snapshot or set events).
"""

from __future__ import annotations

import json
import logging
from typing import Callable, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from livequant.daemon._socket_thread import SocketThread
from livequant.daemon.client import CommandError, send_command  # re-exported: the client side

__all__ = ["CommandServer", "send_command", "CommandError", "NoArguments", "BUILTIN_SCHEMAS",
           "DECISION_SCHEMAS",
           "MAX_REQUEST_BYTES"]

log = logging.getLogger(__name__)

MAX_REQUEST_BYTES = 64 * 1024
MAX_REQUEST_KEYS = 32
MAX_DEPTH = 8
MAX_CMD_CHARS = 64


class NoArguments(BaseModel):
    """A command that takes nothing but its name."""

    model_config = ConfigDict(extra="forbid", strict=True)

    cmd: str


class ProposalsRequest(BaseModel):
    """``{"cmd": "proposals", "state": "open"}``: list proposals, optionally of one state."""

    model_config = ConfigDict(extra="forbid", strict=True)

    cmd: str
    state: Literal["open", "accepted", "rejected", "expired"] | None = None


class AcceptRequest(BaseModel):
    """``{"cmd": "accept", "id": "p0001", "note": "..."}``."""

    model_config = ConfigDict(extra="forbid", strict=True)

    cmd: str
    id: str = Field(min_length=1, max_length=64)
    note: str | None = Field(default=None, max_length=2000)


class RejectRequest(BaseModel):
    """``{"cmd": "reject", "id": "p0001", "why": "..."}``."""

    model_config = ConfigDict(extra="forbid", strict=True)

    cmd: str
    id: str = Field(min_length=1, max_length=64)
    why: str | None = Field(default=None, max_length=2000)


#: Request models of the decision loop's commands.
DECISION_SCHEMAS: dict[str, type[BaseModel]] = {
    "proposals": ProposalsRequest, "accept": AcceptRequest, "reject": RejectRequest}

#: Request models of the built-in commands (the daemon's own handlers).
BUILTIN_SCHEMAS: dict[str, type[BaseModel]] = {
    name: NoArguments for name in ("status", "pause", "resume", "shutdown")}


def _depth(value, limit: int) -> int:
    """Nesting depth of a decoded JSON value, stopping once past `limit`."""
    if limit < 0:
        return 1
    if isinstance(value, dict):
        return 1 + max((_depth(v, limit - 1) for v in value.values()), default=0)
    if isinstance(value, list):
        return 1 + max((_depth(v, limit - 1) for v in value), default=0)
    return 0


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
    schemas : dict, optional
        Command name -> pydantic model the request must satisfy before its
        handler runs (merged over :data:`BUILTIN_SCHEMAS`).  The handler gets the
        request as sent (a dict), once it has passed.
    curve : CurveServerKeys, optional
        Serve over ZeroMQ CURVE (see ``livequant.daemon.security``).
    """

    thread_name = "commands"
    label = "command socket"

    def __init__(self, context, endpoint: str, handlers: dict[str, Callable[[dict], dict]], *,
                 schemas: dict[str, type[BaseModel]] | None = None, curve=None):
        self.context = context
        self._init_thread(endpoint)
        self.handlers = dict(handlers)
        self.schemas = {**BUILTIN_SCHEMAS, **(schemas or {})}
        self.curve = curve
        self.n_requests = 0
        self.n_errors = 0

    def _invalid(self, request) -> str | None:
        """Why `request` (decoded JSON) is not a valid command, or None."""
        if not isinstance(request, dict) or not isinstance(request.get("cmd"), str):
            return ("request must be a JSON object with a string `cmd`, one of "
                    f"{sorted(self.handlers)}")
        if len(request) > MAX_REQUEST_KEYS:
            return f"request has {len(request)} keys; at most {MAX_REQUEST_KEYS} are accepted"
        if _depth(request, MAX_DEPTH) > MAX_DEPTH:
            return f"request is nested deeper than {MAX_DEPTH} levels"
        cmd = request["cmd"]
        if len(cmd) > MAX_CMD_CHARS or cmd not in self.handlers:
            return (f"unknown command {cmd[:MAX_CMD_CHARS]!r}; known: "
                    f"{', '.join(sorted(self.handlers))}")
        model = self.schemas.get(cmd)
        if model is not None:
            try:
                model.model_validate(request)
            except ValidationError as exc:
                problems = "; ".join(
                    f"`{'.'.join(str(p) for p in e['loc'])}`: {e['msg']}" for e in exc.errors())
                return f"{cmd}: invalid request: {problems}"
        return None

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
        except RecursionError:
            return {"ok": False, "error": f"request is nested deeper than {MAX_DEPTH} levels"}
        problem = self._invalid(request)
        if problem is not None:
            return {"ok": False, "error": problem}
        cmd = request["cmd"]
        handler = self.handlers[cmd]
        try:
            reply = handler(request)
            if reply is not None and not isinstance(reply, dict):
                raise TypeError(f"handler returned {type(reply).__name__}, not a dict")
        except (ValueError, KeyError) as exc:
            return {"ok": False, "error": f"{cmd}: {exc}"}
        except Exception as exc:  # noqa: BLE001 - logged with traceback, reported to the client
            log.exception("command %r failed", cmd)
            return {"ok": False, "error": f"{cmd}: internal error: {type(exc).__name__}: {exc}"}
        return {"ok": True, **(reply or {})}

    def reply_bytes(self, raw: bytes) -> bytes:
        """:meth:`answer` encoded for the socket; never raises."""
        try:
            reply = self.answer(raw)
            text = json.dumps(reply, default=str)
        except Exception as exc:  # noqa: BLE001 - a reply that cannot be encoded is a bug; logged
            log.exception("command reply could not be encoded")
            reply = {"ok": False, "error": f"internal error encoding the reply: "
                                           f"{type(exc).__name__}"}
            text = json.dumps(reply)
        if not reply.get("ok"):
            self.n_errors += 1
        return text.encode("utf-8")

    def _make_socket(self, zmq):
        from livequant.daemon.security import apply_curve_server

        sock = self.context.socket(zmq.REP)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.MAXMSGSIZE, MAX_REQUEST_BYTES)
        apply_curve_server(sock, self.curve)
        sock.setsockopt(zmq.SNDTIMEO, 2000)
        return sock

    def _on_readable(self, sock) -> None:
        import zmq

        parts = sock.recv_multipart()
        self.n_requests += 1
        reply = self.reply_bytes(parts[0] if len(parts) == 1 else b"<multipart>")
        try:
            sock.send(reply)
        except zmq.Again:
            log.warning("command reply could not be sent (client gone)")
