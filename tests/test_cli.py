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


# --- checks at load time, readable pictures, progress and start-up ---------------------------------------------


def nan_net() -> torch.nn.Module:
    net = torch.nn.Sequential(torch.nn.Conv2d(3, 4, 3), torch.nn.AdaptiveAvgPool2d(1), torch.nn.Flatten(),
                              torch.nn.Linear(4, 3))
    with torch.no_grad():
        net[3].bias.fill_(float("nan"))
    return net


def test_models_refuses_a_model_whose_dry_run_is_nan(tmp_path, capsys):
    spec = tmp_path / "spec.toml"
    spec.write_text(f'name = "broken"\n[source]\nkind = "factory"\nfactory = "{__name__}:nan_net"\n'
                    '[input]\nheight = 16\nwidth = 16\n[output]\nlabels = ["a", "b", "c"]\n')
    code, out, err = run_cli(["models", str(spec)], capsys)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and "NaN or infinite" in err and "Traceback" not in err


def test_inspect_pictures_are_enlarged_by_pixel_repetition_and_say_how(tmp_path, capsys):
    from pellucid.core.model.loading import load_model

    out = tmp_path / "o"
    spec = tiny_spec(tmp_path)
    code, _, err = run_cli(["inspect", str(png(tmp_path)), "--model", str(spec), "--out", str(out),
                            "--patch", "8", "--stride", "8", "--method", "saliency", "--quiet"], capsys)
    assert code == 0, err
    assert err == ""  # --quiet: no progress lines
    result = json.loads((out / "result.json").read_text())
    assert result["display"]["input_size"] == [32, 32] and result["display"]["enlarged"] == 12
    for name in ("input.png", "occlusion_overlay.png", "occlusion_map.png", "saliency_overlay.png", "saliency_map.png"):
        img = np.asarray(Image.open(out / name).convert("RGB"))
        assert img.shape[:2] == (384, 384), name
        # Nearest neighbour: every 12×12 block is one colour (smoothing would blend neighbouring blocks).
        small = img[::12, ::12]
        assert np.array_equal(np.repeat(np.repeat(small, 12, axis=0), 12, axis=1), img), name
        assert result["pictures"][name]["resampling"].startswith("nearest neighbour")
    # Kernels: each tile scaled to its own largest |weight|; the scales listed match the first conv's weights.
    kernels = result["pictures"]["kernels.png"]
    assert "own largest |weight|" in kernels["scaling"]
    weights = dict(load_model(spec).module.named_parameters())[f"{kernels['layer']}.weight"].detach()
    expected = [float(weights[f].abs().max()) for f in kernels["filters"]]
    assert np.allclose(kernels["scales"], expected, rtol=1e-6)
    assert result["provenance"]["torch"].split("+")[0] == torch.__version__.split("+")[0]


def _audit_folder(tmp_path: Path) -> Path:
    rng = np.random.default_rng(0)
    root = tmp_path / "data"
    for label in ("a", "b", "c"):
        (root / label).mkdir(parents=True, exist_ok=True)
        for i in range(2):
            Image.fromarray(rng.integers(0, 256, (32, 32, 3), dtype=np.uint8)).save(root / label / f"{i}.png")
    return root


def _audit(tmp_path: Path, *extra: str) -> subprocess.CompletedProcess:
    import os

    env = {**os.environ, "PELLUCID_PROGRESS_SECONDS": "0", "PYTHONPATH": str(REPO)}
    args = [sys.executable, "-m", "pellucid", "audit", "--model", str(tiny_spec(tmp_path)),
            "--data" if "--data" in _audit_help() else "--images", str(_audit_folder(tmp_path)),
            "--out", str(tmp_path / "out"), "--store", str(tmp_path / "store"), "--method", "saliency", *extra]
    return subprocess.run(args, cwd=tmp_path, capture_output=True, text=True, timeout=300, env=env)


def _audit_help() -> str:
    return subprocess.run([sys.executable, "-m", "pellucid", "audit", "--help"], cwd=REPO, capture_output=True,
                          text=True, timeout=60).stdout


@pytest.mark.slow
def test_audit_without_a_terminal_prints_plain_progress_lines_and_quiet_prints_none(tmp_path):
    proc = _audit(tmp_path)
    assert proc.returncode == 0, proc.stderr
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert "\r" not in proc.stderr  # no bar redrawn in place: stderr is a pipe here
    progress = [ln for ln in lines if "/6" in ln]
    assert progress and any("done in" in ln for ln in progress)
    assert all("Traceback" not in ln for ln in lines)
    quiet = _audit(tmp_path, "--quiet", "--fresh")
    assert quiet.returncode == 0 and "/6" not in quiet.stderr

    # The run records where it ran; `runs show` and the report say so.
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert summary["provenance"]["torch"].split("+")[0] == torch.__version__.split("+")[0]
    assert summary["summary"]["provenance"]["python"] == ".".join(map(str, sys.version_info[:3]))
    run_id = summary["run"]["id"]
    env = {"PYTHONPATH": str(REPO), "PATH": "/usr/bin:/bin"}
    store = str(tmp_path / "store")
    show = subprocess.run([sys.executable, "-m", "pellucid", "runs", "show", run_id, "--store", store],
                          cwd=tmp_path, capture_output=True, text=True, timeout=120, env=env)
    assert show.returncode == 0 and f"torch {torch.__version__.split('+')[0]}" in show.stdout
    report = subprocess.run([sys.executable, "-m", "pellucid", "report", run_id, "--store", str(tmp_path / "store"),
                             "--out", str(tmp_path / "report"), "--no-pdf"],
                            cwd=tmp_path, capture_output=True, text=True, timeout=300, env=env)
    assert report.returncode == 0, report.stderr
    html = (tmp_path / "report" / "report.html").read_text(encoding="utf-8")
    assert f"Python {'.'.join(map(str, sys.version_info[:3]))}" in html
