"""The archive and the live daemon on a Dask LocalCluster of 2 worker processes.

One cluster for the whole module (starting one costs seconds).  Truth: the per-frame
files of ``livequant analyze`` on the same frames (the daemon's numbers, DESIGN.md
"Per-frame outputs"), and the ledger's exactly-once record (done_count == 1).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import h5py
import mrcfile
import numpy as np
import pytest

from livequant.cli import main
from livequant.daemon import Daemon, Ledger
from livequant.frames import write_frame
from livequant.reprocess import reprocess

from tests.daemon._helpers import (fast_settings, lattice_image, running_daemon, sidecar,
                                   wait_for)

SHAPE = (128, 128)
ROOT = Path(__file__).resolve().parents[2]

distributed = pytest.importorskip("distributed")
# workers import this worktree's livequant and the tests' analyses
_ENV = {"PYTHONPATH": os.pathsep.join(p for p in (str(ROOT), os.environ.get("PYTHONPATH")) if p)}


@pytest.fixture(scope="module")
def client():
    from livequant.cluster import local_cluster

    cluster = local_cluster(2, env=_ENV)
    c = distributed.Client(cluster)
    c.wait_for_workers(2, timeout=120)
    yield c
    c.close()
    cluster.close()


def _good(folder: Path, stem: str, seed: int, fmt="tif"):
    return write_frame(folder, stem, lattice_image(SHAPE, seed=seed), sidecar(stem), fmt=fmt)


def _mixed_folder(folder: Path) -> dict:
    """Good frames, bad frames, an EMD stack (and a 4D dataset) and an MRC stack.

    Returns frame id or file stem -> expected state or quarantine reasons.
    """
    folder.mkdir(parents=True)
    expect = {}
    for k, stem in enumerate(("good_a", "good_b")):
        _good(folder, stem, seed=k + 1)
        expect[stem] = "done"
    _good(folder, "good_c", seed=3, fmt="npy")
    expect["good_c"] = "done"
    cut = folder / "cut.tif"
    _good(folder, "cut", seed=4)
    cut.write_bytes(cut.read_bytes()[:3000])
    expect["cut"] = {"truncated", "unreadable"}
    write_frame(folder, "flat", np.full(SHAPE, 700, np.uint16), sidecar("flat"))
    expect["flat"] = {"constant"}
    write_frame(folder, "no_pixel_size", lattice_image(SHAPE, seed=5), None)
    expect["no_pixel_size"] = {"no-pixel-size"}
    # EMD 0.2: a time series of 2 images (dim1 time; 0.2 A steps = 20 pm) and a 4D dataset
    with h5py.File(folder / "series.emd", "w") as fh:
        fh.attrs["version_major"], fh.attrs["version_minor"] = 0, 2
        g = fh.create_group("data/scan")
        g.attrs["emd_group_type"] = 1
        g["data"] = np.stack([lattice_image(SHAPE, seed=10 + k) for k in range(2)])
        for k, (name, units, values) in enumerate(
                [("t", "[s]", [0.0, 4.0]), ("y", "[Å]", [0.0, 0.2]),
                 ("x", "[Å]", [0.0, 0.2])], start=1):
            g[f"dim{k}"] = np.asarray(values)
            g[f"dim{k}"].attrs["name"], g[f"dim{k}"].attrs["units"] = name, units
        d = fh.create_group("data/diffraction")
        d.attrs["emd_group_type"] = 1
        d["data"] = np.zeros((2, 2, 16, 16), np.uint16)
    expect["series#data.scan#0"] = expect["series#data.scan#1"] = "done"
    expect["series.emd#/data/diffraction/data"] = {"not-2d"}
    with mrcfile.new(folder / "tilt.mrcs") as mrc:
        mrc.set_data(np.stack([lattice_image(SHAPE, seed=20 + k) for k in range(2)])
                     .astype(np.float32))
        mrc.voxel_size = 0.2  # Angstrom: 20 pm
    expect["tilt#0"] = expect["tilt#1"] = "done"
    return expect


def _rows(session: Path):
    with Ledger(session / "ledger.sqlite", readonly=True) as led:
        return led.rows()


def _same_outputs(a: Path, b: Path) -> None:
    """Per-frame files equal byte for byte (summary.json: all but the timings)."""
    for name in ("columns.csv", "cells.csv"):
        assert (a / name).read_bytes() == (b / name).read_bytes(), (a, name)
    sa, sb = (json.loads((d / "summary.json").read_text()) for d in (a, b))
    sa.pop("timings_s", None), sb.pop("timings_s", None)
    assert sa == sb


def test_mixed_archive_once_equal_to_analyze_then_nothing_to_do(tmp_path, client, capsys):
    archive, session = tmp_path / "archive", tmp_path / "session"
    expect = _mixed_folder(archive)
    s = reprocess([archive], session, fast_settings(), client=client)
    assert (s.done, s.quarantined, s.failed) == (7, 4, 0), s.to_json()
    # the worker setup capped each worker's compute threads: 2 workers share the cores
    from livequant.pipeline import threads_per_worker
    from tests.cluster._analyses import numba_threads

    assert set(client.run(numba_threads).values()) == {threads_per_worker(2)}

    rows = _rows(session)
    done = {r.frame_id: r for r in rows if r.state == "done"}
    assert set(done) == {k for k, v in expect.items() if v == "done"}
    assert all(r.done_count == 1 and r.attempts == 1 for r in done.values())
    for r in rows:
        if r.state == "quarantined":
            key = r.path[len(str(archive.resolve())) + 1:]  # FILE#KEY, or a plain file
            key = key if "#" in key else Path(key).stem
            assert r.reason in expect[key], (r.path, r.reason, r.message)

    # the same files as `livequant analyze` on the same frames and settings
    out = tmp_path / "analyze"
    files = sorted(str(p) for p in archive.iterdir() if p.suffix != ".json")
    assert main(["analyze", *files, "--out", str(out), "--json"]) == 2  # bad ones: exit 2
    report = json.loads(capsys.readouterr().out)
    analysed = {f["frame_id"] for f in report["frames"] if f.get("status") == "ok"}
    assert analysed == set(done)
    for fid in done:
        _same_outputs(session / "frames" / fid, out / fid)

    # session-wide Parquet tables: every row of every done frame's files, with frame_id
    import pyarrow.parquet as pq

    cells = pq.read_table(session / "cells.parquet")
    cols = pq.read_table(session / "columns.parquet")
    n_cells = sum(len((session / "frames" / f / "cells.csv").read_text().splitlines()) - 1
                  for f in done)
    n_cols = sum(len((session / "frames" / f / "columns.csv").read_text().splitlines()) - 1
                 for f in done)
    assert (cells.num_rows, cols.num_rows) == (n_cells, n_cols) and n_cells > 0
    assert set(cells.column("frame_id").to_pylist()) == set(done)
    one = cols.filter(pq.ParquetFile(session / "columns.parquet").read()
                      .column("frame_id").to_numpy(zero_copy_only=False) == "tilt#1")
    from livequant.outputs import read_columns_csv

    ref = read_columns_csv(session / "frames" / "tilt#1" / "columns.csv")
    np.testing.assert_array_equal(one.column("x_pm").to_numpy(), ref["x_pm"])
    np.testing.assert_array_equal(one.column("sublattice").to_pylist(), ref["sublattice"])

    # the notebook API reads the same tables and the ledger
    import livequant

    sess = livequant.open_session(session, as_pandas=False)
    assert (len(sess.cells), len(sess.columns), len(sess.frames)) == (n_cells, n_cols, 11)
    assert sorted(sess.frames.state) == sorted(r.state for r in rows)
    np.testing.assert_array_equal(sess.columns.x_pm, cols.column("x_pm").to_numpy())

    # a second run does nothing: nothing queued, no file rewritten
    stamps = {p: p.stat().st_mtime_ns for p in (session / "frames").rglob("*.csv")}
    again = reprocess([archive], session, fast_settings(), client=client, tables=False)
    assert (again.queued, again.done, again.quarantined) == (0, 0, 0)
    assert again.skipped_done == 7
    assert {p: p.stat().st_mtime_ns for p in stamps} == stamps
    assert [(r.state, r.done_count, r.version) for r in _rows(session)] == \
        [(r.state, r.done_count, r.version) for r in rows]


def test_worker_killed_mid_task_leaves_every_frame_done_exactly_once(tmp_path, client):
    """The worker analysing `frame_2` dies mid-task (os._exit, as an OOM kill); the
    scheduler runs the task again on the other worker, and the ledger records each
    frame done once, claimed once."""
    archive, session = tmp_path / "archive", tmp_path / "session"
    archive.mkdir()
    marker = tmp_path / "victim-died"
    for k in range(6):
        stem = f"frame_{k}"
        extra = {"die_marker": str(marker)} if k == 2 else {}
        write_frame(archive, stem, lattice_image(SHAPE, seed=40 + k), sidecar(stem, **extra))
    s = reprocess([archive], session, fast_settings(), client=client,
                  analyze="tests.cluster._analyses:dying_analyze", progress=True)
    assert marker.exists(), "the worker was not killed"
    assert int(marker.read_text()) != os.getpid()  # a worker process died, not this one
    assert (s.done, s.quarantined, s.failed) == (6, 0, 0), s.to_json()
    rows = _rows(session)
    assert len(rows) == 6
    assert all(r.state == "done" and r.done_count == 1 and r.attempts == 1 for r in rows)
    assert sorted(p.name for p in (session / "frames").iterdir()) == \
        [f"frame_{k}" for k in range(6)]
    # the nanny restarts the dead worker: the cluster is whole for the next tests
    client.wait_for_workers(2, timeout=120)


def test_reprocess_command_json_force_and_rules(tmp_path, client, capsys):
    archive, session = tmp_path / "archive", tmp_path / "session"
    archive.mkdir()
    for k in range(2):
        _good(archive, f"f{k}", seed=60 + k)
    # a user rule that flags every frame once: the rules ran on every frame analysed
    plugins = tmp_path / "plugins"
    plugins.mkdir()
    (plugins / "every_frame.py").write_text(
        "from livequant import hookimpl\n"
        "from livequant.rules import Flag, Region\n\n"
        "@hookimpl\n"
        "def livequant_frame_rules(view):\n"
        "    return [Flag('seen', 0.5, Region(20.0, 20.0, 10.0, 10.0), 'test', {})]\n")
    config = tmp_path / "user.toml"
    config.write_text(f"[rules]\nplugin_dirs = [{json.dumps(str(plugins))}]\n")
    address = client.scheduler.address
    args = ["reprocess", str(archive / "*.tif"), "--session", str(session),
            "--scheduler", address, "--json", "--rules", "--config", str(config)]
    assert main(args) == 0
    first = json.loads(capsys.readouterr().out)
    assert first["done"] == 2 and first["tables"]["cells"]["rows"] > 0
    assert first["flags"] == 2
    assert main(args) == 0
    assert json.loads(capsys.readouterr().out)["done"] == 0
    assert main([*args, "--force"]) == 0
    forced = json.loads(capsys.readouterr().out)
    assert forced["done"] == 2
    rows = _rows(session)
    assert all(r.done_count == 1 and r.version == 2 for r in rows)
    with Ledger(session / "ledger.sqlite", readonly=True) as led:
        assert list(led.proposals()) == []  # rules write flags, never proposals
        flags = led.flags()
    # first run and --force: each frame flagged once per analysis (the run between skipped)
    assert sorted(f["frame_id"] for f in flags) == ["f0", "f0", "f1", "f1"]
    assert {f["rule"] for f in flags} == {"every_frame"}
    # a source that names nothing is bad input
    assert main(["reprocess", str(tmp_path / "nowhere"), "--session", str(session)]) == 2
    assert "no such file or folder" in capsys.readouterr().err


def test_daemon_with_scheduler_processes_a_burst_exactly_once(tmp_path, client, capsys):
    """A burst in the watched folder, analysed on the cluster; one worker dies mid-task
    (the frame runs again elsewhere), a constant frame is refused where it is read, an
    analysis that raises on a worker is quarantined; every good frame done once."""
    watch, session = tmp_path / "watch", tmp_path / "session"
    watch.mkdir()
    settings = fast_settings(scheduler=client.scheduler.address, ingest_socket=False)
    # frames of one spot: the daemon would measure drift between them and undo it in the
    # later frames, which `livequant analyze` (one frame at a time) cannot; off for the check
    settings = settings.model_copy(update={"analysis": settings.analysis.model_copy(update={
        "scan_drift": settings.analysis.scan_drift.model_copy(update={"enabled": False})})})
    marker = tmp_path / "worker-died"
    d = Daemon(settings, session=session, watch=watch,
               analyze="tests.cluster._analyses:dying_analyze")
    with running_daemon(d):
        assert d.n_workers == 2
        for k in range(6):
            extra = {"die_marker": str(marker)} if k == 1 else {}
            write_frame(watch, f"burst_{k}", lattice_image(SHAPE, seed=80 + k),
                        sidecar(f"burst_{k}", **extra))
        # bad ones: refused when read here, and an analysis that raises on the worker
        write_frame(watch, "flat", np.full(SHAPE, 9, np.uint16), sidecar("flat"))
        write_frame(watch, "broken", lattice_image(SHAPE, seed=90),
                    sidecar("broken", fail_analysis=True))
        wait_for(lambda: d.snapshot.counts.get("done", 0) == 6
                 and d.snapshot.counts.get("quarantined", 0) == 2, timeout_s=180,
                 what="6 frames done, 2 quarantined")
        assert d.decisions.n_frames == 6  # rules ran here, on the daemon's machine
    assert marker.exists(), "no worker was killed"
    rows = _rows(session)
    done = [r for r in rows if r.state == "done"]
    assert len(done) == 6 and all(r.done_count == 1 and r.attempts == 1 for r in done)
    reasons = {r.frame_id or Path(r.path).stem: r.reason for r in rows
               if r.state == "quarantined"}
    assert reasons == {"flat": "constant", "broken": "analysis-error"}
    # (no wait for the killed worker's replacement: nothing after this uses the shared
    # cluster, and on a loaded machine the nanny's restart took over 120 s once)
    out = tmp_path / "analyze"
    assert main(["analyze", str(watch / "burst_3.tif"), "--out", str(out)]) == 0
    _same_outputs(session / "frames" / "burst_3", out / "burst_3")


def test_a_frame_that_kills_every_worker_is_quarantined(tmp_path):
    """A frame whose analysis kills each worker it is given (a crash in native code, an
    out-of-memory kill) is given up by the scheduler after 2 worker deaths
    (KilledWorker) and quarantined as `worker-crash`; the frames beside it are done
    once.  Its own cluster: the shared one is not left restarting workers."""
    import dask

    from livequant.cluster import local_cluster

    archive, session = tmp_path / "archive", tmp_path / "session"
    archive.mkdir()
    for k in range(2):
        _good(archive, f"ok_{k}", seed=70 + k)
    write_frame(archive, "poison", lattice_image(SHAPE, seed=49),
                sidecar("poison", always_die=True))
    with dask.config.set({"distributed.scheduler.allowed-failures": 1}):
        cluster = local_cluster(2, env=_ENV)
    try:
        with distributed.Client(cluster) as c:
            c.wait_for_workers(2, timeout=120)
            s = reprocess([archive], session, fast_settings(), client=c,
                          analyze="tests.cluster._analyses:dying_analyze")
    finally:
        cluster.close()
    assert (s.done, s.quarantined, s.failed) == (2, 1, 0), (s.errors, s.quarantine)
    rows = _rows(session)
    (poison,) = [r for r in rows if r.state == "quarantined"]
    assert poison.path.endswith("poison.tif") and poison.reason == "worker-crash"
    assert poison.done_count == 0 and "died repeatedly" in poison.message
    assert "no other frame" in poison.message   # charged only when it ran alone
    assert all(r.done_count == 1 for r in rows if r.state == "done")
    assert not (session / "frames" / "poison").exists()

