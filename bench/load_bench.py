"""Bounded load on loopback: the real server under concurrent clients, latencies and memory.

Starts ``pellucid serve`` (uvicorn) in a subprocess on 127.0.0.1 and a free port with the demo
model, uploads a small pool of images, then runs ``clients`` threads of ``requests`` requests each,
mixing page GETs, top-k, activation grids, kernel grids, saliency maps and small occlusion jobs (a
job is started, then polled to the end; it counts as one request, its latency is the time until
its result is fetched). Records p50/p95 per kind, every 5xx, every 429 (a full queue or a client
over its share: the client waits ``Retry-After`` and tries again, as a polite client does), and the
server's resident memory (VmRSS) after the first 50 requests and after all of them. Bounded: a
deadline for the whole run, a timeout on every HTTP call, the server is killed in a ``finally``.

Saliency maps are computed cold: each one is of a freshly uploaded variant of an image (the upload
is not timed), so the result cache never answers them.

``--audit`` runs the same interactive mix on one server idle (half the requests before the audit,
half after it) and while a folder audit of demo tiles runs in the background (started through the
API once it explains images, cancelled at the end), and reports each kind's p95 in both and their
ratio (issue 11's target: a saliency map's p95 under 2× its idle value while an audit runs).

    PYTHONPATH=. .venv/bin/python -m bench.load_bench --clients 20 --requests 50
    PYTHONPATH=. .venv/bin/python -m bench.load_bench --audit --clients 4 --requests 60
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
RESULTS_AUDIT = REPO / "bench" / "results" / "load_audit.md"
KINDS = ("page", "predict", "activations", "kernels", "saliency", "occlusion")
WEIGHTS = (0.15, 0.3, 0.15, 0.1, 0.1, 0.2)
# The interactive mix measured with and without an audit: no occlusion, whose seconds-long jobs
# would dominate what "interactive" means here.
AUDIT_MIX = {"page": 0.2, "predict": 0.3, "activations": 0.1, "kernels": 0.1, "saliency": 0.3}
PAGES = ("/", "/image", "/model", "/compare", "/audits")
OCCLUSION_PARAMS = ({"patch": 24, "stride": 24}, {"patch": 32, "stride": 16}, {"patch": 16, "stride": 16})
# The engine the dashboard uses by default: "auto" picks the incremental engine where it pays,
# whose torch.fx trace must not disturb forward passes of concurrent requests (core/_fx_trace.py).
DEFAULT_ENGINE = "auto"
# The background audit: enough demo tiles and work per tile to outlast the measured window.
# 50 tiles per class is the most the page generates inside a request; stride 4 (441 positions per
# 96-px tile) keeps the audit busy for the whole measured phase even so.
AUDIT_BODY = {"source": {"kind": "demo", "split": "clean", "per_class": 50, "seed": 11}, "method": "occlusion",
              "params": {"patch": 16, "stride": 4}}
MAX_BUSY_WAIT = 30.0  # a client retries a 429 for at most this long


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
             "--store", str(workdir / "store")],
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


def _fresh_variant(pool: list[tuple[str, bytes]], rng: random.Random) -> tuple[str, bytes]:
    """A never-seen variant of a pool image (noise on every pixel): its sha256, and so its maps, are new."""
    from PIL import Image

    name, data = rng.choice(pool)
    base = np.asarray(Image.open(io.BytesIO(data)).convert("RGB"), dtype=np.int16)
    noise = np.random.default_rng(rng.getrandbits(32)).integers(-3, 4, size=base.shape)
    buf = io.BytesIO()
    Image.fromarray(np.clip(base + noise, 0, 255).astype(np.uint8)).save(buf, "PNG")
    return f"fresh-{name}", buf.getvalue()


@dataclass
class Tally:
    kinds: tuple[str, ...] = KINDS
    latencies: dict[str, list[float]] = field(default_factory=dict)
    statuses: dict[int, int] = field(default_factory=dict)
    server_errors: list[str] = field(default_factory=list)
    failures: list[str] = field(default_factory=list)
    busy_waits: list[float] = field(default_factory=list)
    done: int = 0
    lock: threading.Lock = field(default_factory=threading.Lock)

    def __post_init__(self) -> None:
        self.latencies = {k: [] for k in self.kinds}

    def merge(self, other: Tally) -> None:
        for kind, values in other.latencies.items():
            self.latencies.setdefault(kind, []).extend(values)
        for code, n in other.statuses.items():
            self.statuses[code] = self.statuses.get(code, 0) + n
        self.server_errors += other.server_errors
        self.failures += other.failures
        self.busy_waits += other.busy_waits
        self.done += other.done

    def http(self, r: httpx.Response) -> httpx.Response:
        with self.lock:
            self.statuses[r.status_code] = self.statuses.get(r.status_code, 0) + 1
            if r.status_code >= 500:
                self.server_errors.append(f"{r.request.method} {r.request.url.path} → {r.status_code}: {r.text[:200]}")
        return r


def _send(client: httpx.Client, tally: Tally, method: str, url: str, **kw) -> httpx.Response:
    """One request; on 429 wait Retry-After and try again (bounded), counting the waits."""
    waited = 0.0
    while True:
        r = tally.http(client.request(method, url, **kw))
        if r.status_code != 429 or waited >= MAX_BUSY_WAIT:
            return r
        pause = min(float(r.headers.get("retry-after", "1")), MAX_BUSY_WAIT - waited)
        with tally.lock:
            tally.busy_waits.append(pause)
        time.sleep(pause)
        waited += pause


def _job(client: httpx.Client, tally: Tally, body: dict, deadline: float, poll: float) -> httpx.Response:
    r = _send(client, tally, "POST", "/api/jobs", json=body)
    if r.status_code != 202:
        return r
    job = r.json()["id"]
    while True:
        r = tally.http(client.get(f"/api/jobs/{job}"))
        state = r.json()["state"] if r.status_code == 200 else "http-error"
        if state in ("done", "failed", "cancelled", "http-error"):
            break
        if time.time() > deadline:
            raise TimeoutError(f"job {job} still {state} at the deadline")
        time.sleep(poll)
    if state != "done":
        raise RuntimeError(f"{body['method']} job ended {state}: {r.text[:200]}")
    return tally.http(client.get(f"/api/results/{r.json()['result_id']}"))


def _one(client: httpx.Client, kind: str, rng: random.Random, images: list[str], pool: list[tuple[str, bytes]],
         layer: str, model: str, tally: Tally, deadline: float, engine: str) -> float:
    """Run one request of ``kind``; returns its latency in seconds (a saliency map's upload not counted)."""
    image = rng.choice(images)
    t0 = time.perf_counter()
    if kind == "page":
        r = tally.http(client.get(rng.choice(PAGES)))
    elif kind == "predict":
        r = _send(client, tally, "POST", "/api/predict", json={"image": image, "k": 4})
    elif kind == "activations":
        r = _send(client, tally, "POST", "/api/activations",
                  json={"image": image, "layer": layer, "sort": rng.choice(["index", "mean", "max"])})
    elif kind == "kernels":
        r = tally.http(client.get(f"/api/models/{model}/kernels"))
    elif kind == "saliency":
        name, data = _fresh_variant(pool, rng)
        up = _send(client, tally, "POST", "/api/images", files={"file": (name, data, "image/png")})
        if up.status_code != 200:
            raise RuntimeError(f"upload answered {up.status_code}: {up.text[:200]}")
        t0 = time.perf_counter()
        r = _job(client, tally, {"image": up.json()["id"], "method": "saliency"}, deadline, poll=0.005)
    else:
        r = _job(client, tally, {"image": image, "method": "occlusion",
                                 "params": {**rng.choice(OCCLUSION_PARAMS), "engine": engine}}, deadline, poll=0.05)
    elapsed = time.perf_counter() - t0
    if r.status_code != 200:
        raise RuntimeError(f"{kind} answered {r.status_code}: {r.text[:200]}")
    return elapsed


def _pct(values: list[float], q: float) -> float | None:
    if not values:
        return None
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, round(q * (len(ordered) - 1)))]


