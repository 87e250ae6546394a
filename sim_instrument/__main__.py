"""``python -m sim_instrument``: a simulated STEM for livequant.

Run ``python -m sim_instrument --help`` for the modes, and
``python -m sim_instrument MODE --help`` for each mode's settings.
"""

from __future__ import annotations

import argparse
import logging
import sys
import threading

from livequant.commands._common import positive_float as _positive

__all__ = ["main", "build_parser"]

EXIT_OK, EXIT_FAILURE, EXIT_BAD_INPUT = 0, 1, 2

_EPILOG = """\
examples:
  python -m sim_instrument survey --out /tmp/frames --frames 9 --cadence-s 3
  python -m sim_instrument survey --out /tmp/frames --zmq tcp://127.0.0.1:5557
  python -m sim_instrument replay --from /tmp/frames --out /tmp/watched --interval-s 1
  python -m sim_instrument serve --events tcp://127.0.0.1:5556 --out /tmp/frames --duration-s 600
  python -m sim_instrument series --out /tmp/frames --frames 16 --dwell-us 1 --shape 512 --fov-nm 5
  python -m sim_instrument series --out /tmp/frames --pair --shape 512 --fov-nm 5
  python -m sim_instrument scenarios

Frames land in --out as NAME.tif plus NAME.json (written image first, sidecar
last, each by rename).  The sidecar reports the commanded stage position; the
simulated specimen drifts, so what is really under the beam differs.  The
ground truth of every frame (true column positions, displacements, walls,
vortex cores, drift) goes to a separate folder, OUT-truth by default.
"""


class _Parser(argparse.ArgumentParser):
    def error(self, message):
        self.print_usage(sys.stderr)
        self.exit(EXIT_BAD_INPUT, f"{self.prog}: error: {message}\n")


def _shape(text: str):
    try:
        if "x" in text.lower():
            r, c = text.lower().split("x")
            shape = (int(r), int(c))
        else:
            shape = (int(text), int(text))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected N or ROWSxCOLS (e.g. 1024 or 512x1024), "
                                         f"got {text!r}") from None
    if min(shape) < 8 or max(shape) > 8192:
        raise argparse.ArgumentTypeError(f"pixel counts must be within 8..8192, got {text}")
    return shape


def _nonneg(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"must be >= 0, got {text}")
    return v


