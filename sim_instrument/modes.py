"""The three ways the simulated instrument runs: survey, replay, serve.

Every loop is bounded (a frame count, a request count or a duration) and
checks a ``stop`` event between frames, so it ends by itself, on Ctrl-C, or
when a test sets the event.
"""

from __future__ import annotations

import json
import logging
import math
import threading
import time
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from livequant.frames import IMAGE_SUFFIXES, read_image
from sim_instrument.engine import ScanEngine
from sim_instrument.requests import SCAN_REQUEST_TOPIC, ScanRequestError, decode_scan_request

__all__ = ["survey_positions", "run_survey", "run_replay", "run_serve", "list_frames"]

log = logging.getLogger("sim_instrument")


def survey_positions(n_frames: int, start_nm, step_nm) -> np.ndarray:
    """Frame centres of a serpentine raster: (n_frames, 2) stage (x, y), nm.

    Rows of ``ceil(sqrt(n))`` frames run along x, alternating direction, so
    the stage never jumps back across the whole raster.  `step_nm` is one
    distance for both axes or ``(step_x, step_y)``.
    """
    if n_frames < 1:
        raise ValueError(f"`frames` must be >= 1, got {n_frames}")
    per_row = max(1, math.ceil(math.sqrt(n_frames)))
    k = np.arange(n_frames)
    row, col = np.divmod(k, per_row)
    col = np.where(row % 2 == 0, col, per_row - 1 - col)
    start = np.asarray(start_nm, float)
    step = np.broadcast_to(np.asarray(step_nm, float), (2,))
    return start[None, :] + step[None, :] * np.column_stack([col, row]).astype(float)


def _pace(next_at: float, stop: threading.Event) -> None:
    delay = next_at - time.monotonic()
    if delay > 0:
        stop.wait(delay)


def run_survey(engine: ScanEngine, sinks: Sequence, *, frames: int, fov_nm: float,
               shape_px, start_nm=(0.0, 0.0), step_nm: float | None = None,
               cadence_s: float = 0.0, acquire_kw: dict | None = None,
               stop: threading.Event | None = None,
               on_frame: Callable | None = None) -> list[str]:
    """Acquire a raster of frames over the specimen, one every `cadence_s`.

    The simulated clock advances by the frame time, plus the idle time to
    the next frame when `cadence_s` is longer, so drift accumulates as it
    would at the instrument.  Returns the frame ids written.
    """
    stop = stop or threading.Event()
    rows, cols = shape_px
    # Default: tile the specimen, one frame width along x and one height along y.
    step = step_nm if step_nm is not None else (fov_nm, fov_nm * rows / cols)
    ids = []
    next_at = time.monotonic()
    for centre in survey_positions(frames, start_nm, step):
        if stop.is_set():
            break
        t_start = engine.time_s
        acq = engine.acquire(tuple(centre), fov_nm, shape_px, **(acquire_kw or {}))
        for sink in sinks:
            sink.send(acq.pixels, acq.sidecar, acq.truth)
        ids.append(acq.frame_id)
        log.info("frame %s at stage (%.1f, %.1f) nm", acq.frame_id, centre[0], centre[1])
        if on_frame:
            on_frame(acq)
        idle = cadence_s - (engine.time_s - t_start)
        if idle > 0:
            engine.wait(idle)
        next_at += cadence_s
        if len(ids) < frames:
            _pace(next_at, stop)
    return ids


def list_frames(folder) -> list[Path]:
    """Image files of a frame folder in name order (hidden and partial files skipped)."""
    folder = Path(folder)
    if not folder.is_dir():
        raise ValueError(f"`{folder}` is not a folder of frames")
    return sorted(p for p in folder.iterdir()
                  if p.suffix.lower() in IMAGE_SUFFIXES and not p.name.startswith("."))


