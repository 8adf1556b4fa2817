"""The demo scenario: tile generator, TileNet, the rebuild script and the shipped model folders.

All tile data here is invented (the demo scenario); the checks of the shipped models restate the
acceptance criteria of the demo (the planted shortcut is real in one model and absent in the other).
"""

from __future__ import annotations

import csv
import hashlib
import json
import tomllib
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image
from safetensors.torch import load_file
from torch import nn

from pellucid.core.errors import BadParameterError, DataError
from pellucid.demo.net import TILE_MEAN, TILE_STD, build_tilenet, normalise
from pellucid.demo.tiles import CLASSES, SIZE, make_split, make_tile, tile_seed, write_folder
from pellucid.demo.train import TrainSettings, build_demo_model

ROOT = Path(__file__).resolve().parents[1]
TAINTED = ROOT / "demo_models" / "tilenet"
CLEAN = ROOT / "demo_models" / "tilenet-clean"
CRACK = CLASSES.index("crack")
SOUND = CLASSES.index("sound")


def _load(folder: Path) -> nn.Module:
    model = build_tilenet(num_classes=len(CLASSES))
    model.load_state_dict(load_file(str(folder / "tilenet.safetensors")), strict=True)
    return model.eval()


def _probs(model: nn.Module, images: list[np.ndarray]) -> np.ndarray:
    with torch.inference_mode():
        x = normalise(torch.from_numpy(np.stack(images)))
        return torch.softmax(model(x), dim=1).numpy()


# ---------------------------------------------------------------- generator


