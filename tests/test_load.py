"""Bounded load on loopback: the real server (uvicorn in a subprocess) under 20 concurrent clients.

20 clients × 25 requests mixing top-k, activation grids, kernel grids and small occlusion jobs
against the demo model (or, when it is not built, the tiny test model). Zero 5xx, every request
answered, and the server's resident memory after all 500 requests within 10 % of its value after
the first 50 (no leaked hooks, tensors or unbounded caches). Bounded: a deadline for the run, a
timeout on every call, the server killed in a ``finally`` (see bench/load_bench.py, which also
records the latencies; this test measures them but asserts no time).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from bench.load_bench import DEMO_SPEC, run_load


@pytest.mark.slow
def test_bounded_load_on_loopback(tmp_path: Path, tiny_spec: Path) -> None:
    spec = DEMO_SPEC if DEMO_SPEC.is_file() else tiny_spec
    fig = run_load(clients=20, requests=25, spec=spec, workdir=tmp_path, time_limit=240.0)
    assert fig["server_errors"] == []
    assert fig["failures"] == []
    assert fig["requests_done"] == 500
    assert all(code < 500 for code in fig["statuses"])
    assert all(fig["latency"][kind]["n"] > 0 for kind in ("predict", "activations", "kernels", "occlusion"))
    rss = fig["rss_kib"]
    assert rss["after_500"] <= 1.10 * rss["after_50"], rss
    assert fig["cached_results_at_end"] <= 128
