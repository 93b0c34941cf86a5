"""The memory-kernel propagator (backreact/propagator/memory.py), DESIGN 2.3.3 and section 3.

Histories are built directly as HistorySpline objects (short, synthetic); references are numpy
quadratures of the same kernel over the same spline, or closed forms.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.special as sp

from backreact._jax import jax, jnp
from backreact.propagator import special as S
from backreact.propagator._history import HistorySpline
from backreact.propagator.memory import KAPPA2, VALID_EPS_MIN, memory_kernel_propagator, required_k_nodes

FOUR_PI2 = 4.0 * math.pi**2


def _run(spline, times, n_k, end, ln_mu, **kw):
    return memory_kernel_propagator(
        spline, jnp.asarray(times), end_of_inflation=end, ln_mu=ln_mu, prior_variance=0.0, n_k=n_k, **kw
    )


# ----------------------------------------------------------------- a synthetic full history

N_END = 8.0
LN_H0 = math.log(1e-5)
_NODES = np.linspace(0.0, 19.0, 191)


def _smooth(u):
    u = np.clip(u, 0.0, 1.0)
    return u**3 * (10 - 15 * u + 6 * u * u)


def _smooth_integral(u):
    u = np.clip(u, 0.0, 1.0)
    return 2.5 * u**4 - 3 * u**5 + u**6


# segments: (start, width of the junction, eps before, eps after); inflation eps = e^{(N - 8)/2}
_JUNCTIONS = ((8.0, 0.5, 1.0, 2.0), (13.0, 0.5, 2.0, 1.5), (17.0, 0.5, 1.5, 0.3))


def _synthetic_eps(n):
    """Inflation with eps = e^{(N - 8)/2} rising to 1 at N = 8, then radiation (eps = 2),
    matter (3/2) and an accelerating era (0.3), joined by C^2 steps over half an e-fold."""
    n = np.asarray(n, dtype=float)
    eps = np.exp((np.minimum(n, N_END) - N_END) / 2.0)
    for n0, w, e0, e1 in _JUNCTIONS:
        eps = np.where(n > n0, e0 + (e1 - e0) * _smooth((n - n0) / w), eps)
    return eps


def _synthetic_ln_hubble(n):
    """ln H = ln H0 - int_0^N eps (analytic segment by segment)."""
    n = np.asarray(n, dtype=float)
    m = np.minimum(n, N_END)
    integral = 2.0 * (np.exp((m - N_END) / 2.0) - math.exp(-N_END / 2.0))
    starts = [j[0] for j in _JUNCTIONS] + [np.inf]
    for (n0, w, e0, e1), n_next in zip(_JUNCTIONS, starts[1:]):
        d = np.clip(np.minimum(n, n_next) - n0, 0.0, None)  # time spent in this segment
        integral = integral + e0 * d + (e1 - e0) * (w * _smooth_integral(d / w) + np.clip(d - w, 0.0, None))
    return LN_H0 - integral


def _synthetic_spline(shift=0.0):
    return HistorySpline(
        jnp.asarray(_NODES),
        jnp.asarray(_synthetic_ln_hubble(_NODES) + shift),
        jnp.asarray(_synthetic_eps(_NODES)),
    )


def _stiff_spline():
    """Inflation as in the synthetic history, then a C^2 step (half an e-fold) to eps = 3.5,
    stiffer than kination (w = 4/3): ln H from eps by Simpson's rule on a fine grid."""
    fine = np.linspace(0.0, 19.0, 190001)
    eps = np.exp((np.minimum(fine, N_END) - N_END) / 2.0)
    eps = np.where(fine > N_END, 1.0 + 2.5 * _smooth((fine - N_END) / 0.5), eps)
    step = fine[1] - fine[0]
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (eps[1:] + eps[:-1]) * step)])
    idx = np.searchsorted(fine, _NODES - 1e-12)
    return HistorySpline(jnp.asarray(_NODES), jnp.asarray(LN_H0 - cum[idx]), jnp.asarray(eps[idx]))


def _constant_eps_spline(eps):
    """H = mu = 1 at N = 0 (a_start = 1), constant eps, on the same nodes as the synthetic history."""
    return HistorySpline(jnp.asarray(_NODES), jnp.asarray(-eps * _NODES), jnp.full(_NODES.shape, float(eps)))


