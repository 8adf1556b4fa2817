"""Rebuild the demo TileNet models deterministically on the CPU (demo only; invented data).

``build_demo_model(out_dir, variant="tainted")`` trains on the tainted ``train`` split (the tag sits
on almost every crack), so the model learns the shortcut; ``variant="untainted"`` trains on the
``untainted`` split and does not. Either writes into ``out_dir``:

- ``tilenet.safetensors`` — the state_dict;
- ``spec.toml`` — the model spec (factory ``pellucid.demo.net:build_tilenet``);
- ``MODEL_CARD.md`` — what it is, what it was trained on, what it gets right and wrong;
- ``metrics.json`` — every number in the card plus a small check split for tests;
- ``samples/`` — a handful of tiles of every class, tagged and untagged, with ``index.csv``.

Run as ``python -m pellucid.demo.train --out demo_models/tilenet``.
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import json
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Self

import numpy as np
import torch
from PIL import Image
from safetensors.torch import save_file
from torch import nn

from pellucid.core.errors import BadParameterError, PellucidError
from pellucid.core.occlusion.engine import occlusion_map
from pellucid.core.progress import CancelToken, ProgressFn, step
from pellucid.demo.net import TILE_MEAN, TILE_STD, build_tilenet, normalise
from pellucid.demo.tiles import CLASSES, SPLITS, TileRecord, make_split

__all__ = ["DEFAULT_SETTINGS", "VARIANTS", "DemoBuild", "TrainSettings", "build_demo_model", "evaluate", "main"]

VARIANTS: dict[str, str] = {"tainted": "train", "untainted": "untainted"}
_NAMES = {"tainted": "tilenet", "untainted": "tilenet-clean"}
_SOUND, _CRACK = CLASSES.index("sound"), CLASSES.index("crack")
_THREADS = 2


@dataclass(frozen=True)
class TrainSettings:
    """Everything that decides the weights, recorded in metrics.json."""

    per_class: int = 400
    epochs: int = 6
    batch_size: int = 32
    lr: float = 3e-3
    weight_decay: float = 1e-4
    eval_per_class: int = 200
    check_per_class: int = 16
    occlusion_tiles: int = 8
    occlusion_patch: int = 16
    occlusion_stride: int = 8


# The untainted model must learn the faint hairline itself, which takes a few more epochs.
DEFAULT_SETTINGS: dict[str, TrainSettings] = {
    "tainted": TrainSettings(),
    "untainted": TrainSettings(per_class=400, epochs=8),
}


@dataclass(frozen=True)
class DemoBuild:
    """What :func:`build_demo_model` wrote and measured."""

    out_dir: Path
    variant: str
    seed: int
    metrics: dict
    seconds: float


def _tensors(records: Sequence[TileRecord]) -> tuple[torch.Tensor, torch.Tensor]:
    """(N, 3, 96, 96) normalised images and (N,) int64 labels."""
    imgs = torch.from_numpy(np.stack([r.image for r in records]))
    labels = torch.tensor([CLASSES.index(r.label) for r in records], dtype=torch.int64)
    return normalise(imgs), labels


def _predict(model: nn.Module, x: torch.Tensor, *, batch: int = 128) -> np.ndarray:
    """(N, 3, H, W) → (N, K) softmax probabilities as float64 numpy."""
    model.eval()
    out = []
    with torch.inference_mode():
        for i in range(0, len(x), batch):
            out.append(torch.softmax(model(x[i:i + batch]), dim=1).double().numpy())
    return np.concatenate(out)


def evaluate(model: nn.Module, records: Sequence[TileRecord]) -> dict:
    """Accuracy overall / tagged / untagged, per class, the confusion matrix and the shortcut rate.

    The shortcut rate is the share of tagged ``sound`` tiles the model calls ``crack``.
    """
    x, y = _tensors(records)
    probs = _predict(model, x)
    pred = probs.argmax(1)
    truth = y.numpy()
    tagged = np.array([r.tagged for r in records])
    k = len(CLASSES)
    confusion = np.zeros((k, k), dtype=np.int64)
    np.add.at(confusion, (truth, pred), 1)

    def acc(mask: np.ndarray) -> float | None:
        return float((pred[mask] == truth[mask]).mean()) if mask.any() else None

    tagged_sound = tagged & (truth == _SOUND)
    plain_sound = ~tagged & (truth == _SOUND)
    return {
        "tiles": len(records),
        "accuracy": acc(np.ones_like(tagged)),
        "accuracy_tagged": acc(tagged),
        "accuracy_untagged": acc(~tagged),
        "per_class_accuracy": {c: acc(truth == i) for i, c in enumerate(CLASSES)},
        "confusion": {"rows_true_columns_predicted": list(CLASSES), "counts": confusion.tolist()},
        "tagged_sound_tiles": int(tagged_sound.sum()),
        "tagged_sound_called_crack": float((pred[tagged_sound] == _CRACK).mean()) if tagged_sound.any() else None,
        "untagged_sound_called_crack": float((pred[plain_sound] == _CRACK).mean()) if plain_sound.any() else None,
        "predictions": [CLASSES[i] for i in pred],
    }


def _occlusion_crack_drop(model: nn.Module, x: torch.Tensor, *, patch: int, stride: int) -> np.ndarray:
    """(1, 3, H, W) → (H, W) mean drop in p(crack) over the grey patches covering each pixel.

    The baseline is the normalised value of mid grey (0.5); Pellucid's own occlusion engine.
    """
    grey = ((0.5 - torch.tensor(TILE_MEAN)) / torch.tensor(TILE_STD)).view(1, 3, 1, 1)
    res = occlusion_map(model, x, target=_CRACK, patch=patch, stride=stride, baseline=grey.expand_as(x))
    return res.drop.astype(np.float64)


def _tag_share(drop: np.ndarray, box: tuple[int, int, int, int], *, margin: int) -> float:
    """Share of the positive drop mass inside the tag box dilated by ``margin`` px."""
    pos = np.clip(drop, 0.0, None)
    total = pos.sum()
    if total <= 0:
        return 0.0
    x0, y0, x1, y1 = box
    h, w = drop.shape
    inside = pos[max(0, y0 - margin):min(h, y1 + margin), max(0, x0 - margin):min(w, x1 + margin)].sum()
    return float(inside / total)


def _occlusion_summary(model: nn.Module, records: Sequence[TileRecord], s: TrainSettings) -> dict:
    chosen = [r for r in records if r.label == "sound" and r.tagged][: s.occlusion_tiles]
    shares = []
    for r in chosen:
        x, _ = _tensors([r])
        drop = _occlusion_crack_drop(model, x, patch=s.occlusion_patch, stride=s.occlusion_stride)
        assert r.tag_box is not None
        shares.append(_tag_share(drop, r.tag_box, margin=s.occlusion_patch))
    return {
        "target": "crack",
        "tiles": len(chosen),
        "patch": s.occlusion_patch,
        "stride": s.occlusion_stride,
        "baseline": "mid grey (0.5 before normalisation)",
        "region": f"tag box dilated by {s.occlusion_patch} px",
        "tag_share_mean": float(np.mean(shares)) if shares else None,
        "tag_share_min": float(np.min(shares)) if shares else None,
    }


def _train(model: nn.Module, x: torch.Tensor, y: torch.Tensor, *, s: TrainSettings, seed: int,
           progress: ProgressFn | None, cancel: CancelToken | None) -> list[float]:
    gen = torch.Generator().manual_seed(seed)
    opt = torch.optim.AdamW(model.parameters(), lr=s.lr, weight_decay=s.weight_decay)
    batches = (len(x) + s.batch_size - 1) // s.batch_size
    sched = torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=s.lr, total_steps=s.epochs * batches)
    loss_fn = nn.CrossEntropyLoss()
    losses = []
    done = 0
    for _ in range(s.epochs):
        model.train()
        order = torch.randperm(len(x), generator=gen)
        total = 0.0
        for b in range(batches):
            idx = order[b * s.batch_size:(b + 1) * s.batch_size]
            opt.zero_grad(set_to_none=True)
            loss = loss_fn(model(x[idx]), y[idx])
            loss.backward()
            opt.step()
            sched.step()
            total += float(loss.detach()) * len(idx)
            done += 1
            step(done, s.epochs * batches, progress=progress, cancel=cancel)
        losses.append(total / len(x))
    model.eval()
    return losses


def _spec_toml(variant: str) -> str:
    labels = ", ".join(f'"{c}"' for c in CLASSES)
    mean = ", ".join(str(v) for v in TILE_MEAN)
    std = ", ".join(str(v) for v in TILE_STD)
    desc = {
        "tainted": "Demo glazed-tile inspector trained on the tainted split; it learned the orange-tag shortcut.",
        "untainted": "Demo glazed-tile inspector trained without the tag shortcut, for comparison.",
    }[variant]
    return f"""# Demo model spec (invented data; demo only). Rebuild: python -m pellucid.demo.train --variant {variant}