def _add_instrument(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("specimen and instrument")
    g.add_argument("--scenario", default="demo", metavar="NAME|FILE",
                   help="virtual specimen: a shipped scenario name or a TOML file "
                        "(default: demo; list them with `scenarios`)")
    g.add_argument("--seed", type=int, default=0, help="random seed for noise and drift")
    g.add_argument("--detector", choices=["HAADF", "ABF"], type=str.upper,
                   help="detector (default: the scenario's)")
    g.add_argument("--current-pa", type=_positive, metavar="PA",
                   help="probe current, pA (default: the scenario's, 20 pA in demo)")
    g.add_argument("--dwell-us", type=_positive, metavar="US",
                   help="dwell time per pixel, microseconds (demo: 2 us)")
    g.add_argument("--no-drift", action="store_true",
                   help="a perfectly stable stage (no specimen drift)")
    g.add_argument("--drift-nm-per-s", type=float, nargs=2, metavar=("VX", "VY"),
                   help="linear specimen drift on the stage, nm/s (demo: 0.012 0.006)")


def _add_outputs(p: argparse.ArgumentParser, *, truth: bool = True) -> None:
    g = p.add_argument_group("where frames go")
    g.add_argument("--out", metavar="DIR", help="folder to write frames into (the folder "
                                                "livequant watches)")
    if truth:
        g.add_argument("--truth", metavar="DIR",
                       help="folder for the ground truth (default: OUT-truth; never inside OUT)")
    g.add_argument("--format", choices=["tif", "npy"], default="tif",
                   help="image file format (default: tif)")
    if truth:
        g.add_argument("--dtype", choices=["float32", "uint16", "uint32"], default="float32",
                       help="pixel type: detector counts as float32 (default) or rounded "
                            "integers, as many scan generators deliver")
    g.add_argument("--zmq", metavar="ENDPOINT",
                   help="also (or only) send frames on a ZeroMQ PUSH socket, e.g. "
                        "tcp://127.0.0.1:5557, as [b'frame', header, pixels]")
    g.add_argument("--zmq-connect", action="store_true",
                   help="connect the frame socket instead of binding it")


def _add_scan(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("scan")
    g.add_argument("--fov-nm", type=_positive, default=20.0,
                   help="field of view along the fast-scan direction, nm (default: 20)")
    g.add_argument("--shape", type=_shape, default=(1024, 1024), metavar="N|ROWSxCOLS",
                   help="pixels per frame (default: 1024)")
    g.add_argument("--rotation-deg", type=float, default=0.0,
                   help="scan rotation relative to the stage axes, degrees (default: 0)")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="python -m sim_instrument",
        description="A simulated scanning transmission electron microscope.  It scans a "
                    "virtual perovskite specimen (a ferroelectric film with domain walls, a "
                    "vortex pair, defects) with a drifting stage, shot noise and scan "
                    "distortions, and delivers frames as a real instrument would, with "
                    "exact ground truth beside them.",
        epilog=_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("-v", "--verbose", action="count", default=0,
                        help="more log output on stderr")
    sub = parser.add_subparsers(dest="mode", metavar="MODE", parser_class=_Parser)

    s = sub.add_parser("survey", help="scan a raster of frames over the specimen",
                       description="Scan a serpentine raster of frames over the specimen at a "
                                   "fixed cadence, then stop.")
    _add_instrument(s)
    _add_scan(s)
    _add_outputs(s)
    g = s.add_argument_group("raster")
    g.add_argument("--frames", type=int, default=9, help="number of frames (default: 9)")
    g.add_argument("--cadence-s", type=_nonneg, default=3.0,
                   help="time from one frame start to the next, s (default: 3; 0 = as fast "
                        "as the machine renders)")
    g.add_argument("--start-nm", type=float, nargs=2, default=(-30.0, -70.0), metavar=("X", "Y"),
                   help="stage position of the first frame centre, nm (default: -30 -70, at "
                        "the substrate-film interface of the demo specimen)")
    g.add_argument("--step-nm", type=_positive,
                   help="distance between frame centres, nm (default: one field of view)")

    q = sub.add_parser("series", help="a fast-scan series, or an orthogonal pair, of one region",
                       description="Scan one region again and again with a fast dwell (a "
                                   "series sharing one series_id), or twice with the scan "
                                   "rotated by 90 degrees (--pair).  Drift, line jitter and "
                                   "shot noise act on every frame; each frame's truth is "
                                   "written beside it.")
    _add_instrument(q)
    _add_scan(q)
    _add_outputs(q)
    g = q.add_argument_group("series")
    g.add_argument("--frames", type=int, default=16, help="frames in the series (default: 16)")
    g.add_argument("--pair", action="store_true",
                   help="an orthogonal pair (scan rotations R and R + 90) instead of a series")
    g.add_argument("--at-nm", type=float, nargs=2, default=(-30.0, -70.0), metavar=("X", "Y"),
                   help="stage position of the region, nm (default: -30 -70)")
    g.add_argument("--series-id", help="the sidecar series_id (default: from the first frame)")
    g.add_argument("--jitter-pm", type=_nonneg,
                   help="rms jitter of each scan line along the fast axis, pm (default: the "
                        "scenario's)")
    g.add_argument("--gap-s", type=_nonneg, default=0.0,
                   help="dead time between frames, s (default: 0)")
    g.add_argument("--jump-before", type=int, metavar="K",
                   help="the specimen jumps by 0.2 nm just before frame K (a frame the "
                        "series must leave out)")

    r = sub.add_parser("replay", help="re-send an existing folder of frames",
                       description="Re-send the frames of a folder (image plus sidecar) to a "
                                   "watched folder and/or a socket at a fixed rate.")
    r.add_argument("--from", dest="source", required=True, metavar="DIR",
                   help="folder of frames to replay (in name order)")
    r.add_argument("--interval-s", type=_nonneg, default=1.0,
                   help="time between frames, s (default: 1)")
    r.add_argument("--loops", type=int, default=1, help="times through the folder (default: 1)")
    _add_outputs(r, truth=False)

    v = sub.add_parser("serve", help="acquire the regions the daemon asks for",
                       description="Listen for scan-request events on the daemon's events "
                                   "socket and acquire each requested region, closing the "
                                   "loop.  Stops after --max-requests frames or --duration-s.")
    v.add_argument("--events", required=True, metavar="ENDPOINT",
                   help="the daemon's events PUB endpoint, e.g. tcp://127.0.0.1:5556")
    v.add_argument("--max-requests", type=int, help="stop after this many frames")
    v.add_argument("--duration-s", type=_positive, default=None,
                   help="stop after this long, s (default: 3600 if --max-requests is not given)")
    v.add_argument("--realtime-clock", action="store_true",
                   help="let the simulated clock follow the wall clock between requests, so "
                        "the specimen drifts while the instrument waits (off by default)")
    _add_instrument(v)
    _add_outputs(v)

    sub.add_parser("scenarios", help="list the shipped specimen scenarios")
    return parser


def _engine(args):
    from sim_instrument.engine import DriftModel, ScanEngine
    from sim_instrument.specimen import Specimen

    specimen = Specimen.from_scenario(args.scenario)
    inst = specimen.scenario.instrument
    if args.detector:
        inst = inst.model_copy(update={"detector": inst.detector.model_copy(
            update={"mode": args.detector})})
    if args.no_drift:
        drift = DriftModel.none()
    elif args.drift_nm_per_s:
        drift = DriftModel(args.drift_nm_per_s, inst.drift.random_walk_nm_per_sqrt_s,
                           seed=args.seed + 1)
    else:
        drift = None
    return ScanEngine(specimen, instrument=inst, drift=drift, seed=args.seed)


def _sinks(args, *, truth: bool):
    from sim_instrument.outputs import FolderSink, TruthSink, ZmqSink

    sinks = []
    if not args.out and not args.zmq:
        raise ValueError("give --out DIR and/or --zmq ENDPOINT: the frames need somewhere to go")
    if args.out:
        sinks.append(FolderSink(args.out, truth_dir=getattr(args, "truth", None) if truth
                                else False, fmt=args.format))
    elif truth and getattr(args, "truth", None):
        sinks.append(TruthSink(args.truth))
    if args.zmq:
        sinks.append(ZmqSink(args.zmq, bind=not args.zmq_connect))
    return sinks


def _run(args) -> int:
    from sim_instrument import modes
    from sim_instrument.scenario import list_scenarios, load_scenario

    if args.mode == "scenarios":
        for name in list_scenarios():
            sc = load_scenario(name)
            print(f"{name}: {sc.size_nm[0]:g} x {sc.size_nm[1]:g} nm. {sc.description}")
        return EXIT_OK

    stop = threading.Event()
    sinks = []
    try:
        if args.mode == "replay":
            sinks = _sinks(args, truth=False)
            ids = modes.run_replay(args.source, sinks, interval_s=args.interval_s,
                                   loops=args.loops, stop=stop)
        else:
            engine = _engine(args)
            sinks = _sinks(args, truth=True)
            kw = {k: v for k, v in (("dwell_time_us", args.dwell_us),
                                    ("beam_current_pa", args.current_pa)) if v is not None}
            kw["dtype"] = args.dtype
            if args.mode == "series":
                ids = _run_series(engine, sinks, args, kw)
            elif args.mode == "survey":
                ids = modes.run_survey(engine, sinks, frames=args.frames, fov_nm=args.fov_nm,
                                       shape_px=args.shape, start_nm=args.start_nm,
                                       step_nm=args.step_nm, cadence_s=args.cadence_s,
                                       acquire_kw={"scan_rotation_deg": args.rotation_deg,
                                                   **kw},
                                       stop=stop)
            else:
                duration = args.duration_s
                if duration is None and args.max_requests is None:
                    duration = 3600.0
                ids = modes.run_serve(engine, sinks, args.events,
                                      max_requests=args.max_requests, duration_s=duration,
                                      stop=stop, acquire_kw=kw,
                                      realtime_clock=args.realtime_clock)
    finally:
        for sink in sinks:
            sink.close()
    print(f"sim_instrument: {len(ids)} frame(s) sent", file=sys.stderr)
    return EXIT_OK


def _run_series(engine, sinks, args, kw) -> list[str]:
    if args.jitter_pm is not None:
        inst = engine.instrument
        engine.instrument = inst.model_copy(update={"distortion": inst.distortion.model_copy(
            update={"line_jitter_pm": args.jitter_pm})})
    common = dict(scan_rotation_deg=args.rotation_deg, series_id=args.series_id,
                  gap_s=args.gap_s, **kw)
    if args.pair:
        acqs = engine.acquire_orthogonal_pair(tuple(args.at_nm), args.fov_nm, args.shape,
                                              **common)
    else:
        jumps = {args.jump_before: (0.2, 0.0)} if args.jump_before is not None else None
        acqs = engine.acquire_series(args.frames, tuple(args.at_nm), args.fov_nm, args.shape,
                                     jump_before=jumps, **common)
    for acq in acqs:
        for sink in sinks:
            sink.send(acq.pixels, acq.sidecar, acq.truth)
    return [a.frame_id for a in acqs]


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=[logging.WARNING, logging.INFO, logging.DEBUG][min(args.verbose, 2)],
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
                        stream=sys.stderr)
    if not args.mode:
        parser.print_help(sys.stderr)
        return EXIT_BAD_INPUT
    if getattr(args, "frames", 1) < 1:
        parser.error("--frames must be >= 1")
    from livequant.config import ConfigError
    from livequant.frames import FrameError
    from sim_instrument.scenario import ScenarioError

    try:
        return _run(args)
    except KeyboardInterrupt:
        print("sim_instrument: stopped (Ctrl-C)", file=sys.stderr)
        return 130
    except (ScenarioError, ConfigError, FrameError, ValueError, OSError) as exc:
        print(f"sim_instrument: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT


if __name__ == "__main__":
    sys.exit(main())
