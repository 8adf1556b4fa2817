"""Bounded load on loopback: the real server (uvicorn in a subprocess) under concurrent clients.

20 clients × 25 requests mixing page GETs, top-k, activation grids, kernel grids, saliency maps of
fresh images and small occlusion jobs against the demo model (or, when it is not built, the tiny
test model). Zero 5xx, every request answered (a 429 is waited out as its Retry-After says), and
the server's resident memory after all 500 requests within 10 % of its value after the first 50
(no leaked hooks, tensors or unbounded caches). A second run measures the interactive mix idle and
while an audit runs in the background. Bounded: a deadline for each run, a timeout on every call,
the server killed in a ``finally`` (see bench/load_bench.py, which also records the latencies;
these tests measure them but assert no time).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from bench.load_bench import DEMO_SPEC, run_load, run_with_audit


@pytest.mark.slow
def test_bounded_load_on_loopback(tmp_path: Path, tiny_spec: Path) -> None:
    spec = DEMO_SPEC if DEMO_SPEC.is_file() else tiny_spec
    fig = run_load(clients=20, requests=25, spec=spec, workdir=tmp_path, time_limit=240.0)
    assert fig["server_errors"] == []
    assert fig["failures"] == []
    assert fig["requests_done"] == 500
    assert all(code < 500 for code in fig["statuses"])
    assert all(fig["latency"][kind]["n"] > 0
               for kind in ("page", "predict", "activations", "kernels", "saliency", "occlusion"))
    rss = fig["rss_kib"]
    assert rss["after_500"] <= 1.10 * rss["after_50"], rss
    assert fig["cached_results_at_end"] <= 128


@pytest.mark.slow
@pytest.mark.skipif(not DEMO_SPEC.is_file(), reason="the background audit uses the demo model's labels")
def test_interactive_requests_are_answered_while_an_audit_runs(tmp_path: Path) -> None:
    fig = run_with_audit(clients=2, requests=12, workdir=tmp_path, time_limit=240.0)
    for phase in ("idle", "audit_running"):
        assert fig[phase]["failures"] == [] and fig[phase]["server_errors"] == [], fig[phase]
        assert fig[phase]["latency"]["all"]["n"] == 24  # idle: 2 clients × 6 before the audit and 6 after
        assert fig[phase]["latency"]["saliency"]["n"] > 0
    # The audit was still running while every interactive request of that phase was answered.
    assert fig["audit_running"]["audit_state_at_end"] == "running"