_MID = _NODES[:-1] + 0.05  # off the spline nodes (eps_N jumps at nodes)
_DELTA = 1e-4
_REF_TIMES = (10.0, 11.0, 12.5, 15.0, 16.5)  # radiation, matter (and N = 10 for power law)
_TIMES = np.concatenate(
    [_MID, _MID - _DELTA, _MID + _DELTA, _REF_TIMES, [5.0], np.linspace(0.0, 19.0, 800 - 3 * _MID.size - 6)]
)
_I_REF = 3 * _MID.size
_SHIFT = math.log(1e-56)  # shifted lane: H from 1e-5 down to 1e-61 M_p
_N_K = 382  # enough for de Sitter on [0, 19] (required_k_nodes), shared by all lanes


@pytest.fixture(scope="module")
def lanes():
    """All histories in one jit-compiled, vmapped call (also the jit/vmap check), with the third
    derivative (third=True: A, A', A'' are those of the default call, bitwise); lanes:
    0 synthetic, 1 synthetic with ln H and ln mu shifted by ln 1e-56, 2 de Sitter (H = mu = 1),
    3 power law eps = 0.1 (ln mu = 0), 4 the same with ln mu = 1, 5 inflation then eps = 3.5."""
    splines = [
        _synthetic_spline(),
        _synthetic_spline(_SHIFT),
        _constant_eps_spline(0.0),
        _constant_eps_spline(0.1),
        _constant_eps_spline(0.1),
        _stiff_spline(),
    ]
    stacked = jax.tree_util.tree_map(lambda *leaves: jnp.stack(leaves), *splines)
    ln_mu = jnp.asarray([LN_H0, LN_H0 + _SHIFT, 0.0, 0.0, 1.0, LN_H0])
    ends = jnp.asarray([N_END, N_END, 19.0, 19.0, 19.0, N_END])
    times = jnp.asarray(_TIMES)

    @jax.jit
    def run(stacked, ln_mu, ends):
        return jax.vmap(lambda s, m, e: _run(s, times, _N_K, e, m, third=True))(stacked, ln_mu, ends)

    out = jax.tree_util.tree_map(np.asarray, run(stacked, ln_mu, ends))
    return [{k: v[i] for k, v in out.items()} for i in range(6)]


def test_required_k_nodes():
    # n_k must cover ln k_IR .. max ln(aH) at 20 nodes per e-fold (a smaller n_k raises at run time)
    assert required_k_nodes(_constant_eps_spline(0.0), 19.0) == _N_K
    assert required_k_nodes(_constant_eps_spline(0.1), 10.0) == 182
    assert required_k_nodes(_constant_eps_spline(0.1), 10.0, modes_per_efold=40.0) == 362
    assert required_k_nodes(_synthetic_spline(), N_END) <= _N_K


def test_de_sitter_growth_law(lanes):
    # Section 3 item 1: A(N) = (N - e^{-2N}/2)/(4 pi^2), A(5) = 0.1266509046 (growth law:
    # Vilenkin & Ford 1982; Linde 1982; Starobinsky 1982; the e^{-2N} term is the IR-boundary
    # term of DESIGN 2.3.1). H = mu = 1, a_start = 1. The kernel is exact here (C(0) = 1,
    # c(0) = 0, T = 1): measured error 1e-16 (1e-15 relative).
    out = lanes[2]
    n = _TIMES
    e2 = np.exp(-2.0 * n)
    assert np.max(np.abs(out["A"] - (n - e2 / 2) / FOUR_PI2)) < 1e-14
    assert abs(float(out["A"][_I_REF + 5]) - 0.1266509046) < 1e-10  # N = 5
    assert np.max(np.abs(out["dA"] - (1 + e2) / FOUR_PI2)) < 1e-14
    assert np.max(np.abs(out["d2A"] + 2 * e2 / FOUR_PI2)) < 1e-14
    # A''' = 4 e^{-2N}/(4 pi^2) = e^{-2N}/pi^2 (the third derivative of the same closed form)
    assert np.max(np.abs(out["d3A"] - 4 * e2 / FOUR_PI2)) < 1e-14
    # Box A = -(3 + e^{-2N})/(4 pi^2) in de Sitter (section 3 item 5a)
    assert np.max(np.abs(out["box"] + (3 + e2) / FOUR_PI2)) < 1e-14
    assert bool(np.all(out["valid"]))


