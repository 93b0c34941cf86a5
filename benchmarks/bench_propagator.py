"""Speed of the two propagator methods on a realistic history, measured in one run.

Usage: python benchmarks/bench_propagator.py [CONFIG] [--skip-loop]
(default: configs/lcdm.toml: 65 e-folds of plateau inflation, reheating, radiation, matter,
a cosmological-constant era; ~1100 output times, dlnk = 0.05.)

Prints: the exact method's compile time and warm time; its ratio to the plain complex mode
sum run mode by mode (each mode its own jit call, plus the same k integration); peak
memory; the memory kernel's time and its ratio to the exact method; the fitted exponent
of the kernel's time against the number of output times. Ratios, not absolute targets:
these machines are noisy.
"""

from __future__ import annotations

import resource
import sys
import time

from _timing import warm_time


def main(argv):
    from backreact.config import load_config

    path = next((a for a in argv[1:] if not a.startswith("--")), "configs/lcdm.toml")
    cfg = load_config(path)

    import equinox as eqx
    import jax
    import jax.numpy as jnp
    import numpy as np

    from backreact.background import expansion_history, model_from_config
    from backreact.propagator import ModeSettings, exact_propagator, mode_plan, spline_from_history
    from backreact.propagator import modes as M
    from backreact.propagator.memory import memory_kernel_propagator, required_k_nodes

    h = jax.tree_util.tree_map(np.asarray, eqx.filter_jit(expansion_history)(model_from_config(cfg)))
    sp = spline_from_history(h)
    out = jnp.asarray(h.efolds)
    ln_mu = float(h.ln_hubble[0])
    st = ModeSettings()
    plan = mode_plan(sp, out, st)
    print(f"history: {path}, {out.shape[0]} output times, {plan.n_k} modes (dlnk = {1 / st.modes_per_efold})")

    exact = eqx.filter_jit(lambda s, n: exact_propagator(s, n, plan, ln_mu=ln_mu, settings=st))
    t0 = time.perf_counter()
    jax.block_until_ready(exact(sp, out))
    t_first = time.perf_counter() - t0
    t_exact = warm_time(exact, sp, out)
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6
    print(
        f"exact method: compile + first run {t_first:7.2f} s, warm run {t_exact:7.3f} s, "
        f"peak RSS {rss:.2f} GB"
    )

    if "--skip-loop" not in argv:
        # Plain complex mode sum, one mode per call (no hand-over), then the same k integration.
        plan_o = mode_plan(sp, out, st, oracle=True)
        lnk, n0, n1, n2, *_ = M._windows(sp, out, plan_o.n_k, st, True)
        one = jax.jit(lambda j, a, b, c: M._mode_history(sp, out, plan_o, st, j, a, b, c, False))
        jax.block_until_ready(one(lnk[0], n0[0], n1[0], n2[0]))
        t0 = time.perf_counter()
        for j in range(plan_o.n_k):
            jax.block_until_ready(one(lnk[j], n0[j], n1[j], n2[j]))
        t_loop_modes = time.perf_counter() - t0
        integ = eqx.filter_jit(
            lambda s, n: exact_propagator(s, n, plan_o, ln_mu=ln_mu, settings=st, oracle=True)
        )
        sol_f = eqx.filter_jit(lambda s, n: M.solve_modes(s, n, plan_o, st, True))
        t_integration = max(warm_time(integ, sp, out, repeat=1) - warm_time(sol_f, sp, out, repeat=1), 0.0)
        t_loop = t_loop_modes + t_integration
        print(
            f"plain mode-by-mode complex sum: {t_loop:7.2f} s "
            f"({t_loop_modes:.2f} s modes + {t_integration:.2f} s k integration); "
            f"ratio to the exact method {t_loop / t_exact:6.1f}x"
        )

    n_e = float(h.end_of_inflation)
    n_k = required_k_nodes(sp, n_e, 20.0)

    def kernel_at(n):
        f = eqx.filter_jit(
            lambda s, t: memory_kernel_propagator(
                s, t, end_of_inflation=n_e, ln_mu=ln_mu, prior_variance=0.0, n_k=n_k
            )
        )
        # a few ms per run on a shared machine: the median of many runs
        return warm_time(f, sp, n, repeat=15)

    t_kernel = kernel_at(out)
    print(f"memory kernel: warm run {t_kernel:7.3f} s; exact / kernel = {t_exact / t_kernel:6.1f}x")
    sizes = [250, 500, 1000, 2000]
    lo, hi = float(out[0]), float(out[-1])
    times = [kernel_at(jnp.linspace(lo, hi, m)) for m in sizes]
    slope = np.polyfit(np.log(sizes), np.log(times), 1)[0]
    pts = ", ".join(f"{m}: {t * 1e3:.0f} ms" for m, t in zip(sizes, times))
    print(f"memory kernel vs number of output times ({pts}): fitted exponent {slope:.2f}")


if __name__ == "__main__":
    main(sys.argv)
