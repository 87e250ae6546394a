"""``livequant status``: ask the running daemon, or read the session's ledger."""

from __future__ import annotations

import json
import sys
from pathlib import Path

__all__ = ["register", "status_command", "query_status"]


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "status", help="counts and state of a session (running or not)",
        description="Ask the daemon running on a session for its status; when none runs, "
                    "report what the session's ledger holds.")
    from livequant.commands.proposals import add_session_arguments

    add_session_arguments(p)
    p.set_defaults(func=status_command)


def query_status(session: Path, *, timeout_s: float = 3.0,
                 client_key: str | None = None) -> dict:
    """``{"source": "daemon" | "ledger", "status": {...}}`` for a session folder.

    Raises
    ------
    FileNotFoundError
        When no daemon runs there and there is no ledger either.
    """
    from livequant.commands.proposals import NoDaemon, NotRunning, ask_daemon
    from livequant.daemon import Ledger, SessionPaths
    from livequant.daemon.status import snapshot_from_ledger

    paths = SessionPaths(Path(session).expanduser().resolve())
    note = None
    try:
        reply = ask_daemon(paths.root, {"cmd": "status"}, timeout_s=timeout_s,
                           client_key=client_key)
        if reply.get("ok"):
            return {"source": "daemon", "status": reply["status"]}
        note = f"daemon replied with an error: {reply.get('error')}"
    except NotRunning:
        pass  # the ledger tells what there is to tell
    except NoDaemon as exc:
        note = str(exc)
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
        result = query_status(Path(args.session), timeout_s=args.timeout,
                              client_key=getattr(args, "client_key", None))
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
    if not console.is_terminal:      # piped: wide enough that nothing is shortened
        console = Console(stderr=True, width=160)
    if result.get("note"):
        console.print(result["note"], style="yellow")
    console.print(render_status(snap, width=console.width))
    return 0
