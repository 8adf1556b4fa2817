"""Start-up time of the commands that need no model, against a bare Python start, in one run.

Each command runs as a fresh process (``python -m pellucid …``), the way a user starts it, with
an empty data folder. Commands are interleaved round by round so the machine's load hits all of
them alike; the table gives medians and each command's ratio to a bare ``python -c pass`` and to
``python -c "import torch"`` (what every command paid before imports were made lazy).

    python -m bench.startup_bench [--repeats 7] [--out bench/results/startup.md]
    pellucid bench startup -- --repeats 7
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
TARGET_SECONDS = 1.0  # issue 13: commands that need no model start in under a second


def _commands(store: Path) -> dict[str, list[str]]:
    py = sys.executable
    return {
        "python -c pass (floor)": [py, "-c", "pass"],
        "python -c 'import torch' (reference)": [py, "-c", "import torch"],
        "pellucid --help": [py, "-m", "pellucid", "--help"],
        "pellucid --version": [py, "-m", "pellucid", "--version"],
        "pellucid runs list": [py, "-m", "pellucid", "runs", "list", "--store", str(store)],
        "pellucid models": [py, "-m", "pellucid", "models"],
        "pellucid audit --help": [py, "-m", "pellucid", "audit", "--help"],
        # report draws figures, so it needs matplotlib, but not torch: its imports alone
        "pellucid report (imports)": [py, "-c", "import pellucid.cli, pellucid.core.audit.report"],
    }


def measure(repeats: int) -> list[dict]:
    with tempfile.TemporaryDirectory(prefix="pellucid-startup-") as tmp:
        store = Path(tmp) / "store"
        commands = _commands(store)
        env = {**os.environ, "PELLUCID_DATA": str(store)}
        times: dict[str, list[float]] = {name: [] for name in commands}
        for round_ in range(repeats + 1):
            for name, argv in commands.items():
                t0 = time.perf_counter()
                proc = subprocess.run(argv, cwd=tmp, env=env, capture_output=True, text=True, timeout=300)
                seconds = time.perf_counter() - t0
                if proc.returncode != 0:
                    raise SystemExit(f"{name} failed ({proc.returncode}): {proc.stderr.strip()[:300]}")
                if round_:  # round 0 warms the file cache
                    times[name].append(seconds)
    floor = statistics.median(times["python -c pass (floor)"])
    torch_ref = statistics.median(times["python -c 'import torch' (reference)"])
    rows = []
    for name, values in times.items():
        med = statistics.median(values)
        rows.append({"command": name, "median_s": med, "min_s": min(values), "max_s": max(values),
                     "over_bare_python": med / floor, "of_torch_import": med / torch_ref,
                     "under_target": med < TARGET_SECONDS})
    return rows


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench.startup_bench", description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--out", type=Path, default=REPO / "bench" / "results" / "startup.md")
    args = parser.parse_args(argv)
    rows = measure(args.repeats)
    lines = ["| command | median (s) | min–max (s) | × bare python | × `import torch` | under 1 s |",
             "|---|---:|---:|---:|---:|:---:|"]
    lines += [f"| `{r['command']}` | {r['median_s']:.3f} | {r['min_s']:.3f}–{r['max_s']:.3f} | "
              f"{r['over_bare_python']:.1f} | {r['of_torch_import']:.2f} | {'yes' if r['under_target'] else 'no'} |"
              for r in rows]
    text = "\n".join(lines)
    print(text)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(f"Command: `python -m bench.startup_bench --repeats {args.repeats}` (fresh processes, "
                        f"interleaved, medians; {os.cpu_count()} CPUs)\n\n{text}\n", encoding="utf-8")
    args.out.with_suffix(".json").write_text(json.dumps(rows, indent=2) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
