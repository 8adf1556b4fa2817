"""Policies and suspect patches through the API: edit, check, save, download, upload, and the runs
they start (default method, re-run command, flagged count, a running run's delete, every region).

The round trip is judged against the policy as this test wrote it (a plain dict), read back by the
command line's own loader and by a real ``pellucid audit --policy FILE`` run.
"""

from __future__ import annotations

import base64
import json
import shlex
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import png_bytes, synthetic_tile, write_tiny_spec
from fastapi.testclient import TestClient

from pellucid.cli import main
from pellucid.core.audit.policy import THRESHOLDS, load_policy
from pellucid.web.app import create_app
from pellucid.web.settings import Settings

SIZE = 32


@pytest.fixture(scope="module")
def setup(tmp_path_factory) -> tuple[Path, Path, Path]:
    root = tmp_path_factory.mktemp("policies-web")
    spec = write_tiny_spec(root / "model", name="plain", size=SIZE, samples=False)
    images = root / "images"
    for label, seeds in (("sound", (1, 2, 3)), ("crack", (4, 5, 6))):
        (images / "line" / label).mkdir(parents=True)
        for s in seeds:
            (images / "line" / label / f"{s}.png").write_bytes(png_bytes(synthetic_tile(seed=s, size=SIZE)))
    return root, spec, images


@pytest.fixture(scope="module")
def client(setup):
    root, spec, images = setup
    app = create_app(Settings(models=(str(spec),), include_bundled=False, image_root=images, data_dir=root / "data"))
    with TestClient(app) as c:
        yield c


