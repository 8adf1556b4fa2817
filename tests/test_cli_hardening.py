"""The command line's smaller findings of issue 11 (item 9): one line on stderr after an error even when
torch warns first, no setting silently ignored or replaced, no partial output after an error, one
name per folder (``--store`` for the store, ``--images`` for an audit's images), and plain messages
for a factory that raises and for a pickled model given as weights.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
import torch
from conftest import TINY_LABELS, png_bytes, synthetic_tile
from torch import nn

from pellucid.cli import main

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture()
def tile(tmp_path: Path) -> Path:
    path = tmp_path / "tile.png"
    path.write_bytes(png_bytes(synthetic_tile(seed=6)))
    return path


def _one_line(capsys: pytest.CaptureFixture[str]) -> str:
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and err.startswith("pellucid: ") and "Traceback" not in err, err
    return err


# --- occlusion settings: checked, never ignored ---------------------------------------------------------


@pytest.mark.parametrize("extra, message", [
    (["--param", "occlusion.evil=1"], "unknown parameter(s) 'evil'"),
    (["--stride", "0"], "'stride' must be an integer from 1"),
    (["--patch", "0"], "'patch' must be an integer from 1"),
    (["--param", "occlusion.stride=0"], "'stride' must be an integer from 1"),
    (["--patch", "8", "--param", "occlusion.patch=4"], "given twice"),
    (["--param", "occlusion.patch=64"], "larger than the model's 32×32 input"),
    (["--no-occlusion", "--param", "occlusion.patch=4"], "--no-occlusion"),
])
def test_bad_occlusion_settings_are_refused_before_any_file(extra, message, tiny_spec: Path, tile: Path,
                                                            tmp_path: Path, capsys) -> None:
    out = tmp_path / "out"
    assert main(["inspect", str(tile), "--model", str(tiny_spec), "--out", str(out), "-q", *extra]) == 2
    assert message in _one_line(capsys)
    assert not out.exists()


def test_occlusion_params_given_with_param_are_used(tiny_spec: Path, tile: Path, tmp_path: Path, capsys) -> None:
    import json

    out = tmp_path / "out"
    assert main(["inspect", str(tile), "--model", str(tiny_spec), "--out", str(out), "-q", "--param",
                 "occlusion.patch=8", "--param", "occlusion.stride=4", "--param", "occlusion.output=logit"]) == 0
    occ = json.loads((out / "result.json").read_text())["attribution"]["occlusion"]
    assert (occ["patch"], occ["stride"], occ["output"]) == (8, 4, "logit")


def test_an_error_part_way_leaves_out_as_it_was(tiny_spec: Path, tile: Path, tmp_path: Path, capsys) -> None:
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("the user's own file")
    # An unknown layer is found only after the input, kernels and prediction are computed.
    assert main(["inspect", str(tile), "--model", str(tiny_spec), "--out", str(out), "-q", "--layer", "nope"]) == 2
    assert "nope" in _one_line(capsys)
    assert sorted(p.name for p in out.iterdir()) == ["keep.txt"]
    assert main(["inspect", str(tile), "--model", str(tiny_spec), "--out", str(out), "-q"]) == 0
    assert {"keep.txt", "input.png", "result.json"} <= {p.name for p in out.iterdir()}


# --- one name per folder ------------------------------------------------------------------------------


def _labelled(root: Path) -> Path:
    for k, label in enumerate(TINY_LABELS):
        (root / label).mkdir(parents=True)
        for i in range(2):
            (root / label / f"{i}.png").write_bytes(png_bytes(synthetic_tile(seed=10 * k + i)))
    return root


def test_audit_takes_images_and_still_reads_data_with_a_note(tiny_spec: Path, tmp_path: Path, capsys) -> None:
    data = _labelled(tmp_path / "tiles")
    base = ["audit", "--model", str(tiny_spec), "--store", str(tmp_path / "store"), "--method", "saliency", "-q"]
    assert main([*base, "--images", str(data), "--out", str(tmp_path / "a")]) == 0
    capsys.readouterr()
    assert main([*base, "--data", str(data), "--out", str(tmp_path / "b")]) == 0
    err = capsys.readouterr().err
    assert "'audit --data' is now 'audit --images'" in err
    assert main([*base, "--out", str(tmp_path / "c")]) == 2
    assert "needs --images DIR" in _one_line(capsys)
    assert main([*base, "--images", str(data), "--data", str(data), "--out", str(tmp_path / "d")]) == 2
    assert "once" in _one_line(capsys)
    assert "--data" not in subprocess.run([sys.executable, "-m", "pellucid.cli", "audit", "--help"], cwd=REPO,
                                          capture_output=True, text=True, timeout=120).stdout


def test_every_command_names_the_store_store() -> None:
    for command in (["serve"], ["audit"], ["runs", "list"], ["report"]):
        text = subprocess.run([sys.executable, "-m", "pellucid.cli", *command, "--help"], cwd=REPO,
                              capture_output=True, text=True, timeout=120).stdout
        assert "--store DIR" in text and "--data" not in text, (command, text)


# --- plain messages -----------------------------------------------------------------------------------


_FACTORIES = textwrap.dedent('''
    import torch
    from torch import nn


    class Warns(nn.Module):
        def __init__(self):
            super().__init__()
            self.conv = nn.Conv2d(3, 3, 3, padding=1)

        def forward(self, x):
            x = torch.tensor(self.conv(x))  # torch warns: copy-constructing from a tensor
            return x.mean(dim=(2, 3))  # 3 scores for a spec with 4 labels: a load error


    def warns_then_mismatches():
        return Warns()


    def refuses_odd_width(width=3):
        if width % 2:
            raise ValueError(f"width must be even, got {width}")
        return nn.Linear(2, 2)
''')


def _spec(folder: Path, factory: str, weights: str | None = None) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "pellucid_odd_factories.py").write_text(_FACTORIES, encoding="utf-8")
    labels = ", ".join(f'"{c}"' for c in TINY_LABELS)
    line = f'weights = "{weights}"\n' if weights else ""
    spec = folder / f"{factory}.toml"
    spec.write_text(f'name = "{factory}"\n[source]\nkind = "factory"\nfactory = "pellucid_odd_factories:{factory}"\n'
                    f'{line}[input]\nheight = 16\nwidth = 16\nchannels = 3\n[output]\nkind = "softmax"\n'
                    f'labels = [{labels}]\n', encoding="utf-8")
    return spec


def test_torch_warnings_do_not_precede_the_one_line(tmp_path: Path) -> None:
    spec = _spec(tmp_path / "m", "warns_then_mismatches")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(REPO), str(spec.parent)])}
    env.pop("PELLUCID_DEBUG", None)
    proc = subprocess.run([sys.executable, "-m", "pellucid.cli", "models", str(spec)], cwd=REPO, env=env,
                          capture_output=True, text=True, timeout=180)
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("pellucid: "), proc.stderr
    assert "UserWarning" not in proc.stderr and "Traceback" not in proc.stderr


def test_a_factory_that_raises_is_a_load_error(tmp_path: Path, capsys) -> None:
    spec = _spec(tmp_path / "m", "refuses_odd_width")
    sys.path.insert(0, str(spec.parent))
    try:
        assert main(["models", str(spec)]) == 2
    finally:
        sys.path.remove(str(spec.parent))
    err = _one_line(capsys)
    assert "raised ValueError" in err and "width must be even, got 3" in err and "internal error" not in err


class _Tagged:
    """A Python object that a weights-only load must refuse (it is not a tensor)."""


@pytest.mark.parametrize("payload", ["module", "mixed"])
def test_a_pickled_file_given_as_weights_gets_no_advice_to_lift_the_safety(payload: str, tmp_path: Path,
                                                                           capsys) -> None:
    saved = nn.Linear(2, 4) if payload == "module" else {"weight": torch.zeros(4, 2), "meta": _Tagged()}
    torch.save(saved, tmp_path / "whole.pt")
    spec = _spec(tmp_path, "warns_then_mismatches", weights=str(tmp_path / "whole.pt"))
    sys.path.insert(0, str(spec.parent))
    try:
        assert main(["models", str(spec)]) == 2
    finally:
        sys.path.remove(str(spec.parent))
    err = _one_line(capsys)
    assert "pickled" in err and "trust" in err
    for advice in ("weights_only", "can still be loaded", "\x1b["):
        assert advice not in err
