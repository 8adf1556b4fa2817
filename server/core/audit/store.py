"""The store: audit runs, their per-image results and artefacts, in a data folder.

Layout of the data folder::

    DATA/pellucid.db             SQLite in WAL mode (runs, results, artefact index)
    DATA/artefacts/ab/abcd….npy  arrays and pictures, named by the sha256 of their bytes

Crash safety. Every finished image is one committed transaction, written after its artefacts
are on disk (written to a temporary name, then renamed), so a killed process leaves either the
whole result or nothing. A run records its owner (host, process id and that process's start
time); when the store opens and finds a run still marked running whose owner is gone, it marks it
``interrupted``. Resuming such a run skips every image already stored.

Run states::

    queued ──► running ──► done | failed | cancelled
                  └──────► interrupted (owner died) ──► running (resumed)

A data folder that cannot be written (read-only, full, not a folder, a damaged database) gives
a :class:`StoreError` when the store opens, not a failure later in the middle of a run.

The verdict travels with the run: ``runs.gate`` holds the gate result (policy name, path and
sha256, every check with its value, limit and outcome) as JSON, written by :meth:`Store.set_gate`.

Schema versions. 1: runs, results, artefacts. 2: ``runs.gate`` (added in place when a version-1
store opens; a gate that version 1 kept inside the summary moves into the column). 3: ``images``
and ``maps``, the dashboard's uploaded images and the attribution maps made from them
(``core/workbench/``), created empty when an older store opens. A store newer than this Pellucid
is refused, never rewritten.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import shutil
import socket
import sqlite3
import threading
import time
import uuid
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Self

from pellucid.core.errors import NotFoundError, StoreError

if TYPE_CHECKING:  # numpy loads with the first array: listing runs stays quick to start
    import numpy as np

__all__ = [
    "DB_NAME",
    "MIN_FREE_BYTES",
    "RUN_STATES",
    "ResultRow",
    "RunRecord",
    "Store",
    "canonical_json",
    "default_data_dir",
]

DB_NAME = "pellucid.db"
SCHEMA_VERSION = 3
MIN_FREE_BYTES = 32 * 1024 * 1024
QUEUED, RUNNING, DONE, FAILED, CANCELLED, INTERRUPTED = (
    "queued", "running", "done", "failed", "cancelled", "interrupted")
RUN_STATES = (QUEUED, RUNNING, DONE, FAILED, CANCELLED, INTERRUPTED)
_ALLOWED = {
    QUEUED: {RUNNING, CANCELLED, FAILED, INTERRUPTED},
    RUNNING: {DONE, FAILED, CANCELLED, INTERRUPTED},
    INTERRUPTED: {RUNNING, CANCELLED},
    CANCELLED: {RUNNING},
    FAILED: {RUNNING},
    DONE: set(),
}
RESUMABLE = (INTERRUPTED, CANCELLED, FAILED)

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    id TEXT PRIMARY KEY,
    created REAL NOT NULL,
    updated REAL NOT NULL,
    finished REAL,
    status TEXT NOT NULL,
    model_name TEXT NOT NULL,
    model_fingerprint TEXT NOT NULL,
    model_spec TEXT,
    dataset_root TEXT NOT NULL,
    dataset_hash TEXT NOT NULL,
    method TEXT NOT NULL,
    settings TEXT NOT NULL,
    settings_key TEXT NOT NULL,
    tool_version TEXT NOT NULL,
    command TEXT,
    total INTEGER NOT NULL DEFAULT 0,
    done INTEGER NOT NULL DEFAULT 0,
    owner TEXT,
    dataset TEXT,
    summary TEXT,
    error TEXT,
    gate TEXT
);
CREATE INDEX IF NOT EXISTS runs_key ON runs (model_fingerprint, dataset_hash, settings_key);
CREATE TABLE IF NOT EXISTS results (
    run_id TEXT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
    item INTEGER NOT NULL,
    rel TEXT NOT NULL,
    sha256 TEXT NOT NULL,
    label TEXT NOT NULL,
    status TEXT NOT NULL,
    data TEXT NOT NULL,
    map_hash TEXT,
    PRIMARY KEY (run_id, rel)
);
CREATE TABLE IF NOT EXISTS run_artefacts (
    run_id TEXT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
    name TEXT NOT NULL,
    hash TEXT NOT NULL,
    PRIMARY KEY (run_id, name)
);
CREATE TABLE IF NOT EXISTS artefacts (
    hash TEXT PRIMARY KEY,
    kind TEXT NOT NULL,
    size INTEGER NOT NULL,
    created REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS images (
    sha256 TEXT PRIMARY KEY,
    name TEXT NOT NULL,
    info TEXT NOT NULL,
    bytes_hash TEXT NOT NULL,
    thumb_hash TEXT,
    created REAL NOT NULL,
    used REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS images_used ON images (used);
CREATE TABLE IF NOT EXISTS maps (
    id TEXT PRIMARY KEY,
    image TEXT NOT NULL REFERENCES images (sha256) ON DELETE CASCADE,
    model_name TEXT NOT NULL,
    model_fingerprint TEXT NOT NULL,
    method TEXT NOT NULL,
    record TEXT NOT NULL,
    map_hash TEXT NOT NULL,
    display_hash TEXT NOT NULL,
    thumb_hash TEXT,
    checks TEXT,
    created REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS maps_image ON maps (image, model_fingerprint);
"""
# Every column that names an artefact: an artefact none of them names is an orphan.
_ARTEFACT_REFERENCES = (
    "SELECT map_hash FROM results WHERE map_hash IS NOT NULL", "SELECT hash FROM run_artefacts",
    "SELECT bytes_hash FROM images", "SELECT thumb_hash FROM images WHERE thumb_hash IS NOT NULL",
    "SELECT map_hash FROM maps", "SELECT display_hash FROM maps",
    "SELECT thumb_hash FROM maps WHERE thumb_hash IS NOT NULL",
)


