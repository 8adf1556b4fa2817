"""Occlusion benchmark: naive loop, batched brute force, incremental and approximate, side by side.

Run ``python -m bench.occlusion_bench`` (``--help`` for options). One run measures, on the machine
it runs on:

* the ceiling: fp32 ``torch.mm`` throughput (FLOP/s) at the thread count used;
* a tuning sweep of the batched brute force on ResNet-18 (threads, batch size, memory layout),
  whose best setting the rest of the run uses;
* per model (the demo TileNet, ResNet-18, VGG-16; random weights unless the trained demo weights
  exist) at 224×224, patch 16, strides 8 and 4: seconds for the whole position grid, ratio to the
  naive loop and to batched, brute-force-equivalent FLOP/s as a share of the ceiling (positions ×
  model MACs × 2 / seconds; above 100% means less work than brute force), max |difference| to
  batched on the same positions, peak RSS during the method, and the ideal incremental speedup
  (total conv MACs over the mean conv MACs inside the exact projective regions).

Where the whole grid would take minutes, times come from a subset and are extrapolated, and the
table says so: the naive loop runs a few evenly spaced positions; batched runs a few full batches
(its cost per position is the same everywhere); incremental runs the first, last and a few interior
rows (border rows are cheaper) and extrapolates as first + last + interior mean × (rows − 2).
Timings are medians of ``--reps`` repetitions. Results go to ``--out`` as JSON and markdown.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any, Self

import numpy as np
import torch
from torch import nn

from pellucid.core.occlusion.engine import _choose_engine, _scores, compare_to_exact, occlusion_map
from pellucid.core.occlusion.incremental import IncrementalOcclusion
from pellucid.core.occlusion.positions import make_baseline, occlusion_positions

REPO = Path(__file__).resolve().parents[1]


# ---------------------------------------------------------------------------------------------
# measurement helpers


class PeakRSS:
    """Peak resident set size (bytes) of this process while the block runs, sampled every 5 ms."""

    def __init__(self) -> None:
        self.peak = 0
        self.start = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._poll, daemon=True)

    @staticmethod
    def current() -> int:
        try:
            with open("/proc/self/statm") as f:
                return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
        except OSError:  # not Linux: fall back to the lifetime peak
            import resource

            return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024

    def _poll(self) -> None:
        while not self._stop.is_set():
            self.peak = max(self.peak, self.current())
            self._stop.wait(0.005)

    @property
    def growth(self) -> int:
        return max(0, self.peak - self.start)

    def __enter__(self) -> Self:
        self.start = self.current()
        self.peak = self.start
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, self.current())


def timed(fn: Callable[[], Any], reps: int) -> tuple[float, list[float], Any, tuple[int, int]]:
    """(median seconds, all times, last result, (peak RSS, peak growth over the start) bytes)."""
    times = []
    result = None
    peak = growth = 0
    for _ in range(reps):
        with PeakRSS() as rss:
            t0 = time.perf_counter()
            result = fn()
            times.append(time.perf_counter() - t0)
        peak, growth = max(peak, rss.peak), max(growth, rss.growth)
    return statistics.median(times), times, result, (peak, growth)


def mm_ceiling(n: int, reps: int) -> dict[str, Any]:
    a = torch.randn(n, n)
    b = torch.randn(n, n)
    torch.mm(a, b)  # warm-up
    med, times, _, _ = timed(lambda: torch.mm(a, b), reps)
    return {"n": n, "seconds": med, "gflops": 2 * n**3 / med / 1e9, "times": times}


def conv_gemm_ceiling(reps: int) -> dict[str, Any]:
    """The same GEMM (1024 × 1024 × 2048) as a 1×1 convolution, which runs through oneDNN rather than
    the BLAS behind torch.mm; on some CPUs the two differ a lot, so both are reported."""
    x = torch.randn(1, 1024, 32, 64)
    w = torch.randn(1024, 1024, 1, 1)
    with torch.inference_mode():
        torch.conv2d(x, w)
        med, times, _, _ = timed(lambda: torch.conv2d(x, w), reps)
    return {"shape": "1024x1024x2048", "seconds": med, "gflops": 2 * 1024 * 1024 * 2048 / med / 1e9, "times": times}


def model_macs(model: nn.Module, x: torch.Tensor) -> int:
    """MACs of one forward (torch's FLOP counter / 2: convolutions and matrix products)."""
    from torch.utils.flop_counter import FlopCounterMode

    with torch.inference_mode(), FlopCounterMode(display=False) as counter:
        model(x)
    return int(counter.get_total_flops() // 2)


# ---------------------------------------------------------------------------------------------
# models


def _random_bn(model: nn.Module, seed: int) -> nn.Module:
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for m in model.modules():
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.copy_(torch.rand(m.num_features, generator=g) - 0.5)
                m.running_var.copy_(torch.rand(m.num_features, generator=g) + 0.5)
    return model.eval()


def build_model(name: str) -> tuple[nn.Module, str]:
    """(model in eval mode, description)."""
    torch.manual_seed(0)
    if name == "tilenet":
        from pellucid.demo.net import build_tilenet

        model = build_tilenet()
        weights = REPO / "demo_models" / "tilenet" / "tilenet.safetensors"
        if weights.exists():
            from safetensors.torch import load_file

            model.load_state_dict(load_file(str(weights)))
            return model.eval(), "demo TileNet, trained weights"
        return _random_bn(model, 1), "demo TileNet architecture, random weights (trained weights not found)"
    if name == "efficientnet-lite0":
        from pellucid.core.model.bundled import bundled_spec_path
        from pellucid.core.model.loading import load_model

        return load_model(bundled_spec_path(name)).module.eval(), "bundled EfficientNet-Lite0, ImageNet weights"
    import torchvision

    seeded = {"resnet18": 2, "resnet50": 3, "mobilenet_v3_small": 4, "mobilenet_v3_large": 5}
    if name in seeded:
        model = getattr(torchvision.models, name)()
        return _random_bn(model, seeded[name]), f"torchvision {name}, random weights (seed 0, BN seed {seeded[name]})"
    if name == "vgg16":
        return torchvision.models.vgg16().eval(), "torchvision VGG-16, random weights"
    raise SystemExit(f"unknown model {name!r}; choose from tilenet, efficientnet-lite0, resnet18, resnet50, "
                     "mobilenet_v3_small, mobilenet_v3_large, vgg16")


# ---------------------------------------------------------------------------------------------
# the methods on position subsets


def naive_loop(model: nn.Module, x: torch.Tensor, base: torch.Tensor, pos: list[tuple[int, int]], patch: int):
    """What a first hand-written occlusion loop does: one copy and one forward per position."""
    outs = []
    with torch.no_grad():
        for top, left in pos:
            xo = x.clone()
            xo[:, :, top : top + patch, left : left + patch] = base[:, :, top : top + patch, left : left + patch]
            outs.append(model(xo))
    return torch.cat(outs)


def evaluate_positions(evaluate: Callable, tt: torch.Tensor, ll: torch.Tensor, batch: int) -> torch.Tensor:
    with torch.inference_mode():
        return torch.cat([evaluate(tt[i : i + batch], ll[i : i + batch]) for i in range(0, len(tt), batch)])


def tune_batched(x224: torch.Tensor, reps: int, thread_options: list[int]) -> tuple[dict[str, Any], list[dict]]:
    """Sweep threads × batch size × layout for the batched brute force on ResNet-18."""
    model, _ = build_model("resnet18")
    macs = model_macs(model, x224)
    rows = []
    with torch.inference_mode():
        for threads in thread_options:
            torch.set_num_threads(threads)
            ceiling = mm_ceiling(2048, max(3, reps))
            for batch in (8, 16, 32):
                for layout in ("contiguous", "channels_last"):
                    xb = x224.expand(batch, -1, -1, -1).clone()
                    if layout == "channels_last":
                        xb = xb.contiguous(memory_format=torch.channels_last)
                    model(xb)  # warm-up
                    med, _, _, _ = timed(lambda xb=xb: model(xb), reps)
                    gf = 2 * macs * batch / med / 1e9
                    rows.append({"threads": threads, "batch": batch, "layout": layout, "gflops": gf,
                                 "ceiling_gflops": ceiling["gflops"], "fraction": gf / ceiling["gflops"]})
    best = max(rows, key=lambda r: r["gflops"])
    return best, rows


# ---------------------------------------------------------------------------------------------
# one case


def photo_input(name: str, photo: str = "chelsea") -> tuple[torch.Tensor, str]:
    """One of scikit-image's bundled photos through the bundled model's own spec (resize, crop, mean/std)."""
    import io

    from PIL import Image
    from skimage import data

    from pellucid.core.model.bundled import bundled_spec_path
    from pellucid.core.model.loading import load_model
    from pellucid.core.model.preprocess import prepare, read_image

    buf = io.BytesIO()
    Image.fromarray(getattr(data, photo)()).convert("RGB").save(buf, format="PNG")
    spec = load_model(bundled_spec_path(name)).spec
    return prepare(spec, read_image(buf.getvalue())).tensor, f"scikit-image {photo}.png through the spec"


def bench_input(name: str, size: int, seed: int) -> tuple[torch.Tensor, str]:
    """The demo model sees a real demo tile (a tagged sound tile, resized), the bundled ImageNet
    model a real photo; random-weight models see noise."""
    if name == "efficientnet-lite0" and size == 224:
        return photo_input(name)
    tile = REPO / "demo_models" / "tilenet" / "samples" / "sound_tagged_01.png"
    if name == "tilenet" and tile.exists():
        from PIL import Image

        from pellucid.demo.net import normalise

        rgb = np.array(Image.open(tile).convert("RGB").resize((size, size), Image.BILINEAR), dtype=np.uint8)
        return normalise(torch.from_numpy(rgb)[None]), f"demo tile {tile.name}"
    return torch.randn(1, 3, size, size, generator=torch.Generator().manual_seed(seed)), "seeded noise"


def run_case(model: nn.Module, desc: str, name: str, size: int, patch: int, stride: int, *, args: argparse.Namespace,
             batch: int) -> dict[str, Any]:
    x, input_desc = bench_input(name, size, size * 31 + stride)
    base, _ = make_baseline(x, "mean", patch=patch)
    tops = occlusion_positions(size, patch, stride)
    lefts = occlusion_positions(size, patch, stride)
    nr, nc = len(tops), len(lefts)
    n = nr * nc
    macs = model_macs(model, x)
    with torch.inference_mode():
        target = int(model(x).argmax())
    case: dict[str, Any] = {"model": name, "description": desc, "input": input_desc, "size": size, "patch": patch,
                            "stride": stride, "rows": nr, "cols": nc, "n_positions": n, "macs": macs, "methods": {}}
    full_grid = args.full or n * macs <= args.full_below_gmac * 1e9
    print(f"\n== {name} {size}×{size} patch {patch} stride {stride}: {n} positions, {macs / 1e9:.3f} GMAC/forward"
          f"{' (whole grid)' if full_grid else ' (subsets, extrapolated)'}", flush=True)

    engine = IncrementalOcclusion(model, x, base, patch=patch)
    case["ideal_speedup"] = engine.ideal_speedup_for(tops, lefts)
    case["estimated_speedup"] = engine.estimated_speedup
    case["conv_macs"] = engine.conv_macs
    inc_batch = engine.default_batch(nr, nc)

    def grid_positions(rr: list[int]) -> tuple[torch.Tensor, torch.Tensor]:
        tt = torch.as_tensor(tops[rr]).repeat_interleave(nc)
        ll = torch.as_tensor(lefts).repeat(len(rr))
        return tt, ll

    # the ceiling, measured again next to this case (the machine is shared and its speed drifts)
    case["ceiling"] = mm_ceiling(2048, 3)
    ceiling = float(case["ceiling"]["gflops"])

    # position subsets: batched runs a few full batches (same cost at every position), naive a few
    # positions, incremental the first, last and evenly spaced interior rows (border rows are cheaper)
    batched_eval = _choose_engine(model, x, base, patch, "batched", batch, (nr, nc), torch.empty(0),
                                  torch.empty(0)).evaluate
    if full_grid:
        bt, bl = grid_positions(list(range(nr)))
        rows = list(range(nr))
    else:
        k = min(n, batch * args.batched_batches)
        sel = np.linspace(0, n - 1, num=k).round().astype(int)
        bt = torch.as_tensor(tops).repeat_interleave(nc)[sel]
        bl = torch.as_tensor(lefts).repeat(nr)[sel]
        interior = np.linspace(0, nr - 1, num=args.interior_rows + 2)[1:-1].round().astype(int).tolist()
        rows = sorted({0, nr - 1, *interior})
    k = min(n, args.naive_positions)
    sel = np.linspace(0, n - 1, num=k).round().astype(int)
    npos = [(int(tops[i // nc]), int(lefts[i % nc])) for i in sel]

    def run_batched() -> torch.Tensor:
        return evaluate_positions(batched_eval, bt, bl, batch)

    def run_incremental() -> tuple[dict[int, float], torch.Tensor]:
        per_row: dict[int, float] = {}
        outs = []
        eng = IncrementalOcclusion(model, x, base, patch=patch, self_check=False)
        with torch.inference_mode():
            for r in rows:
                tt, ll = grid_positions([r])
                t0 = time.perf_counter()
                for i in range(0, len(tt), inc_batch):
                    outs.append(eng.logits(tt[i : i + inc_batch], ll[i : i + inc_batch]))
                per_row[r] = time.perf_counter() - t0
        return per_row, torch.cat(outs)

    def rows_total(per_row: dict[int, float]) -> float:
        if full_grid:
            return sum(per_row.values())
        inner = [v for r, v in per_row.items() if r not in (0, nr - 1)]
        return per_row[0] + per_row[nr - 1] + statistics.mean(inner) * (nr - 2)

    t0 = time.perf_counter()
    IncrementalOcclusion(model, x, base, patch=patch)  # setup: trace, clean run, self-check
    setup = time.perf_counter() - t0
    run_batched()  # warm-ups
    naive_loop(model, x, base, npos[:1], patch)

    # interleaved repetitions: each method runs once per round, so drifting load hits all alike
    t_b: list[float] = []
    t_i: list[float] = []
    t_n: list[float] = []
    t_auto: list[float] = []
    t_a: list[float] = []
    rss = {k: [0, 0] for k in ("batched", "incremental", "naive", "auto", "approximate")}
    logits_b = logits_i = logits_n = None
    auto = approx = None
    do_approx = args.approximate and n <= args.approx_max_positions
    for _ in range(args.reps):
        with PeakRSS() as r1:
            t0 = time.perf_counter()
            logits_b = run_batched()
            t_b.append((time.perf_counter() - t0) * n / len(bt))
        with PeakRSS() as r2:
            per_row, logits_i = run_incremental()
            t_i.append(rows_total(per_row) + setup)
        with PeakRSS() as r3:
            t0 = time.perf_counter()
            logits_n = naive_loop(model, x, base, npos, patch)
            t_n.append((time.perf_counter() - t0) * n / k)
        measured = [("batched", r1), ("incremental", r2), ("naive", r3)]
        if args.auto:
            with PeakRSS() as r4:
                t0 = time.perf_counter()
                auto = occlusion_map(model, x, target=target, patch=patch, stride=stride, method="auto")
                t_auto.append(time.perf_counter() - t0)
            measured.append(("auto", r4))
        if do_approx:
            with PeakRSS() as r5:
                t0 = time.perf_counter()
                approx = occlusion_map(model, x, target=target, patch=patch, stride=stride, method="approximate")
                t_a.append(time.perf_counter() - t0)
            measured.append(("approximate", r5))
        for key, r in measured:
            rss[key] = [max(rss[key][0], r.peak), max(rss[key][1], r.growth)]
    ratio_bi = statistics.median(b / i for b, i in zip(t_b, t_i))
    ratio_nb = statistics.median(nv / b for nv, b in zip(t_n, t_b))
    scores_b = _scores(logits_b, target, "softmax")

    # correctness: naive and incremental against batched on the same positions
    nt = torch.tensor([p[0] for p in npos])
    nl = torch.tensor([p[1] for p in npos])
    diff_n = float((_scores(logits_n, target, "softmax")
                    - _scores(evaluate_positions(batched_eval, nt, nl, batch), target, "softmax")).abs().max())
    ct, cl = grid_positions(rows[:2])
    diff_i = float((_scores(logits_i[: len(ct)], target, "softmax")
                    - _scores(evaluate_positions(batched_eval, ct, cl, batch), target, "softmax")).abs().max())

    case["methods"]["batched"] = {"seconds": statistics.median(t_b), "times": t_b, "measured_positions": len(bt),
                                  "batch": batch, "peak_rss": rss["batched"][0], "rss_growth": rss["batched"][1],
                                  "extrapolated": len(bt) < n}
    case["methods"]["naive"] = {"seconds": statistics.median(t_n), "times": t_n, "measured_positions": k,
                                "peak_rss": rss["naive"][0], "rss_growth": rss["naive"][1], "extrapolated": k < n,
                                "max_abs_diff": diff_n, "ratio_to_batched_per_round": ratio_nb}
    case["methods"]["incremental"] = {"seconds": statistics.median(t_i), "times": t_i, "setup_seconds": setup,
                                      "measured_rows": rows, "measured_positions": len(rows) * nc,
                                      "peak_rss": rss["incremental"][0], "rss_growth": rss["incremental"][1],
                                      "batch": inc_batch, "extrapolated": not full_grid, "max_abs_diff": diff_i,
                                      "compared_positions": len(ct), "speedup_per_round": ratio_bi}
    ri = {int(t): i for i, t in enumerate(tops)}
    ci = {int(v): j for j, v in enumerate(lefts)}
    if auto is not None:
        got = np.array([auto.grid[ri[int(t)], ci[int(v)]] for t, v in zip(bt, bl)], dtype=np.float64)
        case["methods"]["auto"] = {
            "seconds": statistics.median(t_auto), "times": t_auto, "extrapolated": False,
            "peak_rss": rss["auto"][0], "rss_growth": rss["auto"][1], "engine": auto.engine,
            "max_abs_diff": float(np.abs(got - (auto.base_score - scores_b.numpy())).max()),
            "compared_positions": len(bt), "speedup_per_round": statistics.median(b / a for b, a in zip(t_b, t_auto)),
            "details": {k_: v for k_, v in auto.details.items() if k_ != "sampled_error"},
        }
    if approx is not None and auto is not None:
        from scipy.stats import spearmanr

        err = compare_to_exact(approx, model, x, exact=auto)
        ex_g, ap_g = auto.grid.astype(np.float64), approx.grid.astype(np.float64)
        kk = max(1, round(0.1 * ex_g.size))
        top_overlap = len(set(np.argsort(-ex_g, axis=None)[:kk]) & set(np.argsort(-ap_g, axis=None)[:kk])) / kk
        case["methods"]["approximate"] = {
            "seconds": statistics.median(t_a), "times": t_a, "peak_rss": rss["approximate"][0],
            "rss_growth": rss["approximate"][1], "extrapolated": False, "max_abs_diff": err["grid_max_abs"],
            "mean_abs_diff": err["grid_mean_abs"], "evaluated_fraction": err["evaluated_fraction"],
            "spearman": float(spearmanr(ap_g.ravel(), ex_g.ravel()).statistic), "top10_overlap": top_overlap,
            "sampled_error": approx.details.get("sampled_error"), "exact_engine": approx.details.get("exact_engine"),
            "speedup_over_auto_per_round": statistics.median(e_ / a_ for e_, a_ in zip(t_auto, t_a)),
            "speedup_per_round": statistics.median(b / a_ for b, a_ in zip(t_b, t_a)),
        }
    for meth in case["methods"]:
        print(f"{meth:12s} {case['methods'][meth]['seconds']:9.2f} s", flush=True)
    print(f"incremental vs batched per round (median): {ratio_bi:.2f}×; max|diff| {diff_i:.1e}", flush=True)

    sec_n = case["methods"]["naive"]["seconds"]
    sec_b = case["methods"]["batched"]["seconds"]
    for m in case["methods"].values():
        m["vs_naive"] = sec_n / m["seconds"]
        m["vs_batched"] = sec_b / m["seconds"]
        m["equiv_gflops"] = 2 * macs * n / m["seconds"] / 1e9
        m["ceiling_fraction"] = m["equiv_gflops"] / ceiling
    # ratios measured within one round are steadier than ratios of medians on a drifting machine
    for meth in ("incremental", "auto", "approximate"):
        if meth in case["methods"]:
            case["methods"][meth]["vs_batched"] = case["methods"][meth]["speedup_per_round"]
    return case


# ---------------------------------------------------------------------------------------------
# report


def markdown(report: dict[str, Any]) -> str:
    m = report["machine"]
    lines = [
        (f"Machine: {m['cpu']} · {m['cores']} cores · torch {m['torch']} · {m['threads']} intra-op thread(s) · "
         f"load average {m['load_start']} at start, {m['load_end']} at end."),
        (f"Ceiling: torch.mm {report['ceiling']['n']}² fp32 = **{report['ceiling']['gflops']:.1f} GFLOP/s** "
         f"(median of {len(report['ceiling']['times'])}); the same-size GEMM as a 1×1 convolution (oneDNN): "
         f"{report['conv_gemm_ceiling']['gflops']:.1f} GFLOP/s. Each case re-measures torch.mm next to it "
         "and its '% ceiling' uses that value."),
        "",
        "Batched brute-force tuning on ResNet-18 (224×224, GFLOP/s = 2 × MACs × images / s):",
        "",
        "| threads | batch | layout | GFLOP/s | mm ceiling at these threads | fraction |",
        "|---:|---:|---|---:|---:|---:|",
    ]
    for r in report["tuning"]:
        lines.append(f"| {r['threads']} | {r['batch']} | {r['layout']} | {r['gflops']:.1f} | "
                     f"{r['ceiling_gflops']:.1f} | {r['fraction']:.0%} |")
    b = report["tuned"]
    lines += ["", f"Used for the run: {b['threads']} thread(s), batch {b['batch']}, {b['layout']}.", "",
              ("| model | stride | positions | method | seconds | × naive | × batched | ideal × | "
               "equiv. GFLOP/s | % ceiling | max abs diff | peak RSS MB (growth) | how measured |"),
              "|---|---:|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|---|"]
    for c in report["cases"]:
        for meth in ("naive", "batched", "incremental", "auto", "approximate"):
            r = c["methods"].get(meth)
            if r is None:
                continue
            if meth == "approximate":
                how = (f"whole grid, {len(r['times'])} run(s); {r['evaluated_fraction']:.0%} of positions evaluated, "
                       f"Spearman {r['spearman']:.3f} and top-10% overlap {r['top10_overlap']:.0%} against the exact "
                       f"'auto' grid; {r['speedup_over_auto_per_round']:.2f}× faster than 'auto' per round")
            elif meth == "auto":
                race = r["details"].get("race_ms_per_position")
                how = (f"occlusion_map(method='auto') on the whole grid, {len(r['times'])} run(s), setup, self-check "
                       f"and race included; ran {r['engine']}")
                if race:
                    how += (f" (race: incremental {race['incremental']:.1f} ms, batched {race['batched']:.1f} ms per "
                            "position)")
                elif r["details"].get("incremental_skipped"):
                    how += f" ({r['details']['incremental_skipped']})"
                how += f"; diff at {r['compared_positions']} batched positions"
            elif r["extrapolated"]:
                how = f"{r['measured_positions']} of {c['n_positions']} positions, extrapolated"
                if meth == "incremental":
                    how = (f"rows {r['measured_rows']} of {c['rows']}, extrapolated; incl. {r['setup_seconds']:.2f} s "
                           "setup; diff on 2 rows")
            else:
                how = f"whole grid, {len(r['times'])} run(s)"
            if meth in ("incremental", "auto", "approximate"):
                how += f"; per-round speedup over batched {r['speedup_per_round']:.2f}×"
            how += f"; ceiling {c['ceiling']['gflops']:.1f}"
            ideal = f"{c['ideal_speedup']:.2f}" if meth in ("incremental", "auto") else ""
            diff = "reference" if meth == "batched" else f"{r['max_abs_diff']:.1e}"
            lines.append(
                f"| {c['model']} {c['size']}² | {c['stride']} | {c['n_positions']} | {meth} | {r['seconds']:.2f} | "
                f"{r['vs_naive']:.1f} | {r['vs_batched']:.2f} | {ideal} | {r['equiv_gflops']:.1f} | "
                f"{r['ceiling_fraction']:.0%} | {diff} | {r['peak_rss'] / 2**20:.0f} "
                f"(+{r['rss_growth'] / 2**20:.0f}) | {how} |")
    lines += ["", "Summary (speedups over batched are medians of per-round ratios):", "",
              ("| model | stride | ideal × | incremental × | auto × (engine) | approximate × batched | × exact auto | "
               "evaluated | Spearman | top-10% overlap | sampled error (max abs, n) |"),
              "|---|---:|---:|---:|---|---:|---:|---:|---:|---:|---|"]
    for c in report["cases"]:
        m = c["methods"]
        au, ap = m.get("auto"), m.get("approximate")
        cells = [f"{c['model']} {c['size']}²", str(c["stride"]), f"{c['ideal_speedup']:.2f}",
                 f"{m['incremental']['speedup_per_round']:.2f}",
                 f"{au['speedup_per_round']:.2f} ({au['engine']})" if au else ""]
        if ap:
            se = ap.get("sampled_error") or {}
            cells += [f"{ap['speedup_per_round']:.2f}", f"{ap['speedup_over_auto_per_round']:.2f}",
                      f"{ap['evaluated_fraction']:.0%}", f"{ap['spearman']:.3f}", f"{ap['top10_overlap']:.0%}",
                      f"{se.get('max_abs', 0):.1e}, {se.get('positions', 0)}" if se.get("positions") else "none"]
        else:
            cells += [""] * 6
        lines.append("| " + " | ".join(cells) + " |")
    lines += ["", "Models and inputs:", ""]
    seen = set()
    for c in report["cases"]:
        if (c["model"], c["size"]) not in seen:
            seen.add((c["model"], c["size"]))
            lines.append(f"- {c['model']} {c['size']}²: {c['description']}; input {c['input']}; "
                         f"{c['macs'] / 1e9:.3f} GMAC per forward (torch FLOP counter / 2).")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m bench.occlusion_bench",
                                description="Time occlusion engines against a naive loop and the mm ceiling.")
    p.add_argument("--models", nargs="+",
                   default=["tilenet", "efficientnet-lite0", "mobilenet_v3_small", "mobilenet_v3_large", "resnet50"],
                   help="also: resnet18, vgg16")
    p.add_argument("--size", type=int, default=224)
    p.add_argument("--patch", type=int, default=16)
    p.add_argument("--strides", nargs="+", type=int, default=[8])
    p.add_argument("--reps", type=int, default=3, help="repetitions per timing (median reported)")
    p.add_argument("--threads", nargs="+", type=int, default=None,
                   help="intra-op thread counts to try in the tuning sweep (default: 1 and all cores)")
    p.add_argument("--batch", type=int, default=None, help="batched batch size (default: the sweep's best)")
    p.add_argument("--naive-positions", type=int, default=8)
    p.add_argument("--batched-batches", type=int, default=4, help="batches timed when not running the whole grid")
    p.add_argument("--interior-rows", type=int, default=2, help="interior rows timed for incremental")
    p.add_argument("--full", action="store_true", help="time every method on the whole grid (slow)")
    p.add_argument("--no-auto", dest="auto", action="store_false",
                   help="skip the whole-grid occlusion_map(method='auto') run in each round")
    p.add_argument("--no-approximate", dest="approximate", action="store_false",
                   help="skip the whole-grid approximate run in each round")
    p.add_argument("--full-below-gmac", type=float, default=60.0,
                   help="run the whole grid when positions × MACs is below this many GMAC")
    p.add_argument("--approx-max-positions", type=int, default=1000,
                   help="grids up to this size also run incremental (once) and approximate on the whole grid")
    p.add_argument("--no-demo-native", dest="demo_native", action="store_false",
                   help="skip the demo model at its own 96×96 input size")
    p.add_argument("--out", type=Path, default=REPO / "bench" / "results")
    args = p.parse_args(argv)

    cores = os.cpu_count() or 1
    load_start = " ".join(f"{v:.1f}" for v in os.getloadavg())
    thread_options = args.threads or sorted({1, cores})
    x224 = torch.randn(1, 3, 224, 224, generator=torch.Generator().manual_seed(0))
    print(f"tuning the batched brute force on ResNet-18 (threads {thread_options}) …", flush=True)
    best, tuning = tune_batched(x224, args.reps, thread_options)
    torch.set_num_threads(best["threads"])
    print(f"best: {best}", flush=True)
    ceiling = mm_ceiling(2048, max(5, args.reps))
    conv_ceiling = conv_gemm_ceiling(max(5, args.reps))
    print(f"mm ceiling {ceiling['gflops']:.1f} GFLOP/s, same GEMM as 1×1 conv {conv_ceiling['gflops']:.1f} GFLOP/s "
          f"at {best['threads']} thread(s)", flush=True)

    cases = []
    for name in args.models:
        model, desc = build_model(name)
        sizes = [args.size] + ([96] if name == "tilenet" and args.size != 96 and args.demo_native else [])
        for size in sizes:
            for stride in args.strides:
                cases.append(run_case(model, desc, name, size, args.patch, stride, args=args,
                                      batch=args.batch or best["batch"]))
        del model
    report = {
        "command": "python -m bench.occlusion_bench " + " ".join(argv if argv is not None else sys.argv[1:]),
        "machine": {"cpu": platform.processor() or platform.machine(), "cores": cores, "torch": torch.__version__,
                    "threads": torch.get_num_threads(), "load_start": load_start,
                    "load_end": " ".join(f"{v:.1f}" for v in os.getloadavg())},
        "ceiling": ceiling, "conv_gemm_ceiling": conv_ceiling, "tuning": tuning, "tuned": best, "cases": cases,
    }
    try:
        with open("/proc/cpuinfo") as f:
            names = [ln.split(":", 1)[1].strip() for ln in f if ln.startswith("model name")]
        if names:
            report["machine"]["cpu"] = names[0]
    except OSError:
        pass
    args.out.mkdir(parents=True, exist_ok=True)
    (args.out / "occlusion_bench.json").write_text(json.dumps(report, indent=2, default=float))
    md = markdown(report)
    (args.out / "occlusion_bench.md").write_text(md)
    print("\n" + md)
    print(f"wrote {args.out / 'occlusion_bench.json'} and {args.out / 'occlusion_bench.md'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
