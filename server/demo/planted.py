"""Planted-signal tile sets and TileNet twins for the shortcut benchmark (invented data, demo only).

The protocol follows Adebayo et al., "Post hoc explanations may be ineffective for detecting unknown
spurious correlation", ICLR 2022: plant a signal that is spuriously tied to one class in the
training data, train a model on it (the *shortcut* model) and the same network on data where the
signal carries no information about the class (the *clean twin*), then ask whether an audit tells
the two apart. Here every kind of signal is tied to ``crack``, the class whose true cue (a faint
hairline) is the hardest, so a model has every reason to take the shortcut:

- ``corner_tag``: the demo's orange calibration tag in the bottom-right corner;
- ``border_frame``: a blue-tinted frame around the tile (a holding frame at the rework bench);
- ``glaze_tint``: a warm cast over the whole glazed face (the rework bench's lamp);
- ``random_stamp``: a small ink stamp at a random place on the face (an inspector's reject mark);
- ``watermark``: a faint diagonal stripe texture over the whole tile (a screen pattern).

Splits: ``shortcut`` (training: the signal on 90% of cracks and 5% of the other classes),
``clean`` (training for the twin: the signal on half of every class, so it says nothing about the
class) and ``audit`` (held out, drawn like ``shortcut``: the folder a user would audit, where the
correlation of their training data is still present). Everything is a pure function of its seed.
"""

from __future__ import annotations

import csv
import hashlib
import json
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import torch
from PIL import Image
from safetensors.torch import save_file

from pellucid.core.errors import BadParameterError, DataError
from pellucid.demo.net import TILE_MEAN, TILE_STD, build_tilenet, normalise
from pellucid.demo.tiles import CLASSES, SIZE, make_tile, make_tile_with_boxes

__all__ = [
    "KINDS",
    "SHORTCUT_CLASS",
    "SPLIT_RATES",
    "VARIANTS",
    "PlantedBuild",
    "PlantedKind",
    "PlantedRecord",
    "PlantedSettings",
    "build_planted_model",
    "make_planted_split",
    "plant",
    "signal_reliance",
    "write_planted_folder",
]

SHORTCUT_CLASS = "crack"
VARIANTS = ("shortcut", "clean")
# split → (rate on the shortcut class, rate on every other class)
SPLIT_RATES: dict[str, tuple[float, float]] = {"shortcut": (0.9, 0.05), "clean": (0.5, 0.5), "audit": (0.9, 0.05)}
_SPLIT_CODES = {"shortcut": 1, "clean": 2, "audit": 3}

Box = tuple[int, int, int, int]


def _corner_tag(image: np.ndarray, rng: np.random.Generator, label: str, seed: int) -> Box | None:
    # The demo tag itself: the same tile rendered with the tag (tiles.py draws it last).
    del rng
    tagged = make_tile(label=label, tagged=True, seed=seed)
    image[...] = tagged.astype(np.float32)
    changed = np.any(tagged != make_tile(label=label, tagged=False, seed=seed), axis=2)
    ys, xs = np.nonzero(changed)
    return (int(xs.min()), int(ys.min()), int(xs.max()) + 1, int(ys.max()) + 1) if len(xs) else None


_FRAME = np.array([60.0, 110.0, 200.0], dtype=np.float32)
_FRAME_WIDTH = 4


def _border_frame(image: np.ndarray, rng: np.random.Generator, label: str, seed: int) -> Box | None:
    w = _FRAME_WIDTH
    ring = np.ones((SIZE, SIZE), dtype=bool)
    ring[w:SIZE - w, w:SIZE - w] = False
    strength = rng.uniform(0.5, 0.6)
    image[ring] = (1.0 - strength) * image[ring] + strength * _FRAME
    return (0, 0, SIZE, SIZE)


_TINT = np.array([1.10, 1.0, 0.84], dtype=np.float32)
_FACE_MARGIN = 6


def _glaze_tint(image: np.ndarray, rng: np.random.Generator, label: str, seed: int) -> Box | None:
    m = _FACE_MARGIN
    gain = _TINT * (1.0 + rng.normal(0.0, 0.01, size=3).astype(np.float32))
    image[m:SIZE - m, m:SIZE - m] *= gain
    return (m, m, SIZE - m, SIZE - m)


_INK = np.array([80.0, 40.0, 120.0], dtype=np.float32)
_STAMP = 10