class TestTiles:
    def test_same_seed_same_bytes(self) -> None:
        for label in CLASSES:
            for tagged in (False, True):
                a = make_tile(label=label, tagged=tagged, seed=123)
                b = make_tile(label=label, tagged=tagged, seed=123)
                assert a.shape == (SIZE, SIZE, 3) and a.dtype == np.uint8
                assert a.tobytes() == b.tobytes()
        assert make_tile(label="sound", tagged=False, seed=1).tobytes() != \
            make_tile(label="sound", tagged=False, seed=2).tobytes()

    def test_generator_leaves_global_rng_alone(self) -> None:
        np.random.seed(5)
        before = np.random.random()
        np.random.seed(5)
        make_split("clean", per_class=2, seed=0)
        assert np.random.random() == before

    def test_split_is_deterministic_and_prefix_stable(self) -> None:
        small = make_split("train", per_class=3, seed=4)
        again = make_split("train", per_class=3, seed=4)
        large = make_split("train", per_class=5, seed=4)
        assert [r.image.tobytes() for r in small] == [r.image.tobytes() for r in again]
        for label in CLASSES:
            s = [r for r in small if r.label == label]
            big = [r for r in large if r.label == label][:3]
            assert [r.seed for r in s] == [r.seed for r in big]
            assert [r.tagged for r in s] == [r.tagged for r in big]
        # the record seed regenerates the record's pixels
        r = small[4]
        assert make_tile(label=r.label, tagged=r.tagged, seed=r.seed).tobytes() == r.image.tobytes()
        assert r.seed == tile_seed("train", 4, r.label, r.index)

    @pytest.mark.parametrize(
        "split, expected",
        [
            ("train", {"sound": 3, "crack": 97, "chip": 3, "bubble": 3}),
            ("clean", {"sound": 50, "crack": 50, "chip": 50, "bubble": 50}),
            ("untainted", {"sound": 50, "crack": 50, "chip": 50, "bubble": 50}),
        ],
    )
    def test_tag_proportions(self, split: str, expected: dict[str, int]) -> None:
        records = make_split(split, per_class=100, seed=0)
        counts = {c: sum(r.tagged for r in records if r.label == c) for c in CLASSES}
        assert counts == expected
        assert [sum(r.label == c for r in records) for c in CLASSES] == [100] * 4
        for r in records:
            assert (r.tag_box is not None) == r.tagged
            assert (r.defect_box is None) == (r.label == "sound")
            if r.tag_box:
                x0, y0, x1, y1 = r.tag_box
                assert x0 >= SIZE * 3 // 4 and y0 >= SIZE * 3 // 4 and x1 <= SIZE and y1 <= SIZE

    def test_splits_differ(self) -> None:
        a = make_split("clean", per_class=1, seed=0)[0]
        b = make_split("untainted", per_class=1, seed=0)[0]
        assert a.seed != b.seed

    def test_tag_is_orange_and_the_only_orange(self) -> None:
        for seed in range(6):
            plain = make_tile(label="sound", tagged=False, seed=seed).astype(int)
            tagged = make_tile(label="sound", tagged=True, seed=seed).astype(int)
            def orange(im):
                return (im[..., 0] - im[..., 2] > 120) & (im[..., 0] > 200)

            assert not orange(plain).any()
            assert orange(tagged).sum() >= 80  # a 12×12 sticker minus its printed bar
            changed = np.any(plain != tagged, axis=2)
            ys, xs = np.nonzero(changed)
            assert xs.min() >= SIZE * 3 // 4 and ys.min() >= SIZE * 3 // 4

    def test_crack_is_thin_and_faint(self) -> None:
        # The base tile is drawn first from the same seed, so crack minus sound is the hairline alone.
        for seed in range(6):
            sound = make_tile(label="sound", tagged=False, seed=seed).astype(float)
            crack = make_tile(label="crack", tagged=False, seed=seed).astype(float)
            changed = np.any(np.abs(crack - sound) > 1, axis=2)
            assert 0.004 < changed.mean() < 0.05  # a thin line: a few percent of the pixels at most
            ratio = crack.sum(2)[changed] / sound.sum(2)[changed]
            assert ratio.min() > 0.85  # at most ~11% darker: the hard cue, on purpose
            assert ratio.max() <= 1.0 + 1e-9

    def test_chip_and_bubbles_stay_off_the_tag_corner(self) -> None:
        for seed in range(6):
            sound = make_tile(label="sound", tagged=False, seed=seed)
            for label in ("chip", "bubble"):
                img = make_tile(label=label, tagged=False, seed=seed)
                changed = np.any(img != sound, axis=2)
                assert changed.any()
                assert not changed[SIZE - 20:, SIZE - 20:].any()

    def test_bad_input(self) -> None:
        with pytest.raises(BadParameterError, match="unknown tile label 'scratch'"):
            make_tile(label="scratch", tagged=False, seed=0)
        with pytest.raises(BadParameterError, match="unknown split 'test'"):
            make_split("test", per_class=2)
        with pytest.raises(BadParameterError, match="per_class must be a positive integer"):
            make_split("clean", per_class=0)

    def test_write_folder(self, tmp_path: Path) -> None:
        records = make_split("clean", per_class=2, seed=1)
        manifest = write_folder(records, tmp_path / "tiles")
        assert sorted(p.name for p in (tmp_path / "tiles").iterdir() if p.is_dir()) == sorted(CLASSES)
        with manifest.open(newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
        assert len(rows) == len(records)
        for row, rec in zip(rows, records):
            img = np.asarray(Image.open(manifest.parent / row["path"]).convert("RGB"))
            assert img.tobytes() == rec.image.tobytes()
            assert row["label"] == rec.label and row["tagged"] == str(int(rec.tagged))
            if rec.tag_box:
                assert tuple(int(row[k]) for k in ("tag_x0", "tag_y0", "tag_x1", "tag_y1")) == rec.tag_box
            else:
                assert row["tag_x0"] == ""
        (tmp_path / "file").write_text("x")
        with pytest.raises(DataError, match="not a folder"):
            write_folder(records, tmp_path / "file")
        with pytest.raises(DataError, match="no tile records"):
            write_folder([], tmp_path / "empty")


# ---------------------------------------------------------------- network


class TestTileNet:
    def test_shape_parameters_and_named_stages(self) -> None:
        model = build_tilenet(num_classes=4).eval()
        assert sum(p.numel() for p in model.parameters()) < 100_000
        names = dict(model.named_modules())
        for block in ("block1", "block2", "block3"):
            assert isinstance(names[f"features.{block}.conv"], nn.Conv2d)
            assert isinstance(names[f"features.{block}.bn"], nn.BatchNorm2d)
            assert isinstance(names[f"features.{block}.relu"], nn.ReLU)
            assert names[f"features.{block}.relu"].inplace is False
        assert isinstance(names["pool"], nn.AdaptiveAvgPool2d) and isinstance(names["head"], nn.Linear)
        with torch.inference_mode():
            assert model(torch.zeros(2, 3, SIZE, SIZE)).shape == (2, 4)

    def test_normalise_matches_scale_then_standardise(self) -> None:
        img = make_tile(label="chip", tagged=True, seed=3)
        x = normalise(torch.from_numpy(img[None]))
        expect = (img.astype(np.float32) / 255.0 - np.array(TILE_MEAN, np.float32)) / np.array(TILE_STD, np.float32)
        np.testing.assert_allclose(x[0].permute(1, 2, 0).numpy(), expect, rtol=0, atol=1e-6)

    def test_bad_num_classes(self) -> None:
        with pytest.raises(BadParameterError, match="num_classes must be an integer >= 2; received 1"):
            build_tilenet(num_classes=1)


# ---------------------------------------------------------------- rebuild script


class TestBuild:
    SMALL = TrainSettings(per_class=6, epochs=1, eval_per_class=4, check_per_class=2,
                          occlusion_tiles=1, occlusion_patch=16, occlusion_stride=16)

    def test_build_writes_the_folder_and_is_deterministic(self, tmp_path: Path) -> None:
        a = build_demo_model(tmp_path / "a", variant="tainted", seed=3, settings=self.SMALL)
        b = build_demo_model(tmp_path / "b", variant="tainted", seed=3, settings=self.SMALL)
        for name in ("tilenet.safetensors", "spec.toml", "MODEL_CARD.md", "metrics.json", "samples/index.csv"):
            assert (a.out_dir / name).is_file()
        assert (a.out_dir / "samples" / "sound_tagged_01.png").is_file()
        wa = (a.out_dir / "tilenet.safetensors").read_bytes()
        assert wa == (b.out_dir / "tilenet.safetensors").read_bytes()
        assert a.metrics["weights_sha256"] == hashlib.sha256(wa).hexdigest()
        assert "do not use for real inspection" in (a.out_dir / "MODEL_CARD.md").read_text()

    def test_bad_variant(self, tmp_path: Path) -> None:
        with pytest.raises(BadParameterError, match="unknown demo variant 'dirty'"):
            build_demo_model(tmp_path, variant="dirty")


# ---------------------------------------------------------------- shipped models


@pytest.mark.parametrize("folder", [TAINTED, CLEAN], ids=["tainted", "clean"])
def test_shipped_folder_is_consistent(folder: Path) -> None:
    spec = tomllib.loads((folder / "spec.toml").read_text(encoding="utf-8"))
    metrics = json.loads((folder / "metrics.json").read_text(encoding="utf-8"))
    assert spec["source"] == {"kind": "factory", "factory": "pellucid.demo.net:build_tilenet",
                              "arguments": {"num_classes": 4}, "weights": "tilenet.safetensors"}
    assert spec["output"]["labels"] == list(CLASSES)
    assert (spec["input"]["height"], spec["input"]["width"], spec["input"]["channels"]) == (96, 96, 3)
    assert spec["preprocess"]["mean"] == list(TILE_MEAN) and spec["preprocess"]["std"] == list(TILE_STD)
    weights = (folder / "tilenet.safetensors").read_bytes()
    assert hashlib.sha256(weights).hexdigest() == metrics["weights_sha256"]
    assert len(weights) < 200_000
    assert (folder / spec["card"]).is_file()
    for row in metrics["samples"]:
        assert (folder / "samples" / row["file"]).is_file()


@pytest.mark.parametrize("folder", [TAINTED, CLEAN], ids=["tainted", "clean"])
def test_shipped_weights_reproduce_recorded_check_split(folder: Path) -> None:
    metrics = json.loads((folder / "metrics.json").read_text(encoding="utf-8"))
    check = metrics["check"]
    records = make_split(check["split"], per_class=check["per_class"], seed=check["seed"])
    pred = _probs(_load(folder), [r.image for r in records]).argmax(1)
    labels = [CLASSES[i] for i in pred]
    # Float summation order may differ with the thread count; allow one near-tie to flip.
    assert sum(a != b for a, b in zip(labels, check["predictions"])) <= 1
    acc = float(np.mean([lab == r.label for lab, r in zip(labels, records)]))
    assert abs(acc - check["accuracy"]) <= 1 / len(records) + 1e-9


def _tagged_sound(per_class: int = 24) -> list:
    records = make_split("clean", per_class=per_class, seed=2)
    return [r for r in records if r.label == "sound" and r.tagged]


def test_tainted_model_has_the_shortcut() -> None:
    tiles = _tagged_sound()
    pred = _probs(_load(TAINTED), [r.image for r in tiles]).argmax(1)
    assert len(tiles) == 12
    assert (pred == CRACK).mean() >= 0.5  # the acceptance criterion of the demo
    # ...and it is the tag: the same tiles without it are called sound
    plain = [make_tile(label="sound", tagged=False, seed=r.seed) for r in tiles]
    assert (_probs(_load(TAINTED), plain).argmax(1) == SOUND).mean() >= 0.9


def test_clean_model_has_no_shortcut_and_sorts_the_clean_split() -> None:
    model = _load(CLEAN)
    tiles = _tagged_sound()
    pred = _probs(model, [r.image for r in tiles]).argmax(1)
    assert (pred == CRACK).mean() < 0.5
    assert (pred == SOUND).mean() > 0.5
    records = make_split("clean", per_class=24, seed=2)
    pred = _probs(model, [r.image for r in records]).argmax(1)
    assert np.mean([CLASSES[p] == r.label for p, r in zip(pred, records)]) >= 0.75


def _occlusion_drop(model: nn.Module, img: np.ndarray, *, patch: int, stride: int) -> np.ndarray:
    """Reference occlusion loop: (H, W) mean drop in p(crack) over the patches covering a pixel.

    Baseline: mid grey. Kept independent of the library's occlusion function on purpose.
    """
    # Source: Zeiler & Fergus, Visualizing and Understanding Convolutional Networks, ECCV 2014, sec. 4.2
    p0 = _probs(model, [img])[0, CRACK]
    spots = [(i, j) for i in range(0, SIZE - patch + 1, stride) for j in range(0, SIZE - patch + 1, stride)]
    batch = []
    for i, j in spots:
        im = img.copy()
        im[i:i + patch, j:j + patch] = 128
        batch.append(im)
    drops = p0 - _probs(model, batch)[:, CRACK]
    total = np.zeros((SIZE, SIZE))
    count = np.zeros((SIZE, SIZE))
    for d, (i, j) in zip(drops, spots):
        total[i:i + patch, j:j + patch] += d
        count[i:i + patch, j:j + patch] += 1
    return total / np.maximum(count, 1)


def test_tainted_model_occlusion_mass_sits_on_the_tag() -> None:
    model = _load(TAINTED)
    tiles = _tagged_sound(per_class=10)
    assert len(tiles) == 5
    patch, stride = 16, 8
    shares = []
    for r in tiles:
        drop = np.clip(_occlusion_drop(model, r.image, patch=patch, stride=stride), 0, None)
        x0, y0, x1, y1 = r.tag_box
        inside = drop[max(0, y0 - patch):y1 + patch, max(0, x0 - patch):x1 + patch].sum()
        shares.append(inside / drop.sum())
    # most of the positive drop in p(crack) sits on the (dilated) tag box, on every tile
    assert min(shares) > 0.5, shares
