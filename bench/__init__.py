"""Benchmarks (``make bench``); not part of the installed package."""
