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
# The same without a cosmological constant, continued to a = 1/(1 - 0.89) ~ 9: the matter era
# lasts 10 e-folds after equality, so that its deep part (eps within 2e-3 of 3/2) is 5 e-folds.
MATTER = "[inflation]\nmodel = 'plateau'\n[cosmology]\nomega_lambda = 0.0\nfinal_redshift = -0.89\n"


@functools.cache
def _both(text):
    import equinox as eqx
    import jax.numpy as jnp

    cfg, model, h = solved(text)
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
    h, ex, mk = _both(LCDM)
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
    h, ex, mk = _both(LCDM)
    n, eps = h.efolds, h.epsilon
    after = n > float(h.end_of_inflation)
    flagged = ~mk["valid"].astype(bool)
    np.testing.assert_array_equal(flagged[after], eps[after] <= VALID_EPS_MIN)
    assert flagged[np.argmin(np.abs(n))]  # today is flagged
    rel = np.abs(mk["A"] / ex["A"] - 1)
    assert rel[np.argmin(np.abs(n))] > 0.1  # and wrong by more than 10% today
    assert rel[~flagged & (np.abs(n - float(h.end_of_inflation)) > 2)].max() < 2.4e-2


def _equality(n, eps, n_end):
    """N of radiation-matter equality (eps = 7/4), after the end of inflation."""
    post = n > n_end + 2
    return n[post][np.argmin(np.abs(eps[post] - 1.75))]


def test_memory_kernel_in_deep_matter_domination():
    # DESIGN.md section 3 check 5: the memory kernel agrees with the exact method to 0.3% during
    # inflation, radiation and matter domination, and to 2% within two e-folds of a change of
    # equation of state. Here on a history whose matter era is long (MATTER). Measured (table in
    # docs/propagator_memory_kernel.md section 6): 2.5e-4 inflation, 2.4e-3 radiation (7e-4
    # where eps is within 1% of 2; the rest at the QCD and e+e- changes of eps), 1.2e-2 and
    # 1.1e-2 within two e-folds of the end of inflation and of equality, 1.0e-2 on the slow
    # approach to matter (N > N_eq + 2 while eps - 3/2 > 2e-3, i.e. up to N_eq + 5.4), 2.0e-3 deep
    # in matter domination, falling to 3.5e-4 from N_eq + 8.
    h, ex, mk = _both(MATTER)
    n, eps = h.efolds, h.epsilon
    n_end = float(h.end_of_inflation)
    n_eq = _equality(n, eps, n_end)
    deep = (n > n_eq + 2) & (np.abs(eps - 1.5) <= 2e-3)
    assert n[deep].max() - n[deep].min() > 4  # a long matter era (measured 4.8 e-folds deep)
    rel = np.abs(mk["A"] / ex["A"] - 1)
    eras = {
        "inflation": (n < n_end - 2, 3e-3),  # check 5: 0.3%
        "end of inflation": (np.abs(n - n_end) <= 2, 2e-2),  # check 5: 2% near a change of eos
        "radiation": ((n > n_end + 2) & (n < n_eq - 2), 3e-3),  # check 5: 0.3%
        "equality": (np.abs(n - n_eq) <= 2, 2e-2),  # check 5: 2% near a change of eos
        # check 5's 2%: eps is still changing (rho_r/rho_m falls only as e^-(N - N_eq)), so the
        # change of eos outlasts the two e-folds after equality
        "approach to matter": ((n > n_eq + 2) & ~deep, 2e-2),
        "deep matter": (deep, 3e-3),  # check 5: 0.3%
    }
    for name, (sel, tol) in eras.items():
        assert sel.any(), name
        assert rel[sel].max() < tol, (name, rel[sel].max())
    # The analytic derivatives deep in matter domination: DESIGN sets no bound (2.3.6 asks for
    # their accuracy by era); these are the measured 1.7e-2 (A') and 8.7e-3 (Box A) of the docs
    # table with a factor ~1.7 of margin, so that a regression of the derivatives fails here.
    assert np.max(np.abs(mk["dA"] / ex["dA"] - 1)[deep]) < 3e-2
    assert np.max(np.abs(mk["box"] / ex["box"] - 1)[deep]) < 1.5e-2
    # no acceleration after inflation: valid everywhere past the reheating junction (eps > 1.4)
    assert mk["valid"][n > n_end + 1].all()