def default_data_dir() -> Path:
    """``$PELLUCID_DATA`` when set, else ``./.pellucid`` (the server's default too)."""
    env = os.environ.get("PELLUCID_DATA")
    return Path(env).expanduser() if env else Path(".pellucid")


def canonical_json(value: Any) -> str:
    """JSON with sorted keys and no spaces: equal settings give equal text (and equal keys)."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), allow_nan=True)


def _process_start(pid: int) -> str | None:
    """The kernel's start time of ``pid`` (guards against a reused process id); None if unknown."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    # Field 22 (starttime) follows the parenthesised command name, which may contain spaces.
    fields = stat.rsplit(")", 1)[-1].split()
    return fields[19] if len(fields) > 19 else None


def _owner_alive(owner: dict) -> bool:
    if owner.get("host") != socket.gethostname():
        return True  # another machine's run: we cannot tell, so we do not touch it
    pid = int(owner.get("pid", -1))
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass
    start = _process_start(pid)
    return start is None or owner.get("start") is None or start == owner.get("start")


def this_owner() -> dict:
    pid = os.getpid()
    return {"host": socket.gethostname(), "pid": pid, "start": _process_start(pid)}


@dataclass(frozen=True)
class RunRecord:
    """One stored audit run (summary and settings decoded)."""

    id: str
    created: float
    updated: float
    finished: float | None
    status: str
    model_name: str
    model_fingerprint: str
    model_spec: str | None
    dataset_root: str
    dataset_hash: str
    method: str
    settings: dict
    tool_version: str
    command: str | None
    total: int
    done: int
    owner: dict | None
    dataset: dict | None
    summary: dict | None
    error: str | None
    gate: dict | None = None  # the stored gate result (see Store.set_gate), None when no policy judged the run

    @property
    def verdict(self) -> str | None:
        """"pass", "fail" or None (no policy judged this run)."""
        return None if not self.gate else ("pass" if self.gate.get("passed") else "fail")

    def to_dict(self, *, with_summary: bool = True) -> dict:
        out = {
            "id": self.id, "created": self.created, "updated": self.updated, "finished": self.finished,
            "status": self.status, "model_name": self.model_name, "model_fingerprint": self.model_fingerprint,
            "model_spec": self.model_spec, "dataset_root": self.dataset_root, "dataset_hash": self.dataset_hash,
            "method": self.method, "settings": self.settings, "tool_version": self.tool_version,
            "command": self.command, "total": self.total, "done": self.done, "error": self.error,
            "verdict": self.verdict, "gate": self.gate,
        }
        if with_summary:
            out["dataset"] = self.dataset
            out["summary"] = self.summary
        return out


