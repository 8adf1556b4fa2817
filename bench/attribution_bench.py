"""Cost of every registered attribution method and of the sanity check, on the models users bring.

One run, every method at its default parameters on one image per model: the demo model (96×96, a
demo tile), the bundled EfficientNet-Lite0 (scikit-image's chelsea.png through its spec), and
torchvision's MobileNetV3-Small and ResNet-50 with seeded random weights (the same photo, ImageNet
mean/std). A backward pass counts as two forwards (common practice, no source). Seconds depend on
the machine and its load; forward-pass equivalents do not. Each row also says what the method
decided on its own: Integrated Gradients' steps and completeness error, RISE's masks and the
agreement of its two halves, occlusion's engine. The sanity check (cascading randomisation) runs
at its defaults (block steps, two-minute budget) for the methods in ``--sanity`` on the models in
``--sanity-models``.

    python -m bench.attribution_bench [--models …] [--sanity gradcam integrated_gradients] [--threads N]
"""

from __future__ import annotations

import argparse
import io
import json
import os
import time
from pathlib import Path
from typing import Any

import torch
from PIL import Image

from pellucid.core.attribution import Normalization, compute_attribution, list_methods, sanity_check
from pellucid.core.errors import PellucidError

REPO = Path(__file__).resolve().parents[1]
IMAGENET_MEAN = (0.485, 0.456, 0.406)  # torchvision's weights documentation
IMAGENET_STD = (0.229, 0.224, 0.225)
MODELS = ("tilenet", "efficientnet-lite0", "mobilenet_v3_small", "resnet50")


def _photo_bytes(name: str = "chelsea") -> bytes:
    from skimage import data

    buf = io.BytesIO()
    Image.fromarray(getattr(data, name)()).convert("RGB").save(buf, format="PNG")
    return buf.getvalue()


def load_case(name: str) -> tuple[torch.nn.Module, torch.Tensor, Normalization, str, str]:
    """(model in eval mode, (1, C, H, W) input, normalisation, output kind, description)."""
    from pellucid.core.model.bundled import bundled_spec_path
    from pellucid.core.model.loading import load_model
    from pellucid.core.model.preprocess import prepare, read_image

    if name in ("tilenet", "efficientnet-lite0"):
        lm = load_model(bundled_spec_path(name))
        image = (REPO / "demo_models" / "tilenet" / "samples" / "sound_tagged_01.png" if name == "tilenet"
                 else _photo_bytes())
        x = prepare(lm.spec, read_image(image)).tensor
        norm = Normalization.of(lm.spec.preprocess.mean, lm.spec.preprocess.std)
        what = "demo tile sound_tagged_01.png" if name == "tilenet" else "scikit-image chelsea.png through the spec"
        return lm.module.eval(), x, norm, lm.output_kind, f"bundled {name}, {what}"
    import numpy as np
    import torchvision

    torch.manual_seed(0)
    model = getattr(torchvision.models, name)().eval()
    g = torch.Generator().manual_seed(1)
    with torch.no_grad():
        for m in model.modules():
            if isinstance(m, torch.nn.BatchNorm2d):
                m.running_mean.copy_(torch.rand(m.num_features, generator=g) - 0.5)
                m.running_var.copy_(torch.rand(m.num_features, generator=g) + 0.5)
    rgb = Image.open(io.BytesIO(_photo_bytes())).convert("RGB")
    w, h = rgb.size
    s = 256 / min(w, h)
    rgb = rgb.resize((round(w * s), round(h * s)), Image.BILINEAR)
    left, top = (rgb.size[0] - 224) // 2, (rgb.size[1] - 224) // 2
    arr = np.asarray(rgb.crop((left, top, left + 224, top + 224)), dtype=np.float32) / 255.0
    x = torch.from_numpy(arr).permute(2, 0, 1).unsqueeze(0)
    x = (x - torch.tensor(IMAGENET_MEAN).view(1, 3, 1, 1)) / torch.tensor(IMAGENET_STD).view(1, 3, 1, 1)
    return (model, x.contiguous(), Normalization.of(IMAGENET_MEAN, IMAGENET_STD), "softmax",
            f"torchvision {name}, seeded random weights; scikit-image chelsea.png, ImageNet mean/std")


def _note(method: str, amap: Any) -> str:
    ex = amap.extras
    if method == "integrated_gradients":
        err = ex.get("completeness_error")
        return f"{ex.get('steps_used')} steps, completeness error {err:.1%}" if err is not None else ""
    if method == "rise":
        rho = ex.get("halves_spearman")
        state = "converged" if ex.get("converged") else "not converged"
        return f"{ex.get('masks_used')} masks, halves agree {rho:.2f} ({state})" if rho is not None else ""
    if method == "occlusion":
        return f"engine {ex.get('engine')}"
    return ""