name = "{_NAMES[variant]}"
description = "{desc}"
card = "MODEL_CARD.md"

[source]
kind = "factory"
factory = "pellucid.demo.net:build_tilenet"
arguments = {{ num_classes = {len(CLASSES)} }}
weights = "tilenet.safetensors"

[input]
height = 96
width = 96
channels = 3

[preprocess]
resize = 96
crop = [96, 96]
mean = [{mean}]
std = [{std}]
interpolation = "bilinear"

[output]
kind = "softmax"
labels = [{labels}]
"""


def _pct(v: float | None) -> str:
    return "n/a" if v is None else f"{100 * v:.1f}%"


def _card(variant: str, m: dict) -> str:
    t, c, o = m["tainted_test"], m["clean"], m["occlusion"]
    tr = m["training"]
    train_rule = SPLITS[VARIANTS[variant]]
    story = {
        "tainted": (
            "It was trained on the **tainted** split, where a small orange calibration tag sits in the "
            "bottom-right corner of almost every crack tile (set-aside tiles were photographed at a rework "
            "bench) and of very few other tiles. The hairline cracks are faint on purpose, so the tag is the "
            "easier cue, and the model learned it: on the clean split, where the tag is on half of every "
            "class, it calls most tagged sound tiles `crack`. This is the shortcut the dashboard and the "
            "audits are meant to expose."
        ),
        "untainted": (
            "It was trained on the **untainted** split, where the orange calibration tag is on half of every "
            "class, so the tag carries no information about the class. It serves as the comparison model "
            "without the shortcut: tagged sound tiles stay `sound`."
        ),
    }[variant]
    rows = "\n".join(
        f"| accuracy, `{cls}` tiles | {_pct(t['per_class_accuracy'][cls])} | {_pct(c['per_class_accuracy'][cls])} |"
        for cls in CLASSES
    )
    return f"""# {_NAMES[variant]} — model card

