"""``livequant accept ID``: accept a proposal; the daemon publishes it as a scan-request.

Before anything is sent the proposal (centre, size, rotation, pixel size,
dwell, dose) and the safety caution are printed, and the operator is asked to
confirm; ``--yes`` skips the question (scripts, the simulated instrument).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

__all__ = ["register", "accept_command"]


def register(subparsers) -> None:
    from livequant.commands.proposals import add_session_arguments

    p = subparsers.add_parser(
        "accept", help="accept a proposal: the daemon asks the instrument to scan it",
        description="Accept proposal ID of the running daemon. The daemon records the decision, "
                    "places the region again for the drift expected now and publishes it as a "
                    "scan-request. Proposals are suggestions: check the dose budget of a "
                    "beam-sensitive specimen; facility procedures and the instrument's "
                    "interlocks come first.")
    p.add_argument("id", metavar="ID", help="proposal id, e.g. p0001 (see `livequant proposals`)")
    p.add_argument("--note", metavar="TEXT", help="a note kept with the decision")
    p.add_argument("--yes", "-y", action="store_true",
                   help="accept without asking (the proposal and the caution are still printed "
                        "first); needed when no terminal can answer the question")
    add_session_arguments(p)
    p.set_defaults(func=accept_command)


def decide(args, request: dict, verb: str) -> int:
    """Send one decision; print the outcome; exit code per DESIGN.md."""
    from livequant.cli import EXIT_BAD_INPUT, EXIT_FAILURE
    from livequant.commands.proposals import NoDaemon, NotRunning, ask_daemon

    try:
        reply = ask_daemon(Path(args.session), request, timeout_s=args.timeout,
                           client_key=getattr(args, "client_key", None))
    except NoDaemon as exc:
        print(f"livequant {verb}: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT if isinstance(exc, NotRunning) else EXIT_FAILURE
    if args.json:
        print(json.dumps(reply, default=str))
    if not reply.get("ok"):
        if not args.json:
            # the daemon names the command ("accept: no proposal ..."); say it once
            error = str(reply.get("error")).removeprefix(f"{verb}: ")
            print(f"livequant {verb}: {error}", file=sys.stderr)
        return EXIT_FAILURE if "internal error" in str(reply.get("error")) else EXIT_BAD_INPUT
    if not args.json:
        print(f"proposal {reply['id']}: {reply['state']}", file=sys.stderr)
        req = reply.get("scan_request")
        if req:
            rows, cols = req["shape_px"]
            print(f"scan-request: centre ({req['center_x_nm']:.2f}, {req['center_y_nm']:.2f}) nm, "
                  f"field of view {req['fov_nm']:.2f} nm, {rows} x {cols} px, rotation "
                  f"{req['scan_rotation_deg']:.1f} deg, dwell {req['dwell_time_us']:g} us",
                  file=sys.stderr)
    return 0


def confirm_accept(args, *, ask=input, stdin=None) -> int | None:
    """Show proposal `args.id` and the caution; ask unless ``--yes``.

    Returns None to go ahead, or the exit code to stop with (declined, no
    terminal to ask, unknown id, no daemon).
    """
    from livequant.cli import EXIT_BAD_INPUT, EXIT_FAILURE
    from livequant.commands.proposals import (NoDaemon, NotRunning, ask_daemon, print_caution,
                                              print_proposals)

    try:
        reply = ask_daemon(Path(args.session), {"cmd": "proposals", "state": None},
                           timeout_s=args.timeout, client_key=getattr(args, "client_key", None))
    except NoDaemon as exc:
        print(f"livequant accept: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT if isinstance(exc, NotRunning) else EXIT_FAILURE
    if not reply.get("ok"):
        # the daemon names the command ("accept: ..."); say it once
        error = str(reply.get("error"))
        for verb in ("proposals: ", "accept: "):
            error = error.removeprefix(verb)
        print(f"livequant accept: {error}", file=sys.stderr)
        return EXIT_FAILURE if "internal error" in error else EXIT_BAD_INPUT
    row = next((r for r in reply.get("proposals") or [] if str(r.get("id")) == args.id), None)
    if row is None:
        print(f"livequant accept: no proposal with id {args.id!r}; list them with "
              "`livequant proposals`", file=sys.stderr)
        return EXIT_BAD_INPUT
    print_proposals([row], beam_current_pa=reply.get("beam_current_pa"), file=sys.stderr)
    print_caution()
    if args.yes:
        return None
    stdin = stdin if stdin is not None else sys.stdin
    if not (hasattr(stdin, "isatty") and stdin.isatty()):
        print(f"livequant accept: not accepted: no terminal to confirm on; give --yes to "
              f"accept {args.id} without the question", file=sys.stderr)
        return EXIT_BAD_INPUT
    try:
        answer = ask(f"accept {args.id}? [y/N] ")
    except EOFError:
        answer = ""
    if answer.strip().lower() not in ("y", "yes"):
        print(f"{args.id}: not accepted", file=sys.stderr)
        return EXIT_BAD_INPUT
    return None


def accept_command(args) -> int:
    stop = confirm_accept(args)
    if stop is not None:
        return stop
    return decide(args, {"cmd": "accept", "id": args.id, "note": args.note}, "accept")
