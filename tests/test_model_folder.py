"""``serve --models DIR``: the spec files a page may add a model from, chosen by name, never by a path
that leaves the folder; a spec that does not load is refused and not served."""

from __future__ import annotations

from pathlib import Path

import pytest
from conftest import write_tiny_spec
from fastapi.testclient import TestClient

from pellucid.cli import main
from pellucid.web.app import create_app
from pellucid.web.settings import Settings


@pytest.fixture()
def folder(tmp_path: Path) -> Path:
    """A models folder: one good spec in a subfolder, a broken one, one whose weights are missing, and
    links (a file and a folder) that lead outside it."""
    root = tmp_path / "specs"
    root.mkdir()
    write_tiny_spec(root / "second", name="second", seed=1, samples=False)
    (root / "broken.toml").write_text("name = \n", encoding="utf-8")
    missing = write_tiny_spec(root / "noweights", name="noweights", seed=2, samples=False)
    (missing.parent / "weights.safetensors").unlink()
    outside = write_tiny_spec(tmp_path / "elsewhere", name="elsewhere", seed=3, samples=False)
    (root / "outside.toml").symlink_to(outside)
    (root / "escape").symlink_to(outside.parent, target_is_directory=True)
    return root


@pytest.fixture()
def served(tiny_spec: Path, folder: Path, tmp_path: Path):
    settings = Settings(models=(str(tiny_spec),), include_bundled=False, models_dir=folder, data_dir=tmp_path / "d")
    with TestClient(create_app(settings)) as c:
        yield c


def _plain(r, status: int, *words: str) -> None:
    assert r.status_code == status, r.text
    detail = r.json()["detail"]
    assert isinstance(detail, str) and "\n" not in detail and "Traceback" not in detail
    for w in words:
        assert w in detail, detail


def test_the_list_holds_the_folder_spec_files_and_nothing_outside(served: TestClient) -> None:
    body = served.get("/api/model-specs").json()
    assert body["available"] and body["folder"] == "specs"
    files = {s["file"]: s for s in body["specs"]}
    assert set(files) == {"broken.toml", "noweights/spec.toml", "second/spec.toml"}
    assert files["second/spec.toml"]["name"] == "second" and files["second/spec.toml"]["error"] is None
    assert not files["second/spec.toml"]["served"]
    assert files["broken.toml"]["name"] is None and files["broken.toml"]["error"]


def test_adding_a_spec_serves_its_model(served: TestClient) -> None:
    r = served.post("/api/model-specs", json={"file": "second/spec.toml"})
    assert r.status_code == 201, r.text
    assert r.json()["name"] == "second" and r.json()["added"]
    names = [m["name"] for m in served.get("/api/models").json()["models"]]
    assert names == ["tiny", "second"]
    assert served.get("/api/models/second").json()["num_classes"] == 4
    again = served.post("/api/model-specs", json={"file": "second/spec.toml"})
    assert again.status_code == 200 and not again.json()["added"]
    listed = {s["file"]: s for s in served.get("/api/model-specs").json()["specs"]}
    assert listed["second/spec.toml"]["served"]


@pytest.mark.parametrize("file, status, words", [
    ("../elsewhere/spec.toml", 422, ("'..'",)),
    ("/etc/passwd", 422, ("absolute",)),
    ("outside.toml", 422, ("outside the models folder",)),
    ("escape/spec.toml", 422, ("outside the models folder",)),
    ("missing.toml", 404, ("missing.toml",)),
    ("second/weights.safetensors", 422, ("not a spec file",)),
    ("second", 422, ("not a spec file",)),
    ("broken.toml", 422, ("broken.toml cannot be used",)),
    ("", 422, ("name a spec file",)),
])
def test_names_that_leave_the_folder_or_are_no_spec_are_refused(served: TestClient, file: str, status: int,
                                                                 words: tuple[str, ...]) -> None:
    _plain(served.post("/api/model-specs", json={"file": file}), status, *words)
    assert [m["name"] for m in served.get("/api/models").json()["models"]] == ["tiny"]


def test_a_spec_that_does_not_load_is_refused_and_not_served(served: TestClient) -> None:
    r = served.post("/api/model-specs", json={"file": "noweights/spec.toml"})
    assert 400 <= r.status_code < 500
    _plain(r, r.status_code)
    assert [m["name"] for m in served.get("/api/models").json()["models"]] == ["tiny"]


def test_a_name_already_served_from_another_file_is_a_conflict(tiny_spec: Path, tmp_path: Path) -> None:
    root = tmp_path / "specs"
    write_tiny_spec(root / "copy", name="tiny", seed=4, samples=False)
    settings = Settings(models=(str(tiny_spec),), include_bundled=False, models_dir=root, data_dir=tmp_path / "d")
    with TestClient(create_app(settings)) as c:
        _plain(c.post("/api/model-specs", json={"file": "copy/spec.toml"}), 409, "'tiny'")


def test_without_a_models_folder_the_list_is_empty_and_adding_says_how(tiny_spec: Path, tmp_path: Path) -> None:
    settings = Settings(models=(str(tiny_spec),), include_bundled=False, data_dir=tmp_path / "d")
    with TestClient(create_app(settings)) as c:
        assert c.get("/api/model-specs").json() == {"available": False, "folder": None, "specs": []}
        _plain(c.post("/api/model-specs", json={"file": "x.toml"}), 404, "--models DIR")


def test_serve_refuses_a_models_folder_that_is_not_one(tmp_path: Path, capsys) -> None:
    code = main(["serve", "--models", str(tmp_path / "nope"), "--port", "1", "--store", str(tmp_path / "d")])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and "--models" in err
