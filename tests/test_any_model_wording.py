"""Audit words fit any model: a small grey digit classifier without boxes is audited and reported.

The data are scikit-learn's bundled handwritten digits (load_digits: 1,797 8×8 images, ten classes;
Source: the UCI "Optical Recognition of Handwritten Digits" set as shipped by scikit-learn), upscaled
to 32×32 by pixel repetition, one channel. A tiny CNN is trained on them here, then ``pellucid
audit`` runs with a policy, an injection test at random places and a report. No box or mask is
given, so no sentence the audit writes — summary.json, the command's output, the report — may
speak of objects, or of defects, tiles or tags (the demo's own words).
"""

from __future__ import annotations

import json
import re
import textwrap
from html.parser import HTMLParser

import numpy as np
import pytest
import torch
from conftest import png_bytes
from torch import nn

from pellucid.cli import main

FORBIDDEN = re.compile(r"\b(objects?|defects?|tiles?|tags?)\b", re.IGNORECASE)
PER_CLASS = 3


def build_digit_net() -> nn.Module:
    """32×32 grey → 8×8 (undoing the upscaling) → conv → ReLU → linear over the 8×8 map."""
    return nn.Sequential(nn.AvgPool2d(4), nn.Conv2d(1, 16, 3, padding=1), nn.ReLU(), nn.Flatten(),
                         nn.Linear(16 * 64, 10))


def _digits() -> tuple[np.ndarray, np.ndarray]:
    datasets = pytest.importorskip("sklearn.datasets")
    d = datasets.load_digits()
    pictures = np.kron(d.images, np.ones((4, 4))) / 16.0  # (1797, 32, 32) in [0, 1]
    return pictures, d.target


class _Text(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.parts: list[str] = []
        self._skip = 0

    def handle_starttag(self, tag: str, attrs: list) -> None:
        self._skip += tag in ("style", "script")

    def handle_endtag(self, tag: str) -> None:
        self._skip -= tag in ("style", "script")

    def handle_data(self, data: str) -> None:
        if not self._skip:
            self.parts.append(data)


def _sentences(value, path: str = "") -> list[tuple[str, str]]:
    """Every string value in a JSON document with where it sits (keys are names, not sentences)."""
    if isinstance(value, dict):
        return [s for k, v in value.items() for s in _sentences(v, f"{path}.{k}")]
    if isinstance(value, list):
        return [s for n, v in enumerate(value) for s in _sentences(v, f"{path}[{n}]")]
    return [(path, value)] if isinstance(value, str) else []


@pytest.fixture(scope="module")
def grey_audit(tmp_path_factory):
    from safetensors.torch import save_file

    root = tmp_path_factory.mktemp("grey-digits")
    pictures, labels = _digits()
    torch.manual_seed(0)
    net = build_digit_net()
    x = torch.tensor((pictures - 0.5) / 0.5, dtype=torch.float32)[:, None]
    y = torch.tensor(labels)
    opt = torch.optim.Adam(net.parameters(), lr=0.005)
    order = torch.Generator().manual_seed(0)
    for _ in range(2):
        perm = torch.randperm(len(y), generator=order)
        for i in range(0, len(y), 64):
            idx = perm[i:i + 64]
            opt.zero_grad()
            nn.functional.cross_entropy(net(x[idx]), y[idx]).backward()
            opt.step()
    save_file({k: v.contiguous() for k, v in net.state_dict().items()}, str(root / "digits.safetensors"))
    names = ", ".join(f'"{c}"' for c in range(10))
    (root / "digits.toml").write_text(textwrap.dedent(f'''
        name = "grey-digits"
        description = "ten handwritten digits, 32x32 grey"
        [source]
        kind = "factory"
        factory = "test_any_model_wording:build_digit_net"
        weights = "digits.safetensors"
        [input]
        height = 32
        width = 32
        channels = 1
        [preprocess]
        mean = [0.5]
        std = [0.5]
        [output]
        kind = "softmax"
        labels = [{names}]
        '''), encoding="utf-8")
    data = root / "data"
    for c in range(10):
        (data / str(c)).mkdir(parents=True)
        for n in np.flatnonzero(labels == c)[-PER_CLASS:]:  # held out of nothing, but few: the words matter here
            grey = np.round(pictures[n] * 255).astype(np.uint8)
            (data / str(c) / f"{n}.png").write_bytes(png_bytes(grey, mode="L"))
    (root / "mark.png").write_bytes(png_bytes(np.full((4, 4, 3), 255, dtype=np.uint8)))
    (root / "gate.toml").write_text(textwrap.dedent('''
        name = "digit gate"
        [thresholds]
        min_accuracy = 0.5
        max_corner_share = 0.5
        max_border_share = 0.9
        max_flagged_fraction = 1.0
        max_injection_flip_rate = 1.0
        max_failed_images = 0
        '''), encoding="utf-8")
    return root


def test_audit_and_report_of_a_grey_model_without_boxes_use_general_words(grey_audit, capsys):
    root = grey_audit
    capsys.readouterr()
    code = main(["audit", "--model", str(root / "digits.toml"), "--data", str(root / "data"), "--out",
                 str(root / "out"), "--store", str(root / "store"), "--policy", str(root / "gate.toml"),
                 "--inject-patch", str(root / "mark.png"), "--inject-at", "random", "--inject-class", "7",
                 "--report", "--quiet"])
    cli = capsys.readouterr()
    assert code in (0, 1), cli.err  # pass or fail, the words are what is checked
    doc = json.loads((root / "out" / "summary.json").read_text(encoding="utf-8"))
    s = doc["summary"]
    assert s["object"]["images"] == 0 and s["done"] == 10 * PER_CLASS  # no boxes, every image audited
    assert s["injection"]["settings"]["at"] == "random" and s["injection"]["tested"] > 0
    run_id = doc["run"]["id"]
    assert main(["runs", "show", run_id, "--store", str(root / "store")]) == 0
    shown = capsys.readouterr().out

    # The model's own spec and card are the user's words, not Pellucid's: left out of the check.
    sentences = [(p, v) for p, v in _sentences({k: v for k, v in doc.items() if k != "model"})
                 if not p.startswith(".summary.model")]
    bad = [(p, v) for p, v in sentences if FORBIDDEN.search(v)]
    assert not bad, bad[:5]
    for line in (cli.out + cli.err + shown).splitlines():
        assert not FORBIDDEN.search(line), line
    text = _Text()
    text.feed((root / "out" / "report.html").read_text(encoding="utf-8"))
    body = " ".join(text.parts)
    found = [m.group(0) for m in FORBIDDEN.finditer(body)]
    assert not found, [body[max(0, m.start() - 80):m.end() + 40] for m in FORBIDDEN.finditer(body)][:3]
    # …and the report still says what it measured
    assert "Injection test" in body and "Gate:" in body and "border band" in body
