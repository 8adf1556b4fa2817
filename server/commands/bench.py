"""``pellucid bench``: the benchmark suites (from a source checkout, where bench/ lives)."""

from __future__ import annotations

import argparse
import importlib
import sys
from pathlib import Path

from pellucid.core.errors import PellucidError

SUITES = {
    "occlusion": "bench.occlusion_bench",
    "latency": "bench.latency_bench",
    "attribution": "bench.attribution_bench",
    "load": "bench.load_bench",
    "report": "bench.report_bench",
    "shortcuts": "bench.shortcut_bench",
    "startup": "bench.startup_bench",
    "audit": "bench.audit_bench",
}


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("bench", help="run a benchmark suite and write its tables under bench/results/",
                       description="Run one of Pellucid's benchmark suites on this machine. Timings are measured "
                                   "as ratios within one run; see BENCHMARKS.md. Extra arguments go to the suite "
                                   "(e.g. pellucid bench occlusion -- --help).")
    p.add_argument("suite", choices=sorted(SUITES), help="which suite to run")
    p.add_argument("args", nargs=argparse.REMAINDER, help="arguments for the suite")
    p.set_defaults(func=_bench)


def _bench(args: argparse.Namespace) -> int:
    # bench/ ships with the source, not inside the package: the checkout this package runs from
    # (an editable install), else the current folder.
    for root in (Path(__file__).resolve().parents[2], Path.cwd()):
        if (root / "bench" / "__init__.py").is_file():
            if str(root) not in sys.path:
                sys.path.insert(0, str(root))
            break
    try:
        module = importlib.import_module(SUITES[args.suite])
    except ImportError:
        raise PellucidError("the benchmark suites live in bench/ of a source checkout; run pellucid bench "
                            "from the repository root") from None
    rest = [a for a in args.args if a != "--"]
    return int(module.main(rest) or 0)
