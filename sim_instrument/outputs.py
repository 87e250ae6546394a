"""Where simulated frames go: a watched folder, a ZeroMQ socket, a truth folder.

The folder writer behaves like a careful acquisition program: the image is
written under a hidden temporary name and renamed into place, then the
sidecar likewise (``livequant.frames.write_frame``), so a watcher that waits
for the sidecar never reads a partial frame.  The truth goes to a separate
folder, never the watched one.

The socket sink is a PUSH socket sending ``[b"frame", header, pixels]``
(``livequant.wire.encode_frame_message``).  PUSH rather than PUB because a
frame must not vanish when the receiver is a moment late: PUSH holds it
until a peer is connected (up to the send timeout).
"""

from __future__ import annotations

import logging
import os
from pathlib import Path

import numpy as np

from livequant.frames import write_frame
from livequant.wire import encode_frame_message

__all__ = ["FolderSink", "TruthSink", "ZmqSink", "default_truth_dir"]

log = logging.getLogger("sim_instrument")


def default_truth_dir(out_dir: str | os.PathLike) -> Path:
    """The truth folder beside a watched folder: ``OUT-truth``."""
    out = Path(out_dir)
    return out.with_name(out.name + "-truth")


class FolderSink:
    """Write frames (image then sidecar, each by rename) and their truth.

    Parameters
    ----------
    out_dir : path
        The folder the daemon watches.
    truth_dir : path or None
        Where ground truth goes (default ``OUT-truth``); ``False`` for none.
    fmt : {"tif", "npy"}
    """

    def __init__(self, out_dir, truth_dir=None, fmt: str = "tif"):
        self.out_dir = Path(out_dir)
        if truth_dir is None:
            truth_dir = default_truth_dir(self.out_dir)
        self.truth_dir = Path(truth_dir) if truth_dir is not False else None
        if self.truth_dir is not None and self.truth_dir.resolve() == self.out_dir.resolve():
            raise ValueError(f"`truth_dir` must not be the watched folder {self.out_dir}; the "
                             "daemon would try to read truth files as frames")
        self.fmt = fmt
        self.out_dir.mkdir(parents=True, exist_ok=True)

    def send(self, pixels: np.ndarray, sidecar: dict, truth=None) -> Path:
        # Truth first: whoever sees the frame can already find its truth.
        if truth is not None and self.truth_dir is not None:
            truth.save(self.truth_dir)
        return write_frame(self.out_dir, sidecar["frame_id"], pixels, sidecar, fmt=self.fmt)

    def close(self) -> None:
        pass


class TruthSink:
    """Write only the ground truth (for socket-only sessions)."""

    def __init__(self, truth_dir):
        self.truth_dir = Path(truth_dir)

    def send(self, pixels, sidecar: dict, truth=None) -> None:
        if truth is not None:
            truth.save(self.truth_dir)

    def close(self) -> None:
        pass


class ZmqSink:
    """Send frames as multipart messages on a PUSH socket.

    Parameters
    ----------
    endpoint : str
        e.g. ``tcp://127.0.0.1:5557``.
    bind : bool
        Bind (default) or connect.
    send_timeout_ms : int
        How long a send may wait for a receiver before the frame is reported
        as not delivered (it is still on disk when a folder sink runs too).
    context : zmq.Context, optional
    """

    def __init__(self, endpoint: str, *, bind: bool = True, send_timeout_ms: int = 5000,
                 context=None):
        import zmq

        self._zmq = zmq
        self._own_context = context is None
        self.context = context or zmq.Context()
        self.socket = self.context.socket(zmq.PUSH)
        self.socket.setsockopt(zmq.LINGER, 0)
        self.socket.setsockopt(zmq.SNDTIMEO, int(send_timeout_ms))
        self.socket.setsockopt(zmq.SNDHWM, 100)
        self.endpoint = endpoint
        try:
            if bind:
                self.socket.bind(endpoint)
                # With a wildcard port ("tcp://127.0.0.1:*") report the one chosen.
                self.endpoint = self.socket.getsockopt_string(zmq.LAST_ENDPOINT)
            else:
                self.socket.connect(endpoint)
        except zmq.ZMQError as exc:
            self.close()
            raise ValueError(f"cannot {'bind' if bind else 'connect'} frame socket "
                             f"{endpoint!r}: {exc}") from None
        self.failed = 0

    def send(self, pixels: np.ndarray, sidecar: dict, truth=None) -> bool:
        try:
            self.socket.send_multipart(encode_frame_message(pixels, sidecar), copy=False)
            return True
        except self._zmq.Again:
            self.failed += 1
            log.warning("frame %s not delivered: no receiver on %s within the send timeout",
                        sidecar.get("frame_id"), self.endpoint)
            return False

    def close(self) -> None:
        self.socket.close(linger=0)
        if self._own_context:
            self.context.term()
