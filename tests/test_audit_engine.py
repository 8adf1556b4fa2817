"""The shard map and crash safety: every engine gives the same results; a killed run resumes.

The model is a TileNet with seeded random weights built here (nothing downloaded); the images are
demo tiles written into tmp_path.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest
import torch
from safetensors.torch import save_file

from pellucid.core.audit import AuditSettings, load_dataset, ray_available, run_audit
from pellucid.core.audit.store import DB_NAME, Store
from pellucid.core.model.loading import load_model
from pellucid.demo.net import TILE_MEAN, TILE_STD, build_tilenet
from pellucid.demo.tiles import CLASSES, make_split, write_folder

REPO = Path(__file__).resolve().parents[1]


def _tiny_model(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    torch.manual_seed(0)
    net = build_tilenet(num_classes=4)
    save_file({k: v.contiguous() for k, v in net.state_dict().items()}, str(folder / "w.safetensors"))
    labels = ", ".join(f'"{c}"' for c in CLASSES)
    (folder / "spec.toml").write_text(f"""name = "tiny-tiles"
[source]
kind = "factory"
factory = "pellucid.demo.net:build_tilenet"
arguments = {{ num_classes = 4 }}
weights = "w.safetensors"
[input]
height = 96
width = 96
channels = 3
[preprocess]
mean = [{", ".join(map(str, TILE_MEAN))}]
std = [{", ".join(map(str, TILE_STD))}]
[output]
kind = "softmax"
labels = [{labels}]
""")
    return folder / "spec.toml"


def _results(store: Store, run_id: str) -> list[tuple]:
    return [(r.rel, r.sha256, r.status, r.data, r.map_hash) for r in store.results(run_id)]


def _without_timing(summary: dict) -> dict:
    return {k: v for k, v in summary.items() if k != "timing"}


@pytest.fixture(scope="module")
def setup(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    root = tmp_path_factory.mktemp("engine")
    spec = _tiny_model(root / "model")
    write_folder(make_split("clean", per_class=3, seed=2), root / "data")
    return spec, root / "data"


def _audit(spec: Path, data: Path, store_dir: Path, **kw):
    model = load_model(spec)
    with Store(store_dir) as store:
        out = run_audit(model, load_dataset(data), store=store, settings=AuditSettings(shard_size=4), **kw)
        return out, _results(store, out.run.id)


@pytest.mark.slow
def test_process_pool_equals_inline(setup, tmp_path: Path) -> None:
    spec, data = setup
    inline, rows_a = _audit(spec, data, tmp_path / "a")
    pooled, rows_b = _audit(spec, data, tmp_path / "b", workers=2)
    assert rows_a == rows_b
    assert _without_timing(inline.summary) == _without_timing(pooled.summary)


@pytest.mark.slow
def test_ray_equals_local(setup, tmp_path: Path) -> None:
    if not ray_available():
        pytest.skip("ray is not installed (pip install ray) — the Ray engine cannot be tested here")
    import ray

    spec, data = setup
    local, rows_local = _audit(spec, data, tmp_path / "local")
    ray.init(num_cpus=2, include_dashboard=False, log_to_driver=False)
    try:
        remote, rows_ray = _audit(spec, data, tmp_path / "ray", engine="ray")
    finally:
        ray.shutdown()
    assert len(rows_ray) == len(rows_local) == 12
    assert rows_ray == rows_local  # same predictions, measures and map bytes (hashes)
    assert _without_timing(remote.summary) == _without_timing(local.summary)


def _done(db: Path) -> int:
    if not db.exists():
        return 0
    try:
        con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1.0)
        try:
            return int(con.execute("SELECT COALESCE(MAX(done), 0) FROM runs").fetchone()[0])
        finally:
            con.close()
    except sqlite3.Error:
        return 0


def test_sigkill_mid_run_then_resume(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from pellucid.cli import main

    spec = _tiny_model(tmp_path / "model")
    write_folder(make_split("clean", per_class=8, seed=4), tmp_path / "data")
    args = ["audit", "--model", str(spec), "--images", str(tmp_path / "data"), "--method", "occlusion",
            "--param", "patch=8", "--param", "stride=4", "--shard-size", "2"]
    store_dir = tmp_path / "store"
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    proc = subprocess.Popen([sys.executable, "-m", "pellucid.cli", *args, "--store", str(store_dir),
                             "--out", str(tmp_path / "out-killed")], env=env, cwd=REPO,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.time() + 120
    while _done(store_dir / DB_NAME) < 4:
        assert proc.poll() is None, "the audit ended before it could be killed"
        assert time.time() < deadline, "the audit made no progress"
        time.sleep(0.01)
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)

    with Store(store_dir) as store:
        assert store.integrity_check() == "ok"
        (run,) = store.list_runs()
        assert run.status == "interrupted", run.status
        assert run.id in store.recovered
        before = store.finished_items(run.id)
        assert 4 <= len(before) < 32

    assert main([*args, "--store", str(store_dir), "--out", str(tmp_path / "out-resumed")]) == 0
    out = capsys.readouterr().out
    assert f"resumed run {run.id}: {len(before)} image(s) already done, {32 - len(before)} computed now" in out

    assert main([*args, "--store", str(tmp_path / "fresh"), "--out", str(tmp_path / "out-fresh")]) == 0
    with Store(store_dir) as resumed, Store(tmp_path / "fresh") as fresh:
        (a,) = resumed.list_runs()
        (b,) = fresh.list_runs()
        assert a.id == run.id and a.status == b.status == "done"
        assert _results(resumed, a.id) == _results(fresh, b.id)
        assert _without_timing(a.summary) == _without_timing(b.summary)
        assert a.summary["timing"]["images_reused"] == len(before)