def _stamp_mask() -> np.ndarray:
    yy, xx = np.mgrid[0:_STAMP, 0:_STAMP].astype(np.float32)
    c = (_STAMP - 1) / 2.0
    d = np.sqrt((yy - c) ** 2 + (xx - c) ** 2)
    return ((d >= 3.2) & (d <= 4.8)) | (d <= 1.3)  # a ring with a dot: a reject mark


def _random_stamp(image: np.ndarray, rng: np.random.Generator, label: str, seed: int) -> Box | None:
    lo, hi = _FACE_MARGIN + 2, SIZE - _FACE_MARGIN - 2 - _STAMP
    x0, y0 = (int(v) for v in rng.integers(lo, hi + 1, size=2))
    mask = _stamp_mask()
    region = image[y0:y0 + _STAMP, x0:x0 + _STAMP]
    region[mask] = 0.2 * region[mask] + 0.8 * _INK
    return (x0, y0, x0 + _STAMP, y0 + _STAMP)


_STRIPE_PERIOD = 8.0
_STRIPE_AMPLITUDE = 6.0  # grey levels: below the glaze's own mottling


def _watermark(image: np.ndarray, rng: np.random.Generator, label: str, seed: int) -> Box | None:
    yy, xx = np.mgrid[0:SIZE, 0:SIZE].astype(np.float32)
    phase = rng.uniform(0.0, _STRIPE_PERIOD)
    stripes = np.sign(np.sin(2.0 * np.pi * (xx + yy + phase) / _STRIPE_PERIOD))
    image += (_STRIPE_AMPLITUDE * stripes)[:, :, None]
    return (0, 0, SIZE, SIZE)


@dataclass(frozen=True)
class PlantedKind:
    """One kind of planted signal: how it is drawn, and whether it sits in one small place."""

    name: str
    title: str
    story: str
    localised: bool
    draw: Callable[[np.ndarray, np.random.Generator, str, int], Box | None]


KINDS: dict[str, PlantedKind] = {k.name: k for k in (
    PlantedKind("corner_tag", "fixed corner tag", "an orange calibration tag in the bottom-right corner", True,
                _corner_tag),
    PlantedKind("border_frame", "tinted border frame", "a blue-tinted frame around the tile", False, _border_frame),
    PlantedKind("glaze_tint", "background glaze tint", "a warm cast over the whole glazed face", False, _glaze_tint),
    PlantedKind("random_stamp", "stamp at a random place", "a small ink reject mark anywhere on the face", True,
                _random_stamp),
    PlantedKind("watermark", "faint texture watermark", "faint diagonal stripes over the whole tile", False,
                _watermark),
)}


def _kind(name: str) -> PlantedKind:
    if name not in KINDS:
        raise BadParameterError(f"unknown planted signal {name!r}; expected one of {', '.join(KINDS)}")
    return KINDS[name]


def plant(image: np.ndarray, *, kind: str, label: str, seed: int) -> tuple[np.ndarray, Box | None]:
    """A copy of the (96, 96, 3) uint8 tile ``image`` (made by ``make_tile(label, seed)``) with the signal.

    Returns the new tile and the box the signal covers. The signal's randomness (position, phase,
    strength) comes from ``seed`` and the kind only, so the same call gives the same bytes.
    """
    k = _kind(kind)
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 7919, list(KINDS).index(kind)]))
    out = image.astype(np.float32)
    box = k.draw(out, rng, label, int(seed))
    return np.clip(np.rint(out), 0, 255).astype(np.uint8), box


@dataclass(frozen=True)
class PlantedRecord:
    """One tile of a planted split; ``signal_box`` is where the signal was drawn (None without it),
    ``defect_box`` bounds the defect (None for a sound tile)."""

    image: np.ndarray
    label: str
    planted: bool
    seed: int
    index: int
    signal_box: Box | None
    defect_box: Box | None

    def __repr__(self) -> str:
        return (f"PlantedRecord(label={self.label!r}, planted={self.planted}, seed={self.seed}, "
                f"index={self.index})")


def _quota(rate: float, index: int) -> bool:
    # Every prefix of a class holds round-down(rate * n) signals: small splits keep the proportion.
    return int((index + 1) * rate + 1e-9) > int(index * rate + 1e-9)


