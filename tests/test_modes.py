"""The exact method (backreact/propagator/modes.py): check values of DESIGN section 3."""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest
from helpers import solved

import backreact._jax  # noqa: F401  (x64)
from backreact.propagator import HistorySpline, ModeSettings, exact_propagator, mode_plan, spline_from_history

# A short history with every era: 20 e-folds of plateau inflation, instant reheating,
# radiation, matter and a cosmological-constant era (small grid: fast in CI).
SHORT = "[inflation]\nmodel = 'plateau'\nefolds = 20.0\n[cosmology]\nomega_lambda = 0.316\n"


def _run(spline, out, settings, oracle=False, ln_mu=0.0):
    import equinox as eqx
    import jax.numpy as jnp

    out = jnp.asarray(out)
    plan = mode_plan(spline, out, settings, oracle=oracle)
    f = eqx.filter_jit(
        lambda sp, n: exact_propagator(sp, n, plan, ln_mu=ln_mu, settings=settings, oracle=oracle)
    )
    return {k: np.asarray(v) for k, v in f(spline, out).items()}


def _de_sitter(n_max=8.0):
    import jax.numpy as jnp

    nodes = jnp.linspace(0.0, n_max, 81)
    return HistorySpline(nodes, jnp.zeros_like(nodes), jnp.zeros_like(nodes))


@functools.cache
def _short(oracle=False, **kw):
    cfg, model, h = solved(SHORT, **{k: v for k, v in kw.items() if k.startswith("cosmology__")})
    settings = ModeSettings(**{k: v for k, v in kw.items() if not k.startswith("cosmology__")})
    sp = spline_from_history(h)
    return model, h, _run(sp, h.efolds, settings, oracle=oracle, ln_mu=float(h.ln_hubble[0]))


def test_de_sitter_growth_law_with_the_ir_boundary_term():
    # De Sitter, H = mu = 1, a_start = 1: A(N) = (N - e^{-2N}/2)/(4 pi^2), A(5) = 0.1266509046
    # (growth law: Vilenkin & Ford 1982; Linde 1982; Starobinsky 1982; the e^{-2N} term is
    # the IR-boundary term of DESIGN 2.3.1). Required 1e-7 absolute; we measure ~3e-9.
    n = np.array([0.5, 1.0, 2.0, 5.0, 7.0])
    r = _run(_de_sitter(), n, ModeSettings())
    exact = (n - np.exp(-2 * n) / 2) / (4 * math.pi**2)
    np.testing.assert_allclose(r["A"], exact, rtol=0, atol=1e-7)
    assert abs(r["A"][3] - 0.1266509046) < 1e-7
    # A' from the per-mode derivative (no finite differences): (1 + e^{-2N})/(4 pi^2), to the
    # same 1e-7 absolute (measured 3.6e-8, i.e. 1.4e-6 relative).
    np.testing.assert_allclose(r["dA"], (1 + np.exp(-2 * n)) / (4 * math.pi**2), rtol=0, atol=1e-7)
    # Box A = -(A'' + 3 A') = -(3 + e^{-2N})/(4 pi^2) (DESIGN 3 item 5a), 1e-4 relative.
    np.testing.assert_allclose(r["box"], -(3 + np.exp(-2 * n)) / (4 * math.pi**2), rtol=1e-4)


def test_exact_method_equals_the_complex_oracle_in_every_era():
    # DESIGN 3 item 5: hand-over to the real transfer vs complex modes all the way, same k
    # grid, same stop and continuation: A within 1e-6, A' within 1e-5, Box A within 1e-4
    # (relative to the local scale of each quantity), in inflation, reheating, radiation,
    # matter and the Lambda era. Measured: 1e-8, 4e-7, 3e-7.
    model, h, exact = _short()
    _, _, oracle = _short(oracle=True)
    for seg, s in model.segment_slices.items():
        for name, tol in (("A", 1e-6), ("dA", 1e-5), ("box", 1e-4)):
            a, b = exact[name][s], oracle[name][s]
            scale = np.maximum(np.abs(b), 1e-300)
            assert np.max(np.abs(a - b) / scale) < tol, (seg, name, np.max(np.abs(a - b) / scale))


