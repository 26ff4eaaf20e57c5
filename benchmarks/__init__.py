"""Benchmarks: measured side by side with their baselines in one run; never asserted in tests."""
