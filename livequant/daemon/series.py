"""The daemon's series aggregator: members in as they are done, aggregates out as frames.

The tick loop calls :meth:`SeriesAggregator.on_done` for every frame marked
done.  A member of a series (sidecar ``series_id``, or a page ``NAME#INDEX`` of
a container) is handed to one background thread, which reads it again,
registers it to its series (:class:`livequant.series.SeriesBuilder`), records
the verdict in the ledger (``series_members``) and on the events socket
(``status`` event ``series-member``; a left-out frame is also a warning on
the display), and, when an aggregate is due, writes it as an ordinary frame
under ``SESSION/series/KEY/`` (image, then sidecar) and queues it in the
ledger.  The aggregate then runs through the worker pool like any frame
(its outputs in ``SESSION/frames/AGGREGATE_ID/``, its ``frame`` event, the
rules); when it is done, ``on_done`` records its precision and the gain over
a single member (``series_aggregates``, ``status`` event ``series``).

Registration runs in a thread, not in the tick loop, so a 2048 x 2048
member never delays the claim of the next frame.  Series are kept in memory
(the running sum: about two frames each); beyond ``series.max_series`` the
least recently fed is closed.  After a restart, or when a closed series gets
a new member, the members the ledger says were averaged are registered
again from their files first (members already recorded are not offered
again).
"""

from __future__ import annotations

import logging
import queue
import threading
import time
from collections import OrderedDict
from pathlib import Path
from typing import Callable

import numpy as np

from livequant.frames import FrameError, read_frame, write_frame
from livequant.series import SeriesBuilder, is_aggregate, series_key

__all__ = ["SeriesAggregator"]


def _acquired_s(text) -> float | None:
    if not text:
        return None
    from datetime import datetime

    try:
        return datetime.fromisoformat(str(text)).timestamp()
    except ValueError:
        return None

log = logging.getLogger("livequant.daemon.series")