@pytest.mark.parametrize(
    "change, tol",
    [
        # k density: 20 -> 40 per e-fold (40 and 80 agree with each other to 1e-7 in A). The
        # 20/e-fold result is off by 2.4e-5 in A, 7e-5 in A' and ~1e-2 of H^4/(16 pi^2) in
        # Box A near the end of inflation and in reheating (standing waves of modes near
        # the horizon sampled at dlnk = 0.05; the smooth-envelope k reconstruction of
        # DESIGN 2.3.4 would remove it and is not implemented yet).
        ({"modes_per_efold": 40.0}, {"A": 1e-4, "dA": 3e-4, "box": 3e-2}),
        # integrator tolerance 1e-10 -> 1e-11: measured 1e-7, 3e-7, 4e-5
        ({"rtol": 1e-11, "atol": 1e-13}, {"A": 3e-7, "dA": 1e-6, "box": 1e-4}),
        # hand-over 1e-2 -> 3e-3 (the dropped decaying mode, DESIGN: < 1e-9 at x_h = 1e-2)
        ({"handover_x": 3e-3}, {"A": 1e-6, "dA": 1e-5, "box": 1e-4}),
        # stop 30 -> 60 (the Bogoliubov envelope is an adiabatic invariant deep inside)
        ({"stop_x": 60.0}, {"A": 1e-6, "dA": 1e-4, "box": 1e-3}),
        # top of the k grid 40 -> 100 max(aH): measured 2e-10, 1e-7, 3e-7 (DESIGN 3 item 4)
        ({"k_margin": math.log(100.0)}, {"A": 1e-8, "dA": 1e-6, "box": 1e-5}),
    ],
)
def test_exact_method_converges(change, tol):
    # Halving dlnk, tightening the tolerance, moving the hand-over outward, the stop inward
    # and the top of the k grid (the cut-off: DESIGN 3 item 4, "independent of k_c once
    # k_c > 10 max(aH)") change A, A', Box A by less than the stated tolerances, relative to
    # max(|value|, its natural size H^2/(4 pi^2) or H^4/(16 pi^2)). The k density sets A' and Box A
    # through the standing waves of re-entered modes (aliasing at dlnk = 0.05), hence 1e-3.
    model, h, base = _short()
    _, _, new = _short(**change)
    # natural sizes: H^2/(4 pi^2) for A and A', H^4/(16 pi^2) for Box A (DESIGN 3 item 5a),
    # so that zero crossings (A ~ 0 at the first point) do not count as errors
    h2 = np.exp(2 * h.ln_hubble)
    natural = {"A": h2 / (4 * math.pi**2), "dA": h2 / (4 * math.pi**2), "box": h2**2 / (16 * math.pi**2)}
    for name, t in tol.items():
        for seg, s in model.segment_slices.items():
            a, b = base[name][s], new[name][s]
            scale = np.maximum(np.abs(a), natural[name][s])
            err = np.max(np.abs(a - b) / scale)
            assert err < t, (change, name, seg, err)


def test_late_acceleration_unchanged_when_the_history_is_cut_at_today():
    # DESIGN 3 item 5b: a history ending just after today (z = -0.01 instead of -0.5) gives
    # the same A, A', Box A today to 1e-6: modes that exit a second time in the Lambda era
    # are integrated straight through, nothing depends on how far the run continues.
    model, h, base = _short()
    model2, h2, cut = _short(cosmology__final_redshift=-0.01)
    i = int(np.argmin(np.abs(h.efolds)))
    j = int(np.argmin(np.abs(h2.efolds)))
    assert h.efolds[i] == 0.0 and h2.efolds[j] == 0.0
    for name in ("A", "dA", "box"):
        assert abs(cut[name][j] / base[name][i] - 1) < 1e-6, (name, cut[name][j], base[name][i])


def test_gradient_with_respect_to_the_history_is_finite():
    # The self-consistent solver differentiates A today through the mode sum: d A(N=5) /
    # d ln H_nodes must be finite (de Sitter; dA/d ln H < 0 would be unphysical? no sign
    # claim: only finiteness and a non-zero total).
    import equinox as eqx
    import jax
    import jax.numpy as jnp

    sp = _de_sitter()
    out = jnp.array([5.0])
    settings = ModeSettings()
    plan = mode_plan(sp, out, settings)

    def a_of(lnh):
        s2 = HistorySpline(sp.efolds, lnh, sp.epsilon_nodes)
        return exact_propagator(s2, out, plan, ln_mu=0.0, settings=settings)["A"][0]

    g = eqx.filter_jit(jax.grad(a_of))(sp.ln_hubble_nodes)
    assert np.all(np.isfinite(np.asarray(g)))
    # A ~ H^2 (N + ln(mu/H))/(4 pi^2): raising ln H everywhere raises A by ~2A - H^2/(4pi^2).
    total = float(jnp.sum(g))
    expected = 2 * 0.1266509046 - 1 / (4 * math.pi**2)
    assert abs(total / expected - 1) < 1e-3, (total, expected)


def test_power_law_inflation_matches_the_closed_form():
    # Constant eps = 0.1 from the first point (H_start = mu = 1, a_start = 1): DESIGN 3 item
    # 3a says the exact mode sum equals A_mem + A_loc (frozen amplitude H1^2 C(eps), local
    # part with c(eps) and the IR term), which is exact for constant eps, to ~1e-8 at N = 10.
    # Both sides here: our vectorized mode sum and the memory kernel (whose special
    # functions tests/test_propagator_special.py checks against scipy's Hankel functions).
    # Tolerance 1e-6 relative: the exact method's k grid (Simpson at dlnk = 0.05) and
    # rtol 1e-10 give ~1e-7 (de Sitter check above).
    import equinox as eqx
    import jax.numpy as jnp

    from backreact.propagator.memory import memory_kernel_propagator, required_k_nodes

    eps = 0.1
    nodes = jnp.linspace(0.0, 12.0, 121)
    sp = HistorySpline(nodes, -eps * nodes, jnp.full_like(nodes, eps))
    # At N = 10 the infrared-most mode has x = e^{-9}: the kernel's frozen-amplitude
    # treatment of it is exact to O(x^2) ~ 1e-8 (at N = 4 it is 9e-5 off, x = 0.027).
    out = np.array([10.0, 11.0])
    ex = _run(sp, out, ModeSettings(), ln_mu=0.0)
    n_k = required_k_nodes(sp, 12.0, 20.0)
    mk = eqx.filter_jit(
        lambda s, n: memory_kernel_propagator(
            s, n, end_of_inflation=12.0, ln_mu=0.0, prior_variance=0.0, n_k=n_k
        )
    )(sp, jnp.asarray(out))
    np.testing.assert_allclose(ex["A"], np.asarray(mk["A"]), rtol=1e-6)
    np.testing.assert_allclose(ex["dA"], np.asarray(mk["dA"]), rtol=1e-5)
