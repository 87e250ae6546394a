"""``livequant status``: ask the running daemon, or read the session's ledger."""

from __future__ import annotations

import json
import sys
from pathlib import Path

from livequant.commands.run import DEFAULT_SESSION

__all__ = ["register", "status_command", "query_status"]


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "status", help="counts and state of a session (running or not)",
        description="Ask the daemon running on a session for its status; when none runs, "
                    "report what the session's ledger holds.")
    p.add_argument("--session", metavar="DIR", default=DEFAULT_SESSION,
                   help=f"session folder (default ./{DEFAULT_SESSION})")
    p.add_argument("--json", action="store_true", help="one JSON object on stdout")
    p.add_argument("--timeout", type=float, default=3.0, metavar="S",
                   help="seconds to wait for the daemon's reply (default 3)")
    p.set_defaults(func=status_command)


def query_status(session: Path, *, timeout_s: float = 3.0) -> dict:
    """``{"source": "daemon" | "ledger", "status": {...}}`` for a session folder.

    Raises
    ------
    FileNotFoundError
        When no daemon runs there and there is no ledger either.
    """
    from livequant.daemon import CommandError, Ledger, SessionPaths, send_command
    from livequant.daemon.session import pid_alive, read_daemon_file
    from livequant.daemon.status import snapshot_from_ledger

    paths = SessionPaths(Path(session).expanduser().resolve())
    info = read_daemon_file(paths)
    note = None
    if info and pid_alive(info.get("pid", -1)) and info.get("endpoints", {}).get("commands"):
        try:
            reply = send_command(info["endpoints"]["commands"], {"cmd": "status"},
                                 timeout_s=timeout_s)
            if reply.get("ok"):
                return {"source": "daemon", "status": reply["status"]}
            note = f"daemon replied with an error: {reply.get('error')}"
        except CommandError as exc:
            note = f"daemon (pid {info['pid']}) did not answer: {exc}"
    if not paths.ledger.exists():
        raise FileNotFoundError(f"{paths.root}: no daemon running and no ledger; is this a "
                                "session folder? (give --session DIR)")
    with Ledger(paths.ledger, readonly=True) as ledger:
        snap = snapshot_from_ledger(ledger, session=str(paths.root))
    out = {"source": "ledger", "status": snap.as_dict()}
    if note:
        out["note"] = note
    return out


def status_command(args) -> int:
    from livequant.cli import EXIT_BAD_INPUT

    try:
        result = query_status(Path(args.session), timeout_s=args.timeout)
    except FileNotFoundError as exc:
        print(f"livequant status: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    if args.json:
        print(json.dumps(result, default=str))
        return 0
    from rich.console import Console

    from livequant.daemon.status import LastFrame, Snapshot
    from livequant.display import render_status

    st = dict(result["status"])
    st.pop("total", None)
    last = st.pop("last", None)
    st["warnings"] = tuple(st.get("warnings") or ())
    snap = Snapshot(**st, last=LastFrame(**last) if last else None)
    console = Console(stderr=True)
    if result.get("note"):
        console.print(result["note"], style="yellow")
    console.print(render_status(snap))
    return 0