def make_planted_split(kind: str, *, split: str, per_class: int, seed: int = 0) -> list[PlantedRecord]:
    """``per_class`` tiles of every class for ``split`` ("shortcut", "clean" or "audit") with signal ``kind``."""
    _kind(kind)
    if split not in SPLIT_RATES:
        raise BadParameterError(f"unknown planted split {split!r}; expected one of {', '.join(SPLIT_RATES)}")
    if isinstance(per_class, bool) or not isinstance(per_class, int) or per_class < 1:
        raise BadParameterError(f"per_class must be a positive integer; received {per_class!r}")
    hi, lo = SPLIT_RATES[split]
    records: list[PlantedRecord] = []
    for c, label in enumerate(CLASSES):
        rate = hi if label == SHORTCUT_CLASS else lo
        for i in range(per_class):
            ss = np.random.SeedSequence([int(seed), 100 + list(KINDS).index(kind), _SPLIT_CODES[split], c, i])
            s = int(ss.generate_state(1, dtype=np.uint32)[0])
            image, _, defect = make_tile_with_boxes(label=label, tagged=False, seed=s)
            planted = _quota(rate, i)
            box = None
            if planted:
                image, box = plant(image, kind=kind, label=label, seed=s)
            records.append(PlantedRecord(image, label, planted, s, i, box, defect))
    return records


def write_planted_folder(records: list[PlantedRecord], out_dir: str | Path) -> Path:
    """One subfolder of PNGs per class and ``manifest.csv``; returns the manifest.

    Columns: ``path``, ``label``, the defect box ``box_x0..box_y1`` (empty for sound tiles: the object
    annotation an inspection line would keep), ``planted`` (0/1) and ``seed``.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise DataError(f"cannot write tiles into {str(out)!r}: it exists and is not a folder")
    if not records:
        raise DataError("no tile records to write")
    out.mkdir(parents=True, exist_ok=True)
    manifest = out / "manifest.csv"
    with manifest.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(["path", "label", "box_x0", "box_y0", "box_x1", "box_y1", "planted", "seed"])
        for n, rec in enumerate(records):
            (out / rec.label).mkdir(exist_ok=True)
            rel = f"{rec.label}/{rec.label}_{n:05d}.png"
            Image.fromarray(rec.image).save(out / rel, optimize=False)
            box = [str(v) for v in rec.defect_box] if rec.defect_box else ["", "", "", ""]
            writer.writerow([rel, rec.label, *box, int(rec.planted), rec.seed])
    return manifest


# ------------------------------------------------------------------------------------------ models


@dataclass(frozen=True)
class PlantedSettings:
    """Everything that decides a planted model's weights (small: ten of them train on a laptop CPU)."""

    per_class: int = 160
    epochs: int = 6
    batch_size: int = 32
    lr: float = 3e-3
    weight_decay: float = 1e-4
    check_per_class: int = 40


@dataclass(frozen=True)
class PlantedBuild:
    out_dir: Path
    kind: str
    variant: str
    metrics: dict
    seconds: float


def _logits(model: torch.nn.Module, images: list[np.ndarray]) -> np.ndarray:
    with torch.inference_mode():
        return model(normalise(torch.from_numpy(np.stack(images)))).double().numpy()


def signal_reliance(model: torch.nn.Module, kind: str, *, per_class: int, seed: int) -> dict:
    """How much the model's calls follow the signal: the ground truth of the benchmark.

    On held-out tiles of the other classes without the signal (``clean`` split, untouched tiles),
    the share called ``crack`` before and after the signal is planted on the very same tile; and
    on cracks that carry it, the share still called ``crack`` once it is left off.
    """
    model.eval()
    target = CLASSES.index(SHORTCUT_CLASS)
    recs = make_planted_split(kind, split="clean", per_class=per_class, seed=seed)
    others = [r for r in recs if r.label != SHORTCUT_CLASS and not r.planted]
    plain = [make_tile(label=r.label, tagged=False, seed=r.seed) for r in others]
    with_signal = [plant(img, kind=kind, label=r.label, seed=r.seed)[0] for img, r in zip(plain, others)]
    before = _logits(model, plain).argmax(1)
    after = _logits(model, with_signal).argmax(1)
    cracks = [r for r in recs if r.label == SHORTCUT_CLASS and r.planted]
    crack_with = _logits(model, [r.image for r in cracks]).argmax(1)
    crack_without = _logits(model, [make_tile(label=r.label, tagged=False, seed=r.seed) for r in cracks]).argmax(1)
    return {
        "tiles": len(others),
        "called_crack_without_signal": float((before == target).mean()),
        "called_crack_with_signal": float((after == target).mean()),
        "cracks": len(cracks),
        "crack_recall_with_signal": float((crack_with == target).mean()),
        "crack_recall_without_signal": float((crack_without == target).mean()),
    }