def _b64(data: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(data).decode()


def _patch(client: TestClient, side: int = 4) -> str:
    r = client.post("/api/audits/patches", json={"png": _b64(png_bytes(np.full((side, side, 3), 250, np.uint8))),
                                                 "name": "mark.png"})
    assert r.status_code == 200, r.text
    return r.json()["id"]


def _wait(client: TestClient, job_id: str) -> dict:
    deadline = time.time() + 120
    while True:
        status = client.get(f"/api/audits/jobs/{job_id}").json()
        if status["state"] in ("done", "failed", "cancelled"):
            return status
        assert time.time() < deadline, status
        time.sleep(0.05)


# What the user typed into the editor; the reference side of every round trip below.
TYPED = {
    "name": "line gate", "description": "written in the editor",
    "thresholds": {"min_accuracy": 0.0, "max_corner_share": 0.9, "max_injection_flip_rate": 1.0,
                   "max_failed_images": 0},
    "classes": {"crack": {"max_corner_share": 0.8}},
    "audit": {"method": "occlusion", "params": {"patch": 8, "stride": 8}, "target": "predicted"},
}


def test_options_describe_every_policy_key(client: TestClient) -> None:
    keys = client.get("/api/audits/options").json()["policy_keys"]
    assert [k["key"] for k in keys["thresholds"]] == list(THRESHOLDS)
    assert all(k["unit"] and k["meaning"] for k in keys["thresholds"])
    assert {k["key"] for k in keys["injection"]} == {"patch", "suspect_class", "at", "seed", "limit"}
    assert {k["key"] for k in keys["audit"]} == {"method", "params", "target"}


def test_edit_save_download_and_audit_with_the_downloaded_file(client: TestClient, setup, tmp_path: Path) -> None:
    _, spec, images = setup
    patch = _patch(client)
    form = {**TYPED, "injection": {"patch_id": patch, "suspect_class": "crack", "at": "random", "seed": 3,
                                   "limit": 2}}
    checked = client.post("/api/audits/policies/check", json=form)
    assert checked.status_code == 200, checked.text
    saved = client.put("/api/audits/policies/line-gate", json=form)
    assert saved.status_code == 200, saved.text
    # The saved file is itself a policy the command line reads (its patch named relative to it).
    on_disk = load_policy(saved.json()["path"])
    assert on_disk.injection is not None and on_disk.injection.patch.is_file()

    download = client.get("/api/audits/policies/line-gate/download")
    assert download.status_code == 200 and 'filename="line-gate.toml"' in download.headers["content-disposition"]
    file = tmp_path / "elsewhere" / "gate.toml"
    file.parent.mkdir()
    file.write_bytes(download.content)
    policy = load_policy(file)  # the CLI's loader
    assert policy.name == TYPED["name"] and policy.description == TYPED["description"]
    assert policy.thresholds == {k: float(v) for k, v in TYPED["thresholds"].items()}
    assert policy.classes == {"crack": {"max_corner_share": 0.8}}
    assert (policy.method, policy.params, policy.target) == ("occlusion", {"patch": 8, "stride": 8}, "predicted")
    inj = policy.injection
    assert (inj.suspect_class, inj.at, inj.seed, inj.limit) == ("crack", "random", 3, 2)
    assert inj.patch.read_bytes() == client.get(f"/api/audits/patches/{patch}.png").content

    out = tmp_path / "out"
    code = main(["audit", "--model", str(spec), "--images", str(images / "line"), "--policy", str(file), "--out",
                 str(out), "--store", str(tmp_path / "store"), "--no-discovery", "--quiet"])
    assert code in (0, 1)
    doc = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert doc["gate"]["policy"]["name"] == "line gate"
    assert doc["run"]["method"] == "occlusion" and doc["summary"]["injection"]["settings"]["at"] == "random"
    assert doc["summary"]["injection"]["settings"]["patch_size"] == [4, 4]
    assert doc["summary"]["injection"]["settings"]["seed"] == 3


@pytest.mark.parametrize("change, status, words", [
    ({"thresholds": {"min_accuracy": 80}}, 422, "must lie between 0 and 1"),
    ({"thresholds": {"max_corner_shares": 0.2}}, 422, "Did you mean 'max_corner_share'"),
    ({"thresholds": {}, "classes": {}}, 422, "sets no threshold"),
    ({"audit": {"method": "occlusion", "params": {"stride": 0}}}, 422, "stride"),
    ({"audit": {"method": "nope"}}, 422, "audit.method must be one of"),
    ({"audit": {"method": "occlusion", "params": {"stride": [1]}}}, 422, "plain values"),
    ({"injection": {"suspect_class": "crack", "at": [1, 1]}}, 422, "needs a suspect patch"),
    ({"injection": {"patch_id": "0123456789abcdef", "suspect_class": "crack", "at": [1, 1]}}, 404,
     "no stored patch"),
])
def test_bad_policies_are_one_sentence(client: TestClient, change: dict, status: int, words: str) -> None:
    r = client.post("/api/audits/policies/check", json={**TYPED, **change})
    assert r.status_code == status, r.text
    detail = r.json()["detail"]
    assert words in detail and "\n" not in detail and "Traceback" not in detail


def test_an_empty_parameter_is_left_out(client: TestClient) -> None:
    r = client.post("/api/audits/policies/check", json={**TYPED, "audit": {"method": "occlusion",
                                                                          "params": {"stride": None, "patch": 8}}})
    assert r.status_code == 200 and "params = { patch = 8 }" in r.json()["toml"]


def test_names_and_bundled_policies(client: TestClient) -> None:
    assert client.put("/api/audits/policies/..%2Fescape", json=TYPED).status_code in (404, 422)
    bad = client.put("/api/audits/policies/has space", json=TYPED)
    assert bad.status_code == 422 and "policy name" in bad.json()["detail"]
    clash = client.put("/api/audits/policies/policy-demo", json=TYPED)
    assert clash.status_code == 409 and "bundled" in clash.json()["detail"]
    assert client.delete("/api/audits/policies/policy-demo").status_code == 409
    bundled = client.get("/api/audits/policies/policy-demo").json()
    # Source: demo_models/policy-demo.toml as shipped (its [injection] and [audit] tables).
    assert bundled["origin"] == "bundled" and bundled["form"]["injection"]["suspect_class"] == "crack"
    assert bundled["form"]["audit"]["method"] == "occlusion" and bundled["patch"]["width"] > 0
    assert client.get("/api/audits/policies/none-such").status_code == 404


def test_patch_upload_is_checked(client: TestClient) -> None:
    assert client.get("/api/audits/patches").status_code == 200
    text = client.post("/api/audits/patches", json={"png": _b64(b"hello"), "name": "notes.txt"})
    assert text.status_code == 415 and "not an image" in text.json()["detail"]
    wide = client.post("/api/audits/patches", json={"png": _b64(png_bytes(np.zeros((8, 600, 3), np.uint8)))})
    assert wide.status_code == 422 and "at most 512 px" in wide.json()["detail"]
    junk = client.post("/api/audits/patches", json={"png": "%%%"})
    assert junk.status_code == 422 and "base64" in junk.json()["detail"]
    assert client.get("/api/audits/patches/zz.png").status_code == 422
    same = _patch(client, side=5)
    assert same == _patch(client, side=5)  # named by content
    assert client.get(f"/api/audits/patches/{same}.png").content.startswith(b"\x89PNG")


def test_a_web_run_carries_its_exact_command(client: TestClient, setup, tmp_path: Path, monkeypatch) -> None:
    root, _, _ = setup
    patch = _patch(client, side=3)
    body = {"source": {"kind": "folder", "path": "line"}, "discovery": False,
            "injection": {"kind": "upload", "patch_id": patch, "suspect_class": "crack", "at": "random", "seed": 5}}
    plan = client.post("/api/audits/estimate", json=body)
    assert plan.status_code == 200, plan.text
    planned, cost = plan.json()["plan"], plan.json()["cost"]
    # The default method follows the core's rule: Grad-CAM for a model that takes hooks.
    assert planned["method"] == "gradcam" and planned["method_source"] == "default"
    assert planned["images"] == 6 and planned["injection"]["suspect_class"] == "crack"
    assert cost["images"] == 6 and cost["seconds"] > 0 and cost["phases"][0]["unit"] == "images"
    started = client.post("/api/audits", json=body)
    assert started.status_code == 200, started.text
    status = _wait(client, started.json()["id"])
    assert status["state"] == "done", status
    run = client.get(f"/api/audits/runs/{status['run_id']}").json()
    command = shlex.split(run["command"])
    assert command[:2] == ["pellucid", "audit"] and run["command"] == started.json()["command"]
    assert command[command.index("--inject-patch") + 1] == str((root / "data" / "patches" / f"{patch}.png").resolve())
    assert command[command.index("--inject-seed") + 1] == "5" and "--no-discovery" in command
    # Run as typed, it audits with exactly the same settings (a new run beside the finished one).
    monkeypatch.chdir(tmp_path)
    assert main([*command[1:], "--quiet"]) == 0
    again = json.loads((tmp_path / "audit-out" / "summary.json").read_text(encoding="utf-8"))["run"]
    assert again["id"] != run["id"] and again["settings"] == run["settings"]
    listed = next(r for r in client.get("/api/audits/runs").json()["runs"] if r["id"] == run["id"])
    # "Flagged images" in the list is the run view's count of flagged images.
    assert listed["flagged_count"] == run["summary"]["flagged_count"] == len(run["summary"]["flagged_images"])


def test_a_policy_sets_the_method_and_adds_its_injection(client: TestClient) -> None:
    patch = _patch(client, side=2)
    form = {**TYPED, "injection": {"patch_id": patch, "suspect_class": "crack", "at": [1, 1]}}
    assert client.put("/api/audits/policies/with-patch", json=form).status_code == 200
    plan = client.post("/api/audits/estimate", json={"source": {"kind": "folder", "path": "line"},
                                                     "policy": "with-patch"}).json()["plan"]
    assert plan["method"] == "occlusion" and plan["method_source"] == "policy" and plan["target"] == "predicted"
    assert plan["injection"]["from_policy"] and plan["injection"]["at"] == [1, 1]
    assert "--policy" in plan["command"] and "--inject-patch" not in plan["command"]


def test_delete_of_a_running_run_is_a_conflict_with_the_way_out(client: TestClient) -> None:
    body = {"source": {"kind": "demo", "per_class": 12, "seed": 4}, "method": "occlusion",
            "params": {"patch": 4, "stride": 2}, "discovery": False}
    job = client.post("/api/audits", json=body).json()
    deadline = time.time() + 60
    while True:
        s = client.get(f"/api/audits/jobs/{job['id']}").json()
        if s["run_id"] and s["state"] == "running":
            break
        assert time.time() < deadline and s["state"] in ("queued", "running"), s
        time.sleep(0.02)
    listed = next(r for r in client.get("/api/audits/runs").json()["runs"] if r["id"] == s["run_id"])
    assert listed["job"] == job["id"]
    r = client.delete(f"/api/audits/runs/{s['run_id']}")
    assert r.status_code == 409 and "cancel it first" in r.json()["detail"] and job["id"] in r.json()["detail"]
    assert s["unit"] in (None, "images", "files") and s["phase_words"]
    client.post(f"/api/audits/jobs/{job['id']}/cancel")
    assert _wait(client, job["id"])["state"] == "cancelled"
    assert client.delete(f"/api/audits/runs/{s['run_id']}").status_code == 200


def test_compare_shows_every_region(client: TestClient) -> None:
    # Source: the region list of server/core/audit/measures.py's docstring (border band, four corner boxes, centre box).
    runs = [r["id"] for r in client.get("/api/audits/runs").json()["runs"] if r["status"] == "done"][:2]
    assert len(runs) == 2
    diff = client.get("/api/audits/compare", params={"first": runs[0], "second": runs[1]}).json()
    for entry in diff["per_class"].values():
        if "only_in" in entry:
            continue
        for region in ("border", "top_left", "top_right", "bottom_left", "bottom_right", "centre"):
            assert set(entry[f"{region}_share"]) == {"first", "second", "change"}


def test_the_plan_sees_a_folder_change(client: TestClient, setup) -> None:
    _, _, images = setup
    for label in ("sound", "crack"):
        (images / "grow" / label).mkdir(parents=True)
        (images / "grow" / label / "1.png").write_bytes(png_bytes(synthetic_tile(seed=11, size=SIZE)))
        (images / "grow" / label / "2.png").write_bytes(png_bytes(synthetic_tile(seed=12, size=SIZE)))
    body = {"source": {"kind": "folder", "path": "grow"}, "discovery": False}
    assert client.post("/api/audits/estimate", json=body).json()["plan"]["images"] == 4
    assert client.post("/api/audits/estimate", json=body).json()["plan"]["images"] == 4  # read once, kept
    (images / "grow" / "crack" / "3.png").write_bytes(png_bytes(synthetic_tile(seed=13, size=SIZE)))
    assert client.post("/api/audits/estimate", json=body).json()["plan"]["images"] == 5
