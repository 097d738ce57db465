"""Scoring and compile benchmarks: `python -m benchmarks.run --help` (see README.md).

Figures are printed and written as JSON; they are never timed assertions in tests.
"""