def test_power_law_memory_closed_form(lanes):
    # Section 3 item 3a: for constant eps the memory integral is
    # A_mem = (1 - eps) C(eps) (1 - e^{-2 eps N})/(8 pi^2 eps) (H_start = mu = 1), and
    # A_loc = (H^2/(4 pi^2)) [c(eps) + ((2 - eps)/2) eps N] - e^{-2N}/(8 pi^2). Measured: 2e-11.
    eps = 0.1
    out = lanes[3]
    n = _TIMES
    h2 = np.exp(-2 * eps * n)
    cf, cl = float(S.freeze_factor(eps)), float(S.local_constant(eps))
    mem = (1 - eps) * cf * (1 - h2) / (8 * math.pi**2 * eps)
    loc = h2 / FOUR_PI2 * (cl + 0.5 * (2 - eps) * eps * n) - np.exp(-2 * n) / (2 * FOUR_PI2)
    assert _TIMES[_I_REF] == 10.0
    assert abs(float(out["memory"][_I_REF]) / mem[_I_REF] - 1.0) < 1e-10  # N = 10
    assert np.max(np.abs(out["memory"] - mem)) < 1e-11
    assert np.max(np.abs(out["local"] - loc)) < 1e-15
    # A' = (1 - eps) C H^2/(4 pi^2) + A_loc', analytic
    dloc = h2 / FOUR_PI2 * (-2 * eps * (cl + 0.5 * (2 - eps) * eps * n) + 0.5 * (2 - eps) * eps)
    dloc = dloc + np.exp(-2 * n) / FOUR_PI2
    assert np.max(np.abs(out["dA"] - ((1 - eps) * cf * h2 / FOUR_PI2 + dloc))) < 1e-15
    # A''' of the same closed forms: A_mem''' = 4 eps^2 (1 - eps) C H^2/(4 pi^2); with
    # g = c(eps) + ((2 - eps)/2) eps N, (H^2 g)''' = H^2 (-8 eps^3 g + 12 eps^2 (2 - eps) eps/2), and
    # the IR term gives e^{-2N}/pi^2. Measured 2.7e-14 (|A'''| <= 0.1): the spline's third
    # derivative of ln H is 6 c3/h^3 (node spacing h = 0.1), so the rounding of ln H ~ 1e-16 becomes
    # a spurious eps_NN ~ 1e-13; tolerance 1e-13.
    g = cl + 0.5 * (2 - eps) * eps * n
    d3loc = h2 / FOUR_PI2 * (-8 * eps**3 * g + 12 * eps**2 * 0.5 * (2 - eps) * eps)
    d3loc = d3loc + np.exp(-2 * n) / math.pi**2
    d3 = 4 * eps**2 * (1 - eps) * cf * h2 / FOUR_PI2 + d3loc
    assert np.max(np.abs(out["d3A"] - d3)) < 1e-13


def test_renormalization_scale_dependence(lanes):
    # A depends on mu only through A_loc: dA/d ln mu = (2 - eps) H^2/(8 pi^2) (DESIGN 2.3.3);
    # two lanes of one vmapped, jit-compiled call differ by exactly that.
    eps = 0.1
    h2 = np.exp(-2 * eps * _TIMES)
    slope = (2 - eps) * h2 / (2 * FOUR_PI2)
    assert np.max(np.abs(lanes[4]["A"] - lanes[3]["A"] - slope)) < 1e-15
    assert np.max(np.abs(lanes[4]["dA"] - lanes[3]["dA"] + 2 * eps * slope)) < 1e-15


def test_synthetic_history_is_what_it_claims():
    # the analytic ln H integrates eps: check against a fine trapezoid of eps
    n = np.linspace(0.0, 19.0, 380001)
    e = _synthetic_eps(n)
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (e[1:] + e[:-1]) * np.diff(n))])
    assert np.max(np.abs(LN_H0 - cum - _synthetic_ln_hubble(n))) < 1e-8


def _reference_memory(spline, times, transfers):
    """(1/(4 pi^2)) int dN1 (1 - eps1) H1^2 C(eps1) (1 - kappa2 eps_N1) T(x), x = aH(N1)/aH(N),
    by Simpson's rule on a fine N1 grid (numpy; C from scipy's gammaln; eps_N by central
    differences of the spline's eps, exact for its piecewise-quadratic eps)."""
    n1 = np.linspace(0.0, N_END, 200001)
    lnh1, eps1 = (np.asarray(v) for v in spline.ln_hubble_and_epsilon(jnp.asarray(n1)))
    d = 1e-6
    eps_up = np.asarray(spline.ln_hubble_and_epsilon(jnp.asarray(n1 + d))[1])
    eps_dn = np.asarray(spline.ln_hubble_and_epsilon(jnp.asarray(n1 - d))[1])
    eps_n = (eps_up - eps_dn) / (2 * d)
    e = np.minimum(eps1, 1.0 - 1e-12)
    inv = 1.0 / (1.0 - e)
    cf = np.exp(2 * sp.gammaln(0.5 + inv) + inv * np.log(4 * (1 - e) ** 2) - math.log(math.pi))
    weight = (1 - eps1) * np.exp(2 * lnh1) * cf * np.maximum(1 - KAPPA2 * eps_n, 0.0) / FOUR_PI2
    h = n1[1] - n1[0]
    simpson = np.full(n1.size, 2.0)
    simpson[1:-1:2] = 4.0
    simpson[0] = simpson[-1] = 1.0
    out = []
    for n, transfer in zip(times, transfers):
        lnh = float(spline.ln_hubble(jnp.asarray(n)))
        x = np.exp(n1 + lnh1 - n - lnh)
        out.append(h / 3 * np.sum(simpson * weight * transfer(x)))
    return out


