"""Pellucid's benchmark suite (run ``python -m bench.occlusion_bench``; results in BENCHMARKS.md)."""