def _drive(server: Server, *, clients: int, requests: int, mix: dict[str, float], ids: list[str],
           pool: list[tuple[str, bytes]], layer: str, model: str, time_limit: float, seed: int, engine: str,
           early: int = 50, think: float = 0.0) -> tuple[Tally, dict[str, int], float]:
    """``clients`` threads × ``requests`` requests drawn from ``mix``, each client pausing a random
    0…2·``think`` seconds between requests; returns the tally, RSS marks, wall time."""
    kinds, weights = tuple(mix), tuple(mix.values())
    tally = Tally(kinds=kinds)
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
                kind = rng.choices(kinds, weights)[0]
                if think > 0:
                    time.sleep(rng.uniform(0.0, 2.0 * think))
                t0 = time.perf_counter()
                try:
                    latency = _one(client, kind, rng, ids, pool, layer, model, tally, deadline, engine)
                except Exception as exc:  # noqa: BLE001 - every failure is counted and reported
                    latency = time.perf_counter() - t0
                    with tally.lock:
                        tally.failures.append(f"{kind}: {type(exc).__name__}: {exc}")
                with tally.lock:
                    tally.latencies[kind].append(latency)
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
    return tally, marks, time.perf_counter() - t_start


def _setup(server: Server, spec: Path, images: int) -> tuple[str, str, list[str], list[tuple[str, bytes]]]:
    pool = _image_pool(spec, images)
    with httpx.Client(base_url=server.base, timeout=60.0) as c:
        model = c.get("/api/models").json()["default"]
        layer = c.get(f"/api/models/{model}/layers").json()["default_feature_layer"]
        ids = []
        for name, data in pool:
            r = c.post("/api/images", files={"file": (name, data, "image/png")})
            r.raise_for_status()
            ids.append(r.json()["id"])
    return model, layer, ids, pool


