"""Interactive latency of the image page, measured against a bare forward pass in the same run.

The image page's server work is one hooked forward pass (top-k + the default layer's maps) and
the activation grid's PNG. We report it as a ratio to a bare forward pass of the same model on
the same input, measured interleaved in one process, so the machine's load affects both alike.
Also: the time to draw and encode a 512-channel activation grid.

    python -m bench.latency_bench [--repeats 15] [--out bench/results/latency.md]
"""

from __future__ import annotations

import argparse
import io
import json
import statistics
import time
from pathlib import Path

import torch
import torchvision
from PIL import Image

from pellucid.core.errors import PellucidError
from pellucid.core.model.bundled import bundled_spec_path
from pellucid.core.model.layers import layer_map
from pellucid.core.model.loading import load_model
from pellucid.core.model.preprocess import prepare, read_image
from pellucid.core.views import render
from pellucid.core.views.activations import activations_with_prediction

REPO = Path(__file__).resolve().parents[1]


def _median_ms(fn, repeats: int) -> float:
    fn()  # warm-up
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append((time.perf_counter() - t0) * 1000)
    return statistics.median(times)


def page_ratio(name: str, image_path: Path, repeats: int) -> dict:
    model = load_model(bundled_spec_path(name))
    x = prepare(model.spec, read_image(image_path)).tensor
    layer = layer_map(model.module, input_shape=model.input_shape).last_conv().name

    def bare() -> None:
        with torch.inference_mode():
            model.module(x)

    def page() -> None:
        acts, _ = activations_with_prediction(model.module, x, layer=layer, labels=model.labels,
                                              output_kind=model.output_kind, k=5)
        grid, _ = render.activation_grid(acts.maps, order=acts.order("max"))
        render.encode_png(grid)

    bare_times, page_times = [], []
    bare()
    page()
    for _ in range(repeats):  # interleaved, so drifting load hits both alike
        t0 = time.perf_counter()
        bare()
        t1 = time.perf_counter()
        page()
        t2 = time.perf_counter()
        bare_times.append((t1 - t0) * 1000)
        page_times.append((t2 - t1) * 1000)
    b, p = statistics.median(bare_times), statistics.median(page_times)
    return {"model": name, "layer": layer, "bare_forward_ms": b, "page_work_ms": p, "ratio": p / b}


def grid_512(repeats: int) -> list[dict]:
    rows = []
    for arch, layer in (("resnet18", "layer4"), ("vgg16", "features.29")):
        net = getattr(torchvision.models, arch)(weights=None).eval()
        x = torch.randn(1, 3, 224, 224)
        acts, _ = activations_with_prediction(net, x, layer=layer, labels=[str(i) for i in range(1000)], k=1)

        def draw(acts=acts) -> None:
            grid, _ = render.activation_grid(acts.maps, order=acts.order("max"))
            render.encode_png(grid)

        rows.append({"maps": f"{arch} {layer}", "shape": list(acts.maps.shape),
                     "grid_png_ms": _median_ms(draw, repeats)})
    return rows


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench.latency_bench", description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=15)
    parser.add_argument("--out", type=Path, default=REPO / "bench" / "results" / "latency.md")
    args = parser.parse_args(argv)
    photo = Path("/tmp/pellucid-bench-photo.png")
    from skimage import data

    buf = io.BytesIO()
    Image.fromarray(data.chelsea()).save(buf, format="PNG")
    photo.write_bytes(buf.getvalue())
    pages = [page_ratio("tilenet", REPO / "demo_models/tilenet/samples/sound_tagged_01.png", args.repeats)]
    try:
        pages.append(page_ratio("efficientnet-lite0", photo, args.repeats))
    except PellucidError as exc:
        print(f"skipping the ImageNet model: {exc}")
    grids = grid_512(args.repeats)
    lines = ["| model | layer shown | bare forward (ms) | page work (ms) | ratio (target ≤ 2) |",
             "|---|---|---:|---:|---:|"]
    lines += [f"| {r['model']} | {r['layer']} | {r['bare_forward_ms']:.1f} | {r['page_work_ms']:.1f} | "
              f"{r['ratio']:.2f} |" for r in pages]
    lines += ["", "| 512-channel maps | shape | grid drawn + PNG encoded (ms, target ≤ 300) |", "|---|---|---:|"]
    lines += [f"| {r['maps']} | {'×'.join(map(str, r['shape']))} | {r['grid_png_ms']:.1f} |" for r in grids]
    text = "\n".join(lines)
    print(text)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(f"Command: `python -m bench.latency_bench --repeats {args.repeats}` (medians, "
                        f"torch threads {torch.get_num_threads()})\n\n{text}\n", encoding="utf-8")
    args.out.with_suffix(".json").write_text(json.dumps({"pages": pages, "grids": grids}, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
