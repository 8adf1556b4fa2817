"""The command line: bad input gives one line on stderr and a non-zero exit, never a traceback."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
import torchvision
from PIL import Image

from pellucid.cli import main

REPO = Path(__file__).resolve().parents[1]


def run_cli(args: list[str], capsys) -> tuple[int, str, str]:
    code = main(args)
    out, err = capsys.readouterr()
    return code, out, err


def tiny_spec(tmp_path: Path, *, weights: str | None = None, arch: str = "resnet18") -> Path:
    w = f'weights = "{weights}"\n' if weights else ""
    p = tmp_path / "spec.toml"
    p.write_text(f'name = "tiny"\n[source]\nkind = "torchvision"\narchitecture = "{arch}"\n'
                 f"arguments = {{ num_classes = 3 }}\n{w}[input]\nheight = 32\nwidth = 32\n"
                 '[output]\nlabels = ["a", "b", "c"]\n')
    return p


def png(tmp_path: Path, name: str = "img.png", size: int = 32) -> Path:
    arr = np.random.default_rng(0).integers(0, 256, (size, size, 3), dtype=np.uint8)
    path = tmp_path / name
    Image.fromarray(arr).save(path)
    return path


def _file(path: Path, data: bytes) -> Path:
    path.write_bytes(data)
    return path


@pytest.mark.parametrize(
    "make, fragment",
    [
        (lambda d: _file(d / "note.jpg", b"just text"), "not an image"),
        (lambda d: _file(d / "empty.png", b""), "empty (0 bytes)"),
        (lambda d: _file(d / "cut.png", png(d).read_bytes()[:300]), "truncated or damaged"),
    ],
)
def test_bad_images(tmp_path, capsys, make, fragment):
    code, _, err = run_cli(["inspect", str(make(tmp_path)), "--model", str(tiny_spec(tmp_path)),
                            "--out", str(tmp_path / "o")], capsys)
    assert code == 2
    assert fragment in err and "Traceback" not in err and len(err.strip().splitlines()) == 1


def test_over_limit_image(tmp_path, capsys):
    from pellucid.core.model.preprocess import MAX_IMAGE_PIXELS

    big = tmp_path / "huge.png"
    Image.new("L", (8000, MAX_IMAGE_PIXELS // 8000 + 10)).save(big)  # compresses to a small file
    code, _, err = run_cli(["inspect", str(big), "--model", str(tiny_spec(tmp_path)),
                            "--out", str(tmp_path / "o")], capsys)
    assert code == 2 and "over the limit" in err and len(err.strip().splitlines()) == 1


def test_missing_and_mismatched_weights(tmp_path, capsys):
    code, _, err = run_cli(["inspect", str(png(tmp_path)), "--model", str(tiny_spec(tmp_path, weights="gone.pt")),
                            "--out", str(tmp_path / "o")], capsys)
    assert code == 2 and "does not exist" in err
    torch.save(torchvision.models.vgg11(num_classes=3).state_dict(), tmp_path / "vgg.pt")
    code, _, err = run_cli(["inspect", str(png(tmp_path)), "--model", str(tiny_spec(tmp_path, weights="vgg.pt")),
                            "--out", str(tmp_path / "o")], capsys)
    assert code == 2 and "missing keys" in err and "unexpected keys" in err
    assert len(err.strip().splitlines()) == 1


def test_unknown_option_and_model(tmp_path, capsys):
    with pytest.raises(SystemExit) as info:
        main(["inspect", "--frobnicate"])
    assert info.value.code == 2
    code, _, err = run_cli(["models", "no-such-model"], capsys)
    assert code == 2 and "neither a model spec file nor a bundled model" in err


def test_inspect_writes_views_and_result_json(tmp_path, capsys):
    out = tmp_path / "o"
    code, _, err = run_cli(["inspect", str(png(tmp_path)), "--model", str(tiny_spec(tmp_path)),
                            "--out", str(out), "--patch", "8", "--stride", "8"], capsys)
    assert code == 0, err
    result = json.loads((out / "result.json").read_text())
    for name in ("input.png", "kernels.png", "occlusion_overlay.png", "occlusion_map.png"):
        assert (out / name).stat().st_size > 0
    assert result["model"]["fingerprint"] and result["image"]["sha256"]
    assert result["attribution"]["occlusion"]["patch"] == 8
    assert "not proof" in result["caution"]
    assert len(result["prediction"]["top"]) == 3


def test_console_script_runs_as_a_process(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "pellucid.cli", "models"], cwd=REPO, capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 0 and "efficientnet-lite0" in proc.stdout


def test_serve_refuses_an_unusable_data_folder(tmp_path, capsys):
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("a file where the data folder should be")
    code, _, err = run_cli(["serve", "--store", str(blocker), "--port", "1"], capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1 and "Traceback" not in err
