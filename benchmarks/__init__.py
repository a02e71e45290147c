"""Reproducible speed measurements, each against a baseline in the same process.

Run them all with ``python -m benchmarks.run`` (or ``make bench``); pass a name filter to run
some: ``python -m benchmarks.run propagation``.
"""
