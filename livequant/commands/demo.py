"""``livequant demo``: the simulated instrument and the daemon in one command."""

from __future__ import annotations

import argparse
import json
import logging
import sys

from livequant.commands._common import positive_float as _positive

__all__ = ["register", "demo_command"]

CAUTION = ("The demo drives a simulated instrument.  At a real microscope, livequant only "
           "proposes: the operator decides, beam-sensitive specimens have dose budgets, and "
           "facility procedures and the instrument's interlocks come first.")


def _shape(text: str) -> tuple[int, int]:
    try:
        n = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a pixel count such as 512, got {text!r}") \
            from None
    if not 64 <= n <= 4096:
        raise argparse.ArgumentTypeError(f"the frame size must lie within 64..4096 px, got {n}")
    return (n, n)


def register(subparsers) -> None:
    from livequant.demo import DemoOptions

    d = DemoOptions()
    p = subparsers.add_parser(
        "demo", help="run the simulated instrument and the daemon together",
        description="Survey an invented ferroelectric film with the simulated instrument, "
                    "analyse every frame live, flag what deserves a look, propose regions and "
                    "(with --auto-accept) revisit them at higher magnification.  Ends by itself "
                    "after --duration-s with a summary and a session report.  " + CAUTION)
    p.add_argument("--session", metavar="DIR",
                   help="session folder (default: a new temporary folder)")
    p.add_argument("--duration-s", type=_positive, default=d.duration_s, metavar="S",
                   help=f"how long the instrument runs, seconds (default {d.duration_s:g})")
    p.add_argument("--frames", type=int, default=d.frames, metavar="N",
                   help=f"survey frames (default {d.frames})")
    p.add_argument("--size", type=_shape, default=d.shape_px, dest="shape_px", metavar="PX",
                   help=f"pixels per survey frame side (default {d.shape_px[0]})")
    p.add_argument("--cadence-s", type=_positive, default=d.cadence_s, metavar="S",
                   help=f"at least this long between survey frames, seconds "
                        f"(default {d.cadence_s:g})")
    p.add_argument("--dwell-us", type=_positive, default=d.dwell_time_us, metavar="US",
                   dest="dwell_time_us",
                   help=f"survey dwell per pixel, microseconds (default {d.dwell_time_us:g})")
    p.add_argument("--auto-accept", action="store_true",
                   help="accept every proposal automatically so the simulated instrument "
                        "revisits it (for the simulated instrument only)")
    p.add_argument("--seed", type=int, default=d.seed, help="seed of noise and drift")
    p.add_argument("--config", metavar="FILE", help="user TOML configuration")
    p.add_argument("--workers", type=int, metavar="N",
                   help="analysis processes (default: one per core)")
    p.add_argument("--no-report", action="store_true", help="do not write the session report")
    p.add_argument("--no-console", action="store_true",
                   help="no live display: log one status line per heartbeat instead")
    p.add_argument("--json", action="store_true",
                   help="print the summary as one JSON object on stdout")
    p.set_defaults(func=demo_command)


def demo_command(args) -> int:
    from livequant.cli import EXIT_BAD_INPUT
    from livequant.config import ConfigError
    from livequant.daemon import SetupError
    from livequant.demo import DemoOptions, format_outcome, run_demo

    if args.frames < 1:
        print(f"livequant demo: --frames must be >= 1, got {args.frames}", file=sys.stderr)
        return EXIT_BAD_INPUT
    options = DemoOptions(session=args.session, duration_s=args.duration_s, frames=args.frames,
                          shape_px=args.shape_px, cadence_s=args.cadence_s,
                          dwell_time_us=args.dwell_time_us,
                          auto_accept=args.auto_accept, seed=args.seed,
                          config_file=args.config, workers=args.workers,
                          report=not args.no_report)
    use_console = not args.no_console and sys.stderr.isatty()
    if not use_console:
        logging.getLogger("livequant").setLevel(min(logging.getLogger().level, logging.INFO))
    print(CAUTION, file=sys.stderr)
    factory = None
    if use_console:
        from livequant.display import LiveDisplay
        from livequant.display.live import daemon_decider

        def factory(daemon):
            return LiveDisplay(lambda: daemon.snapshot,
                               refresh_per_second=daemon.settings.daemon.refresh_per_second,
                               decide=daemon_decider(daemon))
    try:
        outcome = run_demo(options, display_factory=factory)
    except (ConfigError, SetupError) as exc:
        print(f"livequant demo: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    print(format_outcome(outcome), file=sys.stderr)
    if args.json:
        print(json.dumps(outcome.as_dict()))
    return 1 if outcome.instrument_error else 0
