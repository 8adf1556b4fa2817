"""Crash safety of stored audit runs, and a clear error for an unusable data folder at start.

The audit is killed with SIGKILL in the middle of a run (``pellucid audit`` in a subprocess; the
server's audit API was not there yet when this was written, so the CLI runs it), then:
``PRAGMA integrity_check`` is ok, reopening the store marks the run ``interrupted``, the results
finished before the kill are byte-for-byte the same after resuming, and the resumed run skips
them and completes.

A read-only folder and a folder without enough free space give a StoreError when the store
opens (and ``pellucid audit`` / ``pellucid runs`` exit 2 with one line), before any image is
processed.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest
from conftest import TINY_LABELS, png_bytes, synthetic_tile

from pellucid.core.audit.store import DB_NAME, Store
from pellucid.core.errors import StoreError

REPO = Path(__file__).resolve().parents[1]
PER_CLASS = 6


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A labelled folder: one sub-folder per class of the tiny model, PER_CLASS tiles each."""
    root = tmp_path_factory.mktemp("audit-folder")
    for k, label in enumerate(TINY_LABELS):
        (root / label).mkdir()
        for i in range(PER_CLASS):
            tile = synthetic_tile(seed=100 * k + i, tagged=label == "crack" and i % 2 == 0)
            (root / label / f"{label}-{i}.png").write_bytes(png_bytes(tile))
    return root


def _audit_argv(spec: Path, data: Path, store: Path, out: Path) -> list[str]:
    # Occlusion with a 1-pixel stride makes each image slow enough to be killed between images.
    return [sys.executable, "-m", "pellucid.cli", "audit", "--model", str(spec), "--images", str(data),
            "--store", str(store), "--out", str(out), "--method", "occlusion", "--param", "patch=4",
            "--param", "stride=1", "--shard-size", "1", "--workers", "1"]


def _env(spec: Path) -> dict[str, str]:
    # conftest writes the tiny model's module into a _modules folder beside the model folders.
    paths = [str(REPO), str(Path(__file__).parent), str(spec.parent.parent / "_modules")]
    return {**os.environ, "PYTHONPATH": os.pathsep.join(paths)}


def _finished(db: Path) -> list[tuple]:
    if not db.exists():
        return []
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
    try:
        return con.execute("SELECT run_id, rel, sha256, label, status, data, map_hash FROM results "
                           "ORDER BY rel").fetchall()
    except sqlite3.OperationalError:  # the schema is not there yet
        return []
    finally:
        con.close()


@pytest.mark.slow
def test_sigkill_mid_audit_then_resume(tiny_spec: Path, folder: Path, tmp_path: Path) -> None:
    store_dir, out = tmp_path / "store", tmp_path / "out"
    db = store_dir / DB_NAME
    total = PER_CLASS * len(TINY_LABELS)
    proc = subprocess.Popen(_audit_argv(tiny_spec, folder, store_dir, out), cwd=REPO, env=_env(tiny_spec),
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, start_new_session=True)
    try:
        deadline = time.time() + 180
        while len(_finished(db)) < 3:
            assert proc.poll() is None, f"the audit ended before it could be killed: {proc.stderr.read()!r}"
            assert time.time() < deadline, "the audit stored no results in time"
            time.sleep(0.05)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)  # its own session: the audit and anything it started
        proc.wait(timeout=30)
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL
    before = _finished(db)
    assert 3 <= len(before) < total, len(before)

    con = sqlite3.connect(str(db))
    try:
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    finally:
        con.close()

    with Store(store_dir) as store:
        assert store.integrity_check() == "ok"
        (run,) = store.list_runs()
        assert store.recovered == [run.id]
        assert store.get_run(run.id).status == "interrupted"
    assert _finished(db) == before  # reopening changed no result

    resumed = subprocess.run(_audit_argv(tiny_spec, folder, store_dir, out), cwd=REPO, env=_env(tiny_spec),
                             capture_output=True, text=True, timeout=300, check=False)
    assert resumed.returncode == 0, resumed.stderr[-2000:]
    assert f"resumed run {run.id}: {len(before)} image(s) already done, {total - len(before)} computed now" \
        in resumed.stdout, resumed.stdout
    after = _finished(db)
    assert len(after) == total
    assert set(before) <= set(after)  # finished results intact, byte for byte
    with Store(store_dir) as store:
        assert store.get_run(run.id).status == "done"
        assert [r.id for r in store.list_runs()] == [run.id]
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert run.id in json.dumps(summary)


def _read_only_folder(tmp_path: Path) -> Path:
    """A folder this process cannot write into (root ignores permission bits, so it gets /proc/self)."""
    if os.geteuid() == 0:
        return Path("/proc/self")
    folder = tmp_path / "read-only"
    folder.mkdir()
    folder.chmod(0o500)
    return folder


def test_read_only_data_folder_fails_at_open(tmp_path: Path) -> None:
    with pytest.raises(StoreError, match="is not writable"):
        Store(_read_only_folder(tmp_path))


def test_full_data_folder_fails_at_open(tmp_path: Path) -> None:
    free = shutil.disk_usage(tmp_path).free
    with pytest.raises(StoreError, match="nearly full"):
        Store(tmp_path / "data", min_free_bytes=free + 10**12)
    assert not (tmp_path / "data" / DB_NAME).exists()  # refused before a database was made


