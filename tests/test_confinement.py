"""One confinement rule for every file a request can make the server read (issue 11, findings 3, 7, 9).

- A folder audited over HTTP reads nothing outside its folder: manifest rows with ``../`` or an
  absolute path and class folders that are symbolic links to elsewhere are skipped and listed,
  and their pictures appear nowhere (results, flagged images, run image endpoint).
- A run audited from the command line into the same store keeps its pictures to itself unless its
  folder lies under the server's ``--images`` folder.
- A model's samples listing does not follow a symbolic link out of its samples folder.
- Resuming is idempotent: a second resume while the first runs, or one of a finished run, is 409.
"""

from __future__ import annotations

import time
from pathlib import Path

import pytest
from conftest import TINY_LABELS, png_bytes, synthetic_tile, write_tiny_spec
from fastapi.testclient import TestClient

from pellucid.core.audit import AuditSettings, load_dataset, run_audit
from pellucid.core.audit.store import Store
from pellucid.core.confine import is_inside, resolve_inside
from pellucid.core.errors import BadParameterError
from pellucid.core.model.loading import load_model
from pellucid.core.model.spec import ModelSpec
from pellucid.web.app import create_app
from pellucid.web.settings import Settings


def _tile(path: Path, seed: int) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(png_bytes(synthetic_tile(seed=seed)))


