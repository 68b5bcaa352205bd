"""Benchmarks (speed floors), run as python -m bench.<name>."""
