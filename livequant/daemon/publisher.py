"""Events out: the PUB socket and the append-only ``SESSION/events.jsonl``.

Every event is one ``(topic, payload)`` pair.  :meth:`EventPublisher.publish`
appends it to ``events.jsonl`` at once (one JSON object per line:
``{"topic", "time", "seq", "data"}``, flushed) and queues it for the
publisher thread, which alone owns the PUB socket and sends
``[topic, JSON]``.  A PUB socket drops messages for slow subscribers at its
high-water mark; the file keeps every event, so a listener that fell behind
can read what it missed.
"""

from __future__ import annotations

import json
import logging
import math
import queue
import threading
import time
from pathlib import Path

__all__ = ["EventPublisher", "TOPICS", "EVENTS_NAME"]

log = logging.getLogger(__name__)

TOPICS = ("frame", "flag", "proposal", "scan-request", "status")
EVENTS_NAME = "events.jsonl"
_STOP = object()


def _clean(value):
    """Make `value` strict JSON: NaN and infinities (not JSON) become null."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    return value


class EventPublisher:
    """Publish events on a PUB socket and append them to ``events.jsonl``.

    Parameters
    ----------
    context : zmq.Context or None
        None: file only (no socket), e.g. for tests of the file copy.
    endpoint : str
        Where to bind, e.g. ``tcp://127.0.0.1:5602`` (port 0 = any free port).
    events_file : Path
    """

    def __init__(self, context, endpoint: str, events_file: Path, *, curve=None):
        self.context = context
        self.curve = curve  # CurveServerKeys: subscribers must hold an authorised key
        self.endpoint = endpoint
        self.events_file = Path(events_file)
        self._queue: queue.Queue = queue.Queue(maxsize=10_000)
        self._lock = threading.Lock()
        self._fh = open(self.events_file, "a", encoding="utf-8")
        self._seq = 0
        self._thread: threading.Thread | None = None
        self._ready = threading.Event()
        self._error: BaseException | None = None
        self.bound_endpoint: str | None = None
        self.n_published = 0
        self.n_socket_dropped = 0

    def start(self, timeout: float = 10.0) -> str | None:
        if self.context is None:
            return None
        self._thread = threading.Thread(target=self._run, name="publisher", daemon=True)
        self._thread.start()
        if not self._ready.wait(timeout):
            raise RuntimeError(f"events socket {self.endpoint}: not ready after {timeout} s")
        if self._error is not None:
            raise self._error
        return self.bound_endpoint

    def publish(self, topic: str, data: dict) -> None:
        """Append one event to the file and queue it for the socket (thread-safe)."""
        if topic not in TOPICS:
            raise ValueError(f"`topic` must be one of {TOPICS}, got {topic!r}")
        data = _clean(data)
        with self._lock:
            self._seq += 1
            record = {"topic": topic, "time": time.time(), "seq": self._seq, "data": data}
            line = json.dumps(record, default=str)
            self._fh.write(line + "\n")
            self._fh.flush()
            self.n_published += 1
        if self._thread is not None:
            try:
                self._queue.put_nowait((topic, json.dumps(data, default=str)))
            except queue.Full:
                # The file copy above is the record; the socket is best-effort.
                self.n_socket_dropped += 1

    def close(self, timeout: float = 5.0) -> None:
        """Send what is queued (up to `timeout`), close the socket and the file."""
        if self._thread is not None and self._thread.is_alive():
            try:
                self._queue.put(_STOP, timeout=timeout)
            except queue.Full:
                log.warning("events queue full at shutdown; socket copies of the last events "
                            "are not sent (they are in %s)", self.events_file)
            self._thread.join(timeout)
        with self._lock:
            if not self._fh.closed:
                self._fh.close()

    def is_alive(self) -> bool:
        return self._thread is None or self._thread.is_alive()

    def _run(self) -> None:
        import zmq

        from livequant.daemon.security import apply_curve_server
        from livequant.daemon.sources import _bind

        try:
            sock = self.context.socket(zmq.PUB)
            apply_curve_server(sock, self.curve)
            # Subscribers only send subscriptions: a few bytes each.
            sock.setsockopt(zmq.MAXMSGSIZE, 4096)
            sock.setsockopt(zmq.LINGER, 500)  # finite: shutdown never hangs on a slow peer
            sock.setsockopt(zmq.SNDHWM, 1000)
            self.bound_endpoint = _bind(sock, self.endpoint)
        except BaseException as exc:  # raised by start()
            self._error = exc
            self._ready.set()
            return
        self._ready.set()
        try:
            while True:
                item = self._queue.get()
                if item is _STOP:
                    break
                topic, payload = item
                try:
                    sock.send_multipart([topic.encode(), payload.encode("utf-8")],
                                        flags=zmq.NOBLOCK)
                except zmq.Again:
                    self.n_socket_dropped += 1
        finally:
            sock.close()