def test_data_folder_that_is_a_file_fails_at_open(tmp_path: Path) -> None:
    (tmp_path / "data").write_text("not a folder", encoding="utf-8")
    with pytest.raises(StoreError, match="not a folder"):
        Store(tmp_path / "data")


def test_damaged_database_fails_at_open(tmp_path: Path) -> None:
    (tmp_path / "data").mkdir()
    (tmp_path / "data" / DB_NAME).write_bytes(b"this is not a database file" * 200)
    with pytest.raises(StoreError, match=r"move pellucid.db aside"):
        Store(tmp_path / "data")


@pytest.mark.parametrize("command", ["audit", "runs"])
def test_cli_refuses_a_read_only_store_at_start(command: str, tiny_spec: Path, folder: Path, tmp_path: Path,
                                                capsys: pytest.CaptureFixture[str]) -> None:
    from pellucid.cli import main

    store = str(_read_only_folder(tmp_path))
    if command == "audit":
        argv = ["audit", "--model", str(tiny_spec), "--images", str(folder), "--store", store,
                "--out", str(tmp_path / "out")]
    else:
        argv = ["runs", "list", "--store", store]
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and "not writable" in lines[0], err
    assert not (tmp_path / "out" / "summary.json").exists()


# --- worker processes end with their audit ------------------------------------------------------------


def _workers_of(pid: int) -> list[int]:
    """Process ids of the pool workers ``pid`` spawned (multiprocessing's spawn entry point)."""
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
            cmdline = (entry / "cmdline").read_bytes().replace(b"\0", b" ")
        except OSError:
            continue
        ppid = int(stat.rsplit(")", 1)[-1].split()[1])
        if ppid == pid and b"spawn_main" in cmdline:
            found.append(int(entry.name))
    return found


def _alive(pids: list[int]) -> list[int]:
    alive = []
    for pid in pids:
        try:
            state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[-1].split()[0]
        except OSError:
            continue
        if state != "Z":  # a zombie has ended; only its exit status is left for a parent to collect
            alive.append(pid)
    return alive


def _start_pool_audit(tiny_spec: Path, folder: Path, tmp_path: Path, *,
                      busy: bool = True) -> tuple[subprocess.Popen, list[int]]:
    """``pellucid audit --workers 2``, once both workers exist (and, when ``busy``, results are stored)."""
    argv = [*_audit_argv(tiny_spec, folder, tmp_path / "store", tmp_path / "out")]
    argv[argv.index("--workers") + 1] = "2"
    proc = subprocess.Popen(argv, cwd=REPO, env=_env(tiny_spec), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            start_new_session=True)
    deadline = time.time() + 180
    while len(_workers_of(proc.pid)) < 2 or (busy and not _finished(tmp_path / "store" / DB_NAME)):
        assert proc.poll() is None, f"the audit ended early: {proc.stderr.read()!r}"
        assert time.time() < deadline, "the audit's two workers did not start storing results in time"
        time.sleep(0.1)
    return proc, _workers_of(proc.pid)


def _wait_gone(pids: list[int], limit: float = 60.0) -> list[int]:
    """Poll until none of ``pids`` runs (bounded; returns those still running at the limit)."""
    deadline = time.time() + limit
    while _alive(pids) and time.time() < deadline:
        time.sleep(0.1)
    return _alive(pids)


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc").is_dir(), reason="reads process lists from /proc")
@pytest.mark.parametrize("moment", ["starting", "busy"])
def test_workers_end_when_the_audit_is_killed(moment: str, tiny_spec: Path, folder: Path, tmp_path: Path) -> None:
    # "starting": killed while the workers still start up (before any can have imported torch);
    # "busy": killed while they explain images.
    proc, workers = _start_pool_audit(tiny_spec, folder, tmp_path, busy=moment == "busy")
    try:
        os.kill(proc.pid, signal.SIGKILL)  # the parent only: nothing gets a chance to clean up
        proc.wait(timeout=30)
        assert _wait_gone(workers) == [], "worker processes outlived their killed audit"
    finally:
        for pid in _alive(workers):
            os.kill(pid, signal.SIGKILL)
        proc.stderr.close()


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc").is_dir(), reason="reads process lists from /proc")
def test_a_stop_request_reaps_the_workers_and_marks_the_run_interrupted(tiny_spec: Path, folder: Path,
                                                                        tmp_path: Path) -> None:
    proc, workers = _start_pool_audit(tiny_spec, folder, tmp_path)
    try:
        os.kill(proc.pid, signal.SIGTERM)
        _, err = proc.communicate(timeout=60)
        assert proc.returncode == 130, (proc.returncode, err)  # stopped like Ctrl-C, not killed mid-write
        text = err.decode()
        assert text.rstrip().endswith("pellucid: interrupted") and "Traceback" not in text, text
        assert _alive(workers) == []  # reaped by the parent before it exited
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        for pid in _alive(workers):
            os.kill(pid, signal.SIGKILL)
    with Store(tmp_path / "store") as store:
        (run,) = store.list_runs()
        assert run.status == "interrupted" and store.recovered == []
