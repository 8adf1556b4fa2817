"""Bounded load on loopback: the real server under concurrent clients, latencies and memory.

Starts ``pellucid serve`` (uvicorn) in a subprocess on 127.0.0.1 and a free port with the demo
model, uploads a small pool of images, then runs ``clients`` threads of ``requests`` requests each,
mixing top-k, activation grids, kernel grids and small occlusion jobs (started, then polled to the
end; one job counts as one request, its latency is the time until it is done). Records p50/p95 per
kind, every 5xx, and the server's resident memory (VmRSS) after the first 50 requests and after
all of them. Bounded: a deadline for the whole run, a timeout on every HTTP call, the server is
killed in a ``finally``.

    PYTHONPATH=. .venv/bin/python -m bench.load_bench --clients 20 --requests 50
"""

from __future__ import annotations

import argparse
import io
import os
import random
import socket
import statistics
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import httpx
import numpy as np

REPO = Path(__file__).resolve().parents[1]
DEMO_SPEC = REPO / "demo_models" / "tilenet" / "spec.toml"
RESULTS = REPO / "bench" / "results" / "load.md"
KINDS = ("predict", "activations", "kernels", "occlusion")
WEIGHTS = (0.4, 0.25, 0.15, 0.2)
OCCLUSION_PARAMS = ({"patch": 24, "stride": 24}, {"patch": 32, "stride": 16}, {"patch": 16, "stride": 16})
# The engine the dashboard uses by default: "auto" picks the incremental engine where it pays,
# whose torch.fx trace must not disturb forward passes of concurrent requests (core/_fx_trace.py).
DEFAULT_ENGINE = "auto"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def rss_kib(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise RuntimeError(f"no VmRSS for process {pid}")


@dataclass
class Server:
    proc: subprocess.Popen
    base: str
    log: Path

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(timeout=30)


def start_server(spec: Path, workdir: Path, *, start_timeout: float = 90.0) -> Server:
    port = free_port()
    log = workdir / "server.log"
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    with open(log, "wb") as fh:
        proc = subprocess.Popen(
            [sys.executable, "-m", "pellucid.cli", "serve", "--model", str(spec), "--port", str(port),
             "--data", str(workdir / "data")],
            cwd=REPO, env=env, stdout=fh, stderr=subprocess.STDOUT,
        )
    server = Server(proc=proc, base=f"http://127.0.0.1:{port}", log=log)
    deadline = time.time() + start_timeout
    while True:
        if proc.poll() is not None:
            raise RuntimeError(f"the server exited with {proc.returncode}: {log.read_text()[-2000:]}")
        try:
            if httpx.get(server.base + "/api/status", timeout=2.0).status_code == 200:
                return server
        except httpx.HTTPError:
            pass
        if time.time() > deadline:
            server.stop()
            raise RuntimeError(f"the server did not answer within {start_timeout:.0f} s")
        time.sleep(0.2)


def _image_pool(spec: Path, n: int) -> list[tuple[str, bytes]]:
    """Demo samples first, then re-coloured variants of them, as PNG bytes."""
    from PIL import Image

    files = sorted((spec.parent / "samples").glob("*.png"))
    pool = [(p.name, p.read_bytes()) for p in files]
    rng = np.random.default_rng(0)
    i = 0
    while len(pool) < n and files:
        base = np.asarray(Image.open(files[i % len(files)]).convert("RGB"), dtype=np.int16)
        shifted = np.clip(base + rng.integers(-12, 12, size=3), 0, 255).astype(np.uint8)
        buf = io.BytesIO()
        Image.fromarray(shifted).save(buf, "PNG")
        pool.append((f"variant-{i}.png", buf.getvalue()))
        i += 1
    return pool[:n]


@dataclass
class Tally:
    latencies: dict[str, list[float]] = field(default_factory=lambda: {k: [] for k in KINDS})
    statuses: dict[int, int] = field(default_factory=dict)
    server_errors: list[str] = field(default_factory=list)
    failures: list[str] = field(default_factory=list)
    done: int = 0
    lock: threading.Lock = field(default_factory=threading.Lock)

    def http(self, r: httpx.Response) -> httpx.Response:
        with self.lock:
            self.statuses[r.status_code] = self.statuses.get(r.status_code, 0) + 1
            if r.status_code >= 500:
                self.server_errors.append(f"{r.request.method} {r.request.url.path} → {r.status_code}: {r.text[:200]}")
        return r


def _one(client: httpx.Client, kind: str, rng: random.Random, images: list[str], layer: str, model: str,
         tally: Tally, deadline: float, engine: str) -> None:
    image = rng.choice(images)
    if kind == "predict":
        r = tally.http(client.post("/api/predict", json={"image": image, "k": 4}))
    elif kind == "activations":
        r = tally.http(client.post("/api/activations", json={"image": image, "layer": layer,
                                                              "sort": rng.choice(["index", "mean", "max"])}))
    elif kind == "kernels":
        r = tally.http(client.get(f"/api/models/{model}/kernels"))
    else:
        r = tally.http(client.post("/api/jobs", json={"image": image, "method": "occlusion",
                                                       "params": {**rng.choice(OCCLUSION_PARAMS), "engine": engine}}))
        if r.status_code == 202:
            job = r.json()["id"]
            while True:
                r = tally.http(client.get(f"/api/jobs/{job}"))
                state = r.json()["state"] if r.status_code == 200 else "http-error"
                if state in ("done", "failed", "cancelled", "http-error"):
                    break
                if time.time() > deadline:
                    raise TimeoutError(f"job {job} still {state} at the deadline")
                time.sleep(0.05)
            if state != "done":
                raise RuntimeError(f"occlusion job ended {state}: {r.text[:200]}")
            r = tally.http(client.get(f"/api/results/{r.json()['result_id']}"))
    if r.status_code != 200:
        raise RuntimeError(f"{kind} answered {r.status_code}: {r.text[:200]}")


def run_load(*, clients: int = 20, requests: int = 50, spec: Path = DEMO_SPEC, workdir: Path,
             images: int = 16, time_limit: float = 300.0, early: int = 50, seed: int = 0,
             engine: str = DEFAULT_ENGINE) -> dict:
    """Run the load and return the figures (see the module docstring)."""
    workdir.mkdir(parents=True, exist_ok=True)
    server = start_server(spec, workdir)
    try:
        with httpx.Client(base_url=server.base, timeout=30.0) as c:
            model = c.get("/api/models").json()["default"]
            layer = c.get(f"/api/models/{model}/layers").json()["default_feature_layer"]
            ids = []
            for name, data in _image_pool(spec, images):
                r = c.post("/api/images", files={"file": (name, data, "image/png")})
                r.raise_for_status()
                ids.append(r.json()["id"])
        rss_start = rss_kib(server.proc.pid)
        tally = Tally()
        marks: dict[str, int] = {}
        total = clients * requests
        deadline = time.time() + time_limit

        def worker(k: int) -> None:
            rng = random.Random(seed * 1000 + k)
            with httpx.Client(base_url=server.base, timeout=30.0) as client:
                for _ in range(requests):
                    if time.time() > deadline:
                        with tally.lock:
                            tally.failures.append(f"client {k} stopped at the deadline")
                        return
                    kind = rng.choices(KINDS, WEIGHTS)[0]
                    t0 = time.perf_counter()
                    try:
                        _one(client, kind, rng, ids, layer, model, tally, deadline, engine)
                    except Exception as exc:  # noqa: BLE001 - every failure is counted and reported
                        with tally.lock:
                            tally.failures.append(f"{kind}: {type(exc).__name__}: {exc}")
                    with tally.lock:
                        tally.latencies[kind].append(time.perf_counter() - t0)
                        tally.done += 1
                        if tally.done == early:
                            marks["early"] = rss_kib(server.proc.pid)
                        if tally.done == 500 and total > 500:
                            marks["500"] = rss_kib(server.proc.pid)

        t_start = time.perf_counter()
        threads = [threading.Thread(target=worker, args=(k,), daemon=True) for k in range(clients)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=max(1.0, deadline - time.time() + 35))
        wall = time.perf_counter() - t_start
        rss_end = rss_kib(server.proc.pid)
        status = httpx.get(server.base + "/api/status", timeout=10).json()
    finally:
        server.stop()

    def pct(values: list[float], q: float) -> float | None:
        if not values:
            return None
        ordered = sorted(values)
        return ordered[min(len(ordered) - 1, round(q * (len(ordered) - 1)))]

    every = [v for vs in tally.latencies.values() for v in vs]
    rss_early = marks.get("early", rss_start)
    return {
        "clients": clients, "requests_per_client": requests, "requests_planned": total,
        "requests_done": tally.done, "wall_seconds": wall, "throughput_rps": tally.done / wall if wall else 0.0,
        "statuses": dict(sorted(tally.statuses.items())), "server_errors": tally.server_errors,
        "failures": tally.failures,
        "latency": {kind: {"n": len(v), "p50": pct(v, 0.5), "p95": pct(v, 0.95),
                           "mean": statistics.fmean(v) if v else None}
                    for kind, v in {**tally.latencies, "all": every}.items()},
        "rss_kib": {"after_setup": rss_start, f"after_{early}": rss_early,
                    **({"after_500": marks["500"]} if "500" in marks else {}), f"after_{tally.done}": rss_end},
        "rss_growth": (rss_end - rss_early) / rss_early,
        "cached_results_at_end": status["cached_results"],
        "spec": str(spec.relative_to(REPO) if spec.is_relative_to(REPO) else spec),
        "engine": engine,
    }


def to_markdown(fig: dict, *, command: str) -> str:
    def ms(v: float | None) -> str:
        return "–" if v is None else f"{1000 * v:.0f}"

    rss = list(fig["rss_kib"].items())
    lines = [
        "# Bounded load on loopback",
        "",
        f"Command: `{command}`  ",
        (f"Model: `{fig['spec']}`; {fig['clients']} concurrent clients × {fig['requests_per_client']} requests "
        f"({fig['requests_done']} done of {fig['requests_planned']}) in {fig['wall_seconds']:.1f} s "
        f"({fig['throughput_rps']:.1f} requests/s) on {os.cpu_count()} CPU cores, shared with other work."),
        (f"An occlusion request is one job (engine {fig['engine']!r}): start, poll until done, fetch the result; "
        "its latency is all of that."),
        "",
        "| request | n | p50 ms | p95 ms | mean ms |",
        "|---|---:|---:|---:|---:|",
    ]
    for kind, row in fig["latency"].items():
        lines.append(f"| {kind} | {row['n']} | {ms(row['p50'])} | {ms(row['p95'])} | {ms(row['mean'])} |")
    for failure in fig["server_errors"][:5] + fig["failures"][:5]:
        lines.append(f"\n- {failure[:300]}")
    lines += [
        "",
        f"HTTP statuses: {fig['statuses']}; 5xx: {len(fig['server_errors'])}; failed requests: {len(fig['failures'])}.",
        "",
        "Server resident memory (VmRSS): " + ", ".join(f"{k.replace('_', ' ')} {v / 1024:.1f} MiB" for k, v in rss)
        + f"; growth from the first mark after setup traffic to the end: {100 * fig['rss_growth']:+.1f} %.",
        f"Cached results at the end: {fig['cached_results_at_end']} (the cache is bounded).",
        "",
    ]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--clients", type=int, default=20)
    parser.add_argument("--requests", type=int, default=50, help="requests per client")
    parser.add_argument("--time-limit", type=float, default=300.0)
    parser.add_argument("--out", type=Path, default=RESULTS)
    parser.add_argument("--workdir", type=Path, default=None)
    parser.add_argument("--engine", default=DEFAULT_ENGINE, help="occlusion engine of the jobs (default auto)")
    args = parser.parse_args(argv)
    import tempfile

    with tempfile.TemporaryDirectory(prefix="pellucid-load-") as tmp:
        fig = run_load(clients=args.clients, requests=args.requests, time_limit=args.time_limit,
                       workdir=args.workdir or Path(tmp), engine=args.engine)
    command = (f"PYTHONPATH=. .venv/bin/python -m bench.load_bench --clients {args.clients} "
               f"--requests {args.requests} --engine {args.engine}")
    text = to_markdown(fig, command=command)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(text, encoding="utf-8")
    print(text)
    return 0 if not fig["server_errors"] and not fig["failures"] else 1


if __name__ == "__main__":
    sys.exit(main())