@pytest.fixture(scope="module")
def layout(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """images/ (the server's folder) with two hostile datasets, and outside/ with a 'secret' tile."""
    base = tmp_path_factory.mktemp("confine")
    images, outside = base / "images", base / "outside"
    _tile(outside / "secret.png", 99)
    _tile(outside / "crack" / "secret-crack.png", 98)
    _tile(outside / "crack" / "secret-crack-2.png", 97)
    # A manifest that reaches out with '../' and with an absolute path.
    manifest_ds = images / "with-manifest"
    for k, label in enumerate(TINY_LABELS):
        for i in range(2):
            _tile(manifest_ds / label / f"{label}{i}.png", 2 * k + i)
    rows = ["path,label"] + [f"{label}/{label}{i}.png,{label}" for label in TINY_LABELS for i in range(2)]
    rows += ["../../outside/secret.png,crack", f"{outside / 'crack' / 'secret-crack.png'},sound"]
    (manifest_ds / "manifest.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    # Class folders, one of them a symbolic link to a folder elsewhere.
    folder_ds = images / "with-links"
    for k, label in enumerate(TINY_LABELS):
        if label != "crack":
            for i in range(2):
                _tile(folder_ds / label / f"{label}{i}.png", 10 + 2 * k + i)
    (folder_ds / "crack").symlink_to(outside / "crack", target_is_directory=True)
    # A folder outside the server's images folder, audited from the command line.
    for i in range(2):
        _tile(base / "elsewhere" / "sound" / f"a{i}.png", 20 + i)
        _tile(base / "elsewhere" / "crack" / f"b{i}.png", 22 + i)
    return {"base": base, "images": images, "outside": outside, "manifest": manifest_ds, "links": folder_ds,
            "elsewhere": base / "elsewhere"}


def test_the_rule_follows_links_and_dots(layout: dict[str, Path]) -> None:
    images = layout["images"]
    assert is_inside(images, images / "with-links" / "sound" / "sound0.png")
    assert not is_inside(images, images / "with-links" / "crack" / "secret-crack.png")  # through a link
    assert not is_inside(images, images / "with-manifest" / ".." / ".." / "outside" / "secret.png")
    assert not is_inside(images, layout["outside"] / "secret.png")
    for bad in ("../outside/secret.png", str(layout["outside"] / "secret.png"), "with-links/crack/secret-crack.png",
                "a\x00b"):
        with pytest.raises(BadParameterError):
            resolve_inside(images, bad)


def test_confined_dataset_skips_what_lies_outside(layout: dict[str, Path]) -> None:
    free = load_dataset(layout["manifest"])  # the command line reads what the user listed …
    assert len(free.items) == 2 * len(TINY_LABELS) + 2 and free.allowed_root is None
    confined = load_dataset(layout["manifest"], confine=True)  # … a server reads only inside the folder
    assert [i.rel for i in confined.items] == sorted(f"{lb}/{lb}{i}.png" for lb in TINY_LABELS for i in range(2))
    assert confined.allowed_root == layout["manifest"].resolve()
    reasons = {s.rel: s.reason for s in confined.skipped}
    assert len(reasons) == 2 and all("outside the dataset folder" in r for r in reasons.values()), reasons
    linked = load_dataset(layout["links"], confine=True)
    assert {i.label for i in linked.items} == set(TINY_LABELS) - {"crack"}
    assert any("symbolic link out of the dataset folder" in n for n in linked.notes)
    assert load_dataset(layout["links"]).allowed_root is None  # followed without confinement: not contained


def _wait(client: TestClient, job_id: str, timeout: float = 180.0) -> dict:
    deadline = time.time() + timeout
    while True:
        status = client.get(f"/api/audits/jobs/{job_id}").json()
        if status["state"] in ("done", "failed", "cancelled"):
            return status
        assert time.time() < deadline, status
        time.sleep(0.05)


@pytest.fixture(scope="module")
def server(layout: dict[str, Path], tiny_spec: Path):
    settings = Settings(models=(str(tiny_spec),), include_bundled=False, image_root=layout["images"],
                        data_dir=layout["base"] / "store")
    with TestClient(create_app(settings)) as c:
        yield c


@pytest.mark.parametrize("folder", ["with-manifest", "with-links"])
def test_http_audits_never_read_outside_their_folder(server: TestClient, layout: dict[str, Path], folder: str) -> None:
    r = server.post("/api/audits", json={"source": {"kind": "folder", "path": folder}, "method": "gradcam"})
    assert r.status_code == 200, r.text
    status = _wait(server, r.json()["id"])
    assert status["state"] == "done", status
    run = server.get(f"/api/audits/runs/{status['run_id']}").json()
    assert run["pictures"] is True and run["dataset"]["allowed_root"].endswith(folder)
    with Store(layout["base"] / "store") as store:
        rels = [row.rel for row in store.results(run["id"])]
    if folder == "with-manifest":
        assert sorted(rels) == sorted(f"{lb}/{lb}{i}.png" for lb in TINY_LABELS for i in range(2))
        skipped = run["dataset"]["skipped"]
        assert len(skipped) == 2 and all("outside the dataset folder" in s["reason"] for s in skipped), skipped
    else:
        assert sorted(rels) == sorted(f"{lb}/{lb}{i}.png" for lb in TINY_LABELS if lb != "crack" for i in range(2))
        assert any("symbolic link out of the dataset folder" in n for n in run["dataset"]["notes"])
    flagged = server.get(f"/api/audits/runs/{run['id']}/flagged").json()
    assert all("secret" not in img["rel"] for img in flagged["images"])
    for rel in ("../../outside/secret.png", "crack/secret-crack.png", str(layout["outside"] / "secret.png")):
        r = server.get(f"/api/audits/runs/{run['id']}/image", params={"rel": rel})
        assert r.status_code in (404, 422), (rel, r.status_code, r.text)


def test_command_line_runs_elsewhere_keep_their_pictures(server: TestClient, layout: dict[str, Path],
                                                          tiny_spec: Path) -> None:
    model = load_model(ModelSpec.from_toml(tiny_spec))
    with Store(layout["base"] / "store") as store:
        outside_run = run_audit(model, load_dataset(layout["elsewhere"]), store=store,
                                settings=AuditSettings(method="gradcam"), resume=False).run
        inside_run = run_audit(model, load_dataset(layout["manifest"]), store=store,
                               settings=AuditSettings(method="saliency"), resume=False).run
    listed = {r["id"]: r for r in server.get("/api/audits/runs").json()["runs"]}
    assert listed[outside_run.id]["pictures"] is False and listed[inside_run.id]["pictures"] is False
    detail = server.get(f"/api/audits/runs/{outside_run.id}").json()
    assert detail["summary"]["accuracy"] is not None  # the numbers stay readable
    assert "does not show its pictures" in detail["pictures_refusal"]
    for path in ("flagged", "image?rel=sound/a0.png", "gallery", "report.html", "artefact?name=flagged/x/image"):
        r = server.get(f"/api/audits/runs/{outside_run.id}/{path}")
        assert r.status_code == 403 and "does not show its pictures" in r.json()["detail"], (path, r.text)
    # The manifest run under --images listed files outside its folder: not contained, so no pictures either.
    assert server.get(f"/api/audits/runs/{inside_run.id}/flagged").status_code == 403


def test_command_line_run_inside_the_image_folder_shows_its_pictures(server: TestClient, layout: dict[str, Path],
                                                                      tiny_spec: Path) -> None:
    model = load_model(ModelSpec.from_toml(tiny_spec))
    with Store(layout["base"] / "store") as store:
        run = run_audit(model, load_dataset(layout["links"], confine=True), store=store,
                        settings=AuditSettings(method="gradient_x_input"), resume=False).run
    assert server.get(f"/api/audits/runs/{run.id}").json()["pictures"] is True
    r = server.get(f"/api/audits/runs/{run.id}/image", params={"rel": "sound/sound0.png"})
    assert r.status_code == 200 and r.json()["image"].startswith("data:image/png;base64,")


def test_samples_do_not_follow_links_out_of_their_folder(tmp_path: Path) -> None:
    spec = write_tiny_spec(tmp_path / "model", name="linked")
    _tile(tmp_path / "outside" / "secret.png", 5)
    (spec.parent / "samples" / "zz-secret.png").symlink_to(tmp_path / "outside" / "secret.png")
    settings = Settings(models=(str(spec),), include_bundled=False, data_dir=tmp_path / "store")
    with TestClient(create_app(settings)) as c:
        names = [s["name"] for s in c.get("/api/samples").json()["samples"]]
        assert names and "zz-secret.png" not in names
        r = c.post("/api/samples/open", json={"model": "linked", "name": "zz-secret.png"})
        assert r.status_code == 422 and "leads outside" in r.json()["detail"]


def test_resume_is_idempotent(tmp_path: Path, tiny_spec: Path) -> None:
    settings = Settings(models=(str(tiny_spec),), include_bundled=False, data_dir=tmp_path / "store")
    with TestClient(create_app(settings)) as c:
        body = {"source": {"kind": "demo", "per_class": 4, "seed": 3}, "method": "occlusion",
                "params": {"patch": 4, "stride": 1}}
        job = c.post("/api/audits", json=body).json()
        deadline = time.time() + 120
        while True:  # cancel once some images are stored
            s = c.get(f"/api/audits/jobs/{job['id']}").json()
            if s["phase"] == "images" and s["done"] > 0:
                break
            assert time.time() < deadline and s["state"] in ("queued", "running"), s
            time.sleep(0.02)
        c.post(f"/api/audits/jobs/{job['id']}/cancel")
        run_id = _wait(c, job["id"])["run_id"]
        answers = [c.post(f"/api/audits/runs/{run_id}/resume") for _ in range(3)]
        assert [a.status_code for a in answers] == [200, 409, 409], [a.text for a in answers]
        assert "already being resumed" in answers[1].json()["detail"] or "running" in answers[1].json()["detail"]
        assert _wait(c, answers[0].json()["id"])["state"] == "done"
        again = c.post(f"/api/audits/runs/{run_id}/resume")
        assert again.status_code == 409 and "is done" in again.json()["detail"]
        runs = c.get("/api/audits/runs").json()["runs"]
        assert [r["id"] for r in runs] == [run_id]  # no duplicate run was made


def test_demo_folders_are_pruned_and_come_back(tmp_path: Path, tiny_spec: Path) -> None:
    from pellucid.web.run_access import MAX_DEMO_FOLDERS

    settings = Settings(models=(str(tiny_spec),), include_bundled=False, data_dir=tmp_path / "store")
    with TestClient(create_app(settings)) as c:
        for seed in range(MAX_DEMO_FOLDERS + 2):
            job = c.post("/api/audits", json={"source": {"kind": "demo", "per_class": 2, "seed": seed},
                                              "method": "saliency"}).json()
            status = _wait(c, job["id"])
            assert status["state"] == "done", status
            if seed == 0:
                run_id = status["run_id"]
        folders = sorted(p.name for p in (tmp_path / "store" / "demo-tiles").iterdir())
        assert len(folders) == MAX_DEMO_FOLDERS and "clean-2-0" not in folders, folders
        with Store(tmp_path / "store") as store:
            rel = store.results(run_id)[0].rel
        r = c.get(f"/api/audits/runs/{run_id}/image", params={"rel": rel})
        assert r.status_code == 200, r.text  # the pruned folder was generated again, identically (same hash)
        assert (tmp_path / "store" / "demo-tiles" / "clean-2-0" / rel).is_file()
