"""Time to write a stored audit's report (HTML + PDF) for a folder of 200 images, in one run.

Setup (not timed): the demo's clean split with ``--per-class`` tiles per class (50 → 200 images)
is audited with the bundled ``tilenet`` under the demo policy (occlusion, discovery, confirmation,
injection), into a throw-away store; ``--store DIR --run ID`` reuses a stored run instead.

Measured, as fresh processes the way a person runs them and interleaved round by round so the
machine's load hits all alike (medians; round 0 warms the file cache and is not counted):

- ``pellucid report RUN --out DIR`` (HTML and PDF, A4): the figure the target (10 s) is about;
- the same with ``--paper letter``; ``--no-pdf`` (the HTML alone);
- ``python -c pass``, the floor of any command.

Then once in-process, the report's three steps (reading the run and its pictures, rendering the
HTML, laying out and writing the PDF) with wall and CPU seconds, the page count and file sizes.
The machine is shared, so the load average is written beside the figures.

    python -m bench.report_bench [--per-class 50] [--repeats 3] [--store DIR --run ID]
    pellucid bench report -- --repeats 3
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
TARGET_SECONDS = 10.0  # issue 17: HTML and PDF for a 200-image run in under 10 s


def _cpu() -> float:
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def _run(argv: list[str], env: dict, cwd: Path, timeout: int = 3600
         ) -> tuple[float, float, subprocess.CompletedProcess]:
    """Wall seconds, CPU seconds (user + system of the child) and the finished process."""
    t0, c0 = time.perf_counter(), _cpu()
    proc = subprocess.run(argv, cwd=cwd, env=env, capture_output=True, text=True, timeout=timeout)
    seconds, cpu = time.perf_counter() - t0, _cpu() - c0
    if proc.returncode not in (0, 1):
        raise SystemExit(f"{' '.join(argv[:5])} … failed ({proc.returncode}): {proc.stderr.strip()[-400:]}")
    return seconds, cpu, proc


def _audit(work: Path, per_class: int, env: dict) -> tuple[Path, str, float]:
    py = sys.executable
    tiles, store = work / "tiles", work / "store"
    _run([py, "-m", "pellucid", "demo", "tiles", "--split", "clean", "--per-class", str(per_class), "--seed", "2",
          "--out", str(tiles)], env, work)
    seconds, _, _ = _run([py, "-m", "pellucid", "audit", "--model", "tilenet", "--images", str(tiles), "--policy",
                       str(REPO / "demo_models" / "policy-demo.toml"), "--store", str(store), "--out",
                       str(work / "audit"), "--quiet"], env, work)
    run_id = json.loads((work / "audit" / "summary.json").read_text(encoding="utf-8"))["run"]["id"]
    return store, run_id, seconds


def _steps(store: Path, run_id: str, out: Path) -> dict:
    from pellucid.core.audit.report import build_report, render_html
    from pellucid.core.audit.report_pdf import print_pdf
    from pellucid.core.audit.store import Store

    steps: dict[str, dict] = {}

    def timed(name, fn):
        w, c = time.perf_counter(), time.process_time()
        value = fn()
        steps[name] = {"wall_s": time.perf_counter() - w, "cpu_s": time.process_time() - c}
        return value

    with Store(store) as s:
        content = timed("read the run and its pictures", lambda: build_report(s, run_id))
    html = timed("render the HTML (template, pictures as data: URIs)", lambda: render_html(content))
    out.mkdir(parents=True, exist_ok=True)
    pages = timed("lay out and write the PDF (WeasyPrint)", lambda: print_pdf(html, out / "report.pdf"))
    return {"steps": steps, "pages": pages, "html_bytes": len(html.encode("utf-8")),
            "pdf_bytes": (out / "report.pdf").stat().st_size, "images": content.summary.get("done"),
            "flagged": content.summary.get("flagged_count"), "pictures": len(content.pictures)}


def measure(store: Path, run_id: str, repeats: int, env: dict, work: Path) -> list[dict]:
    py = sys.executable
    base = [py, "-m", "pellucid", "report", run_id, "--store", str(store)]
    commands = {
        "python -c pass (floor)": [py, "-c", "pass"],
        "pellucid report RUN (HTML + PDF, A4)": [*base, "--out", str(work / "r-a4")],
        "pellucid report RUN --paper letter": [*base, "--out", str(work / "r-letter"), "--paper", "letter"],
        "pellucid report RUN --no-pdf (HTML only)": [*base, "--out", str(work / "r-html"), "--no-pdf"],
    }
    times: dict[str, list[float]] = {name: [] for name in commands}
    cpus: dict[str, list[float]] = {name: [] for name in commands}
    for round_ in range(repeats + 1):
        for name, argv in commands.items():
            seconds, cpu, _ = _run(argv, env, work, timeout=600)
            if round_:
                times[name].append(seconds)
                cpus[name].append(cpu)
    # CPU seconds are what the command costs; on an idle machine its wall time is about that (it runs
    # on one core). Wall times on a shared machine add the waiting for a core.
    return [{"command": name, "median_s": statistics.median(v), "min_s": min(v), "max_s": max(v),
             "cpu_s": statistics.median(cpus[name]),
             "under_target": statistics.median(v) < TARGET_SECONDS} for name, v in times.items()]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench.report_bench", description=__doc__.splitlines()[0])
    parser.add_argument("--per-class", type=int, default=50, help="demo tiles per class (4 classes; default 50)")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--store", type=Path, default=None, help="reuse this store (with --run)")
    parser.add_argument("--run", default=None, help="reuse this stored run (with --store)")
    parser.add_argument("--out", type=Path, default=REPO / "bench" / "results" / "report.md")
    args = parser.parse_args(argv)
    if (args.store is None) != (args.run is None):
        parser.error("--store and --run go together")
    env = {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    with tempfile.TemporaryDirectory(prefix="pellucid-report-bench-") as tmp:
        work = Path(tmp)
        audit_s = None
        if args.store is None:
            print(f"auditing {4 * args.per_class} demo images (setup, not timed) …", flush=True)
            store, run_id, audit_s = _audit(work, args.per_class, env)
        else:
            store, run_id = args.store, args.run
        load_before = os.getloadavg()
        rows = measure(store, run_id, args.repeats, env, work)
        steps = _steps(store, run_id, work / "steps")
        load_after = os.getloadavg()

    lines = ["| command | wall, median (s) | wall min–max (s) | CPU, median (s) | wall under 10 s |",
             "|---|---:|---:|---:|:---:|"]
    lines += [f"| `{r['command']}` | {r['median_s']:.2f} | {r['min_s']:.2f}–{r['max_s']:.2f} | {r['cpu_s']:.2f} | "
              f"{'yes' if r['under_target'] else 'no'} |" for r in rows]
    lines += ["", "| step (in-process, one run) | wall (s) | CPU (s) |", "|---|---:|---:|"]
    lines += [f"| {name} | {v['wall_s']:.2f} | {v['cpu_s']:.2f} |" for name, v in steps["steps"].items()]
    facts = (f"{steps['images']} images audited, {steps['flagged']} flagged, {steps['pictures']} stored pictures "
             f"read; report: {steps['pages']} A4 pages, HTML {steps['html_bytes'] / 1e6:.1f} MB, PDF "
             f"{steps['pdf_bytes'] / 1e6:.1f} MB")
    load = (f"load average (1, 5, 15 min) before {' '.join(f'{v:.1f}' for v in load_before)}, after "
            f"{' '.join(f'{v:.1f}' for v in load_after)}; {os.cpu_count()} CPUs")
    text = "\n".join(lines)
    print(text)
    print(facts)
    print(load)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    setup = (f"setup: audit of the demo's clean split, {4 * args.per_class} images, {audit_s:.0f} s (not timed)"
             if audit_s is not None else f"setup: stored run {run_id}")
    args.out.write_text(f"Command: `python -m bench.report_bench --per-class {args.per_class} --repeats "
                        f"{args.repeats}` (fresh processes, interleaved, medians)  \n{setup}  \n{facts}  \n{load}\n\n"
                        f"{text}\n", encoding="utf-8")
    args.out.with_suffix(".json").write_text(json.dumps({"commands": rows, **steps, "load_before": load_before,
                                                         "load_after": load_after}, indent=2) + "\n",
                                             encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
