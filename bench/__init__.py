"""Benchmarks: every ``bench/bench_*.py`` module has ``run() -> list[dict]`` (one dict per
measured case). ``python -m bench`` (``make bench``) runs them all and prints a table.
Speed targets are ratios against a naive baseline measured in the same run, or absolute
times on the machine at hand; they live here, never as timed asserts in tests."""
