"""Cost of every registered attribution method, in forward-pass equivalents and seconds.

One run, on the demo model (96×96) and the bundled ImageNet model (224×224), every method at its
default parameters; a backward pass counts as two forwards (common practice, no source). Seconds
depend on the machine and its load; the forward-pass equivalents do not.

    python -m bench.attribution_bench [--out bench/results/attribution.md] [--skip-imagenet]
"""

from __future__ import annotations

import argparse
import io
import json
import time
from pathlib import Path

import torch
from PIL import Image

from pellucid.core.attribution import Normalization, compute_attribution, list_methods
from pellucid.core.errors import PellucidError
from pellucid.core.model.bundled import bundled_spec_path
from pellucid.core.model.loading import load_model
from pellucid.core.model.preprocess import prepare, read_image

REPO = Path(__file__).resolve().parents[1]


def bench_model(name: str, image: bytes | Path) -> list[dict]:
    model = load_model(bundled_spec_path(name))
    x = prepare(model.spec, read_image(image)).tensor
    norm = Normalization.of(model.spec.preprocess.mean, model.spec.preprocess.std)
    t0 = time.perf_counter()
    with torch.inference_mode():
        model.module(x)
    forward_s = time.perf_counter() - t0
    rows = []
    for method in list_methods():
        amap = compute_attribution(method["name"], model.module, x, output_kind=model.output_kind,
                                   normalization=norm)
        rows.append({"model": name, "method": method["name"], "seconds": amap.seconds,
                     "forward_equivalents": amap.forward_equivalents, "n_forwards": amap.n_forwards,
                     "n_backwards": amap.n_backwards, "one_forward_seconds": forward_s,
                     "engine": amap.extras.get("engine"), "warning": amap.warning})
        print(f"{name:20s} {method['name']:22s} {amap.forward_equivalents:8.0f} fwd-eq {amap.seconds:8.2f} s")
    return rows


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench.attribution_bench", description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=REPO / "bench" / "results" / "attribution.md")
    parser.add_argument("--skip-imagenet", action="store_true")
    args = parser.parse_args(argv)
    rows = bench_model("tilenet", REPO / "demo_models" / "tilenet" / "samples" / "sound_tagged_01.png")
    if not args.skip_imagenet:
        from skimage import data

        buf = io.BytesIO()
        Image.fromarray(data.chelsea()).save(buf, format="PNG")
        try:
            rows += bench_model("efficientnet-lite0", buf.getvalue())
        except PellucidError as exc:
            print(f"skipping the ImageNet model: {exc}")
    lines = ["| model | method | forward-pass equivalents | seconds | engine / note |", "|---|---|---:|---:|---|"]
    for r in rows:
        note = r["engine"] or ""
        if r["warning"]:
            note = (note + "; " if note else "") + r["warning"]
        lines.append(f"| {r['model']} | {r['method']} | {r['forward_equivalents']:.0f} | {r['seconds']:.2f} | {note} |")
    text = "\n".join(lines)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(f"Command: `python -m bench.attribution_bench` (defaults of every method; torch threads "
                        f"{torch.get_num_threads()})\n\n{text}\n", encoding="utf-8")
    args.out.with_suffix(".json").write_text(json.dumps(rows, indent=2) + "\n", encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
