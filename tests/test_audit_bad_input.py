"""Bad audit input is one sentence — exit 2 on the command line, a 4xx from the API — and stores nothing.

The cases are those a new user meets (issue "Shortcut verdicts you can trust"): a folder with one
class, a class with one image, a suspect patch larger than the model's input, a suspect class the
model does not have, and a Grad-CAM layer without a 4-D map (or an occlusion patch larger than
the input). After each refusal the store holds no run: nothing was stored half-way.
"""

from __future__ import annotations

import base64
from pathlib import Path

import numpy as np
import pytest
from conftest import TINY_SIZE, png_bytes, synthetic_tile
from fastapi.testclient import TestClient

from pellucid.cli import main
from pellucid.core.audit.dataset import load_dataset
from pellucid.core.audit.runner import run_audit
from pellucid.core.audit.settings import AuditSettings, InjectionSpec
from pellucid.core.audit.store import Store
from pellucid.core.errors import PellucidError
from pellucid.core.model.loading import load_model

BIG = TINY_SIZE + 8


def _folder(root: Path, counts: dict[str, int]) -> Path:
    for label, n in counts.items():
        (root / label).mkdir(parents=True, exist_ok=True)
        for i in range(n):
            (root / label / f"{i}.png").write_bytes(png_bytes(synthetic_tile(seed=i, tagged=label == "crack")))
    return root


@pytest.fixture(scope="module")
def folders(tmp_path_factory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("bad-audit-input")
    big = np.full((BIG, BIG, 3), 200, dtype=np.uint8)
    (root / "big.png").write_bytes(png_bytes(big))
    (root / "small.png").write_bytes(png_bytes(np.full((4, 4, 3), 30, dtype=np.uint8)))
    return {
        "images": root,
        "good": _folder(root / "good", {"sound": 2, "crack": 2}),
        "one-class": _folder(root / "one-class", {"sound": 3}),
        "one-image": _folder(root / "one-image", {"sound": 3, "crack": 1}),
        "big": root / "big.png",
        "small": root / "small.png",
    }


# name → (extra CLI arguments, folder, the words the one sentence must contain)
CASES = {
    "one class": ([], "one-class", "one class only ('sound'"),
    "a class with one image": ([], "one-image", "'crack' have only one readable image"),
    "a patch bigger than the input": (["--inject-patch", "{big}", "--inject-at", "0,0", "--inject-class", "crack"],
                                      "good", f"larger than the model's {TINY_SIZE}×{TINY_SIZE} input"),
    "a suspect class not in the labels": (["--inject-patch", "{small}", "--inject-at", "0,0", "--inject-class",
                                           "zebra"], "good", "suspect class 'zebra' is not one of model"),
    "grad-cam on the linear head": (["--method", "gradcam", "--param", "layer=head"], "good",
                                    "valid layers: features.conv1"),
    "an occlusion patch bigger than the input": (["--method", "occlusion", "--param", f"patch={BIG}"], "good",
                                                 f"larger than the model's {TINY_SIZE}×{TINY_SIZE} input"),
}


@pytest.mark.parametrize("case", list(CASES))
def test_cli_refuses_with_one_line_and_stores_nothing(case, folders, tiny_spec, tmp_path, capsys):
    extra, data, words = CASES[case]
    extra = [a.format(big=folders["big"], small=folders["small"]) for a in extra]
    store = tmp_path / "store"
    code = main(["audit", "--model", str(tiny_spec), "--images", str(folders[data]), "--out", str(tmp_path / "out"),
                 "--store", str(store), *extra])
    err = capsys.readouterr().err.strip()
    assert code == 2, err
    # One error line, the last; progress lines (reading files) may come before it.
    errors = [line for line in err.splitlines() if line.startswith("pellucid:")]
    assert len(errors) == 1 and errors[0] == err.splitlines()[-1] and words in errors[0], err
    assert "Traceback" not in err
    with Store(store) as s:
        assert s.list_runs() == []
    assert not (tmp_path / "out" / "summary.json").exists()


def test_the_core_refuses_before_the_run_row_exists(folders, tiny_spec, tmp_path):
    model = load_model(tiny_spec)
    with Store(tmp_path / "store") as store:
        for data in ("one-class", "one-image"):
            with pytest.raises(PellucidError):
                run_audit(model, load_dataset(folders[data]), store=store)
        patch = np.zeros((BIG, 4, 3), dtype=np.uint8)
        with pytest.raises(PellucidError, match="larger than the model"):
            run_audit(model, load_dataset(folders["good"]), store=store,
                      injection=InjectionSpec(patch=patch, suspect_class="crack", at=(0, 0)))
        with pytest.raises(PellucidError, match="valid layers"):
            run_audit(model, load_dataset(folders["good"]), store=store,
                      settings=AuditSettings(method="gradcam", params={"layer": "head"}))
        assert store.list_runs() == []


def _png64(path: Path) -> str:
    return base64.b64encode(path.read_bytes()).decode()


def test_api_refuses_with_a_4xx_and_stores_nothing(folders, tiny_spec, tmp_path):
    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    app = create_app(Settings(models=(str(tiny_spec),), include_bundled=False, image_root=folders["images"],
                              data_dir=tmp_path / "data"))
    upload = {"kind": "upload", "at": [0, 0]}
    requests = {
        "one class": ({"source": {"kind": "folder", "path": "one-class"}}, "one class only"),
        "a class with one image": ({"source": {"kind": "folder", "path": "one-image"}}, "only one readable image"),
        "a patch bigger than the input": ({"source": {"kind": "folder", "path": "good"}, "injection": {
            **upload, "suspect_class": "crack", "patch_png": _png64(folders["big"])}}, "larger than the model"),
        "a suspect class not in the labels": ({"source": {"kind": "folder", "path": "good"}, "injection": {
            **upload, "suspect_class": "zebra", "patch_png": _png64(folders["small"])}}, "'zebra' is not one of"),
        "grad-cam on the linear head": ({"source": {"kind": "folder", "path": "good"}, "method": "gradcam",
                                         "params": {"layer": "head"}}, "valid layers"),
        "an occlusion patch bigger than the input": ({"source": {"kind": "folder", "path": "good"},
                                                      "method": "occlusion", "params": {"patch": BIG}},
                                                     "larger than the model"),
    }
    with TestClient(app) as client:
        for name, (body, words) in requests.items():
            r = client.post("/api/audits", json=body)
            assert 400 <= r.status_code < 500, (name, r.status_code, r.text)
            detail = r.json()["detail"]
            assert words in detail and "\n" not in detail, (name, detail)
            assert r.json()["error"], name
        assert client.get("/api/audits/runs").json()["runs"] == []
