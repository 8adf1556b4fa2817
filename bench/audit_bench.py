"""Audit throughput against a bare batched forward + backward of the same model, and audit memory.

For each model (the bundled EfficientNet-Lite0; torchvision's MobileNetV3-Small and ResNet-50 with
seeded random weights), each intra-op thread count (``--threads``, default 1 and 2) and each round
(``--reps``), interleaved so a drifting load hits all alike:

* **bare**: the same images, already decoded and preprocessed, pushed through the model in
  batches of ``--shard`` with a backward pass of the target scores: the floor any gradient-based
  audit pays (images/s);
* **audit**: ``pellucid.core.audit.worker.audit_images`` on shards of ``--shard`` images, the work
  an audit worker does for each shard: read and hash-check the file, decode, resize and crop,
  predict, explain (``--method``, Grad-CAM by default) and measure the map (images/s);
* **one at a time**: the one-image path (``audit_image``) on the first ``--single`` images, what
  audits did before shards were batched (images/s).

The ratio audit / bare is taken per round (median reported). Then one full ``run_audit`` (store,
summary and all) on ``--memory-images`` images of the first model measures resident memory after
every 100 images. Images are crops and flips of scikit-image's bundled photos, written as PNG
files into a temporary class-subfolder dataset. Results go to ``--out`` (markdown and JSON).

    python -m bench.audit_bench [--models …] [--images 96] [--shard 8] [--threads 1 2] [--reps 3]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import tempfile
import textwrap
import time
from pathlib import Path
from typing import Any

import numpy as np
import torch
from PIL import Image

REPO = Path(__file__).resolve().parents[1]
MODELS = ("efficientnet-lite0", "mobilenet_v3_small", "resnet50")
PHOTOS = ("chelsea", "coffee", "astronaut", "rocket", "cat", "hubble_deep_field", "immunohistochemistry")


def rss_bytes() -> int:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def write_dataset(root: Path, labels: list[str], count: int, seed: int = 0) -> Path:
    """``count`` PNGs (crops and flips of scikit-image's photos, ~300 px) in one subfolder per label."""
    from skimage import data

    rng = np.random.default_rng(seed)
    photos = [np.asarray(Image.fromarray(getattr(data, name)()).convert("RGB")) for name in PHOTOS]
    for label in labels:
        (root / label).mkdir(parents=True, exist_ok=True)
    for i in range(count):
        img = photos[i % len(photos)]
        h, w = img.shape[:2]
        side = int(min(h, w) * rng.uniform(0.6, 1.0))
        top, left = rng.integers(0, h - side + 1), rng.integers(0, w - side + 1)
        crop = img[top : top + side, left : left + side]
        if rng.random() < 0.5:
            crop = crop[:, ::-1]
        Image.fromarray(np.ascontiguousarray(crop)).resize((300, 300), Image.BILINEAR).save(
            root / labels[i % len(labels)] / f"img-{i:05d}.png")
    return root


def model_spec(folder: Path, name: str) -> Path:
    """The bundled spec, or a spec for a torchvision architecture with seeded random weights."""
    if name == "efficientnet-lite0":
        from pellucid.core.model.bundled import bundled_spec_path

        return bundled_spec_path(name)
    path = folder / f"{name}.toml"
    path.write_text(textwrap.dedent(f'''
        name = "{name}-random"
        description = "torchvision {name}, seeded random weights (benchmark only)"
        [source]
        kind = "torchvision"
        architecture = "{name}"
        seed = 0
        [input]
        height = 224
        width = 224
        channels = 3
        [preprocess]
        resize = 256
        crop = [224, 224]
        mean = [0.485, 0.456, 0.406]
        std = [0.229, 0.224, 0.225]
        [output]
        kind = "softmax"
        builtin = "imagenet-1k"
        '''), encoding="utf-8")
    return path


def items_of(dataset: Any) -> list[dict]:
    return [{**item.to_dict(), "path": str(item.path)} for item in dataset.items]


def bare_rate(model: Any, tensors: torch.Tensor, targets: torch.Tensor, batch: int) -> float:
    """Images/s of forward + backward of the target scores in batches (the inputs need a gradient,
    as the input-gradient methods do; Grad-CAM's backward stops earlier, so this is generous)."""
    module = model.module
    t0 = time.perf_counter()
    for k in range(0, len(tensors), batch):
        x = tensors[k : k + batch].clone().requires_grad_(True)
        out = module(x)
        out[torch.arange(len(x)), targets[k : k + batch]].sum().backward()
    return len(tensors) / (time.perf_counter() - t0)


def bench_model(name: str, folder: Path, args: argparse.Namespace) -> dict[str, Any]:
    from pellucid.core.audit.dataset import load_dataset
    from pellucid.core.audit.settings import AuditSettings
    from pellucid.core.audit.worker import audit_image, audit_images
    from pellucid.core.model.loading import load_model
    from pellucid.core.model.preprocess import prepare, read_image

    model = load_model(model_spec(folder, name))
    model.module.eval()
    for p in model.module.parameters():
        p.requires_grad_(False)  # as in an audit: gradients are taken with respect to inputs and activations
    labels = [model.labels[281], model.labels[285]]
    data_dir = folder / f"data-{name}"
    if not data_dir.exists():
        write_dataset(data_dir, labels, args.images)
    items = items_of(load_dataset(data_dir))
    settings = AuditSettings(method=args.method, target="predicted", shard_size=args.shard).validated()
    tensors = torch.cat([prepare(model.spec, read_image(Path(i["path"]))).tensor.clone() for i in items])
    with torch.no_grad():
        targets = torch.cat([model.module(tensors[k : k + args.shard]).argmax(1)
                             for k in range(0, len(tensors), args.shard)])
    rows: list[dict[str, Any]] = []
    for threads in args.threads:
        torch.set_num_threads(threads)
        bare_rate(model, tensors[: args.shard], targets[: args.shard], args.shard)  # warm-up
        audit_images(model, items[: args.shard], settings)
        bare, audit, single = [], [], []
        for _ in range(args.reps):
            bare.append(bare_rate(model, tensors, targets, args.shard))
            t0 = time.perf_counter()
            for k in range(0, len(items), args.shard):
                outcomes = audit_images(model, items[k : k + args.shard], settings)
                assert all(o.status == "done" for o in outcomes), [o.data for o in outcomes if o.status != "done"]
            audit.append(len(items) / (time.perf_counter() - t0))
            t0 = time.perf_counter()
            for item in items[: args.single]:
                audit_image(model, item, settings)
            single.append(args.single / (time.perf_counter() - t0))
        ratios = [a / b for a, b in zip(audit, bare)]
        rows.append({"model": name, "threads": threads, "shard": args.shard, "images": len(items),
                     "bare_images_per_s": statistics.median(bare), "audit_images_per_s": statistics.median(audit),
                     "single_images_per_s": statistics.median(single), "ratio_per_round": statistics.median(ratios),
                     "bare": bare, "audit": audit, "single": single})
        print(f"{name:20s} {threads} thread(s): bare {statistics.median(bare):6.1f} img/s, audit "
              f"{statistics.median(audit):6.1f} img/s ({statistics.median(ratios):.0%} of bare), one at a time "
              f"{statistics.median(single):6.1f} img/s", flush=True)
    return {"model": name, "description": model.spec.description, "rows": rows}


def memory_run(name: str, folder: Path, args: argparse.Namespace, threads: int) -> dict[str, Any]:
    from pellucid.core.audit.dataset import load_dataset
    from pellucid.core.audit.runner import run_audit
    from pellucid.core.audit.settings import AuditSettings
    from pellucid.core.audit.store import Store
    from pellucid.core.model.loading import load_model

    torch.set_num_threads(threads)
    model = load_model(model_spec(folder, name))
    data_dir = folder / f"memory-{name}"
    write_dataset(data_dir, [model.labels[281], model.labels[285]], args.memory_images, seed=1)
    dataset = load_dataset(data_dir)
    marks: dict[int, int] = {}

    def progress(done: int, total: int) -> None:
        mark = (done // 100) * 100  # progress comes once per shard: record the first report past each 100
        if mark not in marks and done <= total:
            marks[mark] = rss_bytes()

    t0 = time.perf_counter()
    run_audit(model, dataset, store=Store(folder / f"store-{name}"),
              settings=AuditSettings(method=args.method, shard_size=args.shard, threads=threads), progress=progress)
    seconds = time.perf_counter() - t0
    return {"model": name, "images": args.memory_images, "threads": threads, "seconds": seconds,
            "rss_mb": {str(k): v / 2**20 for k, v in sorted(marks.items())}}


def markdown(report: dict[str, Any]) -> str:
    m = report["meta"]
    lines = [f"Command: `{m['command']}`; torch {m['torch']}; {m['cores']} cores; load average {m['load_start']} "
             f"at start, {m['load_end']} at end. Method {m['method']}, shards of {m['shard']} images.", "",
             "| model | threads | bare fwd+bwd (img/s) | audit (img/s) | audit / bare (per round) | "
             "one image at a time (img/s) | batched / one at a time |", "|---|---:|---:|---:|---:|---:|---:|"]
    for case in report["models"]:
        for r in case["rows"]:
            speedup = r["audit_images_per_s"] / r["single_images_per_s"]
            lines.append(f"| {r['model']} | {r['threads']} | {r['bare_images_per_s']:.1f} | "
                         f"{r['audit_images_per_s']:.1f} | {r['ratio_per_round']:.0%} | "
                         f"{r['single_images_per_s']:.1f} | {speedup:.1f}× |")
    for case in report["models"]:
        best = max(case["rows"], key=lambda r: r["audit_images_per_s"])
        lines.append(f"\n{case['model']}: the faster thread count in this run was {best['threads']} "
                     f"({best['audit_images_per_s']:.1f} img/s).")
    mem = report.get("memory")
    if mem:
        marks = ", ".join(f"{k}: {v:.0f} MB" for k, v in mem["rss_mb"].items())
        lines += ["", f"Memory: one `run_audit` of {mem['images']} images ({mem['model']}, {mem['threads']} thread(s), "
                  f"{mem['seconds']:.0f} s, {mem['images'] / mem['seconds']:.1f} img/s including store, summary and "
                  f"pictures): resident memory at the first progress report past each 100 images: {marks}."]
    lines += ["", "Models:", ""] + [f"- {c['model']}: {c['description']}" for c in report["models"]]
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m bench.audit_bench", description=__doc__.splitlines()[0])
    p.add_argument("--models", nargs="+", default=list(MODELS), choices=MODELS)
    p.add_argument("--images", type=int, default=96, help="images per model for the throughput rounds")
    p.add_argument("--shard", type=int, default=8, help="images per shard (= per batch)")
    p.add_argument("--threads", nargs="+", type=int, default=None, help="thread counts (default: 1 and all cores)")
    p.add_argument("--reps", type=int, default=3)
    p.add_argument("--single", type=int, default=16, help="images run one at a time for the old path's rate")
    p.add_argument("--method", default="gradcam")
    p.add_argument("--memory-images", type=int, default=1000, help="images of the full run_audit (0 skips it)")
    p.add_argument("--out", type=Path, default=REPO / "bench" / "results")
    args = p.parse_args(argv)
    cores = os.cpu_count() or 1
    args.threads = args.threads or sorted({1, cores})
    meta = {"command": "python -m bench.audit_bench " + " ".join(argv or []), "torch": torch.__version__,
            "cores": cores, "method": args.method, "shard": args.shard,
            "load_start": " ".join(f"{v:.1f}" for v in os.getloadavg())}
    report: dict[str, Any] = {"meta": meta, "models": []}
    with tempfile.TemporaryDirectory(prefix="pellucid-audit-bench-") as tmp:
        folder = Path(tmp)
        for name in args.models:
            report["models"].append(bench_model(name, folder, args))
        if args.memory_images:
            best = max(report["models"][0]["rows"], key=lambda r: r["audit_images_per_s"])["threads"]
            report["memory"] = memory_run(args.models[0], folder, args, best)
            print(f"memory: {report['memory']['rss_mb']}", flush=True)
    meta["load_end"] = " ".join(f"{v:.1f}" for v in os.getloadavg())
    args.out.mkdir(parents=True, exist_ok=True)
    (args.out / "audit_bench.json").write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    text = markdown(report)
    (args.out / "audit_bench.md").write_text(text, encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
