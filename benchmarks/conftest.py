"""Benchmarks run with `pytest benchmarks --benchmark-enable`; they are outside the default test run."""