def _latency_table(tally: Tally) -> dict[str, dict]:
    every = [v for vs in tally.latencies.values() for v in vs]
    return {kind: {"n": len(v), "p50": _pct(v, 0.5), "p95": _pct(v, 0.95), "mean": statistics.fmean(v) if v else None}
            for kind, v in {**tally.latencies, "all": every}.items()}


def run_load(*, clients: int = 20, requests: int = 50, spec: Path = DEMO_SPEC, workdir: Path,
             images: int = 16, time_limit: float = 300.0, early: int = 50, seed: int = 0,
             engine: str = DEFAULT_ENGINE) -> dict:
    """Run the mixed load and return the figures (see the module docstring)."""
    workdir.mkdir(parents=True, exist_ok=True)
    server = start_server(spec, workdir)
    try:
        model, layer, ids, pool = _setup(server, spec, images)
        rss_start = rss_kib(server.proc.pid)
        tally, marks, wall = _drive(server, clients=clients, requests=requests, mix=dict(zip(KINDS, WEIGHTS)),
                                    ids=ids, pool=pool, layer=layer, model=model, time_limit=time_limit, seed=seed,
                                    engine=engine, early=early)
        rss_end = rss_kib(server.proc.pid)
        status = httpx.get(server.base + "/api/status", timeout=10).json()
    finally:
        server.stop()
    rss_early = marks.get("early", rss_start)
    return {
        "clients": clients, "requests_per_client": requests, "requests_planned": clients * requests,
        "requests_done": tally.done, "wall_seconds": wall, "throughput_rps": tally.done / wall if wall else 0.0,
        "statuses": dict(sorted(tally.statuses.items())), "server_errors": tally.server_errors,
        "failures": tally.failures, "busy_waits": len(tally.busy_waits),
        "latency": _latency_table(tally),
        "rss_kib": {"after_setup": rss_start, f"after_{early}": rss_early,
                    **({"after_500": marks["500"]} if "500" in marks else {}), f"after_{tally.done}": rss_end},
        "rss_growth": (rss_end - rss_early) / rss_early,
        "cached_results_at_end": status["cached_results"],
        "spec": str(spec.relative_to(REPO) if spec.is_relative_to(REPO) else spec),
        "engine": engine,
    }


def _start_audit(c: httpx.Client, deadline: float) -> str:
    # Starting reads (and, the first time, generates) every tile to refuse bad input before a job
    # exists: allow it minutes on a loaded machine, and one retry of a dropped connection.
    try:
        r = c.post("/api/audits", json=AUDIT_BODY, timeout=600.0)
    except httpx.TransportError:
        r = c.post("/api/audits", json=AUDIT_BODY, timeout=600.0)
    r.raise_for_status()
    job = r.json()["id"]
    while True:  # measure only while the audit explains images, its long phase
        s = c.get(f"/api/audits/jobs/{job}").json()
        if s["phase"] == "images" and s["done"] > 0:
            return job
        if s["state"] in ("done", "failed", "cancelled") or time.time() > deadline:
            raise RuntimeError(f"the background audit did not reach its images: {s}")
        time.sleep(0.1)


