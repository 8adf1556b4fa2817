"""The injection test counts honestly: skipped, tested, eligible and flips on a folder built by hand.

The model here is written by hand so that every prediction is known by construction: it calls
an image "marked" when the bottom-right 8×8 corner is orange-red (mean R − B high) unless a blue
square sits in the centre. The folder holds images that already carry the patch (pasting it again
changes nothing: skipped), images the model already calls "marked" (tested, not eligible), images
with the blue square (eligible, do not flip) and plain ones (eligible, flip). Every expected count
below is counted from that construction, and the mean shift is recomputed here with a paste and a
normalisation written independently of the code under test.
"""

from __future__ import annotations

import textwrap

import numpy as np
import pytest
import torch
from conftest import png_bytes
from torch import nn

from pellucid.core.audit.dataset import load_dataset
from pellucid.core.audit.injection import SAME_PATCH_LEVELS, injection_test
from pellucid.core.audit.sentences import injection_sentence
from pellucid.core.audit.settings import InjectionSpec
from pellucid.core.errors import BadParameterError
from pellucid.core.model.loading import load_model

SIZE = 32
LABELS = ("plain", "marked", "other")
PATCH = np.zeros((8, 8, 3), dtype=np.uint8) + np.array([240, 130, 20], dtype=np.uint8)
AT = (24, 24)


class CornerNet(nn.Module):
    """logit(marked) = 4·mean(R − B in the bottom-right 8×8) − 2 − 4·mean(B − R in the centre 8×8)."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        r, b = x[:, 0], x[:, 2]
        corner = (r - b)[:, 24:32, 24:32].mean(dim=(1, 2))
        blocker = (b - r)[:, 12:20, 12:20].mean(dim=(1, 2)).clamp(min=0)
        marked = 4 * corner - 2 - 4 * blocker
        zeros = torch.zeros_like(marked)
        return torch.stack([zeros, marked, zeros - 1], dim=1)


def build_corner_net() -> nn.Module:
    return CornerNet()


def _grey(seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.clip(128 + rng.integers(-10, 11, size=(SIZE, SIZE, 3)), 0, 255).astype(np.uint8)


def _with_patch(img: np.ndarray, noise: int = 0, seed: int = 0) -> np.ndarray:
    out = img.copy()
    piece = PATCH.astype(int)
    if noise:
        piece = piece + np.random.default_rng(seed).integers(-noise, noise + 1, size=piece.shape)
    out[24:32, 24:32] = np.clip(piece, 0, 255)
    return out


def _tinted(img: np.ndarray) -> np.ndarray:
    out = img.copy()
    out[24:32, 24:32] = (250, 120, 60)  # orange-red but not the patch: |Δ| = (10 + 10 + 40) / 3 = 20 levels
    return out


def _blocked(img: np.ndarray) -> np.ndarray:
    out = img.copy()
    out[12:20, 12:20] = (20, 60, 240)
    return out


# What each file is, and so what it must count as (by construction, see the module docstring).
FOLDER = {
    "plain/clean-0.png": ("flip", lambda: _grey(0)),
    "plain/clean-1.png": ("flip", lambda: _grey(1)),
    "plain/clean-2.png": ("flip", lambda: _grey(2)),
    "plain/clean-3.png": ("flip", lambda: _grey(3)),
    "plain/blocked-0.png": ("no flip", lambda: _blocked(_grey(4))),
    "plain/blocked-1.png": ("no flip", lambda: _blocked(_grey(5))),
    "plain/patched-0.png": ("skipped", lambda: _with_patch(_grey(6))),
    "plain/patched-1.png": ("skipped", lambda: _with_patch(_grey(7))),
    "other/clean-0.png": ("flip", lambda: _grey(8)),
    "other/clean-1.png": ("flip", lambda: _grey(9)),
    "other/clean-2.png": ("flip", lambda: _grey(10)),
    "other/tinted-0.png": ("already", lambda: _tinted(_grey(11))),
    "other/patched-noisy-0.png": ("skipped", lambda: _with_patch(_grey(12), noise=3, seed=1)),
    "marked/m-0.png": ("excluded", lambda: _with_patch(_grey(13))),
    "marked/m-1.png": ("excluded", lambda: _with_patch(_grey(14))),
}


@pytest.fixture(scope="module")
def model(tmp_path_factory):
    folder = tmp_path_factory.mktemp("corner-model")
    labels = ", ".join(f'"{s}"' for s in LABELS)
    (folder / "spec.toml").write_text(textwrap.dedent(f'''
        name = "corner"
        [source]
        kind = "factory"
        factory = "test_injection_counts:build_corner_net"
        [input]
        height = {SIZE}
        width = {SIZE}
        channels = 3
        [preprocess]
        mean = [0.5, 0.5, 0.5]
        std = [0.25, 0.25, 0.25]
        [output]
        kind = "softmax"
        labels = [{labels}]
        '''), encoding="utf-8")
    return load_model(folder / "spec.toml")


@pytest.fixture(scope="module")
def items(tmp_path_factory):
    root = tmp_path_factory.mktemp("corner-folder")
    for rel, (_, make) in FOLDER.items():
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        (root / rel).write_bytes(png_bytes(make()))
    dataset = load_dataset(root)
    return [{**i.to_dict(), "path": str(i.path)} for i in dataset.items]


def _p_marked(picture: np.ndarray) -> float:
    """The model's p(marked) computed here: normalise by hand, forward, softmax by hand."""
    x = (picture.astype(np.float64) / 255.0 - 0.5) / 0.25
    with torch.no_grad():
        logits = CornerNet()(torch.from_numpy(x.transpose(2, 0, 1)[None].astype(np.float32)))[0].double()
    e = torch.exp(logits - logits.max())
    return float(e[1] / e.sum())


