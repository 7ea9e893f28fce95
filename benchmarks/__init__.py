"""Benchmark scripts, outside the shipped package: run from the repository root as
``python -m benchmarks.bench``, ``python -m benchmarks.bench_scale`` and
``python benchmarks/same_bytes.py``."""
