"""Time one background solve: compilation, then warm solves (median of repeats).

Usage: python benchmarks/bench_background.py [CONFIG]   (default: the shipped demo)
Prints absolute times and the ratio compile / warm solve measured in this run.
"""

from __future__ import annotations

import statistics
import sys
import time


def main(argv: list[str]) -> None:
    from backreact.config import default_config_path, load_config

    path = argv[1] if len(argv) > 1 else default_config_path()
    cfg = load_config(path)

    import equinox as eqx

    from backreact.background import expansion_history, model_from_config

    t0 = time.perf_counter()
    model = model_from_config(cfg)
    t_model = time.perf_counter() - t0
    solve = eqx.filter_jit(expansion_history)
    t0 = time.perf_counter()
    h = solve(model)
    h.ln_hubble.block_until_ready()
    t_first = time.perf_counter() - t0
    warm = []
    for _ in range(10):
        t0 = time.perf_counter()
        h = solve(model)
        h.ln_hubble.block_until_ready()
        warm.append(time.perf_counter() - t0)
    t_warm = statistics.median(warm)
    print(f"config: {path}  grid points: {model.size}")
    print(f"model setup (thermal table, numpy):  {t_model:8.3f} s")
    print(f"first call (compile + solve):        {t_first:8.3f} s")
    print(f"warm solve (median of 10):           {t_warm * 1e3:8.2f} ms")
    print(f"ratio first call / warm solve:       {t_first / t_warm:8.0f}")


if __name__ == "__main__":
    main(sys.argv)