class SeriesAggregator:
    """See the module docstring.

    Parameters
    ----------
    settings : Settings
    ledger : Ledger
    publisher : EventPublisher
    series_dir : path
        Where aggregate frames are written (``SESSION/series``).
    register : callable
        ``register(path)``: put a written aggregate on the daemon's queue
        (the daemon's own registration: hash, ledger, wake-up).
    warn : callable
        ``warn(text)``: a line for the display's warnings.
    """

    def __init__(self, settings, ledger, publisher, series_dir, *,
                 register: Callable[[Path], None], warn: Callable[[str], None] = lambda s: None):
        self.settings = settings
        self.cfg = settings.series
        self.ledger = ledger
        self.publisher = publisher
        self.series_dir = Path(series_dir)
        self._register = register
        self._warn = warn
        self._defaults = settings.frame_defaults.as_dict()
        self._queue: queue.Queue = queue.Queue()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._builders: OrderedDict[str, SeriesBuilder] = OrderedDict()
        self._member_sigma: dict[str, list[float]] = {}
        self._status: dict[str, dict] = {}
        self._lock = threading.Lock()
        self.n_errors = 0

    # ------------------------------------------------------------ lifecycle

    def start(self) -> None:
        if not self.cfg.enabled:
            return
        self._catch_up()
        self._thread = threading.Thread(target=self._run, name="series", daemon=True)
        self._thread.start()

    def _catch_up(self, limit: int = 500) -> None:
        """Members done before a restart but never offered to their series (they were
        still waiting when the daemon stopped): hand them over now.  Only frames
        finished after the last recorded member are looked at (at most `limit`)."""
        import json

        members = self.ledger.series_members()
        offered = {m["frame_id"] for m in members}
        since = 0.0
        if members:
            since = max(float(m["created_at"] or 0.0) for m in members) - 60.0
        done = [r for r in self.ledger.rows(state="done")
                if r.frame_id and r.finished_at and r.finished_at >= since
                and r.frame_id not in offered][-limit:]
        frames_dir = self.series_dir.parent / "frames"
        for r in done:
            try:
                summary = json.loads((frames_dir / r.frame_id / "summary.json")
                                     .read_text(encoding="utf-8"))
            except (OSError, ValueError):
                continue
            meta = summary.get("meta") or {}
            if (meta.get("extra") or {}).get("series_role") == "aggregate":
                continue
            fid = meta.get("frame_id") or r.frame_id
            key = meta.get("series_id") or (fid.rpartition("#")[0] if "#" in fid else None)
            if key:
                self._queue.put((key, r.path, fid, _acquired_s(meta.get("acquired_at")),
                                 time.monotonic()))

    def stop(self, timeout_s: float = 30.0) -> None:
        """Finish the members handed over so far (up to `timeout_s`), then stop."""
        if self._thread is None:
            return
        self._queue.put(None)
        self._thread.join(timeout_s)
        if self._thread.is_alive():
            self._stop.set()
            log.warning("series thread still busy after %.0f s; members left are not averaged",
                        timeout_s)

    def is_alive(self) -> bool:
        return self._thread is None or self._thread.is_alive()

    # ------------------------------------------------------------ main thread

    def on_done(self, out) -> None:
        """A frame is done (main thread): hand a member over, or record an aggregate."""
        if not self.cfg.enabled or not out.summary:
            return
        meta = (out.summary or {}).get("meta") or {}
        extra = meta.get("extra") or {}
        if extra.get("series_role") == "aggregate":
            self._aggregate_done(out, extra.get("series") or {})
            return
        key = meta.get("series_id")
        fid = meta.get("frame_id") or out.frame_id or ""
        if not key and "#" in fid:
            name, _, index = fid.rpartition("#")
            key = name if (name and index) else None
        if not key:
            return
        sigma = out.summary.get("median_sigma_position_pm")
        if sigma:
            self._member_sigma.setdefault(key, []).append(float(sigma))
        t_acq = _acquired_s(meta.get("acquired_at"))
        self._queue.put((key, out.path, fid, t_acq, time.monotonic()))

    def _aggregate_done(self, out, block: dict) -> None:
        key = block.get("series_id")
        sigma = out.summary.get("median_sigma_position_pm")
        try:
            row = self.ledger.series_analysed(out.frame_id, median_sigma_position_pm=sigma,
                                              series_id=key)
        except Exception as exc:  # noqa: BLE001 - bookkeeping must not stop the daemon
            self.n_errors += 1
            log.exception("series bookkeeping of %s failed", out.frame_id)
            self._warn(f"series: {out.frame_id}: {type(exc).__name__}: {exc}")
            return
        if row is None:
            return
        event = {"event": "series", "series_id": key, "aggregate_id": out.frame_id,
                 "kind": row["kind"], "n_members": row["n_members"],
                 "n_excluded": row["n_excluded"], "median_sigma_position_pm": sigma,
                 "member_sigma_position_pm": row["member_sigma_position_pm"],
                 "precision_gain": row["precision_gain"],
                 "lattice": out.summary.get("lattice")}
        self.publisher.publish("status", event)
        with self._lock:
            st = self._status.setdefault(key, {"series_id": key})
            st.update({k: event[k] for k in ("kind", "n_members", "n_excluded",
                                             "median_sigma_position_pm", "precision_gain",
                                             "aggregate_id")})

    def status(self) -> tuple:
        """Per series: depth, exclusions, latest aggregate and its precision gain."""
        with self._lock:
            return tuple(dict(v) for v in self._status.values())

    # ------------------------------------------------------------ the thread

    def _run(self) -> None:
        """Members in acquisition order, as far as they can be known.

        The daemon may analyse the newest frame first (``daemon.newest_first``),
        so members can be done out of order; a series registers them in the
        order they were acquired.  A member waits in a small buffer until no
        frame is queued or in analysis (whatever is pending may be an earlier
        member), or at most ``series.reorder_s``; then the earliest waiting
        member goes first.
        """
        pending: list[tuple] = []
        closing = False
        while not (self._stop.is_set() and not closing):
            try:
                item = self._queue.get(timeout=0.2)
            except queue.Empty:
                item = False
            if item is None:
                closing = True
            elif item:
                pending.append(item)
            while pending:
                pending.sort(key=lambda it: (it[3] if it[3] is not None else float("inf"),
                                             it[4]))
                head = pending[0]
                if not (closing or self._idle() or
                        time.monotonic() - min(it[4] for it in pending) >= self.cfg.reorder_s):
                    break
                pending.pop(0)
                key, path, fid = head[:3]
                try:
                    self._member(key, path, fid)
                except Exception as exc:  # noqa: BLE001 - one bad member must not end the series
                    self.n_errors += 1
                    log.exception("series %s: member %s failed", key, fid)
                    self._warn(f"series {key}: {fid}: {type(exc).__name__}: {exc}")
                if self._stop.is_set():
                    return
            if closing and not pending:
                return

    def _idle(self) -> bool:
        """No frame queued or in analysis (a waiting member has no earlier one coming)."""
        try:
            c = self.ledger.counts()
        except Exception:  # noqa: BLE001 - a busy ledger: treat as not idle, retry soon
            return False
        return c.get("queued", 0) + c.get("processing", 0) == 0

    def _builder(self, key: str) -> SeriesBuilder:
        b = self._builders.get(key)
        if b is None:
            b = SeriesBuilder(key, self.settings)
            self._rebuild(b)
            self._builders[key] = b
            while len(self._builders) > self.cfg.max_series:
                old, _ = self._builders.popitem(last=False)
                log.info("series %s closed (more than %d series open)", old, self.cfg.max_series)
        self._builders.move_to_end(key)
        return b

    def _member(self, key: str, path: str, fid: str) -> None:
        if any(m["frame_id"] == fid for m in self.ledger.series_members(key)):
            return  # offered before (a restart, or the same frame done again)
        try:
            frame = self._read_member(path, fid)
        except FrameError as exc:
            log.warning("series %s: %s cannot be read again (%s)", key, path, exc)
            self._warn(f"series {key}: {Path(path).name}: {exc.reason}")
            return
        if is_aggregate(frame.meta) or series_key(frame.meta) != key:
            return
        builder = self._builder(key)
        step = builder.add(frame)
        rec = step.record
        self.ledger.add_series_member(series_id=key, frame_id=rec.frame_id, index=rec.index,
                                      accepted=rec.accepted, reason=rec.reason,
                                      message=rec.message, shift_px=rec.shift_px,
                                      residual_chi2=rec.residual_chi2,
                                      line_rms_px=rec.line_rms_px,
                                      payload={"jitter_px": rec.jitter_px,
                                               "t_start_s": rec.t_start_s, "kind": step.kind})
        self.publisher.publish("status", {"event": "series-member", "series_id": key,
                                          "kind": step.kind, **rec.to_json()})
        if not rec.accepted:
            self._warn(f"series {key}: {rec.frame_id} left out ({rec.reason}): {rec.message}")
            log.warning("series %s: %s left out (%s): %s", key, rec.frame_id, rec.reason,
                        rec.message)
        with self._lock:
            st = self._status.setdefault(key, {"series_id": key})
            st.update({"kind": step.kind, "depth": builder.n_members if step.kind == "average"
                       else sum(1 for m in builder.members if m.accepted),
                       "n_excluded": sum(1 for m in builder.members if not m.accepted),
                       "last_member": rec.frame_id})
        if step.aggregate is not None:
            self._write_aggregate(key, step)

    def _rebuild(self, builder: SeriesBuilder) -> None:
        """Bring a series back after a restart (or after it was closed to save memory).

        The members the ledger says were averaged are registered again, in
        their order, from their files: the same frames give the same sum.
        Nothing is recorded or published again.
        """
        done = [m for m in self.ledger.series_members(builder.key) if m["accepted"]]
        if not done:
            return
        paths = {r.frame_id: r.path for r in self.ledger.rows(state="done") if r.frame_id}
        n = 0
        for m in sorted(done, key=lambda m: m["index"]):
            path = paths.get(m["frame_id"])
            if path is None:
                continue
            try:
                builder.add(self._read_member(path, m["frame_id"]))
                n += 1
            except FrameError as exc:
                log.warning("series %s: %s cannot be read again (%s); the series goes on "
                            "without it", builder.key, path, exc)
        log.info("series %s: %d earlier member(s) registered again", builder.key, n)

    def _read_member(self, path: str, fid: str):
        """The member's frame, read again from the session's files.

        One image per file today; a page ``NAME#INDEX`` of a container file
        needs the container's page reader here (by `fid`).
        """
        return read_frame(path, defaults=self._defaults, confine_to=Path(path).parent)

    def _write_aggregate(self, key: str, step) -> None:
        agg = step.aggregate
        block = agg.meta.extra["series"]
        folder = self.series_dir / agg.frame_id.split("~")[0]
        sidecar = {k: v for k, v in agg.meta.to_json().items() if k != "extra"}
        sidecar.pop("series_id", None)
        sidecar.update({"series_role": "aggregate", "series": block})
        path = write_frame(folder, agg.frame_id, np.asarray(agg.pixels), sidecar, fmt="npy")
        sig = self._member_sigma.get(key) or []
        member_sigma = float(np.median(sig)) if sig else None
        self.ledger.add_series_aggregate(aggregate_id=agg.frame_id, series_id=key,
                                         kind=block["kind"], n_members=block["n_members"],
                                         n_excluded=block["n_excluded"], path=str(path),
                                         member_sigma_position_pm=member_sigma,
                                         payload={k: v for k, v in block.items()
                                                  if k != "members"})
        self._register(path)
        log.info("series %s: %s written (%d members)", key, agg.frame_id, block["n_members"])
        with self._lock:
            self._status.setdefault(key, {"series_id": key})["pending"] = agg.frame_id
