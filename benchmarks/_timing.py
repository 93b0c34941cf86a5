"""Timing helper shared by the benchmark scripts (run them from the repository root)."""

from __future__ import annotations

import statistics
import time


def warm_time(f, *args, repeat: int = 3) -> float:
    """Median wall time of ``f(*args)`` over ``repeat`` calls after one warm-up call (which
    pays compilation), each waited for with jax.block_until_ready."""
    import jax

    jax.block_until_ready(f(*args))
    ts = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        jax.block_until_ready(f(*args))
        ts.append(time.perf_counter() - t0)
    return statistics.median(ts)