def bench_model(name: str, sanity_methods: list[str]) -> tuple[list[dict], list[dict], str]:
    model, x, norm, kind, desc = load_case(name)
    with torch.inference_mode():
        model(x)
        t0 = time.perf_counter()
        for _ in range(3):
            model(x)
        forward_s = (time.perf_counter() - t0) / 3
    rows = []
    for method in list_methods():
        amap = compute_attribution(method["name"], model, x, output_kind=kind, normalization=norm)
        note = _note(method["name"], amap)
        rows.append({"model": name, "method": method["name"], "seconds": amap.seconds,
                     "forward_equivalents": amap.forward_equivalents, "n_forwards": amap.n_forwards,
                     "n_backwards": amap.n_backwards, "one_forward_seconds": forward_s, "note": note,
                     "warning": amap.warning})
        print(f"{name:20s} {method['name']:22s} {amap.forward_equivalents:8.0f} fwd-eq {amap.seconds:8.2f} s  {note}",
              flush=True)
    checks = []
    for method in sanity_methods:
        t0 = time.perf_counter()
        res = sanity_check(method, model, x, output_kind=kind, normalization=norm)
        seconds = time.perf_counter() - t0
        checks.append({"model": name, "method": method, "seconds": seconds, "verdict": res.verdict,
                       "steps": len(res.steps), "planned_steps": res.extras["planned_steps"],
                       "layers": res.extras["layers_randomised"], "first_map_seconds": res.extras["first_map_seconds"],
                       "final_spearman": res.steps[-1].spearman})
        print(f"{name:20s} sanity {method:15s} {seconds:8.1f} s, {len(res.steps)} of "
              f"{res.extras['planned_steps']} block steps, {res.verdict}", flush=True)
    return rows, checks, desc


def markdown(rows: list[dict], checks: list[dict], descs: dict[str, str], meta: dict[str, Any]) -> str:
    lines = [f"Command: `{meta['command']}`; torch {meta['torch']}, {meta['threads']} intra-op thread(s), load average "
             f"{meta['load_start']} at start, {meta['load_end']} at end.", "",
             "| model | method | forward-pass equivalents | seconds | what it decided / note |",
             "|---|---|---:|---:|---|"]
    for r in rows:
        note = r["note"]
        if r["warning"]:
            note = (note + "; " if note else "") + "warning: " + r["warning"]
        lines.append(f"| {r['model']} | {r['method']} | {r['forward_equivalents']:.0f} | {r['seconds']:.2f} | {note} |")
    if checks:
        lines += ["", "Sanity check (cascading randomisation) at its defaults:", "",
                  "| model | method | seconds | steps (of block steps) | layers randomised | first map s | "
                  "final Spearman | verdict |", "|---|---|---:|---:|---:|---:|---:|---|"]
        for c in checks:
            lines.append(f"| {c['model']} | {c['method']} | {c['seconds']:.1f} | {c['steps']} ({c['planned_steps']}) | "
                         f"{c['layers']} | {c['first_map_seconds']:.2f} | {c['final_spearman']:.2f} | {c['verdict']} |")
    lines += ["", "Models and inputs:", ""] + [f"- {k}: {v}" for k, v in descs.items()]
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench.attribution_bench", description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=REPO / "bench" / "results" / "attribution.md")
    parser.add_argument("--models", nargs="+", default=list(MODELS), choices=MODELS)
    parser.add_argument("--sanity", nargs="*", default=["gradcam", "integrated_gradients"],
                        help="methods whose sanity check is timed (none: --sanity)")
    parser.add_argument("--sanity-models", nargs="*", default=["tilenet", "efficientnet-lite0", "mobilenet_v3_small"],
                        help="models whose sanity checks run (ResNet-50's Integrated Gradients map on random weights "
                             "needs hundreds of steps, so it is left out by default)")
    parser.add_argument("--threads", type=int, default=None, help="torch intra-op threads (default: torch's own)")
    parser.add_argument("--skip-imagenet", action="store_true", help="only the demo model")
    args = parser.parse_args(argv)
    if args.threads:
        torch.set_num_threads(args.threads)
    meta = {"command": "python -m bench.attribution_bench " + " ".join(argv or []), "torch": torch.__version__,
            "threads": torch.get_num_threads(), "load_start": " ".join(f"{v:.1f}" for v in os.getloadavg())}
    rows: list[dict] = []
    checks: list[dict] = []
    descs: dict[str, str] = {}
    for name in (["tilenet"] if args.skip_imagenet else args.models):
        try:
            r, c, d = bench_model(name, args.sanity if name in args.sanity_models else [])
        except (PellucidError, ImportError) as exc:
            print(f"skipping {name}: {exc}")
            continue
        rows += r
        checks += c
        descs[name] = d
    meta["load_end"] = " ".join(f"{v:.1f}" for v in os.getloadavg())
    text = markdown(rows, checks, descs, meta)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(text, encoding="utf-8")
    args.out.with_suffix(".json").write_text(json.dumps({"meta": meta, "rows": rows, "sanity": checks}, indent=2)
                                             + "\n", encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
