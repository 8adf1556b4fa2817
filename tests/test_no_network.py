"""No outgoing network calls anywhere: the app, the bundled demo model, the API and the CLI.

A fresh interpreter first replaces ``socket.socket.connect`` / ``connect_ex``,
``socket.getaddrinfo`` and ``socket.create_connection`` with guards that record and refuse any
address that is not loopback (or a local socket file), and only then imports the app, loads the
bundled demo model and drives top-k, activations, kernels, occlusion and Grad-CAM through the API
and ``pellucid inspect``. The guard checks itself on a documentation address first, so an empty
list of attempts means the guard was live and nothing tried to leave the machine.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
DEMO_SPEC = REPO / "demo_models" / "tilenet" / "spec.toml"

_SCRIPT = textwrap.dedent(
    r'''
    import ipaddress, json, socket, sys, time

    attempts = []

    def _local(address):
        if isinstance(address, (str, bytes)):      # AF_UNIX path
            return True
        host = address[0] if isinstance(address, tuple) else address
        if host in ("localhost", "", None):
            return True
        try:
            return ipaddress.ip_address(str(host).split("%")[0]).is_loopback
        except ValueError:
            return False                           # a name that would need a lookup

    def _guard(kind, address):
        if not _local(address):
            attempts.append(f"{kind} {address!r}")
            raise OSError(f"network disabled in this test: {kind} {address!r}")

    _connect, _connect_ex, _getaddrinfo = socket.socket.connect, socket.socket.connect_ex, socket.getaddrinfo
    _create_connection = socket.create_connection

    def connect(self, address):
        _guard("connect", address)
        return _connect(self, address)

    def connect_ex(self, address):
        _guard("connect_ex", address)
        return _connect_ex(self, address)

    def getaddrinfo(host, *args, **kwargs):
        _guard("getaddrinfo", (host,))
        return _getaddrinfo(host, *args, **kwargs)

    def create_connection(address, *args, **kwargs):
        _guard("create_connection", address)
        return _create_connection(address, *args, **kwargs)

    socket.socket.connect, socket.socket.connect_ex = connect, connect_ex
    socket.getaddrinfo, socket.create_connection = getaddrinfo, create_connection

    # The guard is live: a documentation address (RFC 5737) is recorded and refused.
    try:
        socket.create_connection(("192.0.2.1", 80), timeout=0.1)
    except OSError:
        pass
    self_check = list(attempts)
    attempts.clear()

    spec, sample, out = sys.argv[1], sys.argv[2], sys.argv[3]
    from fastapi.testclient import TestClient
    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings
    from pellucid.cli import main

    done = []
    with TestClient(create_app(Settings(models=(spec,), include_bundled=False, data_dir=out + "/data"))) as c:
        model = c.get("/api/models").json()["default"]
        assert c.get(f"/api/models/{model}").status_code == 200
        assert c.get(f"/api/models/{model}/kernels").status_code == 200
        layers = c.get(f"/api/models/{model}/layers").json()
        with open(sample, "rb") as fh:
            image = c.post("/api/images", files={"file": ("tile.png", fh.read(), "image/png")}).json()["id"]
        assert c.post("/api/predict", json={"image": image}).status_code == 200
        r = c.post("/api/activations", json={"image": image, "layer": layers["default_feature_layer"]})
        assert r.status_code == 200, r.text
        for method, params in (("occlusion", {"patch": 24, "stride": 24}), ("gradcam", {})):
            job = c.post("/api/jobs", json={"image": image, "method": method, "params": params}).json()
            deadline = time.time() + 120
            while (state := c.get(f"/api/jobs/{job['id']}").json())["state"] not in ("done", "failed", "cancelled"):
                assert time.time() < deadline
                time.sleep(0.05)
            assert state["state"] == "done", state
            assert c.get(f"/api/results/{state['result_id']}").status_code == 200
            done.append(method)
    code = main(["inspect", sample, "--model", spec, "--out", out + "/inspect", "--patch", "24",
                 "--method", "gradcam"])
    done.append(f"cli:{code}")
    print("RESULT " + json.dumps({"self_check": self_check, "attempts": attempts, "done": done}))
    '''
)


@pytest.mark.skipif(not DEMO_SPEC.is_file(), reason="the bundled demo model is not built")
def test_nothing_leaves_the_machine(tmp_path: Path) -> None:
    samples = sorted((DEMO_SPEC.parent / "samples").glob("*.png"))
    assert samples, "the demo model ships sample tiles"
    script = tmp_path / "guarded.py"
    script.write_text(_SCRIPT, encoding="utf-8")
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    proc = subprocess.run([sys.executable, str(script), str(DEMO_SPEC), str(samples[0]), str(tmp_path)],
                          check=False, capture_output=True, text=True, timeout=300, cwd=REPO, env=env)
    assert proc.returncode == 0, proc.stderr[-3000:]
    line = next(line for line in proc.stdout.splitlines() if line.startswith("RESULT "))
    result = json.loads(line[len("RESULT "):])
    assert result["self_check"] == ["create_connection ('192.0.2.1', 80)"]
    assert result["done"] == ["occlusion", "gradcam", "cli:0"]
    assert result["attempts"] == []
