"""Recording a frame file in the ledger: one row per image, containers expanded.

Shared by the daemon's intake thread and ``livequant reprocess``.  A plain
frame file is one ledger row keyed by its path; a container (HDF5/EMD, MRC
stack, multi-page TIFF; :mod:`livequant.containers`) is one row per image,
keyed by its reference ``FILE#KEY``.  The container is hashed once; each
image's hash derives from it and the key (:func:`member_sha256`), so a copy of
a whole container is recognised as a duplicate image by image.
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass
from pathlib import Path

from livequant.containers import container_members, member_sha256, split_ref
from livequant.frames import sidecar_path

__all__ = ["file_sha256", "register_file", "scan_file", "record_scan", "FileScan"]


def file_sha256(path: str | os.PathLike) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


@dataclass(frozen=True)
class FileScan:
    """What :func:`scan_file` found: the images of a file and the hashes to record."""

    path: Path
    refs: tuple[str, ...]
    sha256: str
    sidecar_sha256: str | None
    size_bytes: int
    mtime_ns: int


def scan_file(ledger, path: str | os.PathLike, *, force: bool = False) -> FileScan | None:
    """Read what recording `path` needs (its images, its hash); None when nothing changed.

    Only reads the ledger, so several files may be scanned at once (threads) and
    recorded in order afterwards with :func:`record_scan`.  Nothing is hashed
    when every image is already recorded with this size, modification time and
    sidecar (the common case of a re-listing), unless `force`.

    Raises
    ------
    FileNotFoundError
        When the file vanished.
    """
    path = Path(path)
    st = path.stat()
    side = sidecar_path(path)
    side_sha = file_sha256(side) if side.exists() else None
    refs = tuple(container_members(path))
    if not force and all(ledger.known(r) == (st.st_size, st.st_mtime_ns, side_sha)
                         for r in refs):
        return None
    return FileScan(path, refs, file_sha256(path), side_sha, st.st_size, st.st_mtime_ns)


def record_scan(ledger, scan: FileScan | None, *, origin: str, complete_at: float,
                force: bool = False) -> list:
    """Record the images of a scanned file; return ``[(ref, Registration), ...]``.

    With `force`, images already done or quarantined are queued again
    (``livequant reprocess --force``).
    """
    if scan is None:
        return []
    out = []
    for ref in scan.refs:
        key = split_ref(ref)[1]
        reg = ledger.register(ref, origin=origin,
                              sha256=scan.sha256 if key is None
                              else member_sha256(scan.sha256, key),
                              sidecar_sha256=scan.sidecar_sha256, size_bytes=scan.size_bytes,
                              mtime_ns=scan.mtime_ns, complete_at=complete_at)
        if force and reg.action == "unchanged" and ledger.force_requeue(reg.seq):
            reg = type(reg)("requeued", reg.seq)
        out.append((ref, reg))
    return out


def register_file(ledger, path: str | os.PathLike, *, origin: str, complete_at: float,
                  force: bool = False) -> list:
    """Record every image of the file `path`; return ``[(ref, Registration), ...]``.

    :func:`scan_file` then :func:`record_scan`; the list is empty when the file was
    recorded before and has not changed.

    Raises
    ------
    FileNotFoundError
        When the file vanished before it could be recorded.
    """
    return record_scan(ledger, scan_file(ledger, path, force=force), origin=origin,
                       complete_at=complete_at, force=force)
