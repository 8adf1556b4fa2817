"""The audit, runs and report commands: exit codes, one-line errors, stored runs."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from pellucid.cli import main
from pellucid.demo.tiles import make_split, write_folder
from tests.test_audit_engine import _tiny_model


@pytest.fixture(scope="module")
def setup(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    root = tmp_path_factory.mktemp("cli")
    spec = _tiny_model(root / "model")
    write_folder(make_split("clean", per_class=2, seed=6), root / "data")
    return spec, root / "data"


def _bad(argv: list[str], capsys: pytest.CaptureFixture[str]) -> str:
    rc = main(argv)
    err = capsys.readouterr().err.strip()
    assert rc == 2, err
    assert len(err.splitlines()) == 1, err
    assert err.startswith("pellucid: ") and "Traceback" not in err
    return err


def test_bad_input_gets_one_line(setup, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    spec, data = setup
    base = ["audit", "--model", str(spec), "--out", str(tmp_path / "out"), "--store", str(tmp_path / "s")]
    (tmp_path / "empty").mkdir()
    assert "nothing to audit" in _bad([*base, "--images", str(tmp_path / "empty")], capsys)
    (tmp_path / "m.csv").write_text("file,class\nx.png,crack\n")
    assert "'path' and 'label'" in _bad([*base, "--images", str(tmp_path / "m.csv")], capsys)
    (tmp_path / "p.toml").write_text("[thresholds]\nmin_acuracy = 0.5\n")
    assert "Did you mean 'min_accuracy'" in _bad([*base, "--images", str(data), "--policy", str(tmp_path / "p.toml")],
                                                capsys)
    (tmp_path / "q.toml").write_text("[thresholds\n")
    assert "not valid TOML" in _bad([*base, "--images", str(data), "--policy", str(tmp_path / "q.toml")], capsys)
    assert "unknown attribution method 'nope'" in _bad([*base, "--images", str(data), "--method", "nope"], capsys)
    assert "stride" in _bad([*base, "--images", str(data), "--method", "occlusion", "--param", "stride=-3"], capsys)
    assert "--inject-at" in _bad([*base, "--images", str(data), "--inject-class", "crack", "--inject-patch",
                                  str(spec)], capsys)
    bad_store = ["audit", "--model", str(spec), "--out", str(tmp_path / "out"), "--images", str(data)]
    assert "data folder" in _bad([*bad_store, "--store", "/proc/self"], capsys)
    labels = tmp_path / "odd"
    write_folder(make_split("clean", per_class=1, seed=1), labels)
    (labels / "manifest.csv").unlink()
    (labels / "sound").rename(labels / "fine")
    assert "label(s) 'fine'" in _bad([*base, "--images", str(labels)], capsys)


def test_unreadable_images_are_listed_not_fatal(setup, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    spec, _ = setup
    data = tmp_path / "data"
    write_folder(make_split("clean", per_class=2, seed=1), data)  # at least two images per class
    (data / "manifest.csv").unlink()
    (data / "crack" / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n truncated")
    rc = main(["audit", "--model", str(spec), "--images", str(data), "--out", str(tmp_path / "out"),
               "--store", str(tmp_path / "s")])
    captured = capsys.readouterr()
    assert rc == 0
    assert "skipped crack/broken.png:" in captured.err
    doc = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert [s["rel"] for s in doc["dataset"]["skipped"]] == ["crack/broken.png"]
    assert doc["summary"]["done"] == 8


def test_runs_and_report(setup, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    spec, data = setup
    store = str(tmp_path / "s")
    common = ["audit", "--model", str(spec), "--images", str(data), "--store", store]
    assert main([*common, "--out", str(tmp_path / "a")]) == 0
    assert main([*common, "--out", str(tmp_path / "b"), "--method", "occlusion", "--param", "stride=16"]) == 0
    capsys.readouterr()
    first = json.loads((tmp_path / "a" / "summary.json").read_text())["run"]["id"]
    second = json.loads((tmp_path / "b" / "summary.json").read_text())["run"]["id"]

    assert main(["runs", "list", "--store", store]) == 0
    listing = capsys.readouterr().out
    assert first in listing and second in listing and "gradcam" in listing and "occlusion" in listing

    assert main(["runs", "show", first[:17], "--store", store]) == 0
    shown = capsys.readouterr().out
    assert "re-run with: pellucid audit" in shown and first in shown

    assert main(["runs", "compare", first, second, "--store", store, "--json"]) == 0
    diff = json.loads(capsys.readouterr().out)
    assert diff["same_model"] and diff["same_dataset"]
    assert diff["settings_changed"]["audit.method"] == {"first": "gradcam", "second": "occlusion"}
    assert diff["images_in_both"] == 8

    assert main(["report", first, "--out", str(tmp_path / "rep"), "--store", store, "--no-pdf"]) == 0
    assert (tmp_path / "rep" / "report.html").is_file() and not (tmp_path / "rep" / "report.pdf").exists()

    assert main(["runs", "delete", second, "--store", store]) == 0
    capsys.readouterr()
    assert main(["runs", "list", "--store", store, "--json"]) == 0
    assert [r["id"] for r in json.loads(capsys.readouterr().out)] == [first]
    assert "no audit run" in _bad(["runs", "show", "nope", "--store", store], capsys)