def test_counts_match_the_folder_built_by_hand(model, items):
    res = injection_test(model, items, InjectionSpec(patch=PATCH, suspect_class="marked", at=AT))
    kinds = [kind for kind, _ in FOLDER.values()]
    considered = sum(1 for k in kinds if k != "excluded")
    skipped = kinds.count("skipped")
    tested = considered - skipped
    already = kinds.count("already")
    flips = kinds.count("flip")
    assert (considered, skipped, tested, already, flips) == (13, 3, 10, 1, 7)  # the construction, restated
    assert res.considered == considered
    assert res.skipped == skipped
    assert res.tested == tested
    assert res.already_suspect == already
    assert res.eligible == tested - already
    assert res.flips == flips
    assert res.flip_rate == pytest.approx(flips / (tested - already))
    assert {s["rel"] for s in res.skipped_images} == {r for r, (k, _) in FOLDER.items() if k == "skipped"}
    assert all(s["change"] <= SAME_PATCH_LEVELS for s in res.skipped_images)
    # The diluted rate the old count gave (skipped images counted as tested non-flips) differs.
    assert res.flips / (considered - already) < res.flip_rate
    # per class, counted from the same table
    for label in ("plain", "other"):
        mine = [k for r, (k, _) in FOLDER.items() if r.startswith(label + "/")]
        row = res.per_class[label]
        assert row["considered"] == len(mine)
        assert row["skipped"] == mine.count("skipped")
        assert row["tested"] == len(mine) - mine.count("skipped")
        assert row["eligible"] == row["tested"] - mine.count("already")
        assert row["flips"] == mine.count("flip")
    # The mean shift runs over every tested image (the already-called one too), recomputed here.
    shifts = []
    for kind, make in FOLDER.values():
        if kind in ("excluded", "skipped"):
            continue
        img = make()
        pasted = img.copy()
        pasted[AT[1]:AT[1] + 8, AT[0]:AT[0] + 8] = PATCH
        shifts.append(_p_marked(pasted) - _p_marked(img))
    assert len(shifts) == tested
    assert res.mean_shift == pytest.approx(float(np.mean(shifts)), abs=1e-5)
    d = res.to_dict()
    assert (d["considered"], d["skipped"], d["tested"], d["eligible"]) == (13, 3, 10, 9)
    sentence = injection_sentence(d)
    for words in ("7 of 9 eligible", "13 image(s) of other classes", "3 skipped", "10 tested",
                  "1 of them already called 'marked'"):
        assert words in sentence, sentence


def test_random_places_are_seeded_recorded_and_inside(model, items):
    spec = InjectionSpec(patch=PATCH, suspect_class="marked", at="random", seed=3)
    a = injection_test(model, items, spec)
    b = injection_test(model, items, spec)
    other = injection_test(model, items, InjectionSpec(patch=PATCH, suspect_class="marked", at="random", seed=4))
    assert a.positions == b.positions and a.positions != other.positions
    assert set(a.positions) == {r for r, (k, _) in FOLDER.items() if k != "excluded"}
    assert all(0 <= x <= SIZE - 8 and 0 <= y <= SIZE - 8 for x, y in a.positions.values())
    assert a.to_dict()["settings"]["at"] == "random" and a.to_dict()["settings"]["seed"] == 3
    # Skipped exactly where the paste at that image's own place changes ≤ 8 levels (recomputed here).
    by_rel = {r: make() for r, (_, make) in FOLDER.items()}
    expected_skips = set()
    for rel, (x, y) in a.positions.items():
        region = by_rel[rel][y:y + 8, x:x + 8].astype(np.int64)
        if np.abs(region - PATCH.astype(np.int64)).mean() <= SAME_PATCH_LEVELS:
            expected_skips.add(rel)
    assert {s["rel"] for s in a.skipped_images} == expected_skips
    # A model that reads only the corner flips only images whose random place covers the corner well.
    assert a.flips <= 7


def test_patch_larger_than_the_input_is_one_sentence(model, items):
    big = np.zeros((SIZE + 1, 4, 3), dtype=np.uint8)
    with pytest.raises(BadParameterError, match=r"the suspect patch is 4×33 px, larger than the model's 32×32 input"):
        injection_test(model, items, InjectionSpec(patch=big, suspect_class="marked", at=(0, 0)))


def test_nothing_to_measure_when_every_image_carries_the_patch(model, items):
    patched = [i for i in items if "patched" in i["rel"] or i["label"] == "marked"]
    with pytest.raises(BadParameterError, match="changes none of the 3 image"):
        injection_test(model, patched, InjectionSpec(patch=PATCH, suspect_class="marked", at=AT))