@dataclass(frozen=True)
class ResultRow:
    run_id: str
    item: int
    rel: str
    sha256: str
    label: str
    status: str  # "done" or "failed"
    data: dict
    map_hash: str | None


def _row_to_run(row: sqlite3.Row) -> RunRecord:
    def load(text: str | None) -> Any:
        return json.loads(text) if text else None

    return RunRecord(
        id=row["id"], created=row["created"], updated=row["updated"], finished=row["finished"],
        status=row["status"], model_name=row["model_name"], model_fingerprint=row["model_fingerprint"],
        model_spec=row["model_spec"], dataset_root=row["dataset_root"], dataset_hash=row["dataset_hash"],
        method=row["method"], settings=load(row["settings"]) or {}, tool_version=row["tool_version"],
        command=row["command"], total=row["total"], done=row["done"], owner=load(row["owner"]),
        dataset=load(row["dataset"]), summary=load(row["summary"]), error=row["error"], gate=load(row["gate"]),
    )


class Store:
    """Runs, results and artefacts in one data folder. Thread-safe; one connection per store.

    ``Store(path)`` opens (creating when needed) and checks the folder: it must be a writable
    folder with at least ``min_free_bytes`` free. Use as a context manager or call ``close()``.
    """

    def __init__(self, path: str | Path, *, min_free_bytes: int = MIN_FREE_BYTES) -> None:
        self.root = Path(path).expanduser()
        self._lock = threading.RLock()
        self._check_folder(min_free_bytes)
        self.artefact_dir = self.root / "artefacts"
        try:
            self.artefact_dir.mkdir(exist_ok=True)
            self._db = sqlite3.connect(str(self.root / DB_NAME), timeout=10.0, check_same_thread=False,
                                       isolation_level=None)
            self._db.row_factory = sqlite3.Row
            mode = self._db.execute("PRAGMA journal_mode=WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                raise StoreError(
                    f"the data folder {str(self.root)!r} does not support SQLite's WAL mode (journal mode "
                    f"stayed {mode!r}); put the data folder on a local disk"
                )
            self._db.execute("PRAGMA synchronous=NORMAL")
            self._db.execute("PRAGMA foreign_keys=ON")
            self._db.execute("PRAGMA busy_timeout=10000")
            self._create_schema()
        except sqlite3.DatabaseError as exc:
            raise StoreError(
                f"cannot use the database in {str(self.root)!r}: {exc}. If the file is damaged, move "
                f"{DB_NAME} aside and Pellucid will start a new one"
            ) from None
        self._clean_temporaries()
        self.recovered = self._mark_orphans()

    # -- opening ------------------------------------------------------------------------------

    def _check_folder(self, min_free_bytes: int) -> None:
        root = self.root
        if root.exists() and not root.is_dir():
            raise StoreError(f"the data folder {str(root)!r} exists but is not a folder; give a folder path")
        try:
            root.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StoreError(
                f"cannot create the data folder {str(root)!r}: {exc.strerror or exc}; choose a writable place "
                "with --store or PELLUCID_DATA"
            ) from None
        probe = root / f".write-check-{uuid.uuid4().hex[:8]}"
        try:
            with open(probe, "wb") as fh:
                fh.write(b"pellucid")
                fh.flush()
                os.fsync(fh.fileno())
        except OSError as exc:
            raise StoreError(
                f"the data folder {str(root)!r} is not writable ({exc.strerror or exc}); Pellucid stores audit "
                "runs there. Fix its permissions or choose another folder with --store or PELLUCID_DATA"
            ) from None
        finally:
            try:
                probe.unlink()
            except OSError:
                pass
        free = shutil.disk_usage(root).free
        if free < min_free_bytes:
            raise StoreError(
                f"the data folder {str(root)!r} is nearly full ({free / 1e6:.1f} MB free, at least "
                f"{min_free_bytes / 1e6:.0f} MB needed); free some space or choose another folder"
            )

    def _create_schema(self) -> None:
        with self._tx():
            for statement in _SCHEMA.strip().split(";"):
                if statement.strip():
                    self._db.execute(statement)
            row = self._db.execute("SELECT value FROM meta WHERE key='schema'").fetchone()
            if row is None:
                self._db.execute("INSERT INTO meta (key, value) VALUES ('schema', ?)", (str(SCHEMA_VERSION),))
            elif int(row["value"]) > SCHEMA_VERSION:
                raise StoreError(
                    f"the database in {str(self.root)!r} has schema version {row['value']}, newer than the version "
                    f"{SCHEMA_VERSION} this Pellucid reads; use a newer Pellucid or another data folder"
                )
            elif int(row["value"]) < SCHEMA_VERSION:
                self._migrate(int(row["value"]))

    def _migrate(self, version: int) -> None:
        """Bring an older store up to :data:`SCHEMA_VERSION` in place (inside the opening transaction)."""
        if version < 2:
            columns = {r["name"] for r in self._db.execute("PRAGMA table_info(runs)").fetchall()}
            if "gate" not in columns:
                self._db.execute("ALTER TABLE runs ADD COLUMN gate TEXT")
            # Version 1 dashboards kept the gate inside the summary: move it to its column.
            for r in self._db.execute("SELECT id, summary FROM runs WHERE summary IS NOT NULL").fetchall():
                summary = json.loads(r["summary"])
                if isinstance(summary, dict) and isinstance(summary.get("gate"), dict):
                    gate = summary.pop("gate")
                    self._db.execute("UPDATE runs SET gate=?, summary=? WHERE id=?",
                                     (json.dumps(gate, allow_nan=True), json.dumps(summary, allow_nan=True), r["id"]))
        # Version 3 only adds tables (images, maps), which the schema above has just created.
        self._db.execute("UPDATE meta SET value=? WHERE key='schema'", (str(SCHEMA_VERSION),))

    def _clean_temporaries(self) -> None:
        for tmp in self.artefact_dir.glob("*/*.tmp-*"):
            try:
                tmp.unlink()
            except OSError:
                pass

    def _mark_orphans(self) -> list[str]:
        """Runs left 'running' or 'queued' by a process that no longer exists become 'interrupted'."""
        found: list[str] = []
        with self._lock:
            rows = self._db.execute("SELECT id, owner FROM runs WHERE status IN (?, ?)", (RUNNING, QUEUED)).fetchall()
            for row in rows:
                owner = json.loads(row["owner"]) if row["owner"] else {}
                if not _owner_alive(owner):
                    found.append(row["id"])
            if found:
                with self._tx():
                    for run_id in found:
                        self._db.execute("UPDATE runs SET status=?, updated=? WHERE id=?",
                                         (INTERRUPTED, time.time(), run_id))
        return found

    # -- plumbing -----------------------------------------------------------------------------

    class _Tx:
        def __init__(self, store: Store) -> None:
            self.store = store

        def __enter__(self) -> sqlite3.Connection:
            self.store._lock.acquire()
            self.store._db.execute("BEGIN IMMEDIATE")
            return self.store._db

        def __exit__(self, kind: object, exc: object, tb: object) -> None:
            try:
                if kind is None:
                    self.store._db.execute("COMMIT")
                else:
                    self.store._db.execute("ROLLBACK")
            finally:
                self.store._lock.release()

    def _tx(self) -> Store._Tx:
        return Store._Tx(self)

    def _write(self, fn: Any) -> Any:
        """Run ``fn(db)`` in a transaction, turning disk problems into StoreError."""
        try:
            with self._tx() as db:
                return fn(db)
        except sqlite3.OperationalError as exc:
            raise StoreError(f"the store in {str(self.root)!r} could not save: {exc}") from None

    # For the other tables of this file (core/workbench/): one connection, one lock.
    write = _write

    def read(self, sql: str, params: tuple = ()) -> list[sqlite3.Row]:
        """Rows of one query, under the store's lock."""
        with self._lock:
            return self._db.execute(sql, params).fetchall()

    @property
    def lock(self) -> threading.RLock:
        """Held by a writer that stores artefacts and then the row naming them, so no sweep runs between."""
        return self._lock

    def close(self) -> None:
        with self._lock:
            try:
                self._db.close()
            except sqlite3.Error:
                pass

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def integrity_check(self) -> str:
        with self._lock:
            return str(self._db.execute("PRAGMA integrity_check").fetchone()[0])

    # -- artefacts ----------------------------------------------------------------------------

    def _artefact_path(self, digest: str, kind: str) -> Path:
        return self.artefact_dir / digest[:2] / f"{digest}.{kind}"

    def put_bytes(self, data: bytes, kind: str) -> str:
        """Store ``data`` under its sha256 (idempotent) and return the hash."""
        if not kind.isalnum():
            raise ValueError(f"artefact kind must be alphanumeric, got {kind!r}")
        digest = hashlib.sha256(data).hexdigest()
        path = self._artefact_path(digest, kind)
        if not path.exists():
            try:
                path.parent.mkdir(exist_ok=True)
                tmp = path.with_name(f"{path.name}.tmp-{uuid.uuid4().hex[:8]}")
                with open(tmp, "wb") as fh:
                    fh.write(data)
                    fh.flush()
                    os.fsync(fh.fileno())
                os.replace(tmp, path)
            except OSError as exc:
                raise StoreError(
                    f"could not write an artefact into {str(self.artefact_dir)!r}: {exc.strerror or exc}"
                ) from None
        self._write(lambda db: db.execute(
            "INSERT OR IGNORE INTO artefacts (hash, kind, size, created) VALUES (?, ?, ?, ?)",
            (digest, kind, len(data), time.time())))
        return digest

    def put_array(self, array: np.ndarray) -> str:
        buf = io.BytesIO()
        import numpy as np

        np.save(buf, np.ascontiguousarray(array), allow_pickle=False)
        return self.put_bytes(buf.getvalue(), "npy")

    def _kind_of(self, digest: str) -> str:
        with self._lock:
            row = self._db.execute("SELECT kind FROM artefacts WHERE hash=?", (digest,)).fetchone()
        if row is None:
            raise NotFoundError(f"no artefact {digest[:16]!r} in the store at {str(self.root)!r}")
        return row["kind"]

    def get_bytes(self, digest: str) -> bytes:
        kind = self._kind_of(digest)
        path = self._artefact_path(digest, kind)
        try:
            return path.read_bytes()
        except OSError:
            raise StoreError(f"artefact {digest[:16]} is listed but its file {str(path)!r} is missing") from None

    def get_array(self, digest: str) -> np.ndarray:
        import numpy as np

        return np.load(io.BytesIO(self.get_bytes(digest)), allow_pickle=False)

    # -- runs ---------------------------------------------------------------------------------

    def create_run(
        self,
        *,
        model_name: str,
        model_fingerprint: str,
        model_spec: str | None,
        dataset_root: str,
        dataset_hash: str,
        method: str,
        settings: dict,
        tool_version: str,
        command: str | None,
        total: int,
        dataset: dict | None = None,
    ) -> RunRecord:
        run_id = time.strftime("%Y%m%d-%H%M%S", time.gmtime()) + "-" + uuid.uuid4().hex[:6]
        now = time.time()
        text = canonical_json(settings)
        key = hashlib.sha256(text.encode()).hexdigest()
        self._write(lambda db: db.execute(
            "INSERT INTO runs (id, created, updated, status, model_name, model_fingerprint, model_spec, "
            "dataset_root, dataset_hash, method, settings, settings_key, tool_version, command, total, done, "
            "owner, dataset) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, 0, ?, ?)",
            (run_id, now, now, QUEUED, model_name, model_fingerprint, model_spec, dataset_root, dataset_hash,
             method, text, key, tool_version, command, int(total), json.dumps(this_owner()),
             json.dumps(dataset) if dataset is not None else None)))
        return self.get_run(run_id)

    @staticmethod
    def settings_key(settings: dict) -> str:
        return hashlib.sha256(canonical_json(settings).encode()).hexdigest()

    def find_resumable(self, *, model_fingerprint: str, dataset_hash: str, settings: dict) -> RunRecord | None:
        """The newest interrupted, cancelled or failed run with exactly these inputs, if any."""
        key = self.settings_key(settings)
        with self._lock:
            row = self._db.execute(
                f"SELECT * FROM runs WHERE model_fingerprint=? AND dataset_hash=? AND settings_key=? AND status IN "
                f"({','.join('?' * len(RESUMABLE))}) ORDER BY created DESC LIMIT 1",
                (model_fingerprint, dataset_hash, key, *RESUMABLE)).fetchone()
        return _row_to_run(row) if row else None

    def get_run(self, run_id: str) -> RunRecord:
        with self._lock:
            row = self._db.execute("SELECT * FROM runs WHERE id=?", (run_id,)).fetchone()
            if row is None:
                rows = self._db.execute("SELECT * FROM runs WHERE id LIKE ? ORDER BY created DESC",
                                        (f"{run_id}%",)).fetchall() if run_id else []
                if len(rows) == 1:
                    row = rows[0]
        if row is None:
            raise NotFoundError(
                f"no audit run {run_id!r} in the store at {str(self.root)!r}; 'pellucid runs list' shows the runs"
            )
        return _row_to_run(row)

    def list_runs(self, *, limit: int = 200) -> list[RunRecord]:
        with self._lock:
            rows = self._db.execute("SELECT * FROM runs ORDER BY created DESC LIMIT ?", (int(limit),)).fetchall()
        return [_row_to_run(r) for r in rows]

    def set_status(self, run_id: str, status: str, *, error: str | None = None) -> RunRecord:
        if status not in RUN_STATES:
            raise ValueError(f"unknown run status {status!r}")

        def move(db: sqlite3.Connection) -> None:
            row = db.execute("SELECT status FROM runs WHERE id=?", (run_id,)).fetchone()
            if row is None:
                raise NotFoundError(f"no audit run {run_id!r}")
            if status not in _ALLOWED[row["status"]]:
                raise RuntimeError(f"run {run_id}: cannot go from {row['status']} to {status}")
            now = time.time()
            finished = now if status in (DONE, FAILED, CANCELLED) else None
            owner = json.dumps(this_owner()) if status == RUNNING else None
            db.execute(
                "UPDATE runs SET status=?, updated=?, finished=?, error=?, owner=COALESCE(?, owner) WHERE id=?",
                (status, now, finished, error, owner, run_id))

        self._write(move)
        return self.get_run(run_id)

    def set_summary(self, run_id: str, summary: dict, *, artefacts: dict[str, str] | None = None) -> None:
        text = json.dumps(summary, allow_nan=True)

        def save(db: sqlite3.Connection) -> None:
            db.execute("UPDATE runs SET summary=?, updated=? WHERE id=?", (text, time.time(), run_id))
            for name, digest in (artefacts or {}).items():
                db.execute("INSERT OR REPLACE INTO run_artefacts (run_id, name, hash) VALUES (?, ?, ?)",
                           (run_id, name, digest))

        self._write(save)

    def set_gate(self, run_id: str, gate: dict | None) -> RunRecord:
        """Store (or clear, with None) the gate result of a run: ``PolicyResult.to_dict()`` and when."""
        text = json.dumps(gate, allow_nan=True) if gate is not None else None

        def save(db: sqlite3.Connection) -> None:
            if db.execute("UPDATE runs SET gate=?, updated=? WHERE id=?", (text, time.time(), run_id)).rowcount != 1:
                raise NotFoundError(f"no audit run {run_id!r}")

        self._write(save)
        return self.get_run(run_id)

    def add_artefacts(self, run_id: str, artefacts: dict[str, str]) -> None:
        """Attach stored artefacts to a run under names (replacing a name already there)."""
        self._write(lambda db: [db.execute("INSERT OR REPLACE INTO run_artefacts (run_id, name, hash) VALUES (?, ?, ?)",
                                           (run_id, name, digest)) for name, digest in artefacts.items()])

    def run_artefacts(self, run_id: str) -> dict[str, str]:
        with self._lock:
            rows = self._db.execute("SELECT name, hash FROM run_artefacts WHERE run_id=? ORDER BY name",
                                    (run_id,)).fetchall()
        return {r["name"]: r["hash"] for r in rows}

    def delete_run(self, run_id: str) -> int:
        """Delete a run, its results and the artefacts no other run uses; returns files removed."""
        run = self.get_run(run_id)
        if run.status == RUNNING and run.owner and _owner_alive(run.owner):
            raise StoreError(f"run {run.id} is still running; cancel it before deleting it")

        def drop(db: sqlite3.Connection) -> None:
            db.execute("DELETE FROM results WHERE run_id=?", (run.id,))
            db.execute("DELETE FROM run_artefacts WHERE run_id=?", (run.id,))
            db.execute("DELETE FROM runs WHERE id=?", (run.id,))

        return self.delete_rows(drop)

    def delete_rows(self, drop: Any, *, grace_seconds: float = 0.0) -> int:
        """Run ``drop(db)`` in one transaction, then remove the artefacts no row names any more.

        ``drop`` may return the hashes its rows named: those go whatever their age. ``grace_seconds``
        spares other artefacts younger than that: one may have been written a moment ago for a row
        not yet inserted (an audit stores a map's array, then its result). Returns files removed.
        """
        def sweep(db: sqlite3.Connection) -> list[tuple[str, str]]:
            named_by_dropped = list(drop(db) or ())
            named = " AND ".join(f"hash NOT IN ({q})" for q in _ARTEFACT_REFERENCES)
            marks = ",".join("?" * len(named_by_dropped)) or "NULL"
            orphans = db.execute(f"SELECT hash, kind FROM artefacts WHERE {named} AND (created <= ? OR hash IN "
                                 f"({marks}))", (time.time() - grace_seconds, *named_by_dropped)).fetchall()
            for row in orphans:
                db.execute("DELETE FROM artefacts WHERE hash=?", (row["hash"],))
            return [(r["hash"], r["kind"]) for r in orphans]

        removed = 0
        for digest, kind in self._write(sweep):
            try:
                self._artefact_path(digest, kind).unlink()
                removed += 1
            except OSError:
                pass
        return removed

    # -- results ------------------------------------------------------------------------------

    def add_result(self, run_id: str, *, item: int, rel: str, sha256: str, label: str, status: str,
                   data: dict, map_hash: str | None) -> None:
        """Record one image's outcome (and bump the run's count) in one transaction."""
        text = json.dumps(data, allow_nan=True)

        def save(db: sqlite3.Connection) -> None:
            cur = db.execute(
                "INSERT OR IGNORE INTO results (run_id, item, rel, sha256, label, status, data, map_hash) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?)", (run_id, item, rel, sha256, label, status, text, map_hash))
            if cur.rowcount:
                db.execute("UPDATE runs SET done=done+1, updated=? WHERE id=?", (time.time(), run_id))

        self._write(save)

    def finished_items(self, run_id: str) -> set[tuple[str, str]]:
        """(rel, sha256) of every image this run has already stored."""
        with self._lock:
            rows = self._db.execute("SELECT rel, sha256 FROM results WHERE run_id=?", (run_id,)).fetchall()
        return {(r["rel"], r["sha256"]) for r in rows}

    def results(self, run_id: str, *, rels: Iterable[str] | None = None) -> list[ResultRow]:
        with self._lock:
            rows = self._db.execute("SELECT * FROM results WHERE run_id=? ORDER BY item, rel", (run_id,)).fetchall()
        wanted = set(rels) if rels is not None else None
        return [
            ResultRow(run_id=r["run_id"], item=r["item"], rel=r["rel"], sha256=r["sha256"], label=r["label"],
                      status=r["status"], data=json.loads(r["data"]), map_hash=r["map_hash"])
            for r in rows if wanted is None or r["rel"] in wanted
        ]

    def result(self, run_id: str, rel: str) -> ResultRow:
        rows = self.results(run_id, rels=[rel])
        if not rows:
            raise NotFoundError(f"run {run_id} holds no result for image {rel!r}")
        return rows[0]

    def iter_runs(self) -> Iterator[RunRecord]:
        yield from self.list_runs(limit=1_000_000)
