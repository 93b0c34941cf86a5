"""Cost of the self-consistent solve against one propagator evaluation, measured in one run.

Usage: python benchmarks/bench_solve.py [CONFIG ...]
(default: configs/demo.toml and configs/short-memory.toml, each with its own propagator
method, default the exact one).

For every config this prints: the passes to convergence (target <= 15), the compile time,
the warm time of one propagator evaluation on the converged history, the warm time of the
calibrated solve (as the config asks for it) and of the uncalibrated solve at the
calibrated parameter value, and their ratios to one propagator evaluation (targets:
<= 40 calibrated, <= 15 uncalibrated). Ratios, not absolute targets: these machines are
noisy, and the ratios are what the targets are stated in.
"""

from __future__ import annotations

import sys
import time

from _timing import warm_time


def bench(path: str) -> None:
    from backreact.config import load_config

    cfg = load_config(path)

    import equinox as eqx
    import jax

    from backreact.background import expansion_history, model_from_config
    from backreact.closures import closure_from_config
    from backreact.propagator import propagator_function
    from backreact.run import _solver_settings_and_target
    from backreact.solve import solve_fixed_point

    model = model_from_config(cfg)
    closure = closure_from_config(cfg)
    if closure is None:
        print(f"{path}: no closure ([spectator] closure = 'none'): nothing to solve")
        return
    plain = eqx.filter_jit(expansion_history)(model)
    propagate = propagator_function(cfg, plain, third=closure.needs_third)
    settings, target = _solver_settings_and_target(cfg)

    def solve(m, cl, start, tgt):
        return solve_fixed_point(m, cl, propagate, settings, tgt, start=start)

    solve_jit = eqx.filter_jit(solve)
    prop_jit = eqx.filter_jit(propagate)

    t0 = time.perf_counter()
    fp = solve_jit(model, closure, plain, target)
    jax.block_until_ready(fp.history.ln_hubble)
    t_compile_cal = time.perf_counter() - t0
    jax.block_until_ready(prop_jit(fp.history))
    t_prop = warm_time(prop_jit, fp.history)
    t_cal = warm_time(solve_jit, model, closure, plain, target)
    passes_cal = int(fp.passes)

    fixed = fp.closure  # the calibrated parameter, now held fixed
    fp_u = solve_jit(model, fixed, plain, None)
    jax.block_until_ready(fp_u.history.ln_hubble)
    t_unc = warm_time(solve_jit, model, fixed, plain, None)
    passes_unc = int(fp_u.passes)

    method = cfg.propagator.method
    print(f"{path}: method {method}, {model.size} grid points")
    print(f"  compile (calibrated solve, first call): {t_compile_cal:8.1f} s")
    print(f"  one propagator evaluation:              {t_prop:8.3f} s")
    kind = cfg.calibration.target
    if target is not None:
        print(
            f"  calibrated solve (target {kind}):   {t_cal:8.3f} s  {passes_cal:3d} passes  "
            f"ratio {t_cal / t_prop:6.1f} (target <= 40)"
        )
    print(
        f"  uncalibrated solve:                     {t_unc:8.3f} s  {passes_unc:3d} passes  "
        f"ratio {t_unc / t_prop:6.1f} (target <= 15)"
    )
    print(f"  passes target <= 15: {'met' if max(passes_cal, passes_unc) <= 15 else 'NOT met'}")


def main(argv: list[str]) -> int:
    paths = argv[1:] or ["configs/demo.toml", "configs/short-memory.toml"]
    for p in paths:
        bench(p)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
