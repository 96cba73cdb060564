"""Benchmarks: each prints its figures and the ratio against the named peer in one run."""
