"""The client side of the command socket: one request, one reply.

Kept apart from :mod:`livequant.daemon.commands` (the server and its pydantic
schemas) so that ``livequant status``, ``proposals``, ``accept`` and
``reject`` start in a fraction of a second.
"""

from __future__ import annotations

import json

__all__ = ["CommandError", "send_command"]


class CommandError(RuntimeError):
    """No reply from the daemon (not running, or not answering in time)."""


def send_command(endpoint: str, request: dict, *, timeout_s: float = 3.0,
                 context=None, curve=None) -> dict:
    """Send one command and return the decoded reply.

    `curve` (a ``CurveClientKeys``) is needed when the daemon serves over CURVE;
    without an authorised key no reply ever comes (a :class:`CommandError`).

    Raises
    ------
    CommandError
        When no reply arrives within `timeout_s` (no daemon there, or it hangs).
    """
    import zmq

    ctx = context or zmq.Context.instance()
    from livequant.daemon.security import apply_curve_client

    sock = ctx.socket(zmq.REQ)
    sock.setsockopt(zmq.LINGER, 0)
    try:
        apply_curve_client(sock, curve)
        sock.connect(endpoint)
        sock.send(json.dumps(request).encode("utf-8"))
        if not sock.poll(int(timeout_s * 1000)):
            raise CommandError(f"no reply from {endpoint} within {timeout_s:g} s")
        return json.loads(sock.recv().decode("utf-8"))
    finally:
        sock.close(linger=0)