def run_with_audit(*, clients: int = 4, requests: int = 60, spec: Path = DEMO_SPEC, workdir: Path,
                   images: int = 16, time_limit: float = 300.0, seed: int = 0, think: float = 0.25) -> dict:
    """The interactive mix idle, then while an audit runs, on one server (see the module docstring)."""
    workdir.mkdir(parents=True, exist_ok=True)
    server = start_server(spec, workdir)
    try:
        model, layer, ids, pool = _setup(server, spec, images)
        common = {"clients": clients, "requests": requests, "mix": AUDIT_MIX, "ids": ids, "pool": pool,
                  "layer": layer, "model": model, "time_limit": time_limit, "engine": DEFAULT_ENGINE, "think": think}
        # A short warm-up (first forwards, first pages) so that neither phase pays it.
        _drive(server, **{**common, "requests": 5}, seed=seed + 99)
        # Idle before and after the audit (half the requests each), so drifting load from elsewhere on a
        # shared machine weighs on both conditions alike.
        half = {**common, "requests": max(1, requests // 2)}
        idle, _, idle_wall = _drive(server, **half, seed=seed)
        load_start = os.getloadavg()
        with httpx.Client(base_url=server.base, timeout=60.0) as c:
            job = _start_audit(c, time.time() + time_limit)
            before = c.get(f"/api/audits/jobs/{job}").json()["done"]
            busy, _, busy_wall = _drive(server, **common, seed=seed + 1)
            state = c.get(f"/api/audits/jobs/{job}").json()
            load_busy = os.getloadavg()
            c.post(f"/api/audits/jobs/{job}/cancel")
            while c.get(f"/api/audits/jobs/{job}").json()["state"] not in ("done", "failed", "cancelled"):
                time.sleep(0.1)
        idle_after, _, wall_after = _drive(server, **half, seed=seed + 2)
        idle.merge(idle_after)
        idle_wall += wall_after
        load_end = os.getloadavg()
    finally:
        server.stop()
    idle_t, busy_t = _latency_table(idle), _latency_table(busy)
    return {
        "clients": clients, "requests_per_client": requests, "mix": AUDIT_MIX, "audit": AUDIT_BODY, "think": think,
        "idle": {"latency": idle_t, "wall_seconds": idle_wall, "failures": idle.failures,
                 "server_errors": idle.server_errors, "busy_waits": len(idle.busy_waits)},
        "audit_running": {"latency": busy_t, "wall_seconds": busy_wall, "failures": busy.failures,
                          "server_errors": busy.server_errors, "busy_waits": len(busy.busy_waits),
                          "audit_images_during": state["done"] - before, "audit_state_at_end": state["state"]},
        "load_average": {"before the audit": load_start, "end of the audit phase": load_busy, "end": load_end},
        "p95_ratio": {k: (busy_t[k]["p95"] / idle_t[k]["p95"]) if idle_t[k]["p95"] and busy_t[k]["p95"] else None
                      for k in idle_t},
        "spec": str(spec.relative_to(REPO) if spec.is_relative_to(REPO) else spec),
    }


def _ms(v: float | None) -> str:
    return "–" if v is None else f"{1000 * v:.0f}"


def to_markdown(fig: dict, *, command: str) -> str:
    rss = list(fig["rss_kib"].items())
    lines = [
        "# Bounded load on loopback",
        "",
        f"Command: `{command}`  ",
        (f"Model: `{fig['spec']}`; {fig['clients']} concurrent clients × {fig['requests_per_client']} requests "
         f"({fig['requests_done']} done of {fig['requests_planned']}) in {fig['wall_seconds']:.1f} s "
         f"({fig['throughput_rps']:.1f} requests/s) on {os.cpu_count()} CPU cores, shared with other work."),
        (f"A map request is one job (occlusion engine {fig['engine']!r}): start, poll until done, fetch the result; "
         "its latency is all of that. Saliency maps are of freshly uploaded images (never cached)."),
        "",
        "| request | n | p50 ms | p95 ms | mean ms |",
        "|---|---:|---:|---:|---:|",
    ]
    for kind, row in fig["latency"].items():
        lines.append(f"| {kind} | {row['n']} | {_ms(row['p50'])} | {_ms(row['p95'])} | {_ms(row['mean'])} |")
    for failure in fig["server_errors"][:5] + fig["failures"][:5]:
        lines.append(f"\n- {failure[:300]}")
    lines += [
        "",
        f"HTTP statuses: {fig['statuses']}; 5xx: {len(fig['server_errors'])}; failed requests: {len(fig['failures'])}; "
        f"waits after a 429 (queue full or a client over its share): {fig['busy_waits']}.",
        "",
        "Server resident memory (VmRSS): " + ", ".join(f"{k.replace('_', ' ')} {v / 1024:.1f} MiB" for k, v in rss)
        + f"; growth from the first mark after setup traffic to the end: {100 * fig['rss_growth']:+.1f} %.",
        f"Cached results at the end: {fig['cached_results_at_end']} (the cache is bounded).",
        "",
    ]
    return "\n".join(lines)


def audit_markdown(fig: dict, *, command: str) -> str:
    idle, busy = fig["idle"], fig["audit_running"]
    lines = [
        "# Interactive latency with and without a running audit",
        "",
        f"Command: `{command}`  ",
        (f"Model: `{fig['spec']}`; {fig['clients']} concurrent clients × {fig['requests_per_client']} requests per "
         f"condition on {os.cpu_count()} CPU cores, shared with other work; mix {fig['mix']}; each client pauses "
         f"0–{2 * fig['think']:.1f} s between requests (a person reading the page). Idle: half the "
         f"requests before the audit and half after it; then while an audit of "
         f"{4 * fig['audit']['source']['per_class']} demo tiles with {fig['audit']['method']} "
         f"{fig['audit']['params']} runs in the background ({busy['audit_images_during']} images audited during "
         "that phase)."),
        "",
        "| request | n idle | p50 idle ms | p95 idle ms | n with audit | p50 with audit ms | p95 with audit ms "
        "| p95 ratio |",
        "|---|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for kind in idle["latency"]:
        a, b = idle["latency"][kind], busy["latency"][kind]
        ratio = fig["p95_ratio"][kind]
        lines.append(f"| {kind} | {a['n']} | {_ms(a['p50'])} | {_ms(a['p95'])} | {b['n']} | {_ms(b['p50'])} | "
                     f"{_ms(b['p95'])} | {'–' if ratio is None else f'{ratio:.2f}'} |")
    for failure in (idle["server_errors"] + busy["server_errors"] + idle["failures"] + busy["failures"])[:5]:
        lines.append(f"\n- {failure[:300]}")
    loads = "; ".join(f"{k} {' '.join(f'{v:.1f}' for v in three)}" for k, three in fig["load_average"].items())
    lines += [
        "",
        f"Load average (1, 5, 15 min) of the machine: {loads}.",
        "",
        f"Failures: idle {len(idle['failures'])}, with audit {len(busy['failures'])}; 5xx: "
        f"{len(idle['server_errors']) + len(busy['server_errors'])}; waits after a 429: idle {idle['busy_waits']}, "
        f"with audit {busy['busy_waits']}.",
        "",
    ]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--clients", type=int, default=None, help="default 20 (4 with --audit)")
    parser.add_argument("--requests", type=int, default=None, help="requests per client (default 50; 60 with --audit)")
    parser.add_argument("--time-limit", type=float, default=300.0)
    parser.add_argument("--out", type=Path, default=None)
    parser.add_argument("--workdir", type=Path, default=None)
    parser.add_argument("--engine", default=DEFAULT_ENGINE, help="occlusion engine of the jobs (default auto)")
    parser.add_argument("--audit", action="store_true",
                        help="measure the interactive mix idle and while an audit runs in the background")
    parser.add_argument("--think", type=float, default=0.25,
                        help="with --audit: mean pause of a client between requests, in seconds (default 0.25)")
    args = parser.parse_args(argv)
    import tempfile

    with tempfile.TemporaryDirectory(prefix="pellucid-load-") as tmp:
        if args.audit:
            clients, requests = args.clients or 4, args.requests or 60
            fig = run_with_audit(clients=clients, requests=requests, time_limit=args.time_limit,
                                 workdir=args.workdir or Path(tmp), think=args.think)
            command = (f"PYTHONPATH=. .venv/bin/python -m bench.load_bench --audit --clients {clients} "
                       f"--requests {requests} --think {args.think}")
            text, out = audit_markdown(fig, command=command), args.out or RESULTS_AUDIT
            ok = not (fig["idle"]["failures"] or fig["audit_running"]["failures"] or fig["idle"]["server_errors"]
                      or fig["audit_running"]["server_errors"])
        else:
            clients, requests = args.clients or 20, args.requests or 50
            fig = run_load(clients=clients, requests=requests, time_limit=args.time_limit,
                           workdir=args.workdir or Path(tmp), engine=args.engine)
            command = (f"PYTHONPATH=. .venv/bin/python -m bench.load_bench --clients {clients} "
                       f"--requests {requests} --engine {args.engine}")
            text, out = to_markdown(fig, command=command), args.out or RESULTS
            ok = not fig["server_errors"] and not fig["failures"]
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text, encoding="utf-8")
    print(text)
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main(argv=None))
