"""Benchmarks, run from the repository root as modules (``python -m bench.bench_reference``);
each prints a table and JSON. ``bench.splash_shots`` holds the splash-shot scenes the tests share."""