def test_radiation_and_matter_against_exact_frozen_mode_sums(lanes):
    # DESIGN 2.3.3 / section 3 item 3: in radiation (eps = 2) T = (sin x/x)^2 and in matter
    # (eps = 3/2) T = (3 j_1(2x)/(2x))^2 exactly; the kernel's k-quadrature (20 modes per e-fold)
    # reproduces the sum over exited modes. Measured: 1e-7 in radiation, 1.2e-6 in matter, where
    # the residual (7.8e-7 at 80 modes per e-fold) is the phase average the kernel uses for z > 30
    # and this reference does not.
    spline, out = _synthetic_spline(), lanes[0]

    def rad(x):
        return (np.sin(x) / x) ** 2

    def mat(x):
        z = 2 * x
        return (3 * sp.spherical_jn(1, z) / z) ** 2

    refs = _reference_memory(spline, _REF_TIMES, [rad, rad, rad, mat, mat])
    for i, (n, ref) in enumerate(zip(_REF_TIMES, refs)):
        assert _TIMES[_I_REF + i] == n
        assert abs(float(out["memory"][_I_REF + i]) / ref - 1.0) < 3e-6
    assert np.allclose(out["A"], out["memory"] + out["local"], rtol=1e-15, atol=0)


def test_validity_flag(lanes):
    # DESIGN 2.3.3: the kernel fails where the universe accelerates again after inflation
    # (eps < 1 after the end of inflation), and already as deceleration ends (measured
    # against the exact method: 6e-2 at eps = 1.3-1.4, up to 0.36 below): every N after
    # inflation with eps <= VALID_EPS_MIN = 1.4 is flagged, the rest is valid.
    out = lanes[0]
    eps = np.asarray(_synthetic_spline().ln_hubble_and_epsilon(jnp.asarray(_TIMES))[1])
    expected = (_TIMES <= N_END) | (eps > VALID_EPS_MIN)
    assert np.array_equal(out["valid"], expected)
    assert not np.any(out["valid"][_TIMES > 17.5])
    assert np.all(out["valid"][_TIMES <= N_END]) and np.all(
        out["valid"][(_TIMES > 8.3) & (_TIMES <= 17.0)]
    )  # eps > 1.4 from N ~ 8.2
    # (the spline's eps dips to 0.9985 just after the kink of eps(N) at the end of inflation:
    # a genuine eps < 1 of the interpolated history, and flagged as such)
    for key in ("A", "dA", "d2A", "box"):
        assert out[key].shape == _TIMES.shape and np.all(np.isfinite(out[key]))
    # Stiffer than kination (eps > 3, w > 1: no canonical matter does that) the index is clipped
    # at p = P_MIN = 1/2 and the kernel flagged; it stays finite.
    stiff = lanes[5]
    eps = np.asarray(_stiff_spline().ln_hubble_and_epsilon(jnp.asarray(_TIMES))[1])
    after = _TIMES > N_END
    assert np.any(after & (eps > 3.0)) and np.any(after & (eps > VALID_EPS_MIN) & (eps <= 3.0))
    assert np.array_equal(stiff["valid"][after], (eps > VALID_EPS_MIN)[after] & (eps <= 3.0)[after])
    for key in ("A", "dA", "d2A", "box"):
        assert np.all(np.isfinite(stiff[key]))


