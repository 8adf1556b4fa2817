"""The wheel is a working tool: built from the source, installed outside the repository, it serves pages,
lists and inspects the bundled models, with no help from the checkout's editable install.

The installed copy gets its heavy dependencies (torch, …) from this test environment through a
``.pth`` file, so nothing is downloaded; ``pellucid`` itself must come from the new environment.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import sys
import sysconfig
import time
import tomllib
import urllib.request
import zipfile
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
_SKIP = shutil.ignore_patterns(".git", ".venv", "build", "dist", "*.egg-info", "__pycache__", ".pellucid",
                               "test-artifacts", ".hypothesis", ".ruff_cache", ".pytest_cache", "*.pyc", "results")


def test_packages_list_covers_every_package_folder():
    """pyproject's explicit package list must name every folder under server/ that is a package."""
    config = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]
    listed = set(config["packages"])
    dirs = config["package-dir"]
    found = {"pellucid"} | {
        "pellucid." + ".".join(init.parent.relative_to(REPO / "server").parts)
        for init in (REPO / "server").rglob("__init__.py") if init.parent != REPO / "server"
    }
    assert found - listed == set(), f"packages missing from pyproject.toml: {sorted(found - listed)}"
    for name in listed:  # and every listed package exists where package-dir says
        root = next((k for k in sorted(dirs, key=len, reverse=True) if name == k or name.startswith(k + ".")), None)
        assert root is not None, name
        folder = REPO / dirs[root] / Path(*name[len(root):].strip(".").split(".")) if name != root \
            else REPO / dirs[root]
        assert folder.is_dir(), f"{name} → {folder} does not exist"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _run(argv: list, *, cwd: Path, env: dict, timeout: int = 600) -> subprocess.CompletedProcess:
    proc = subprocess.run([str(a) for a in argv], cwd=cwd, env=env, capture_output=True, text=True, timeout=timeout)
    assert proc.returncode == 0, f"{argv} failed ({proc.returncode}):\n{proc.stdout[-2000:]}\n{proc.stderr[-2000:]}"
    return proc


@pytest.mark.slow
def test_wheel_installs_outside_the_repository_and_works(tmp_path):
    src, dist, venv, work = tmp_path / "src", tmp_path / "dist", tmp_path / "venv", tmp_path / "work"
    work.mkdir()
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PELLUCID_DEMO_MODELS", "VIRTUAL_ENV")}
    env["PELLUCID_DATA"] = str(tmp_path / "store")

    # 1. Build from a clean copy of the source (no stale build/ folder can leak files into the wheel).
    shutil.copytree(REPO, src, ignore=_SKIP)
    _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-q", "-w", dist, src],
         cwd=work, env=env)
    wheels = list(dist.glob("pellucid-*.whl"))
    assert len(wheels) == 1
    names = set(zipfile.ZipFile(wheels[0]).namelist())
    for needed in ("pellucid/__main__.py", "pellucid/cli.py", "pellucid/templates/model.html",
                   "pellucid/static/model.js", "pellucid/demo_models/tilenet/spec.toml",
                   "pellucid/demo_models/tilenet/tilenet.safetensors", "pellucid/demo_models/tilenet/MODEL_CARD.md",
                   "pellucid/core/model/onnx_import.py"):
        assert needed in names, f"the wheel lacks {needed}"
    assert any(n.startswith("pellucid/demo_models/tilenet/samples/") and n.endswith(".png") for n in names)
    assert not any(n.startswith(("server/", "tests/")) for n in names)

    # 2. A fresh environment outside the repository; its only link to ours is a .pth to our site-packages
    #    (torch and friends). .pth files inside that folder (our editable install) are not processed.
    _run([sys.executable, "-m", "venv", "--without-pip", venv], cwd=work, env=env)
    vpy = venv / "bin" / "python"
    site = Path(_run([vpy, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"], cwd=work,
                     env=env).stdout.strip())
    (site / "_pellucid_test_deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n", encoding="utf-8")
    _run([sys.executable, "-m", "pip", "--python", vpy, "install", "--no-deps", "--no-index", "-q", wheels[0]],
         cwd=work, env=env)

    where = _run([vpy, "-c", "import pellucid; print(pellucid.__file__)"], cwd=work, env=env).stdout.strip()
    assert Path(where).resolve().is_relative_to(venv.resolve()), where
    cli = venv / "bin" / "pellucid"

    # 3. The commands, as a user runs them.
    listing = _run([cli, "models"], cwd=work, env=env).stdout
    assert "tilenet" in listing and "efficientnet-lite0" in listing
    samples = sorted((Path(where).parent / "demo_models" / "tilenet" / "samples").glob("*.png"))
    assert samples
    _run([cli, "inspect", samples[0], "--model", "tilenet", "--out", work / "out", "--quiet"], cwd=work, env=env)
    result = json.loads((work / "out" / "result.json").read_text(encoding="utf-8"))
    assert result["model"]["name"] == "tilenet" and result["prediction"]["top"]
    assert Path(result["model"]["weights_path"]).resolve().is_relative_to(venv.resolve())

    # 4. One page from a real server started by the installed command.
    port = _free_port()
    server = subprocess.Popen([str(cli), "serve", "--port", str(port)], cwd=work, env=env,
                              stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    try:
        deadline = time.monotonic() + 180
        page = None
        while time.monotonic() < deadline and server.poll() is None:
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/model", timeout=5) as resp:
                    page = (resp.status, resp.read().decode("utf-8"))
                break
            except OSError:
                time.sleep(0.5)
        log = server.stdout.read() if server.poll() is not None else ""
        assert page is not None, f"the server did not answer: {log}"
        status, body = page
        assert status == 200 and "<html" in body.lower() and "/static/" in body
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/static/model.js", timeout=5) as resp:
            assert resp.status == 200 and resp.read()
    finally:
        server.terminate()
        try:
            server.wait(timeout=30)
        except subprocess.TimeoutExpired:
            server.kill()
            server.wait(timeout=30)
        server.stdout.close()
