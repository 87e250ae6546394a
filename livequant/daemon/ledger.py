"""The session ledger: every frame seen, every flag, proposal and decision.

``SESSION/ledger.sqlite`` is an SQLite database in WAL mode (readers such as
``livequant status`` never block the daemon, and a crash loses at most the
transaction in progress).  The ledger *is* the frame queue: a frame is
``queued`` when it is known to be complete on disk, ``processing`` while a
worker has it, ``done`` once its outputs are written, and ``quarantined``
(with a reason) when it cannot be analysed.  Nothing is ever deleted.

State changes of one frame::

    (new) --register--> queued --claim--> processing --finish--> done
                          ^                   |    \\--quarantine--> quarantined
                          |---- requeue ------/
    done/quarantined --register (content changed)--> queued (version + 1)

On start-up :meth:`Ledger.recover` puts every ``processing`` frame back to
``queued``: the daemon stopped before its outputs were known to be written.

One :class:`Ledger` holds one connection guarded by a lock, so the main loop
and the intake thread may both use it.

Tables
------
frames
    One row per image path.  ``sha256`` is the hash of the image bytes (spots
    the same image under another name), ``sidecar_sha256`` that of the sidecar
    (a changed sidecar changes the metadata, so the frame runs again).
    ``version`` counts content changes of the path, ``done_count`` how often
    the current version reached ``done`` (1 at most, checked by the tests),
    ``attempts`` how often it was handed to a worker.  ``complete_at`` is
    when the frame was found complete on disk, ``finished_at`` when it was
    done; ``published_at`` when its summary went out on the events socket.
flags, proposals, decisions
    Filled by the decision loop: ``flags`` one row per rule finding on a frame,
    ``proposals`` one row per proposed scan region (its ``state`` goes
    ``open`` -> ``accepted`` / ``rejected`` / ``expired``), ``decisions`` one
    row per operator (or auto-accept) decision on a proposal.  Regions and
    free-form payloads are JSON text.
drift
    One row per drift measurement: the specimen drift ``d(t)`` (stage
    coordinates, nm, relative to the session's first frame) at a frame's
    acquisition time, with the earlier frame it was measured against.
series_members, series_aggregates (schema 2)
    One row per frame offered to a series (fast-scan series or orthogonal
    pair): whether it went into the average, or why not, its shift and
    registration residual; one row per aggregate analysed (the running
    average at N members, or a corrected pair) with its precision and the
    gain over a single member.  ``frames.series_id`` marks members (and the
    aggregates, which are frames of the session too).  A schema-1 ledger is
    migrated in place when a daemon opens it.
"""

from __future__ import annotations

import contextlib
import json
import sqlite3
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

__all__ = ["Ledger", "LedgerRow", "STATES", "SCHEMA_VERSION", "LEDGER_NAME", "Registration"]

