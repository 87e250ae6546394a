"""``livequant proposals``: the proposed scan regions of a session.

Asks the daemon running on the session; with none running, reads the
session's ledger.  Also holds the client helper that ``accept`` and
``reject`` use to reach the daemon.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

from livequant.commands.run import DEFAULT_SESSION

__all__ = ["register", "proposals_command", "ask_daemon", "NoDaemon", "NotRunning",
           "print_caution", "print_proposals"]

STATES = ("open", "accepted", "rejected", "expired")


class NoDaemon(RuntimeError):
    """No daemon runs on the session (or it does not answer)."""


class NotRunning(NoDaemon):
    """No daemon runs on the session at all (no daemon.json, a dead pid)."""


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "proposals", help="list proposed scan regions (id, score, centre, size, rotation, "
                          "pixel size, dwell, dose, reason)",
        description="List the scan regions proposed in a session, best first. Proposals are "
                    "suggestions: check the dose budget of a beam-sensitive specimen; facility "
                    "procedures and the instrument's interlocks come first.")
    p.add_argument("--state", choices=STATES, default=None,
                   help="only proposals in this state (default: all)")
    add_session_arguments(p)
    p.set_defaults(func=proposals_command)


def add_session_arguments(p) -> None:
    p.add_argument("--session", metavar="DIR", default=DEFAULT_SESSION,
                   help=f"session folder (default ./{DEFAULT_SESSION})")
    p.add_argument("--json", action="store_true", help="one JSON object on stdout")
    p.add_argument("--timeout", type=float, default=3.0, metavar="S",
                   help="seconds to wait for the daemon's reply (default 3)")
    p.add_argument("--client-key", metavar="FILE", dest="client_key",
                   help="your CURVE secret key file (client.key_secret from `livequant keys`), "
                        "for a daemon that requires CURVE")


def _client_keys(client_key, info: dict):
    """CURVE client keys for the daemon of `info` (daemon.json), or None without a key file."""
    if not client_key:
        return None
    from livequant.daemon.security import CurveClientKeys, _load_secret

    server_public = info.get("curve_server_public")
    if not server_public:
        raise NoDaemon("--client-key was given but the daemon does not use CURVE "
                       "(daemon.json has no curve_server_public)")
    try:
        public, secret = _load_secret(Path(client_key).expanduser(), "--client-key")
    except Exception as exc:  # noqa: BLE001 - SetupError or OSError: say which file
        raise NoDaemon(str(exc)) from None
    return CurveClientKeys(public=public, secret=secret,
                           server_public=server_public.encode("ascii"))


def ask_daemon(session: Path, request: dict, *, timeout_s: float = 3.0,
               client_key: str | None = None) -> dict:
    """Send `request` to the daemon running on `session` and return its reply.

    `client_key` is the CURVE secret key file for a daemon that requires CURVE.

    Raises
    ------
    NoDaemon
        No daemon.json, a dead pid, no reply within `timeout_s`, or an unusable key.
    """
    from livequant.daemon import CommandError, SessionPaths, send_command
    from livequant.daemon.session import pid_alive, read_daemon_file

    paths = SessionPaths(Path(session).expanduser().resolve())
    info = read_daemon_file(paths)
    endpoint = (info or {}).get("endpoints", {}).get("commands")
    if not info or not pid_alive(info.get("pid", -1)) or not endpoint:
        raise NotRunning(f"no daemon is running on {paths.root} (start one with `livequant run "
                       f"--session {paths.root}`)")
    curve = _client_keys(client_key, info)
    try:
        return send_command(endpoint, request, timeout_s=timeout_s, curve=curve)
    except CommandError as exc:
        hint = ("" if curve is not None or not info.get("curve_server_public")
                else " (it requires CURVE: give --client-key FILE)")
        raise NoDaemon(f"the daemon (pid {info.get('pid')}) did not answer: {exc}{hint}") \
            from None


def _from_ledger(session: Path, state: str | None) -> list[dict]:
    from livequant.daemon import Ledger, SessionPaths
    from livequant.daemon.briefs import proposal_brief

    paths = SessionPaths(Path(session).expanduser().resolve())
    if not paths.ledger.exists():
        raise FileNotFoundError(f"{paths.root}: no daemon running and no ledger; is this a "
                                "session folder? (give --session DIR)")
    with Ledger(paths.ledger, readonly=True) as ledger:
        return [proposal_brief(r) for r in ledger.proposals(state=state)]


def print_caution(console=None) -> None:
    from livequant.proposals.caution import CAUTION

    if console is None:
        print(f"caution: {CAUTION}", file=sys.stderr)
    else:
        console.print(f"caution: {CAUTION}", style="yellow")


def proposals_command(args) -> int:
    from livequant.cli import EXIT_BAD_INPUT, EXIT_FAILURE
    from livequant.proposals.caution import CAUTION

    source, reply = "daemon", {}
    try:
        reply = ask_daemon(Path(args.session), {"cmd": "proposals", "state": args.state},
                           timeout_s=args.timeout, client_key=getattr(args, "client_key", None))
        if not reply.get("ok"):
            error = str(reply.get("error")).removeprefix("proposals: ")
            print(f"livequant proposals: {error}", file=sys.stderr)
            return EXIT_BAD_INPUT
        rows = reply["proposals"]
    except NoDaemon:
        source = "ledger"
        try:
            rows = _from_ledger(Path(args.session), args.state)
        except FileNotFoundError as exc:
            print(f"livequant proposals: {exc}", file=sys.stderr)
            return EXIT_BAD_INPUT
        except Exception as exc:  # noqa: BLE001 - a damaged ledger: say so, exit 1
            print(f"livequant proposals: cannot read the ledger: {exc}", file=sys.stderr)
            return EXIT_FAILURE
    rows = sorted(rows, key=lambda r: (r["state"] != "open", -(r["score"] or 0)))
    current_pa = reply.get("beam_current_pa") if source == "daemon" else _configured_current()
    if args.json:
        print(json.dumps({"source": source, "proposals": rows, "caution": CAUTION,
                          "beam_current_pa": current_pa}, default=str))
        return 0
    if not rows:
        print("no proposals" + (f" in state {args.state}" if args.state else ""), file=sys.stderr)
    else:
        print_proposals(rows, beam_current_pa=current_pa)
    if source == "ledger":
        print("(no daemon running: read from the ledger)", file=sys.stderr)
    if current_pa is None:
        print("dose n/a: no beam current known (set proposals.beam_current_pa, picoamperes)",
              file=sys.stderr)
    print_caution()
    return 0


def _configured_current() -> float | None:
    """``proposals.beam_current_pa`` of the configured sources, read raw (None when unset,
    unreadable or not a positive number; `livequant run` validates it in full)."""
    from livequant.config_tree import ConfigError, settings_tree

    try:
        value = settings_tree().get("proposals", {}).get("beam_current_pa")
    except ConfigError:
        return None
    ok = isinstance(value, (int, float)) and not isinstance(value, bool) and value > 0
    return float(value) if ok else None


def print_proposals(rows, *, beam_current_pa=None, file=None) -> None:
    """The proposals table on `file` (standard output).

    At a terminal it takes the terminal's width and wraps long reasons at word
    boundaries; piped (``livequant proposals | cat``) it has no width limit, one
    line per proposal, so nothing is cut.
    """
    from rich.console import Console

    from livequant.display.status import proposals_table

    file = file or sys.stdout
    tty = hasattr(file, "isatty") and file.isatty()
    if tty:
        console = Console(file=file)
        console.print(proposals_table(rows, limit=len(rows), width=max(60, console.width),
                                      beam_current_pa=beam_current_pa, wrap=True))
        return
    import io

    buf = io.StringIO()
    Console(file=buf, width=100_000, color_system=None, force_terminal=False).print(
        proposals_table(rows, limit=len(rows), width=None, beam_current_pa=beam_current_pa))
    for line in buf.getvalue().splitlines():
        print(line.rstrip(), file=file)
