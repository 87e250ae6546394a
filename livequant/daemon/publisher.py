"""Events out: the PUB socket and the append-only ``SESSION/events.jsonl``.

Every event is one ``(topic, payload)`` pair.  :meth:`EventPublisher.publish`
appends it to ``events.jsonl`` at once (one JSON object per line:
``{"topic", "time", "seq", "data"}``, flushed) and queues it for the
publisher thread, which alone owns the PUB socket and sends
``[topic, JSON]``.  A PUB socket drops messages for slow subscribers at its
high-water mark; the file keeps every event, so a listener that fell behind
can read what it missed.

The file always holds whole lines: each event is appended with one
``write`` on an ``O_APPEND`` descriptor; a write that fails or comes up short
(disk full) is cut back off and the event kept in memory, to be written, in
order, at the next publish that succeeds, so a full disk neither stops the
daemon nor leaves half a line.  A partial last line left by a daemon killed
mid-write is removed when the file is opened again.
"""

from __future__ import annotations

import contextlib
import errno
import json
import logging
import math
import os
import queue
import threading
import time
from collections import deque
from pathlib import Path

from livequant.daemon._socket_thread import SocketThread
from livequant.daemon.security import apply_curve_server

__all__ = ["EventPublisher", "TOPICS", "EVENTS_NAME"]

log = logging.getLogger(__name__)

TOPICS = ("frame", "flag", "proposal", "scan-request", "status")
EVENTS_NAME = "events.jsonl"
_STOP = object()
#: Events kept in memory while the events file cannot be written (then the oldest go).
MAX_UNWRITTEN = 100_000


def _clean(value):
    """Make `value` strict JSON: NaN and infinities (not JSON) become null."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    return value


class EventPublisher(SocketThread):
    """Publish events on a PUB socket and append them to ``events.jsonl``.

    Parameters
    ----------
    context : zmq.Context or None
        None: file only (no socket), e.g. for tests of the file copy.
    endpoint : str
        Where to bind, e.g. ``tcp://127.0.0.1:5602`` (port 0 = any free port).
    events_file : Path
    """

    thread_name = "publisher"
    label = "events socket"

    def __init__(self, context, endpoint: str, events_file: Path, *, curve=None):
        self.context = context
        self.curve = curve  # CurveServerKeys: subscribers must hold an authorised key
        self._init_thread(endpoint)
        self.events_file = Path(events_file)
        self._queue: queue.Queue = queue.Queue(maxsize=10_000)
        self._lock = threading.Lock()
        self._fd: int | None = os.open(self.events_file, os.O_WRONLY | os.O_APPEND | os.O_CREAT,
                                       0o644)
        self._repair_tail()
        self._unwritten: deque[bytes] = deque()
        self._file_failing = False
        self.n_file_errors = 0   # failed appends (each retried later)
        self.n_file_lost = 0     # events dropped from memory after MAX_UNWRITTEN piled up
        self._seq = 0
        self.n_published = 0
        self.n_socket_dropped = 0

    def start(self, timeout: float = 10.0) -> str | None:
        """Bind the events socket on its thread (None: file only, no context)."""
        if self.context is None:
            return None
        return super().start(timeout)

    def publish(self, topic: str, data: dict) -> None:
        """Append one event to the file and queue it for the socket (thread-safe)."""
        if topic not in TOPICS:
            raise ValueError(f"`topic` must be one of {TOPICS}, got {topic!r}")
        data = _clean(data)
        with self._lock:
            self._seq += 1
            record = {"topic": topic, "time": time.time(), "seq": self._seq, "data": data}
            self._unwritten.append((json.dumps(record, default=str) + "\n").encode("utf-8"))
            self._write_unwritten()
            self.n_published += 1
        if self._thread is not None:
            try:
                self._queue.put_nowait((topic, json.dumps(data, default=str)))
            except queue.Full:
                # The file copy above is the record; the socket is best-effort.
                self.n_socket_dropped += 1

    @property
    def n_unwritten(self) -> int:
        """Events waiting in memory for the events file to be writable again."""
        return len(self._unwritten)

    def _repair_tail(self) -> None:
        """Cut off a partial last line (a daemon killed in the middle of appending it)."""
        size = os.fstat(self._fd).st_size
        if size == 0:
            return
        keep = 0
        with open(self.events_file, "rb") as fh:
            pos = size
            while pos > 0:
                step = min(1 << 16, pos)
                pos -= step
                fh.seek(pos)
                i = fh.read(step).rfind(b"\n")
                if i >= 0:
                    keep = pos + i + 1
                    break
        if keep < size:
            log.warning("%s ended in a partial line of %d bytes (the daemon was stopped while "
                        "writing it); removed", self.events_file, size - keep)
            os.ftruncate(self._fd, keep)

    def _write_unwritten(self) -> None:
        """Append the waiting lines in order; on a failure keep them for the next try (locked)."""
        while self._unwritten and self._fd is not None:
            line = self._unwritten[0]
            start = os.lseek(self._fd, 0, os.SEEK_END)
            try:
                n = os.write(self._fd, line)
                if n != len(line):
                    raise OSError(errno.ENOSPC, f"short write ({n} of {len(line)} bytes)")
            except OSError as exc:
                with contextlib.suppress(OSError):
                    os.ftruncate(self._fd, start)  # never leave half a line
                self.n_file_errors += 1
                if not self._file_failing:
                    self._file_failing = True
                    log.error("cannot append to %s (%s); events are kept in memory and written "
                              "when it works again (free space or fix the folder)",
                              self.events_file, exc.strerror or exc)
                while len(self._unwritten) > MAX_UNWRITTEN:
                    self._unwritten.popleft()
                    self.n_file_lost += 1
                return
            self._unwritten.popleft()
        if self._file_failing:
            self._file_failing = False
            log.warning("%s is writable again; the events held in memory are written",
                        self.events_file)

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
            if self._fd is not None:
                self._write_unwritten()
                if self._unwritten:
                    log.error("%d event(s) could not be written to %s before closing",
                              len(self._unwritten), self.events_file)
                os.close(self._fd)
                self._fd = None

    def is_alive(self) -> bool:
        return self._thread is None or self._thread.is_alive()

    def _make_socket(self, zmq):
        sock = self.context.socket(zmq.PUB)
        apply_curve_server(sock, self.curve)
        # Subscribers only send subscriptions: a few bytes each.
        sock.setsockopt(zmq.MAXMSGSIZE, 4096)
        sock.setsockopt(zmq.LINGER, 500)  # finite: shutdown never hangs on a slow peer
        sock.setsockopt(zmq.SNDHWM, 1000)
        return sock

    def _run(self) -> None:
        import zmq

        # Not the receive loop of SocketThread: this thread sends what is queued.
        sock = self._open(self._make_socket)
        if sock is None:
            return
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