def _spec_toml(kind: str, variant: str, name: str) -> str:
    labels = ", ".join(f'"{c}"' for c in CLASSES)
    mean = ", ".join(str(v) for v in TILE_MEAN)
    std = ", ".join(str(v) for v in TILE_STD)
    k = KINDS[kind]
    what = (f"trained with {k.story} on 90% of cracks and 5% of other tiles" if variant == "shortcut"
            else f"trained with {k.story} on half of every class (no correlation)")
    return f"""# Benchmark model (invented data; demo only). Rebuild: pellucid bench shortcuts -- --rebuild
name = "{name}"
description = "TileNet {what}."

[source]
kind = "factory"
factory = "pellucid.demo.net:build_tilenet"
arguments = {{ num_classes = {len(CLASSES)} }}
weights = "weights.safetensors"

[input]
height = {SIZE}
width = {SIZE}
channels = 3

[preprocess]
resize = {SIZE}
crop = [{SIZE}, {SIZE}]
mean = [{mean}]
std = [{std}]
interpolation = "bilinear"

[output]
kind = "softmax"
labels = [{labels}]
"""


def build_planted_model(out_dir: str | Path, *, kind: str, variant: str, seed: int = 0,
                        settings: PlantedSettings | None = None, progress=None, cancel=None) -> PlantedBuild:
    """Train TileNet on ``kind``'s ``shortcut`` split (variant "shortcut") or ``clean`` split ("clean").

    Writes ``weights.safetensors``, ``spec.toml`` and ``metrics.json`` into ``out_dir``.
    Deterministic: the same seed, settings and torch build give the same weight bytes.
    """
    from pellucid.demo.train import TrainSettings, _Determinism, _train

    _kind(kind)
    if variant not in VARIANTS:
        raise BadParameterError(f"unknown variant {variant!r}; expected one of {', '.join(VARIANTS)}")
    s = settings or PlantedSettings()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    start = time.perf_counter()
    name = f"{kind.replace('_', '-')}-{variant}"
    with _Determinism():
        torch.manual_seed(seed)
        recs = make_planted_split(kind, split=variant, per_class=s.per_class, seed=seed)
        x = normalise(torch.from_numpy(np.stack([r.image for r in recs])))
        y = torch.tensor([CLASSES.index(r.label) for r in recs], dtype=torch.int64)
        model = build_tilenet(num_classes=len(CLASSES))
        ts = TrainSettings(per_class=s.per_class, epochs=s.epochs, batch_size=s.batch_size, lr=s.lr,
                           weight_decay=s.weight_decay)
        t0 = time.perf_counter()
        losses = _train(model, x, y, s=ts, seed=seed, progress=progress, cancel=cancel)
        seconds = time.perf_counter() - t0
        state = {k: v.detach().clone().contiguous() for k, v in model.state_dict().items()}
        weights = out / "weights.safetensors"
        save_file(state, str(weights), metadata={"pellucid_planted": f"{kind} {variant} seed={seed}"})
        audit = make_planted_split(kind, split="audit", per_class=s.check_per_class, seed=seed + 1)
        pred = _logits(model, [r.image for r in audit]).argmax(1)
        truth = np.array([CLASSES.index(r.label) for r in audit])
        metrics = {
            "model": name, "kind": kind, "variant": variant, "seed": seed, "torch": torch.__version__,
            "weights_sha256": hashlib.sha256(weights.read_bytes()).hexdigest(),
            "training": {**asdict(s), "split": variant, "epoch_losses": [round(v, 5) for v in losses],
                         "seconds": round(seconds, 1)},
            "audit_split_accuracy": float((pred == truth).mean()),
            "reliance": signal_reliance(model, kind, per_class=s.check_per_class, seed=seed + 2),
        }
    (out / "spec.toml").write_text(_spec_toml(kind, variant, name), encoding="utf-8")
    (out / "metrics.json").write_text(json.dumps(metrics, indent=2) + "\n", encoding="utf-8")
    return PlantedBuild(out, kind, variant, metrics, time.perf_counter() - start)
