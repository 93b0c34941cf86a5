"""Memory kernel against the exact method on a full history (DESIGN 3 item 5)."""

from __future__ import annotations

import functools

import numpy as np
from helpers import solved

from backreact.propagator import ModeSettings, exact_propagator, mode_plan, spline_from_history
from backreact.propagator.memory import VALID_EPS_MIN, memory_kernel_propagator, required_k_nodes

# 65 e-folds of plateau inflation, instant reheating, radiation, matter and a cosmological
# constant (small output grid: 301 times, 1400 modes).
LCDM = "[inflation]\nmodel = 'plateau'\n[cosmology]\nomega_lambda = 0.316\n"


@functools.cache
def _both():
    import equinox as eqx
    import jax.numpy as jnp

    cfg, model, h = solved(LCDM)
    sp = spline_from_history(h)
    out = jnp.asarray(h.efolds)
    ln_mu = float(h.ln_hubble[0])
    settings = ModeSettings()
    plan = mode_plan(sp, out, settings)
    ex = eqx.filter_jit(lambda s, n: exact_propagator(s, n, plan, ln_mu=ln_mu, settings=settings))(sp, out)
    n_e = float(h.end_of_inflation)
    n_k = required_k_nodes(sp, n_e, 20.0)
    mk = eqx.filter_jit(
        lambda s, n: memory_kernel_propagator(
            s, n, end_of_inflation=n_e, ln_mu=ln_mu, prior_variance=0.0, n_k=n_k
        )
    )(sp, out)
    return h, {k: np.asarray(v) for k, v in ex.items()}, {k: np.asarray(v) for k, v in mk.items()}


def test_memory_kernel_matches_the_exact_method_by_era():
    # DESIGN 2.3.3 quotes the kernel's accuracy against the exact method: 3e-3 during
    # inflation and radiation, 1.6e-2 within two e-folds of a change of equation of state.
    # Measured here: 2.5e-4 (inflation), 2.4e-3 (radiation), 1.2e-2 (end of inflation and
    # radiation->matter, +-2 e-folds). In the matter era of this LambdaCDM history (at most
    # ~6 e-folds after equality, then Lambda) we measure 1.0-1.2e-2, not the 1.4e-3 DESIGN
    # quotes for deep matter domination: the matter era here is never "deep".
    h, ex, mk = _both()
    n, eps = h.efolds, h.epsilon
    n_end = float(h.end_of_inflation)
    rel = np.abs(mk["A"] / ex["A"] - 1)
    post = n > n_end + 2
    n_eq = n[post][np.argmin(np.abs(eps[post] - 1.75))]  # radiation-matter equality, eps = 7/4
    eras = {
        "inflation": (n < n_end - 2, 3e-3),
        "end of inflation": (np.abs(n - n_end) <= 2, 2e-2),
        "radiation": (post & (n < n_eq - 2), 3e-3),
        "equality": (np.abs(n - n_eq) <= 2, 2e-2),
        "matter": ((n > n_eq + 2) & (eps > 1.45), 2e-2),
    }
    for name, (sel, tol) in eras.items():
        assert sel.any(), name
        assert rel[sel].max() < tol, (name, rel[sel].max())


def test_memory_kernel_is_flagged_where_it_fails():
    # Every N after inflation with eps <= 1.4 (the approach to and the Lambda era itself,
    # where modes exit a second time) is flagged, and it is indeed wrong there (DESIGN:
    # 50-100% today; measured 35%), while every flagged-valid point is within 2.4e-2.
    h, ex, mk = _both()
    n, eps = h.efolds, h.epsilon
    after = n > float(h.end_of_inflation)
    flagged = ~mk["valid"].astype(bool)
    np.testing.assert_array_equal(flagged[after], eps[after] <= VALID_EPS_MIN)
    assert flagged[np.argmin(np.abs(n))]  # today is flagged
    rel = np.abs(mk["A"] / ex["A"] - 1)
    assert rel[np.argmin(np.abs(n))] > 0.1  # and wrong by more than 10% today
    assert rel[~flagged & (np.abs(n - float(h.end_of_inflation)) > 2)].max() < 2.4e-2
