"""The ``livequant`` command.

Each sub-command lives in a module that provides ``register(subparsers)``;
the module adds its parser and sets ``func`` to a callable taking the parsed
arguments and returning an exit code.  Exit codes: 0 success, 2 bad input or
usage, 1 internal failure.  ``--json`` output is one JSON object on stdout;
human text goes to stderr.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import sys

from livequant import __version__

__all__ = ["main", "EXIT_OK", "EXIT_FAILURE", "EXIT_BAD_INPUT", "COMMAND_MODULES"]

EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_BAD_INPUT = 2

#: Modules that register sub-commands, in the order they appear in --help.
COMMAND_MODULES = (
    "livequant.commands.analyze",
    "livequant.commands.bench",
    "livequant.commands.demo",
    "livequant.commands.run",
    "livequant.commands.status",
    "livequant.commands.proposals",
    "livequant.commands.accept",
    "livequant.commands.reject",
    "livequant.commands.report",
    "livequant.commands.keys",
    "livequant.commands.reprocess",
)


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # usage errors exit 2, as documented
        self.print_usage(sys.stderr)
        self.exit(EXIT_BAD_INPUT, f"{self.prog}: error: {message}\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="livequant",
        description="Real-time quantitative analysis of atomic-resolution STEM frames.",
    )
    parser.add_argument("--version", action="version", version=f"livequant {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0,
                        help="more log output on stderr (-vv for debug)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in COMMAND_MODULES:
        importlib.import_module(name).register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(
        level=[logging.WARNING, logging.INFO, logging.DEBUG][min(args.verbose, 2)],
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
        stream=sys.stderr,
    )
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_BAD_INPUT
    try:
        return int(args.func(args) or 0)
    except KeyboardInterrupt:
        print("livequant: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return EXIT_OK
