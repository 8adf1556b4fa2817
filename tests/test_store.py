"""The store: WAL mode, runs and results, artefacts by hash, orphaned runs, unusable folders."""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from pellucid.core.audit.store import DB_NAME, SCHEMA_VERSION, Store
from pellucid.core.errors import NotFoundError, StoreError


def _run(store: Store, **kw):
    base = {"model_name": "m", "model_fingerprint": "f" * 64, "model_spec": None, "dataset_root": "/d",
                "dataset_hash": "d" * 64, "method": "gradcam", "settings": {"audit": {"method": "gradcam"}},
                "tool_version": "0.1.0", "command": "pellucid audit …", "total": 2}
    base.update(kw)
    return store.create_run(**base)


def test_wal_mode_and_integrity(tmp_path: Path) -> None:
    with Store(tmp_path / "data") as store:
        assert store.integrity_check() == "ok"
    db = sqlite3.connect(tmp_path / "data" / DB_NAME)
    assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    db.close()


def test_run_lifecycle_results_and_artefacts(tmp_path: Path) -> None:
    with Store(tmp_path) as store:
        run = _run(store)
        assert run.status == "queued"
        store.set_status(run.id, "running")
        arr = np.arange(12, dtype=np.float32).reshape(3, 4)
        h = store.put_array(arr)
        assert h == store.put_array(arr.copy())  # content-addressed
        store.add_result(run.id, item=0, rel="a.png", sha256="1" * 64, label="crack", status="done",
                         data={"x": 1}, map_hash=h)
        store.add_result(run.id, item=0, rel="a.png", sha256="1" * 64, label="crack", status="done",
                         data={"x": 1}, map_hash=h)  # a repeat does not count twice
        assert store.get_run(run.id).done == 1
        assert store.finished_items(run.id) == {("a.png", "1" * 64)}
        np.testing.assert_array_equal(store.get_array(h), arr)
        store.set_summary(run.id, {"accuracy": 1.0}, artefacts={"mean_map/crack": h})
        done = store.set_status(run.id, "done")
        assert done.summary == {"accuracy": 1.0} and done.finished is not None
        with pytest.raises(RuntimeError, match="cannot go from done to running"):
            store.set_status(run.id, "running")
        assert store.get_run(run.id[:12]).id == run.id  # unique prefix
        assert [r.id for r in store.list_runs()] == [run.id]
        files = list((tmp_path / "artefacts").rglob("*.npy"))
        assert len(files) == 1
        assert store.delete_run(run.id) == 1
        assert not list((tmp_path / "artefacts").rglob("*.npy"))
        with pytest.raises(NotFoundError, match="runs list"):
            store.get_run(run.id)


def test_shared_artefact_survives_deleting_one_run(tmp_path: Path) -> None:
    with Store(tmp_path) as store:
        h = store.put_bytes(b"png bytes", "png")
        a, b = _run(store), _run(store)
        store.set_summary(a.id, {}, artefacts={"x": h})
        store.set_summary(b.id, {}, artefacts={"x": h})
        assert store.delete_run(a.id) == 0
        assert store.get_bytes(h) == b"png bytes"


def test_resumable_matches_inputs_exactly(tmp_path: Path) -> None:
    with Store(tmp_path) as store:
        run = _run(store)
        store.set_status(run.id, "running")
        store.set_status(run.id, "interrupted")
        found = store.find_resumable(model_fingerprint="f" * 64, dataset_hash="d" * 64,
                                     settings={"audit": {"method": "gradcam"}})
        assert found is not None and found.id == run.id
        assert store.find_resumable(model_fingerprint="f" * 64, dataset_hash="d" * 64,
                                    settings={"audit": {"method": "occlusion"}}) is None


def test_run_of_a_dead_process_becomes_interrupted(tmp_path: Path) -> None:
    with Store(tmp_path) as store:
        run = _run(store)
        store.set_status(run.id, "running")
    # Hand the run to a process that has since exited.
    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True,
                           check=True)
    dead_pid = int(child.stdout)
    db = sqlite3.connect(tmp_path / DB_NAME)
    owner = json.loads(db.execute("SELECT owner FROM runs").fetchone()[0])
    owner.update(pid=dead_pid, start="1")
    db.execute("UPDATE runs SET owner=?", (json.dumps(owner),))
    db.commit()
    db.close()
    with Store(tmp_path) as store:
        assert store.recovered == [run.id]
        assert store.get_run(run.id).status == "interrupted"


def test_run_of_a_live_process_stays_running(tmp_path: Path) -> None:
    with Store(tmp_path) as store:
        run = _run(store)
        store.set_status(run.id, "running")
    with Store(tmp_path) as store:  # this very process owns it
        assert store.recovered == []
        assert store.get_run(run.id).status == "running"


def test_folder_that_is_a_file(tmp_path: Path) -> None:
    (tmp_path / "f").write_text("x")
    with pytest.raises(StoreError, match="not a folder"):
        Store(tmp_path / "f")
    with pytest.raises(StoreError, match="cannot create the data folder"):
        Store(tmp_path / "f" / "below")


def test_read_only_folder(tmp_path: Path) -> None:
    # /proc is read-only even for root, so this holds whoever runs the tests.
    with pytest.raises(StoreError, match=r"not writable|cannot create"):
        Store("/proc/self")


