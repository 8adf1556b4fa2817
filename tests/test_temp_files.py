"""Temporary files are removed: an upload, ``pellucid inspect`` and a job leave the temp folder as they found it.

The test points :func:`tempfile.gettempdir` (and ``TMPDIR``) at a private, empty folder, so other
programs writing to the shared /tmp cannot disturb it, and checks that the folder is empty again
afterwards. The upload is larger than the size at which the multipart parser spools a file to disk.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import png_bytes


def _leftovers(folder: Path) -> list[str]:
    """Everything under ``folder``, except torch's own per-user compile-cache folder while it is empty.

    torch creates ``torchinductor_<user>`` (empty) in the temp folder the first time ``torch._dynamo``
    is imported, which a gradient pass through a Conv2d does; it is made once per user, not per
    request, and Pellucid writes nothing into it. Anything inside it still counts.
    """
    found = []
    for p in folder.rglob("*"):
        if p.parent == folder and p.name.startswith("torchinductor_") and p.is_dir() and not any(p.iterdir()):
            continue
        found.append(str(p.relative_to(folder)))
    return sorted(found)


@pytest.fixture()
def private_tmp(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    folder = tmp_path / "tmp"
    folder.mkdir()
    monkeypatch.setenv("TMPDIR", str(folder))
    monkeypatch.setattr(tempfile, "tempdir", str(folder))
    assert tempfile.gettempdir() == str(folder)
    return folder


def test_upload_inspect_and_job_leave_no_temporary_files(private_tmp: Path, tiny_spec: Path, tmp_path: Path,
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    from fastapi.testclient import TestClient

    from pellucid.cli import main
    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    # Noise does not compress: about 1.5 MB of PNG, over the parser's 1 MB in-memory spool.
    big = png_bytes(np.random.default_rng(0).integers(0, 255, (720, 720, 3), dtype=np.uint8))
    assert len(big) > 1024 * 1024
    settings = Settings(models=(str(tiny_spec),), include_bundled=False, data_dir=tmp_path / "data",
                        max_upload_bytes=4_000_000)
    with TestClient(create_app(settings)) as client:
        r = client.post("/api/images", files={"file": ("big.png", big, "image/png")})
        assert r.status_code == 200, r.text
        image = r.json()["id"]
        job = client.post("/api/jobs", json={"image": image, "method": "occlusion",
                                             "params": {"patch": 8, "stride": 8}}).json()
        deadline = time.time() + 60
        while (state := client.get(f"/api/jobs/{job['id']}").json())["state"] not in ("done", "failed", "cancelled"):
            assert time.time() < deadline
            time.sleep(0.02)
        assert state["state"] == "done", state
        assert client.get(f"/api/results/{state['result_id']}/overlay.png").status_code == 200
        assert _leftovers(private_tmp) == []

    picture = tmp_path / "big.png"
    picture.write_bytes(big)
    code = main(["inspect", str(picture), "--model", str(tiny_spec), "--out", str(tmp_path / "out"),
                 "--method", "gradcam", "--patch", "8"])
    assert code == 0, capsys.readouterr().err
    assert (tmp_path / "out" / "result.json").is_file()
    assert _leftovers(private_tmp) == []


def test_the_check_sees_a_leftover(private_tmp: Path) -> None:
    """The same check fails when something is left behind (so an empty list means something)."""
    with tempfile.NamedTemporaryFile(delete=False, suffix=".png") as handle:
        handle.write(b"x")
    assert _leftovers(private_tmp) == [Path(handle.name).name]
