"""``livequant accept ID``: accept a proposal; the daemon publishes it as a scan-request."""

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
    add_session_arguments(p)
    p.set_defaults(func=accept_command)


def decide(args, request: dict, verb: str) -> int:
    """Send one decision; print the outcome; exit code per DESIGN.md."""
    from livequant.cli import EXIT_BAD_INPUT, EXIT_FAILURE
    from livequant.commands.proposals import NoDaemon, NotRunning, ask_daemon, print_caution

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
        if verb == "accept":
            print_caution()
    return 0


def accept_command(args) -> int:
    return decide(args, {"cmd": "accept", "id": args.id, "note": args.note}, "accept")
