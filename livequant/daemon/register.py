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
from pathlib import Path

from livequant.containers import container_members, member_sha256, split_ref
from livequant.frames import sidecar_path

__all__ = ["file_sha256", "register_file"]


def file_sha256(path: str | os.PathLike) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def register_file(ledger, path: str | os.PathLike, *, origin: str, complete_at: float,
                  force: bool = False) -> list:
    """Record every image of the file `path`; return ``[(ref, Registration), ...]``.

    Nothing is hashed when every image is already recorded with this file size,
    modification time and sidecar (the common case of a re-listing); then the
    list is empty.  With `force`, images already done or quarantined are queued
    again (``livequant reprocess --force``).

    Raises
    ------
    FileNotFoundError
        When the file vanished before it could be recorded.
    """
    path = Path(path)
    st = path.stat()
    side = sidecar_path(path)
    side_sha = file_sha256(side) if side.exists() else None
    refs = container_members(path)
    signature = (st.st_size, st.st_mtime_ns, side_sha)
    if not force and all(ledger.known(r) == signature for r in refs):
        return []
    sha = file_sha256(path)
    out = []
    for ref in refs:
        key = split_ref(ref)[1]
        reg = ledger.register(ref, origin=origin,
                              sha256=sha if key is None else member_sha256(sha, key),
                              sidecar_sha256=side_sha, size_bytes=st.st_size,
                              mtime_ns=st.st_mtime_ns, complete_at=complete_at)
        if force and reg.action == "unchanged" and ledger.force_requeue(reg.seq):
            reg = type(reg)("requeued", reg.seq)
        out.append((ref, reg))
    return out