LEDGER_NAME = "ledger.sqlite"
SCHEMA_VERSION = 2
_CHANGED = "changed-while-processing"  # transient `reason` of a processing frame
STATES = ("queued", "processing", "done", "quarantined")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (
    key TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS frames (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,      -- order in which frames became known
    path TEXT NOT NULL UNIQUE,
    origin TEXT NOT NULL,                       -- 'folder' or 'socket'
    frame_id TEXT,                              -- known once read
    sha256 TEXT NOT NULL,
    sidecar_sha256 TEXT,
    size_bytes INTEGER NOT NULL,
    mtime_ns INTEGER NOT NULL,
    state TEXT NOT NULL CHECK (state IN ('queued', 'processing', 'done', 'quarantined')),
    reason TEXT,
    message TEXT,
    version INTEGER NOT NULL DEFAULT 1,
    attempts INTEGER NOT NULL DEFAULT 0,
    done_count INTEGER NOT NULL DEFAULT 0,
    complete_at REAL NOT NULL,                  -- unix time found complete on disk
    queued_at REAL NOT NULL,
    started_at REAL,
    finished_at REAL,
    read_s REAL,
    analyze_s REAL,
    write_s REAL,
    published_at REAL,
    series_id TEXT                              -- member (or aggregate) of this series
);
CREATE INDEX IF NOT EXISTS frames_by_state ON frames (state, seq);
CREATE INDEX IF NOT EXISTS frames_by_sha ON frames (sha256);
CREATE TABLE IF NOT EXISTS flags (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    frame_id TEXT NOT NULL,
    rule TEXT NOT NULL,
    kind TEXT NOT NULL,
    score REAL,
    region_json TEXT,
    payload_json TEXT,
    created_at REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS proposals (
    id TEXT PRIMARY KEY,
    frame_id TEXT,
    score REAL,
    region_json TEXT NOT NULL,
    state TEXT NOT NULL DEFAULT 'open'
        CHECK (state IN ('open', 'accepted', 'rejected', 'expired')),
    payload_json TEXT,
    created_at REAL NOT NULL,
    updated_at REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS decisions (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    proposal_id TEXT NOT NULL REFERENCES proposals (id),
    decision TEXT NOT NULL CHECK (decision IN ('accept', 'reject', 'expire')),
    decided_by TEXT NOT NULL,                   -- 'operator', 'auto', ...
    note TEXT,
    decided_at REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS series_members (
    series_id TEXT NOT NULL,
    frame_id TEXT NOT NULL,
    idx INTEGER NOT NULL,                       -- order offered to the series
    accepted INTEGER NOT NULL,                  -- 1: in the average
    reason TEXT,                                -- why not: jump, residual, rotation, ...
    message TEXT,
    shift_row_px REAL,
    shift_col_px REAL,
    residual_chi2 REAL,
    line_rms_px REAL,
    payload_json TEXT,
    created_at REAL NOT NULL,
    PRIMARY KEY (series_id, frame_id)
);
CREATE TABLE IF NOT EXISTS series_aggregates (
    aggregate_id TEXT PRIMARY KEY,              -- the aggregate's frame id
    series_id TEXT NOT NULL,
    kind TEXT NOT NULL,                         -- 'average' or 'orthogonal'
    n_members INTEGER NOT NULL,
    n_excluded INTEGER NOT NULL,
    path TEXT,                                  -- the aggregate image in the session
    median_sigma_position_pm REAL,              -- once analysed
    member_sigma_position_pm REAL,              -- median over its members' own frames
    precision_gain REAL,                        -- member / aggregate
    payload_json TEXT,
    created_at REAL NOT NULL,
    analysed_at REAL
);
CREATE TABLE IF NOT EXISTS drift (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    frame_id TEXT NOT NULL,                     -- the frame whose drift was measured
    ref_frame_id TEXT,                          -- the earlier frame it was registered against
    t REAL NOT NULL,                            -- acquisition time of frame_id, unix seconds
    dx_nm REAL NOT NULL,                        -- specimen drift d(t) since the session's first
    dy_nm REAL NOT NULL,                        -- frame, stage coordinates, nanometres
    sigma_nm REAL,                              -- one-sigma uncertainty of each component
    payload_json TEXT,
    created_at REAL NOT NULL
);
"""


@dataclass(frozen=True)
class LedgerRow:
    """One row of the ``frames`` table."""

    seq: int
    path: str
    origin: str
    frame_id: str | None
    sha256: str
    state: str
    reason: str | None
    message: str | None
    version: int
    attempts: int
    done_count: int
    complete_at: float
    queued_at: float
    started_at: float | None
    finished_at: float | None
    published_at: float | None


_ROW_FIELDS = ", ".join(LedgerRow.__dataclass_fields__)


@dataclass(frozen=True)
class Registration:
    """What :meth:`Ledger.register` did with a frame.

    ``action`` is ``"queued"`` (new frame), ``"requeued"`` (content changed),
    ``"unchanged"`` (known, same content: nothing to do) or ``"duplicate"``
    (the same image under another path: quarantined with reason ``duplicate``).
    """

    action: str
    seq: int
    duplicate_of: str | None = None


class Ledger:
    """The SQLite ledger of one session.

    Parameters
    ----------
    path : path-like
        The database file (created with its tables when missing).
    readonly : bool
        Open for reading only (``livequant status`` while no daemon runs).
    """

    def __init__(self, path: str | Path, *, readonly: bool = False):
        self.path = Path(path)
        self._lock = threading.Lock()
        if readonly:
            if not self.path.exists():
                raise FileNotFoundError(f"{self.path}: no ledger here; is this a session folder?")
            uri = f"file:{self.path}?mode=ro"
            self._db = sqlite3.connect(uri, uri=True, check_same_thread=False, timeout=10)
        else:
            self._db = sqlite3.connect(self.path, check_same_thread=False, timeout=30,
                                       isolation_level=None)
            # WAL: readers do not block the writer; synchronous=NORMAL is durable
            # against a crash of the process (not of the OS), the case that matters here.
            self._db.execute("PRAGMA journal_mode=WAL")
            self._db.execute("PRAGMA synchronous=NORMAL")
            self._db.executescript(_SCHEMA)
            self._db.execute("INSERT OR IGNORE INTO meta VALUES ('schema_version', ?)",
                             (str(SCHEMA_VERSION),))
            self._migrate()
        found = self._db.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
        if readonly and found is not None and int(found[0]) == 1:
            found = (str(SCHEMA_VERSION),)  # read as is; the series tables are simply absent
        if found is None or int(found[0]) != SCHEMA_VERSION:
            raise RuntimeError(f"{self.path}: ledger schema version {found and found[0]} is not "
                               f"{SCHEMA_VERSION}; use a new session folder for this version")

    def _migrate(self) -> None:
        """Bring an older ledger up to :data:`SCHEMA_VERSION` (additive changes only)."""
        found = self._db.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
        if found is None or int(found[0]) >= SCHEMA_VERSION:
            return
        if int(found[0]) == 1:
            # 1 -> 2: the series tables (created above, IF NOT EXISTS) and frames.series_id
            cols = {r[1] for r in self._db.execute("PRAGMA table_info(frames)")}
            self._db.execute("BEGIN IMMEDIATE")
            try:
                if "series_id" not in cols:
                    self._db.execute("ALTER TABLE frames ADD COLUMN series_id TEXT")
                self._db.execute("UPDATE meta SET value=? WHERE key='schema_version'",
                                 (str(SCHEMA_VERSION),))
            except BaseException:
                self._db.execute("ROLLBACK")
                raise
            self._db.execute("COMMIT")

    def _has_table(self, name: str) -> bool:
        return self._one("SELECT 1 FROM sqlite_master WHERE type='table' AND name=?",
                         (name,)) is not None

    # ------------------------------------------------------------- plumbing

    def close(self) -> None:
        with self._lock:
            self._db.close()

    def __enter__(self) -> "Ledger":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    @contextlib.contextmanager
    def _transaction(self):
        """One write transaction under the lock (BEGIN IMMEDIATE: take the write lock now)."""
        with self._lock:
            self._db.execute("BEGIN IMMEDIATE")
            try:
                yield self._db
            except BaseException:
                self._db.execute("ROLLBACK")
                raise
            self._db.execute("COMMIT")

    def _tx(self, sql_params: list[tuple[str, tuple]]) -> None:
        with self._transaction() as db:
            for sql, params in sql_params:
                db.execute(sql, params)

    def _one(self, sql: str, params: tuple = ()) -> tuple | None:
        with self._lock:
            return self._db.execute(sql, params).fetchone()

    def _all(self, sql: str, params: tuple = ()) -> list[tuple]:
        with self._lock:
            return self._db.execute(sql, params).fetchall()

    # ------------------------------------------------------------- frames

    def known(self, path: str) -> tuple[int, int, str | None] | None:
        """``(size_bytes, mtime_ns, sidecar_sha256)`` of a known path, else None.

        Lets a re-listing skip hashing files it has already recorded.
        """
        return self._one("SELECT size_bytes, mtime_ns, sidecar_sha256 FROM frames WHERE path=?",
                         (path,))

    def register(self, path: str, *, origin: str, sha256: str, sidecar_sha256: str | None,
                 size_bytes: int, mtime_ns: int, complete_at: float) -> Registration:
        """Record a frame found complete; queue it unless its content is already known."""
        with self._transaction():
            return self._register_locked(path, origin, sha256, sidecar_sha256, size_bytes,
                                         mtime_ns, complete_at, time.time())

    def _register_locked(self, path, origin, sha256, sidecar_sha256, size_bytes, mtime_ns,
                         complete_at, now) -> Registration:
        db = self._db
        row = db.execute("SELECT seq, sha256, sidecar_sha256, state FROM frames WHERE path=?",
                         (path,)).fetchone()
        if row is not None:
            seq, old_sha, old_side, state = row
            if old_sha == sha256 and old_side == sidecar_sha256:
                # Same content; only the file's timestamps moved.  Remember them so a
                # later re-scan does not hash the file again.
                db.execute("UPDATE frames SET size_bytes=?, mtime_ns=? WHERE seq=?",
                           (size_bytes, mtime_ns, seq))
                return Registration("unchanged", seq)
            if state in ("queued", "processing"):
                # Not analysed yet: the worker reads the file when it runs, so record the
                # new content and keep the frame's place in the queue.  Being analysed:
                # the worker may have read the old content, so `finish` queues it again.
                db.execute("UPDATE frames SET sha256=?, sidecar_sha256=?, size_bytes=?, "
                           "mtime_ns=?, version=version+1, reason=? WHERE seq=?",
                           (sha256, sidecar_sha256, size_bytes, mtime_ns,
                            _CHANGED if state == "processing" else None, seq))
                return Registration("unchanged", seq)
            db.execute(
                "UPDATE frames SET sha256=?, sidecar_sha256=?, size_bytes=?, mtime_ns=?, "
                "state='queued', reason=NULL, message=NULL, version=version+1, attempts=0, "
                "done_count=0, complete_at=?, queued_at=?, started_at=NULL, finished_at=NULL, "
                "published_at=NULL WHERE seq=?",
                (sha256, sidecar_sha256, size_bytes, mtime_ns, complete_at, now, seq))
            return Registration("requeued", seq)
        twin = db.execute("SELECT path FROM frames WHERE sha256=? AND path<>? ORDER BY seq "
                          "LIMIT 1", (sha256, path)).fetchone()
        state, reason, message = "queued", None, None
        if twin is not None:
            state, reason = "quarantined", "duplicate"
            message = f"{path}: same image bytes as {twin[0]}, which is already in the session"
        cur = db.execute(
            "INSERT INTO frames (path, origin, sha256, sidecar_sha256, size_bytes, mtime_ns, "
            "state, reason, message, complete_at, queued_at) VALUES (?,?,?,?,?,?,?,?,?,?,?)",
            (path, origin, sha256, sidecar_sha256, size_bytes, mtime_ns, state, reason, message,
             complete_at, now))
        if twin is not None:
            return Registration("duplicate", cur.lastrowid, duplicate_of=twin[0])
        return Registration("queued", cur.lastrowid)

    def force_requeue(self, seq: int) -> bool:
        """Queue a ``done`` or ``quarantined`` frame again as a new version (reprocess --force).

        Like a change of content: ``version`` + 1 and ``done_count`` back to 0, so
        "done exactly once" still holds per version.  Duplicates stay set aside.
        Returns whether the frame was queued.
        """
        with self._transaction() as db:
            cur = db.execute(
                "UPDATE frames SET state='queued', reason=NULL, message=NULL, "
                "version=version+1, attempts=0, done_count=0, queued_at=?, started_at=NULL, "
                "finished_at=NULL, published_at=NULL WHERE seq=? AND state IN ('done', "
                "'quarantined') AND COALESCE(reason, '')<>'duplicate'", (time.time(), seq))
            return cur.rowcount == 1

    def recover(self) -> int:
        """Put frames left ``processing`` by a stopped daemon back in the queue; return how many."""
        with self._lock:
            cur = self._db.execute("UPDATE frames SET state='queued', started_at=NULL "
                                   "WHERE state='processing'")
            return cur.rowcount

    def claim(self, *, newest_first: bool, newer_than_seq: int) -> tuple[int, str, str] | None:
        """Take the next queued frame and mark it ``processing``.

        With `newest_first`, the most recently queued frame goes first when it is
        newer than `newer_than_seq` (the newest frame claimed so far); otherwise,
        and always when nothing newer arrived, the oldest.  Returns
        ``(seq, path, origin)`` or None when the queue is empty.
        """
        with self._transaction() as db:
            row = None
            if newest_first:
                row = db.execute("SELECT seq, path, origin FROM frames WHERE state='queued' "
                                 "AND seq>? ORDER BY seq DESC LIMIT 1",
                                 (newer_than_seq,)).fetchone()
            if row is None:
                row = db.execute("SELECT seq, path, origin FROM frames WHERE state='queued' "
                                 "ORDER BY seq LIMIT 1").fetchone()
            if row is not None:
                db.execute("UPDATE frames SET state='processing', attempts=attempts+1, "
                           "started_at=? WHERE seq=?", (time.time(), row[0]))
        return row

    def requeue(self, seq: int, *, uncharge: bool = False) -> None:
        """Give a ``processing`` frame back to the queue (shutdown, crashed worker).

        With `uncharge` the attempt counted when it was claimed is taken back: the
        frame was not to blame (a worker died while it shared the pool with others).
        """
        dec = ", attempts=MAX(attempts-1, 0)" if uncharge else ""
        self._tx([(f"UPDATE frames SET state='queued', started_at=NULL{dec} WHERE seq=? AND "
                   "state='processing'", (seq,))])

    def claim_seq(self, seq: int) -> tuple[int, str, str] | None:
        """Claim frame `seq` if it is queued (as :meth:`claim`); None otherwise."""
        with self._transaction() as db:
            row = db.execute("SELECT seq, path, origin FROM frames WHERE state='queued' "
                             "AND seq=?", (seq,)).fetchone()
            if row is not None:
                db.execute("UPDATE frames SET state='processing', attempts=attempts+1, "
                           "started_at=? WHERE seq=?", (time.time(), row[0]))
        return row

    def finish(self, seq: int, *, frame_id: str, read_s: float | None = None,
               analyze_s: float | None = None, write_s: float | None = None) -> bool:
        """Mark a frame ``done``.  Call only after its output files are in place.

        Returns False, and queues the frame again instead, when its file changed
        while it was being analysed (the result may describe the old content).
        """
        return self._close_out(
            seq, "UPDATE frames SET state='done', frame_id=?, reason=NULL, message=NULL, "
                 "done_count=done_count+1, finished_at=?, read_s=?, analyze_s=?, write_s=? "
                 "WHERE seq=?", (frame_id, time.time(), read_s, analyze_s, write_s, seq))

    def quarantine(self, seq: int, *, reason: str, message: str,
                   frame_id: str | None = None) -> bool:
        """Set a frame aside with a short `reason` tag and a readable `message`.

        Like :meth:`finish`, returns False and queues the frame again when its file
        changed while it was being analysed (a half-written file, since completed).
        """
        return self._close_out(
            seq, "UPDATE frames SET state='quarantined', reason=?, message=?, "
                 "frame_id=COALESCE(?, frame_id), finished_at=? WHERE seq=?",
            (reason, message, frame_id, time.time(), seq))

    def _close_out(self, seq: int, sql: str, params: tuple) -> bool:
        with self._transaction() as db:
            row = db.execute("SELECT reason FROM frames WHERE seq=?", (seq,)).fetchone()
            stale = row is not None and row[0] == _CHANGED
            if stale:
                db.execute("UPDATE frames SET state='queued', reason=NULL, started_at=NULL "
                           "WHERE seq=?", (seq,))
            else:
                db.execute(sql, params)
        return not stale

    def mark_published(self, seq: int) -> None:
        self._tx([("UPDATE frames SET published_at=? WHERE seq=?", (time.time(), seq))])

    def unpublished_done(self) -> list[tuple[int, str]]:
        """``(seq, frame_id)`` of done frames whose summary never went out (crash in between)."""
        return self._all("SELECT seq, frame_id FROM frames WHERE state='done' AND "
                         "published_at IS NULL ORDER BY seq")

    def counts(self) -> dict[str, int]:
        """Number of frames in each state (every state present, zero when empty)."""
        out = dict.fromkeys(STATES, 0)
        for state, n in self._all("SELECT state, COUNT(*) FROM frames GROUP BY state"):
            out[state] = n
        return out

    def oldest_queued_complete_at(self) -> float | None:
        row = self._one("SELECT MIN(complete_at) FROM frames WHERE state IN "
                        "('queued', 'processing')")
        return None if row is None else row[0]

    def row(self, seq: int) -> LedgerRow | None:
        found = self._one(f"SELECT {_ROW_FIELDS} FROM frames WHERE seq=?", (seq,))
        return None if found is None else LedgerRow(*found)

    def rows(self, *, state: str | None = None) -> list[LedgerRow]:
        if state is not None and state not in STATES:
            raise ValueError(f"`state` must be one of {STATES}, got {state!r}")
        if state is None:
            found = self._all(f"SELECT {_ROW_FIELDS} FROM frames ORDER BY seq")
        else:
            found = self._all(f"SELECT {_ROW_FIELDS} FROM frames WHERE state=? ORDER BY seq",
                              (state,))
        return [LedgerRow(*r) for r in found]

    def recent_quarantined(self, limit: int = 5) -> list[tuple[str, str, str]]:
        """``(path, reason, message)`` of the latest quarantined frames, newest first."""
        return self._all("SELECT path, reason, message FROM frames WHERE state='quarantined' "
                         "ORDER BY finished_at DESC LIMIT ?", (limit,))

    # ------------------------------------------------- decision-loop tables

    def add_flag(self, *, frame_id: str, rule: str, kind: str, score: float | None = None,
                 region: dict | None = None, payload: dict | None = None) -> int:
        with self._lock:
            cur = self._db.execute(
                "INSERT INTO flags (frame_id, rule, kind, score, region_json, payload_json, "
                "created_at) VALUES (?,?,?,?,?,?,?)",
                (frame_id, rule, kind, score, _json_or_none(region), _json_or_none(payload),
                 time.time()))
            return cur.lastrowid

    def add_proposal(self, proposal_id: str, *, region: dict, frame_id: str | None = None,
                     score: float | None = None, payload: dict | None = None) -> None:
        now = time.time()
        self._tx([("INSERT INTO proposals (id, frame_id, score, region_json, payload_json, "
                   "created_at, updated_at) VALUES (?,?,?,?,?,?,?)",
                   (proposal_id, frame_id, score, json.dumps(region), _json_or_none(payload),
                    now, now))])

    def decide(self, proposal_id: str, decision: str, *, decided_by: str = "operator",
               note: str | None = None) -> None:
        """Record a decision and move the proposal to its new state in one transaction."""
        new_state = {"accept": "accepted", "reject": "rejected", "expire": "expired"}.get(decision)
        if new_state is None:
            raise ValueError(f"`decision` must be 'accept', 'reject' or 'expire', got {decision!r}")
        if self._one("SELECT 1 FROM proposals WHERE id=?", (proposal_id,)) is None:
            raise KeyError(f"no proposal with id {proposal_id!r}")
        now = time.time()
        self._tx([
            ("INSERT INTO decisions (proposal_id, decision, decided_by, note, decided_at) "
             "VALUES (?,?,?,?,?)", (proposal_id, decision, decided_by, note, now)),
            ("UPDATE proposals SET state=?, updated_at=? WHERE id=?", (new_state, now,
                                                                       proposal_id)),
        ])

    def add_drift(self, *, frame_id: str, t: float, dx_nm: float, dy_nm: float,
                  sigma_nm: float | None = None, ref_frame_id: str | None = None,
                  payload: dict | None = None) -> int:
        """Record the specimen drift measured on `frame_id` (acquired at unix time `t`)."""
        with self._lock:
            cur = self._db.execute(
                "INSERT INTO drift (frame_id, ref_frame_id, t, dx_nm, dy_nm, sigma_nm, "
                "payload_json, created_at) VALUES (?,?,?,?,?,?,?,?)",
                (frame_id, ref_frame_id, float(t), float(dx_nm), float(dy_nm),
                 None if sigma_nm is None else float(sigma_nm), _json_or_none(payload),
                 time.time()))
            return cur.lastrowid

    def drift(self) -> list[dict]:
        """Every drift measurement in acquisition order."""
        rows = self._all("SELECT frame_id, ref_frame_id, t, dx_nm, dy_nm, sigma_nm, "
                         "payload_json FROM drift ORDER BY t, id")
        return [{"frame_id": f, "ref_frame_id": r, "t": t, "dx_nm": dx, "dy_nm": dy,
                 "sigma_nm": s, "payload": None if p is None else json.loads(p)}
                for f, r, t, dx, dy, s, p in rows]

    def flags(self, *, frame_id: str | None = None) -> list[dict]:
        """Every flag (of one frame, or all) in the order they were raised."""
        sql = ("SELECT id, frame_id, rule, kind, score, region_json, payload_json, created_at "
               "FROM flags")
        rows = (self._all(sql + " WHERE frame_id=? ORDER BY id", (frame_id,)) if frame_id
                else self._all(sql + " ORDER BY id"))
        return [{"id": i, "frame_id": f, "rule": r, "kind": k, "score": s,
                 "region": None if g is None else json.loads(g),
                 "payload": None if p is None else json.loads(p), "created_at": c}
                for i, f, r, k, s, g, p, c in rows]

    def decisions(self) -> list[dict]:
        """Every decision on a proposal, oldest first."""
        rows = self._all("SELECT id, proposal_id, decision, decided_by, note, decided_at "
                         "FROM decisions ORDER BY id")
        return [{"id": i, "proposal_id": p, "decision": d, "decided_by": b, "note": n,
                 "decided_at": t} for i, p, d, b, n, t in rows]

    _PROPOSAL_SQL = ("SELECT id, frame_id, score, region_json, state, payload_json, created_at, "
                     "updated_at FROM proposals")

    def proposals(self, *, state: str | None = None) -> Iterator[dict]:
        rows = (self._all(self._PROPOSAL_SQL + " WHERE state=? ORDER BY created_at", (state,))
                if state else self._all(self._PROPOSAL_SQL + " ORDER BY created_at"))
        for row in rows:
            yield _proposal_dict(row)

    def proposal(self, proposal_id: str) -> dict | None:
        """One proposal by its id (the primary key), or None."""
        row = self._one(self._PROPOSAL_SQL + " WHERE id=?", (proposal_id,))
        return None if row is None else _proposal_dict(row)


    # ------------------------------------------------------------- series

    def add_series_member(self, *, series_id: str, frame_id: str, index: int, accepted: bool,
                          reason: str | None = None, message: str | None = None,
                          shift_px=None, residual_chi2: float | None = None,
                          line_rms_px: float | None = None, payload: dict | None = None) -> None:
        """Record what a series did with one frame (and mark the frame as its member)."""
        shift = (None, None) if shift_px is None else (float(shift_px[0]), float(shift_px[1]))
        self._tx([
            ("INSERT OR REPLACE INTO series_members (series_id, frame_id, idx, accepted, reason, "
             "message, shift_row_px, shift_col_px, residual_chi2, line_rms_px, payload_json, "
             "created_at) VALUES (?,?,?,?,?,?,?,?,?,?,?,?)",
             (series_id, frame_id, int(index), 1 if accepted else 0, reason, message, *shift,
              residual_chi2, line_rms_px, _json_or_none(payload), time.time())),
            ("UPDATE frames SET series_id=? WHERE frame_id=?", (series_id, frame_id)),
        ])

    def add_series_aggregate(self, *, aggregate_id: str, series_id: str, kind: str,
                             n_members: int, n_excluded: int, path: str | None = None,
                             member_sigma_position_pm: float | None = None,
                             payload: dict | None = None) -> None:
        self._tx([("INSERT OR REPLACE INTO series_aggregates (aggregate_id, series_id, kind, "
                   "n_members, n_excluded, path, member_sigma_position_pm, payload_json, "
                   "created_at) VALUES (?,?,?,?,?,?,?,?,?)",
                   (aggregate_id, series_id, kind, int(n_members), int(n_excluded), path,
                    member_sigma_position_pm, _json_or_none(payload), time.time()))])

    def series_analysed(self, aggregate_id: str, *, median_sigma_position_pm: float | None,
                        series_id: str) -> dict | None:
        """Record an aggregate's precision once analysed; return its row (with the gain)."""
        with self._transaction() as db:
            row = db.execute("SELECT member_sigma_position_pm FROM series_aggregates WHERE "
                             "aggregate_id=?", (aggregate_id,)).fetchone()
            if row is None:
                return None
            gain = None
            if median_sigma_position_pm and row[0]:
                gain = float(row[0]) / float(median_sigma_position_pm)
            db.execute("UPDATE series_aggregates SET median_sigma_position_pm=?, "
                       "precision_gain=?, analysed_at=? WHERE aggregate_id=?",
                       (median_sigma_position_pm, gain, time.time(), aggregate_id))
            db.execute("UPDATE frames SET series_id=? WHERE frame_id=?",
                       (series_id, aggregate_id))
        return self.series_aggregates(aggregate_id=aggregate_id)[0]

    def series_members(self, series_id: str | None = None) -> list[dict]:
        """Members offered to series (one or all), in order."""
        if not self._has_table("series_members"):
            return []
        sql = ("SELECT series_id, frame_id, idx, accepted, reason, message, shift_row_px, "
               "shift_col_px, residual_chi2, line_rms_px, payload_json, created_at "
               "FROM series_members")
        rows = (self._all(sql + " WHERE series_id=? ORDER BY idx", (series_id,)) if series_id
                else self._all(sql + " ORDER BY series_id, idx"))
        return [{"series_id": s, "frame_id": f, "index": i, "accepted": bool(a), "reason": r,
                 "message": m, "shift_px": [sr, sc], "residual_chi2": c, "line_rms_px": lr,
                 "payload": None if p is None else json.loads(p), "created_at": t}
                for s, f, i, a, r, m, sr, sc, c, lr, p, t in rows]

    def series_aggregates(self, *, series_id: str | None = None,
                          aggregate_id: str | None = None) -> list[dict]:
        """Aggregates (of one series, one by id, or all) in the order they were made."""
        if not self._has_table("series_aggregates"):
            return []
        sql = ("SELECT aggregate_id, series_id, kind, n_members, n_excluded, path, "
               "median_sigma_position_pm, member_sigma_position_pm, precision_gain, "
               "payload_json, created_at, analysed_at FROM series_aggregates")
        if aggregate_id is not None:
            rows = self._all(sql + " WHERE aggregate_id=?", (aggregate_id,))
        elif series_id is not None:
            rows = self._all(sql + " WHERE series_id=? ORDER BY created_at", (series_id,))
        else:
            rows = self._all(sql + " ORDER BY created_at")
        return [{"aggregate_id": a, "series_id": s, "kind": k, "n_members": n,
                 "n_excluded": x, "path": pth, "median_sigma_position_pm": ms,
                 "member_sigma_position_pm": mm, "precision_gain": g,
                 "payload": None if p is None else json.loads(p), "created_at": c,
                 "analysed_at": an}
                for a, s, k, n, x, pth, ms, mm, g, p, c, an in rows]


def _proposal_dict(row) -> dict:
    pid, fid, score, region, st, payload, created, updated = row
    return {"id": pid, "frame_id": fid, "score": score, "region": json.loads(region),
            "state": st, "payload": None if payload is None else json.loads(payload),
            "created_at": created, "updated_at": updated}


def _json_or_none(value) -> str | None:
    return None if value is None else json.dumps(value)