def test_full_folder(tmp_path: Path) -> None:
    with pytest.raises(StoreError, match="nearly full"):
        Store(tmp_path, min_free_bytes=1 << 62)


def test_damaged_database(tmp_path: Path) -> None:
    (tmp_path / DB_NAME).write_bytes(b"this is not a database file at all" * 200)
    with pytest.raises(StoreError, match=r"move pellucid.db aside"):
        Store(tmp_path)


# A store written by Pellucid's schema version 1 (before the gate column), exactly as it created it.
_V1_SCHEMA = """
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE runs (id TEXT PRIMARY KEY, created REAL NOT NULL, updated REAL NOT NULL, finished REAL,
    status TEXT NOT NULL, model_name TEXT NOT NULL, model_fingerprint TEXT NOT NULL, model_spec TEXT,
    dataset_root TEXT NOT NULL, dataset_hash TEXT NOT NULL, method TEXT NOT NULL, settings TEXT NOT NULL,
    settings_key TEXT NOT NULL, tool_version TEXT NOT NULL, command TEXT, total INTEGER NOT NULL DEFAULT 0,
    done INTEGER NOT NULL DEFAULT 0, owner TEXT, dataset TEXT, summary TEXT, error TEXT);
CREATE INDEX runs_key ON runs (model_fingerprint, dataset_hash, settings_key);
CREATE TABLE results (run_id TEXT NOT NULL REFERENCES runs (id) ON DELETE CASCADE, item INTEGER NOT NULL,
    rel TEXT NOT NULL, sha256 TEXT NOT NULL, label TEXT NOT NULL, status TEXT NOT NULL, data TEXT NOT NULL,
    map_hash TEXT, PRIMARY KEY (run_id, rel));
CREATE TABLE run_artefacts (run_id TEXT NOT NULL REFERENCES runs (id) ON DELETE CASCADE, name TEXT NOT NULL,
    hash TEXT NOT NULL, PRIMARY KEY (run_id, name));
CREATE TABLE artefacts (hash TEXT PRIMARY KEY, kind TEXT NOT NULL, size INTEGER NOT NULL, created REAL NOT NULL);
INSERT INTO meta VALUES ('schema', '1');
"""


def _v1_store(folder: Path, summary: dict) -> None:
    folder.mkdir(parents=True)
    db = sqlite3.connect(folder / DB_NAME)
    db.executescript(_V1_SCHEMA)
    db.execute("INSERT INTO runs (id, created, updated, finished, status, model_name, model_fingerprint, dataset_root, "
               "dataset_hash, method, settings, settings_key, tool_version, total, done, summary) VALUES "
               "('old-run', 1, 1, 2, 'done', 'm', ?, '/d', ?, 'gradcam', '{}', 'k', '0.1.0', 1, 1, ?)",
               ("f" * 64, "d" * 64, json.dumps(summary)))
    db.execute("INSERT INTO results VALUES ('old-run', 0, 'a.png', ?, 'crack', 'done', '{\"x\": 1}', NULL)",
               ("1" * 64,))
    db.commit()
    db.close()


def test_version_1_store_is_migrated_and_keeps_its_runs(tmp_path: Path) -> None:
    gate = {"passed": False, "policy": {"name": "old gate", "sha256": "a" * 64},
            "checks": [{"key": "min_accuracy", "scope": "run", "status": "fail", "sentence": "run: accuracy …"}]}
    _v1_store(tmp_path / "old", {"accuracy": 0.5, "gate": gate})
    with Store(tmp_path / "old") as store:
        run = store.get_run("old-run")
        assert run.gate == gate and run.verdict == "fail"  # the gate moved out of the summary into its column
        assert run.summary == {"accuracy": 0.5}
        assert [r.rel for r in store.results("old-run")] == ["a.png"]
        assert store.integrity_check() == "ok"
    db = sqlite3.connect(tmp_path / "old" / DB_NAME)
    assert db.execute("SELECT value FROM meta WHERE key='schema'").fetchone()[0] == str(SCHEMA_VERSION)
    db.close()
    with Store(tmp_path / "old") as store:  # opening again changes nothing
        assert store.get_run("old-run").gate == gate


def test_gate_is_stored_with_the_run_and_a_newer_store_is_refused(tmp_path: Path) -> None:
    with Store(tmp_path / "s") as store:
        run = _run(store)
        assert run.gate is None and run.verdict is None
        gate = {"passed": True, "policy": {"name": "p", "sha256": "b" * 64}, "checks": []}
        assert store.set_gate(run.id, gate).gate == gate
        assert store.get_run(run.id).to_dict(with_summary=False)["verdict"] == "pass"
        with pytest.raises(NotFoundError):
            store.set_gate("no-such-run", gate)
    db = sqlite3.connect(tmp_path / "s" / DB_NAME)
    db.execute("UPDATE meta SET value=? WHERE key='schema'", (str(SCHEMA_VERSION + 1),))
    db.commit()
    db.close()
    with pytest.raises(StoreError, match=f"schema version {SCHEMA_VERSION + 1}, newer than"):
        Store(tmp_path / "s")
