"""Shared timing helpers of the benchmarks: figures are printed, never asserted."""

import time

import numpy as np


def timed(fn, repeats=41):
    """Median wall time of ``fn()`` over ``repeats`` calls (s), and the last result."""
    times, out = [], None
    for _ in range(repeats):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return float(np.median(times)), out


def median_time(fn, repeats=41):
    """Median wall time of ``fn()`` over ``repeats`` calls, s."""
    return timed(fn, repeats)[0]
