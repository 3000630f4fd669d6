"""Benchmarks: figures as ratios against references measured in the same run (see README.md).

Run them all with ``python -m benchmarks [--quick]``, or one script by hand.
"""
