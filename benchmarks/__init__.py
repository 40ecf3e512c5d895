"""Benchmarks for fringe: speed ratios against a floor measured in the same run, and
accuracy against the Cramér–Rao bound. Run ``python -m benchmarks [--quick] [NAME ...]``."""