def run_replay(source_dir, sinks: Sequence, *, interval_s: float = 1.0, loops: int = 1,
               stop: threading.Event | None = None) -> list[str]:
    """Re-send an existing folder of frames at a fixed interval.

    Sidecars are passed on unchanged (a frame without one gets just its
    ``frame_id``); on the second and later loops the frame id gets a
    ``_rN`` suffix so a daemon sees new frames, not duplicates.
    """
    stop = stop or threading.Event()
    paths = list_frames(source_dir)
    if not paths:
        raise ValueError(f"no frame files ({', '.join(IMAGE_SUFFIXES)}) in {source_dir}")
    if loops < 1:
        raise ValueError(f"`loops` must be >= 1, got {loops}")
    sent = []
    next_at = time.monotonic()
    total = loops * len(paths)
    for loop in range(loops):
        for path in paths:
            if stop.is_set():
                return sent
            pixels = read_image(path)
            side = path.with_suffix(".json")
            sidecar = json.loads(side.read_text(encoding="utf-8")) if side.exists() else {}
            if not isinstance(sidecar, dict):
                raise ValueError(f"{side}: sidecar is not a JSON object")
            fid = str(sidecar.get("frame_id") or path.stem)
            if loop > 0:
                fid = f"{fid}_r{loop + 1}"
            sidecar = {**sidecar, "frame_id": fid}
            for sink in sinks:
                sink.send(pixels, sidecar, None)
            sent.append(fid)
            log.info("replayed %s as %s", path.name, fid)
            next_at += interval_s
            if len(sent) < total:
                _pace(next_at, stop)
    return sent


def run_serve(engine: ScanEngine, sinks: Sequence, events_endpoint: str, *,
              max_requests: int | None = None, duration_s: float | None = None,
              stop: threading.Event | None = None, context=None,
              poll_ms: int = 100, on_frame: Callable | None = None,
              acquire_kw: dict | None = None, realtime_clock: bool = False) -> list[str]:
    """Acquire the regions asked for by ``scan-request`` events.

    Subscribes to `events_endpoint` (the daemon's events PUB socket), topic
    ``scan-request``.  A malformed request is logged with its reason and
    skipped, and so is a repeat of an id already served (a publisher may
    re-send; a new acquisition of the same region needs a new id).  Ends
    after `max_requests` frames, after `duration_s`, or when
    `stop` is set; at least one of the first two must be given.  `acquire_kw`
    holds defaults (``dwell_time_us``, ``beam_current_pa``, ``dtype``) that a
    request's own fields override.  With `realtime_clock` the simulated clock
    catches up with the wall clock before each acquisition
    (:meth:`ScanEngine.catch_up`), so the specimen drifts while the instrument
    waits for requests, as a real one does.
    """
    import zmq

    if max_requests is None and duration_s is None:
        raise ValueError("give `max_requests` or `duration_s`: the serve loop must be bounded")
    stop = stop or threading.Event()
    own = context is None
    ctx = context or zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, SCAN_REQUEST_TOPIC)
    done: list[str] = []
    served_ids: set[str] = set()
    try:
        sub.connect(events_endpoint)
        deadline = None if duration_s is None else time.monotonic() + duration_s
        while not stop.is_set():
            if max_requests is not None and len(done) >= max_requests:
                break
            if deadline is not None and time.monotonic() >= deadline:
                break
            if not sub.poll(poll_ms):
                continue
            parts = sub.recv_multipart(zmq.NOBLOCK)
            try:
                req = decode_scan_request(parts)
            except ScanRequestError as exc:
                log.warning("ignored scan-request: %s", exc)
                continue
            if req.id in served_ids:
                log.info("scan-request %r already served; ignored", req.id)
                continue
            extra = {"request_id": req.id}
            if req.extra:
                extra["request_extra"] = req.extra
            kw = dict(acquire_kw or {})
            for key in ("dwell_time_us", "beam_current_pa", "detector"):
                if getattr(req, key) is not None:
                    kw[key] = getattr(req, key)
            if realtime_clock:
                engine.catch_up()
            try:
                acq = engine.acquire(
                    (req.center_x_nm, req.center_y_nm), req.fov_nm, req.shape_px,
                    scan_rotation_deg=req.scan_rotation_deg,
                    frame_id=f"req_{_safe(req.id)}_{engine.frame_count + 1:05d}", extra=extra,
                    **kw)
            except ValueError as exc:
                log.warning("scan-request %r cannot be acquired: %s", req.id, exc)
                continue
            for sink in sinks:
                sink.send(acq.pixels, acq.sidecar, acq.truth)
            served_ids.add(req.id)
            done.append(acq.frame_id)
            log.info("acquired %s for request %s", acq.frame_id, req.id)
            if on_frame:
                on_frame(acq)
    finally:
        sub.close(linger=0)
        if own:
            ctx.term()
    return done


def _safe(text: str) -> str:
    keep = "".join(ch if ch.isalnum() or ch in "-_" else "-" for ch in text)
    return keep[:60] or "req"
