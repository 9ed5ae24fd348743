"""Synthetic data for the demo, the tests and the benchmarks (never imported by the stages)."""