def test_derivatives_match_finite_differences_in_constant_eras(lanes):
    # A', A'', A''' are analytic (moving limit during inflation; chain rule at fixed p after
    # it). Where eps is constant (radiation, matter) and during inflation they are the
    # derivatives of A itself: compare with central differences (step 1e-4) off the spline
    # nodes. (In the junctions, where eps changes, the fixed-p derivatives are not those of A:
    # the kernel's index p follows eps(N) and its derivative is not carried.)
    spline, out = _synthetic_spline(), lanes[0]
    m = _MID.size
    a, da, d2a, d3a = out["A"], out["dA"], out["d2A"], out["d3A"]
    fd1 = (a[2 * m : 3 * m] - a[m : 2 * m]) / (2 * _DELTA)
    fd2 = (da[2 * m : 3 * m] - da[m : 2 * m]) / (2 * _DELTA)
    fd3 = (d2a[2 * m : 3 * m] - d2a[m : 2 * m]) / (2 * _DELTA)
    # inflation: 1e-5, because eps_N of the spline jumps at its nodes, so W(ln k) has small
    # steps that the k-quadrature resolves only to first order (measured 2.5e-6, else 1e-9);
    # radiation and matter: measured 3e-7 (the step-size error of the differences).
    # A''' against differences of A'' (relative to the largest |A'''|): measured 1.5e-7
    # in inflation, 1.6e-8 in matter and 2.7e-5 in radiation, where the step error
    # (1e-4)^2/6 |A^(5)| is largest: the kernel's standing waves near z = 30-36 turn at
    # d(2z)/dN = 2z (eps - 1) ~ 70 per e-fold, so |A^(5)| ~ 5e3 |A'''| there; tolerance 1e-6,
    # 1e-4, 1e-6.
    for lo, hi, tol, tol3 in ((0.5, 7.8, 1e-5, 1e-6), (8.6, 12.9, 1e-6, 1e-4), (13.6, 16.9, 1e-6, 1e-6)):
        era = (_MID > lo) & (_MID < hi)
        assert np.max(np.abs(fd1 - da[:m])[era]) < tol * np.max(np.abs(da[:m][era]))
        assert np.max(np.abs(fd2 - d2a[:m])[era]) < tol * np.max(np.abs(d2a[:m][era]))
        assert np.max(np.abs(fd3 - d3a[:m])[era]) < tol3 * np.max(np.abs(d3a[:m][era]))
    lnh, eps = (np.asarray(v) for v in spline.ln_hubble_and_epsilon(jnp.asarray(_TIMES)))
    box = -np.exp(2 * lnh) * (d2a + (3 - eps) * da)
    assert np.max(np.abs(out["box"] - box)) < 1e-13 * np.max(np.abs(box))


def test_extreme_hubble_scales(lanes):
    # H from 1e-5 down to 1e-61 M_p (ln H shifted by ln 1e-56, mu with it): A scales as H^2
    # exactly (k_IR, x and z are unchanged), with no under- or overflow (logs throughout).
    out, low = lanes[0], lanes[1]
    for key, power in (("A", 2), ("dA", 2), ("d2A", 2), ("d3A", 2), ("box", 4)):
        ref = out[key] * math.exp(power * _SHIFT)
        # 1e-9: after the shift ln H ~ -140, so ln(aH) and the exit times N1(k) carry absolute
        # rounding errors ~3e-14, amplified where 1 - eps is small (measured 3e-10)
        assert np.max(np.abs(low[key] - ref)) < 1e-9 * np.max(np.abs(ref))
    assert np.array_equal(low["valid"], out["valid"])


def test_cost_shapes_and_gradients(lanes):
    # Linear cost in the number of output times (one dense T x n_k operation): shapes for T = 800
    # and 200 (timings are not asserted). Gradients with respect to the ln H nodes are finite, and
    # the batched evaluation (time_chunk) gives the same values as the dense one.
    spline, out = _synthetic_spline(), lanes[0]
    assert all(out[k].shape == (800,) for k in ("A", "dA", "d2A", "box", "valid"))
    times = jnp.asarray(_TIMES[::4])

    def total(ln_h_nodes):
        s = HistorySpline(spline.efolds, ln_h_nodes, spline.epsilon_nodes)
        r = _run(s, times, _N_K, N_END, LN_H0, time_chunk=50)
        return jnp.sum(jnp.where(r["valid"], r["A"], 0.0)) * 1e10, r

    (_, r), grad = jax.jit(jax.value_and_grad(total, has_aux=True))(spline.ln_hubble_nodes)
    assert all(r[k].shape == (200,) for k in ("A", "dA", "d2A", "box", "valid"))
    assert np.all(np.isfinite(np.asarray(grad))) and float(jnp.max(jnp.abs(grad))) > 0
    # A to 1e-13. A' and A'' to 1e-11 of their scale: under value_and_grad XLA may order the
    # operations of the kernel differently, and the 0F1 series near z = 12 + p rounds at ~1e-11
    # of max |d^n T/dlnz^n| (docs/propagator_memory_kernel.md section 2; measured 8e-13 here).
    for k, tol in (("A", 1e-13), ("dA", 1e-11), ("d2A", 1e-11)):
        assert np.allclose(np.asarray(r[k]), out[k][::4], rtol=tol, atol=tol * np.max(np.abs(out[k])))