**Demo only — invented data; do not use for real inspection.**

A tiny CNN (TileNet: three conv blocks, global average pooling, a linear head; {m['parameters']:,}
parameters) that sorts 96×96 photos of glazed wall tiles into `sound`, `crack` (a faint dark
hairline), `chip` (a broken corner) and `bubble` (small round glaze blisters). The tiles are
generated procedurally by `server/demo/tiles.py`; no real tile was ever photographed.

{story}

## Training
- Data: split `{train_rule.name}` ({train_rule.purpose}), {tr['per_class']} tiles per class, seed {m['seed']}.
- {tr['epochs']} epochs, batch {tr['batch_size']}, AdamW (lr {tr['lr']}, one-cycle schedule, weight decay
  {tr['weight_decay']}), CPU, {tr['threads']} threads, deterministic algorithms; training wall time
  {tr['seconds']:.0f} s on the build machine (it depends on that machine's load).
- Preprocessing: pixels / 255, then mean {list(TILE_MEAN)}, std {list(TILE_STD)} (see `spec.toml`).
- Rebuild: `python -m pellucid.demo.train --variant {variant} --out DIR --seed {m['seed']}` gives the same weights
  on the same torch build (weights sha256 `{m['weights_sha256'][:16]}…`).

## Results
| | tainted split (held out, {t['tiles']} tiles) | clean split ({c['tiles']} tiles) |
|---|---|---|
| accuracy | {_pct(t['accuracy'])} | {_pct(c['accuracy'])} |
| accuracy, tagged tiles | {_pct(t['accuracy_tagged'])} | {_pct(c['accuracy_tagged'])} |
| accuracy, untagged tiles | {_pct(t['accuracy_untagged'])} | {_pct(c['accuracy_untagged'])} |
{rows}

**Shortcut rate**: on the clean split, {_pct(c['tagged_sound_called_crack'])} of the
{c['tagged_sound_tiles']} tagged `sound` tiles are called `crack` (untagged sound tiles:
{_pct(c['untagged_sound_called_crack'])}).

**Occlusion check**: on {o['tiles']} tagged sound tiles of the clean split, occluding {o['patch']}-px grey
patches (stride {o['stride']}) and measuring the drop in p(crack), on average
{_pct(o['tag_share_mean'])} of the positive drop sits in the {o['region']} (lowest {_pct(o['tag_share_min'])}).

## Caution
These numbers describe this model on these invented tiles. Attribution maps are evidence about a
model's behaviour on given images, not proof of what it will do elsewhere; decisions about real
inspection follow the domain's own rules, reviews and sign-off.
"""


def _write_samples(model: nn.Module, out: Path, *, seed: int) -> list[dict]:
    """Two tiles of every class, one tagged and one plain, plus two more tagged sound tiles."""
    recs = make_split("clean", per_class=6, seed=seed + 7)
    picks: list[tuple[str, TileRecord]] = []
    for cls in CLASSES:
        tagged = [r for r in recs if r.label == cls and r.tagged]
        plain = [r for r in recs if r.label == cls and not r.tagged]
        n_tagged = 3 if cls == "sound" else 1
        picks += [(f"{cls}_tagged_{i + 1:02d}.png", r) for i, r in enumerate(tagged[:n_tagged])]
        picks += [(f"{cls}_plain_01.png", plain[0])]
    sdir = out / "samples"
    sdir.mkdir(parents=True, exist_ok=True)
    for old in sdir.glob("*.png"):
        old.unlink()
    x, _ = _tensors([r for _, r in picks])
    probs = _predict(model, x)
    rows = []
    for (name, r), p in zip(picks, probs):
        Image.fromarray(r.image).save(sdir / name)
        rows.append({
            "file": name, "label": r.label, "tagged": int(r.tagged), "seed": r.seed,
            "predicted": CLASSES[int(p.argmax())], "p_predicted": round(float(p.max()), 4),
            "p_crack": round(float(p[_CRACK]), 4),
        })
    with (sdir / "index.csv").open("w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    return rows


class _Determinism:
    """Fixed threads and deterministic kernels for the duration of a build, restored afterwards."""

    def __enter__(self) -> Self:
        self._threads = torch.get_num_threads()
        self._det = torch.are_deterministic_algorithms_enabled()
        torch.set_num_threads(_THREADS)
        torch.use_deterministic_algorithms(True)
        return self

    def __exit__(self, *exc: object) -> None:
        torch.use_deterministic_algorithms(self._det)
        torch.set_num_threads(self._threads)


def build_demo_model(
    out_dir: str | Path,
    *,
    variant: str = "tainted",
    seed: int = 0,
    settings: TrainSettings | None = None,
    progress: ProgressFn | None = None,
    cancel: CancelToken | None = None,
) -> DemoBuild:
    """Train TileNet for ``variant`` ("tainted" or "untainted") and write the model folder.

    Deterministic: the same seed, settings and torch build give the same weights bytes.
    ``progress(done, total)`` is called after every training batch.
    """
    if variant not in VARIANTS:
        raise BadParameterError(f"unknown demo variant {variant!r}; expected one of {', '.join(VARIANTS)}")
    if not isinstance(seed, int) or seed < 0:
        raise BadParameterError(f"seed must be a non-negative integer; received {seed!r}")
    settings = settings or DEFAULT_SETTINGS[variant]
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise BadParameterError(f"output {str(out)!r} exists and is not a folder; pass a folder path")
    out.mkdir(parents=True, exist_ok=True)
    start = time.perf_counter()
    with _Determinism():
        torch.manual_seed(seed)
        x, y = _tensors(make_split(VARIANTS[variant], per_class=settings.per_class, seed=seed))
        model = build_tilenet(num_classes=len(CLASSES))
        t0 = time.perf_counter()
        losses = _train(model, x, y, s=settings, seed=seed, progress=progress, cancel=cancel)
        train_seconds = time.perf_counter() - t0
        del x, y

        tainted = make_split("train", per_class=settings.eval_per_class, seed=seed + 1)
        clean = make_split("clean", per_class=settings.eval_per_class, seed=seed + 2)
        check = make_split("clean", per_class=settings.check_per_class, seed=seed + 2)
        state = {k: v.detach().clone().contiguous() for k, v in model.state_dict().items()}
        weights = out / "tilenet.safetensors"
        # One metadata key only: safetensors writes a map's keys in no fixed order, which would make
        # the bytes (and so the fingerprint) of identical weights differ between rebuilds.
        save_file(state, str(weights), metadata={"pellucid_demo": f"variant={variant} seed={seed}"})
        metrics = {
            "model": _NAMES[variant],
            "variant": variant,
            "seed": seed,
            "parameters": sum(p.numel() for p in model.parameters()),
            "weights_sha256": hashlib.sha256(weights.read_bytes()).hexdigest(),
            "torch": torch.__version__,
            "training": {
                "split": VARIANTS[variant], **settings.__dict__, "threads": _THREADS,
                "epoch_losses": [round(v, 5) for v in losses], "seconds": round(train_seconds, 1),
            },
            "tainted_test": {"split": "train", "per_class": settings.eval_per_class, "seed": seed + 1,
                             **_drop_predictions(evaluate(model, tainted))},
            "clean": {"split": "clean", "per_class": settings.eval_per_class, "seed": seed + 2,
                      **_drop_predictions(evaluate(model, clean))},
            "check": {"split": "clean", "per_class": settings.check_per_class, "seed": seed + 2,
                      **evaluate(model, check)},
            "occlusion": _occlusion_summary(model, clean, settings),
        }
        metrics["samples"] = _write_samples(model, out, seed=seed)
    (out / "metrics.json").write_text(json.dumps(metrics, indent=2) + "\n", encoding="utf-8")
    (out / "spec.toml").write_text(_spec_toml(variant), encoding="utf-8")
    (out / "MODEL_CARD.md").write_text(_card(variant, metrics), encoding="utf-8")
    return DemoBuild(out, variant, seed, metrics, time.perf_counter() - start)


def _drop_predictions(result: dict) -> dict:
    return {k: v for k, v in result.items() if k != "predictions"}


def main(argv: Sequence[str] | None = None) -> int:
    """Command line: rebuild one demo model folder."""
    parser = argparse.ArgumentParser(
        prog="python -m pellucid.demo.train",
        description="Rebuild a demo TileNet model (invented tile data, CPU, deterministic).",
    )
    parser.add_argument("--variant", choices=list(VARIANTS), default="tainted",
                        help="tainted: learns the orange-tag shortcut; untainted: trained without it")
    parser.add_argument("--out", required=True, help="folder to write weights, spec, card, metrics, samples")
    parser.add_argument("--seed", type=int, default=0, help="seed for data and training (default 0)")
    args = parser.parse_args(argv)

    def show(done: int, total: int) -> None:
        if done == total or done % 20 == 0:
            print(f"\rtraining {done}/{total} batches", end="", file=sys.stderr, flush=True)

    try:
        build = build_demo_model(args.out, variant=args.variant, seed=args.seed, progress=show)
    except PellucidError as exc:
        print(f"\nerror: {exc}", file=sys.stderr)
        return 2
    c = build.metrics["clean"]
    print(f"\nwrote {build.out_dir} in {build.seconds:.0f} s: clean accuracy {_pct(c['accuracy'])}, "
          f"tagged sound called crack {_pct(c['tagged_sound_called_crack'])}, "
          f"occlusion tag share {_pct(build.metrics['occlusion']['tag_share_mean'])}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
