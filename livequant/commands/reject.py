"""``livequant reject ID [--why TEXT]``: reject a proposal (kept in the ledger with the reason)."""

from __future__ import annotations

__all__ = ["register", "reject_command"]


def register(subparsers) -> None:
    from livequant.commands.proposals import add_session_arguments

    p = subparsers.add_parser(
        "reject", help="reject a proposal (with a reason)",
        description="Reject proposal ID of the running daemon; the decision and the reason go "
                    "to the session's ledger and the events socket. The region is not proposed "
                    "again.")
    p.add_argument("id", metavar="ID", help="proposal id, e.g. p0001 (see `livequant proposals`)")
    p.add_argument("--why", metavar="TEXT", help="the reason, kept with the decision")
    add_session_arguments(p)
    p.set_defaults(func=reject_command)


def reject_command(args) -> int:
    from livequant.commands.accept import decide

    return decide(args, {"cmd": "reject", "id": args.id, "why": args.why}, "reject")
