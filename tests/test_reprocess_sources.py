"""reprocess without a cluster: which files a SOURCE names, the session lock, --force in
the ledger (the cluster runs are in tests/cluster/test_dask.py)."""

from __future__ import annotations

import numpy as np
import pytest

from livequant.daemon.ledger import Ledger
from livequant.daemon.session import SessionLock, SetupError, check_session_folder
from livequant.frames import write_frame
from livequant.reprocess import expand_sources, reprocess

from tests.daemon._helpers import fast_settings, sidecar


def _files(folder):
    folder.mkdir(parents=True, exist_ok=True)
    img = np.arange(64 * 64, dtype=np.uint16).reshape(64, 64)
    write_frame(folder, "a", img, sidecar("a"))
    write_frame(folder, "b", img + 1, None, fmt="npy")
    (folder / "run.h5").write_bytes(b"")          # a container name (its content is the
    (folder / "notes.txt").write_text("x")        # reader's business), not frames:
    (folder / ".hidden.tif").write_bytes(b"")     # text, hidden, a sub-folder
    (folder / "sub").mkdir()
    write_frame(folder / "sub", "c", img + 2, None)


def test_folders_files_and_globs(tmp_path):
    _files(tmp_path / "arch")
    arch = (tmp_path / "arch").resolve()
    assert [p.name for p in expand_sources([arch])] == ["a.tif", "b.npy", "run.h5"]
    assert [p.name for p in expand_sources([str(arch / "**" / "*.tif")])] == ["a.tif", "c.tif"]
    # the same file named twice is listed once; a hidden file named explicitly is taken
    assert len(expand_sources([arch / "a.tif", arch, arch / ".hidden.tif"])) == 4


@pytest.mark.parametrize("source, message", [
    ("missing", "no such file or folder"),
    ("arch/*.mrc", "matches no frame or container file"),
    ("arch/notes.txt", "not a frame or container file"),
])
def test_a_source_naming_nothing_is_a_clear_error(tmp_path, source, message):
    _files(tmp_path / "arch")
    with pytest.raises(ValueError, match=message):
        expand_sources([str(tmp_path / source)])


def test_a_session_in_use_is_refused_before_any_work(tmp_path):
    _files(tmp_path / "arch")
    paths = check_session_folder(tmp_path / "session")
    lock = SessionLock(paths)
    lock.acquire()  # as a running daemon holds it
    try:
        with pytest.raises(SetupError):
            reprocess([tmp_path / "arch"], tmp_path / "session", fast_settings())
    finally:
        lock.release()


def test_force_requeue_is_a_new_version_and_leaves_duplicates_aside(tmp_path):
    with Ledger(tmp_path / "ledger.sqlite") as led:
        kw = dict(origin="archive", sidecar_sha256=None, size_bytes=1, mtime_ns=1,
                  complete_at=0.0)
        first = led.register("/a.tif", sha256="x", **kw)
        twin = led.register("/b.tif", sha256="x", **kw)
        assert twin.action == "duplicate"
        seq, _path, _origin = led.claim(newest_first=False, newer_than_seq=0)
        assert seq == first.seq and led.finish(seq, frame_id="a")
        assert led.force_requeue(first.seq) and not led.force_requeue(twin.seq)
        row = led.row(first.seq)
        assert (row.state, row.version, row.done_count, row.attempts) == ("queued", 2, 0, 0)
        assert led.row(twin.seq).state == "quarantined"
        assert not led.force_requeue(first.seq)  # queued already: nothing to do
