"""Special functions of the memory kernel (backreact/propagator/special.py), DESIGN 2.3.3, 3.2-3.3b.

References are built with numpy/scipy only (Hankel and Bessel functions, adaptive quadrature),
independently of the JAX implementation.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.special as sp
from scipy.integrate import quad

from backreact._jax import jax, jnp
from backreact.propagator import special as S

GAMMA_E = 0.57721566490153286061


# ----------------------------------------------------------------- power-law inflation mode


def _hankel_mode_m(eps, x):
    """m(x) = k^3 |u|^2 / H(N)^2 of the exact Bunch-Davies mode of power-law inflation.

    Constant eps < 1: conformal time -eta = 1/((1 - eps) aH), v = a u obeys
    v'' + (k^2 - (nu^2 - 1/4)/eta^2) v = 0 with nu = 1/2 + 1/(1 - eps), so
    |u|^2 = (pi/4) (-eta)/a^2 |H^(1)_nu(-k eta)|^2 (Hankel mode; Lyth & Stewart 1992), and with
    x = k/(aH): m = (pi x^3 / (4 (1 - eps))) |H^(1)_nu(x/(1 - eps))|^2.
    """
    nu = 0.5 + 1.0 / (1.0 - eps)
    y = x / (1.0 - eps)
    return math.pi * x**3 / (4.0 * (1.0 - eps)) * np.abs(sp.hankel1(nu, y)) ** 2


def test_freeze_factor_check_values():
    # DESIGN 2.3.3 / section 3 item 2: C(0) = 1, C(1/2) = 9/16, C(0.1) = 0.940998141,
    # dC/deps(0) = -2 (gamma_E + ln 2 - 1).
    assert abs(float(S.freeze_factor(0.0)) - 1.0) < 1e-14
    assert abs(float(S.freeze_factor(0.5)) - 9.0 / 16.0) < 1e-14
    assert abs(float(S.freeze_factor(0.1)) - 0.940998141) < 1e-9
    dc0 = float(jax.grad(S.freeze_factor)(0.0))
    assert abs(dc0 + 2.0 * (GAMMA_E + math.log(2.0) - 1.0)) < 1e-12
    # through gammaln: no overflow as eps -> 1 (Gamma^2 alone overflows above eps = 0.994)
    vals = np.asarray(S.freeze_factor(jnp.asarray([0.99, 0.995, 0.999, 1.0 - 1e-9, 1.0, 1.3])))
    assert np.all(np.isfinite(vals)) and np.all(vals >= 0) and vals[-1] == 0.0 and vals[-2] == 0.0
    assert np.all(
        np.isfinite(np.asarray(jax.vmap(jax.grad(S.freeze_factor))(jnp.asarray([0.2, 0.999, 1.0]))))
    )


@pytest.mark.parametrize("eps", [0.0, 0.1, 0.3, 0.5, 0.8])
def test_freeze_factor_is_late_time_limit_of_hankel_mode(eps):
    # Section 3 item 2 (Hankel mode of power-law inflation: Lyth & Stewart 1992; closed form
    # DESIGN 2.3.3). Mode k = 1 leaves at a1 = 1 with H(N1) = 1; H = a^-eps afterwards.
    # Far outside (x = 1e-5, corrections O(x^2)) 2 k^3 |u|^2 / H(N1)^2 -> C(eps).
    k, x = 1.0, 1e-5
    a = x ** (-1.0 / (1.0 - eps))  # x = k/(aH) = a^-(1 - eps)
    h = a**-eps
    nu = 0.5 + 1.0 / (1.0 - eps)
    minus_eta = 1.0 / ((1.0 - eps) * a * h)
    u2 = math.pi / 4.0 * minus_eta / a**2 * abs(sp.hankel1(nu, k * minus_eta)) ** 2
    assert abs(2.0 * k**3 * u2 - float(S.freeze_factor(eps))) < 1e-8
    # the same mode is Bunch-Davies normalized: 2 k a^2 |u|^2 -> 1 deep inside (x = 1e4)
    assert abs(2.0 * _hankel_mode_m(eps, 1e4) / 1e4**2 - 1.0) < 1e-7


def test_reentry_factor_values():
    # DESIGN 2.3.3 / section 3 item 3: F(2) = 1/2, F(3/2) = 9/32, F(3) = 2/pi.
    assert abs(float(S.reentry_factor(2.0)) - 0.5) < 1e-14
    assert abs(float(S.reentry_factor(1.5)) - 9.0 / 32.0) < 1e-14
    assert abs(float(S.reentry_factor(3.0)) - 2.0 / math.pi) < 1e-14
    assert np.isnan(float(S.reentry_factor(0.5)))
    # large p (eps -> 1+) stays finite through gammaln
    assert np.isfinite(float(S.reentry_factor(1.0 + 1.0 / 25.0)))


# ----------------------------------------------------------------- the local constant c(eps)


def test_local_constant_check_values():
    # DESIGN 2.3.3 / section 3 item 3b: c(0) = 0, c'(0) = 1.40532, c(0.05) = 0.073098177,
    # c(0.1) = 0.153178992.
    assert abs(float(S.local_constant(0.0))) < 1e-15
    assert abs(float(jax.grad(S.local_constant)(0.0)) - 1.40532) < 1e-5
    assert abs(float(S.local_constant(0.05)) - 0.073098177) < 1e-9
    assert abs(float(S.local_constant(0.1)) - 0.153178992) < 1e-9


def test_local_constant_branches_agree():
    # Taylor series (eps < 0.1), Chebyshev expansion (0.1 .. 0.4) and closed form agree where
    # the closed form is well conditioned; the function and its slope are continuous at the
    # switches; the capped form is c(min(eps, 0.4)). (Derivation: docs/propagator_memory_kernel.md.)
    eps = jnp.linspace(0.02, 0.45, 44)
    closed = np.asarray(S._local_constant_closed(eps))
    assert np.max(np.abs(np.asarray(S.local_constant(eps)) - closed)) < 1e-12
    grad = jax.grad(S.local_constant)
    for e0 in (0.1, 0.4):
        jump = float(S.local_constant(e0 + 1e-12)) - float(S.local_constant(e0 - 1e-12))
        assert abs(jump - 2e-12 * float(grad(e0))) < 1e-13
        assert abs(float(grad(e0 - 1e-12)) - float(grad(e0 + 1e-12))) < 1e-8
    assert float(S.local_constant_capped(0.47)) == float(S.local_constant(0.4))
    assert abs(float(S.local_constant_capped(0.25)) - float(S.local_constant(0.25))) < 1e-15


def _local_constant_by_quadrature(eps):
    """c(eps) from the exact mode of power-law inflation (DESIGN 2.3.1 renormalization).

    For constant eps the renormalized A = A_mem + A_loc with A_mem the super-horizon memory,
    so (H^2/(4 pi^2)) c = (H^2/(2 pi^2)) lim [int_0^{x_c} dx/x (m - x^2/2 - (C/2) x^-q theta(1 - x))
    - ((2 - eps)/4) ln x_c], q = 2 eps/(1 - eps):
    c = 2 [int_0^1 dx/x (m - (C/2) x^-q) - 1/4 + int_1^inf dx/x (m - x^2/2 - (2 - eps)/4)].
    Small x: m - (C/2)x^-q from the series of J_(+-nu) (no cancellation); large x: J^2 + Y^2 of
    scipy and the asymptotic tail (DLMF 10.18.17) beyond x = 60.
    """
    nu = 0.5 + 1.0 / (1.0 - eps)
    q = 2.0 * eps / (1.0 - eps)
    cfree = float(S.freeze_factor(eps))
    pref = math.pi / (4.0 * (1.0 - eps) * math.sin(nu * math.pi) ** 2)

    def small(x):
        y = x / (1.0 - eps)
        lead = (y / 2.0) ** -nu / sp.gamma(1.0 - nu)
        w = -(y * y) / 4.0
        term, dsum = 1.0, 0.0
        for n in range(1, 40):
            term *= w / n
            dsum += term / sp.gamma(n + 1.0 - nu)
        diff = (y / 2.0) ** -nu * dsum  # J_(-nu) - lead
        jp, jm = sp.jv(nu, y), sp.jv(-nu, y)
        m_minus_lead = pref * x**3 * (jp * jp - 2.0 * math.cos(nu * math.pi) * jp * jm + diff * (jm + lead))
        return m_minus_lead / x

    # the subtracted leading term is exactly (C/2) x^-q: a check of the closed form of C
    x0 = 1e-3
    y0 = x0 / (1.0 - eps)
    lead_m = pref * x0**3 * ((y0 / 2.0) ** -nu / sp.gamma(1.0 - nu)) ** 2
    assert abs(lead_m / (0.5 * cfree * x0**-q) - 1.0) < 1e-12

    def large(x):
        return (_hankel_mode_m(eps, x) - 0.5 * x * x - 0.25 * (2.0 - eps)) / x

    i1 = quad(small, 0.0, 1.0, epsabs=1e-13, epsrel=1e-11, limit=200)[0]
    big = 60.0
    i2 = sum(
        quad(large, a, b, epsabs=1e-13, epsrel=1e-11, limit=200)[0] for a, b in ((1.0, 10.0), (10.0, big))
    )
    # beyond x = 60: m = (x^2/2) sum_k sigma_k ((1 - eps)/x)^(2k), the asymptotic expansion of
    # J^2 + Y^2 (DLMF 10.18.17); sigma_0 = 1 and sigma_1 = (2 - eps)/(2 (1 - eps)^2) are subtracted
    mu = 4.0 * nu * nu
    tail, sigma = 0.0, 1.0
    for kk in range(1, 7):
        sigma *= (2 * kk - 1) / (2 * kk) * (mu - (2 * kk - 1) ** 2) / 4.0
        if kk >= 2:
            tail += sigma * (1 - eps) ** (2 * kk) * big ** (2 - 2 * kk) / (2.0 * (2 * kk - 2))
    return 2.0 * (i1 - 0.25 + i2 + tail)


@pytest.mark.parametrize("eps", [0.05, 0.1, 0.3])
def test_local_constant_equals_hankel_quadrature(eps):
    # Section 3 item 3b: closed form of DESIGN 2.3.3 vs direct quadrature of the Hankel mode.
    assert abs(_local_constant_by_quadrature(eps) - float(S.local_constant(eps))) < 1e-9


def _mode_sum_power_law(eps, n, x_cut=200.0):
    """Renormalized A(N) of the exact power-law mode sum, DESIGN 2.3.1 (H_start = mu = 1, a_start = 1).

    A = (1/(2 pi^2)) int_{k_IR}^{k_c} dk k^2 [M - 1/(2 k a^2)] - k_IR^2/(8 pi^2 a^2)
        - ((2 - eps) H^2/(8 pi^2)) ln(k_c/(a mu)) + (3 V^2 - V_etaeta)/(64 pi^2 a^2 k_c^2),
    in x = k/(aH): k^2 M dk = H^2 m(x) dx/x; V = (nu^2 - 1/4)/eta^2.
    """
    h = math.exp(-eps * n)
    x_ir = math.exp(-(1.0 - eps) * n)  # k_IR = 1, aH = e^{(1 - eps) N}

    def f(lnx):
        x = math.exp(lnx)
        return _hankel_mode_m(eps, x) - 0.5 * x * x

    edges = np.unique(np.concatenate([np.arange(math.log(x_ir), 0.0, 5.0), [0.0, 2.0, math.log(x_cut)]]))
    integral = sum(
        quad(f, a, b, epsabs=1e-14, epsrel=1e-11, limit=200)[0] for a, b in zip(edges[:-1], edges[1:])
    )
    nu2 = (0.5 + 1.0 / (1.0 - eps)) ** 2 - 0.25
    tail = h * h * nu2 * (3.0 * nu2 - 6.0) * (1.0 - eps) ** 4 / (64.0 * math.pi**2 * x_cut**2)
    return (
        h * h * integral / (2.0 * math.pi**2)
        - math.exp(-2.0 * n) / (8.0 * math.pi**2)
        - (2.0 - eps) * h * h / (8.0 * math.pi**2) * math.log(x_cut * h)
        + tail
    )


def _closed_form_power_law(eps, n):
    """A_mem + A_loc for constant eps (DESIGN 2.3.3): memory (1 - eps) C (1 - H^2)/(8 pi^2 eps)."""
    h2 = math.exp(-2.0 * eps * n)
    cf, cl = float(S.freeze_factor(eps)), float(S.local_constant(eps))
    mem = (1.0 - eps) * cf * (1.0 - h2) / (8.0 * math.pi**2 * eps)
    loc = h2 / (4.0 * math.pi**2) * (cl + 0.5 * (2.0 - eps) * eps * n) - math.exp(-2.0 * n) / (
        8.0 * math.pi**2
    )
    return mem + loc


def test_power_law_mode_sum_equals_memory_plus_local():
    # Section 3 item 3a: the exact mode sum equals A_mem (with c(eps) and the IR term) to ~1e-8
    # at N = 10 for eps = 0.1 (measured: ~1e-11); late-time limit (1 - eps) C/(8 pi^2 eps).
    eps = 0.1
    for n, tol in ((10.0, 1e-8), (40.0, 1e-9)):
        assert abs(_mode_sum_power_law(eps, n) - _closed_form_power_law(eps, n)) < tol
    limit = (1.0 - eps) * float(S.freeze_factor(eps)) / (8.0 * math.pi**2 * eps)
    assert abs(_closed_form_power_law(eps, 400.0) - limit) < 1e-15
    assert abs(_mode_sum_power_law(eps, 80.0) - limit) < 1e-5 * limit


# ----------------------------------------------------------------- the Bessel transfer T(p, z)


def _transfer_scipy(p, z):
    nu = p - 0.5
    lead = np.exp(sp.gammaln(p + 0.5) - nu * np.log(z / 2.0))
    g = lead * sp.jv(nu, z)
    dg = -lead * sp.jv(nu + 1.0, z)  # d/dz (z^-nu J_nu) = -z^-nu J_(nu+1)
    return g * g, 2.0 * g * dg


def test_transfer_against_scipy_bessel():
    # DESIGN 2.3.3: T = [Gamma(p + 1/2) (z/2)^(1/2 - p) J_(p - 1/2)(z)]^2, vs scipy.special.jv to
    # 1e-9 absolute (measured: 5e-12) for 0 < p <= 25, z <= 36, with dT/dz.
    ps = np.concatenate([np.linspace(0.03, 25.0, 47), [1.0, 2.0, 0.5, 12.0]])
    zs = np.linspace(1e-3, 36.0, 721)
    P, Z = np.meshgrid(ps, zs, indexing="ij")
    t, dt = jax.jit(S.bessel_transfer)(jnp.asarray(P), jnp.asarray(Z))
    tr, dtr = _transfer_scipy(P, Z)
    assert np.max(np.abs(np.asarray(t) - tr)) < 1e-9
    assert np.max(np.abs(np.asarray(dt) - dtr)) < 1e-9
    t0, dt0 = S.bessel_transfer(3.0, 0.0)
    assert float(t0) == 1.0 and float(dt0) == 0.0


def test_transfer_equals_frozen_radiation_and_matter_modes():
    # Section 3 item 3: the exact frozen-mode solutions sin(k eta)/(k eta) (radiation, p = 1,
    # z = x) and 3 j_1(k eta)/(k eta) (matter, p = 2, z = 2x), x = k/(aH).
    x = np.linspace(1e-3, 15.0, 400)
    t_rad, _ = S.bessel_transfer(1.0, jnp.asarray(x))
    assert np.max(np.abs(np.asarray(t_rad) - (np.sin(x) / x) ** 2)) < 1e-12
    z = 2.0 * x
    t_mat, _ = S.bessel_transfer(2.0, jnp.asarray(z))
    assert np.max(np.abs(np.asarray(t_mat) - (3.0 * sp.spherical_jn(1, z) / z) ** 2)) < 1e-12


def test_transfer_phase_average_deep_inside():
    # DESIGN 2.3.3: the average of T deep inside is F(eps) (a(N2)/a(N))^2; with
    # z = p (a/a2)^(eps - 1): (a2/a)^2 = (z/p)^(-2p), so <T z^2p> -> F p^2p (to 1e-6 at z ~ 5000).
    z0 = 5000.0
    z = z0 + np.linspace(0.0, 200.0 * math.pi, 40001)  # 200 periods of cos 2z
    for eps in (3.0, 2.0, 1.5, 1.25):
        p = 1.0 / (eps - 1.0)
        tz = _transfer_scipy(p, z)[0] * (z / p) ** (2.0 * p)
        avg = np.trapezoid(tz, z) / (z[-1] - z[0])
        assert abs(avg / float(S.reentry_factor(eps)) - 1.0) < 1e-6
    # the kernel's large-z form: exact averages of the radiation and matter modes,
    # <(sin x/x)^2> = 1/(2 x^2), <(3 j_1(z)/z)^2> = 9 (1 + 1/z^2)/(2 z^4), and (J^2 + Y^2)/2
    zz = np.linspace(30.0, 500.0, 60)
    assert np.max(np.abs(np.asarray(S.bessel_transfer_average(1.0, zz)) * 2 * zz**2 - 1.0)) < 1e-13
    ref_m = 4.5 * (1.0 + 1.0 / zz**2) / zz**4
    assert np.max(np.abs(np.asarray(S.bessel_transfer_average(2.0, zz)) / ref_m - 1.0)) < 1e-13
    for p in (0.3, 1.7, 3.3, 6.0):
        nu = p - 0.5
        ref = (
            np.exp(2 * sp.gammaln(p + 0.5) - 2 * nu * np.log(zz / 2))
            * (sp.jv(nu, zz) ** 2 + sp.yv(nu, zz) ** 2)
            / 2
        )
        assert np.max(np.abs(np.asarray(S.bessel_transfer_average(p, zz)) / ref - 1.0)) < 1e-12


def test_transfer_kernel_blend_and_log_derivatives():
    # The kernel used by the memory method: exact T for z <= 30, its phase average for z >= 36,
    # a C^3 blend in ln z in between; its ln z derivatives (from the Bessel equation) agree with
    # finite differences everywhere, including across the blend.
    for p in (0.5, 1.0, 1.7, 2.0, 6.0):
        z = np.exp(np.linspace(math.log(0.05), math.log(60.0), 901))
        jet = [np.asarray(v) for v in S.transfer_kernel_lnz(p, jnp.asarray(z))]
        t_ex = np.asarray(S.bessel_transfer(p, jnp.asarray(z))[0])
        t_av = np.asarray(S.bessel_transfer_average(p, jnp.asarray(np.maximum(z, 30.0))))
        # the same series on both paths: equal up to the rounding of differently fused code;
        # T <= 1 (T(0) = 1, zeros of J in between), so 1e-15 absolute is a few ulps
        assert np.max(np.abs(jet[0] - t_ex)[z <= 30.0]) < 1e-15
        assert np.max(np.abs(jet[0] - t_av)[z >= 36.0]) < 1e-15
        h = 1e-5
        for order in range(3):
            up = np.asarray(S.transfer_kernel_lnz(p, jnp.asarray(z * math.exp(h)))[order])
            dn = np.asarray(S.transfer_kernel_lnz(p, jnp.asarray(z * math.exp(-h)))[order])
            fd = (up - dn) / (2 * h)
            scale = np.max(np.abs(jet[order + 1])) + 1e-300
            assert np.max(np.abs(fd - jet[order + 1])) < 1e-6 * scale  # O(h^2 (2z)^2) truncation
        t_k, dt_k = S.transfer_kernel(p, jnp.asarray(z))
        assert np.allclose(np.asarray(t_k), jet[0], rtol=0, atol=0)
        assert np.allclose(np.asarray(dt_k) * z, jet[1], rtol=1e-14, atol=1e-300)


def test_transfer_differentiable_in_p():
    # Gradients with respect to the index p (the history enters through eps) are finite and
    # match finite differences, on both the series and the Hankel branch.
    def f(p):
        z = jnp.asarray([0.5, 5.0, 11.0, 20.0, 33.0, 80.0])
        return jnp.sum(S.transfer_kernel_lnz(p, z)[0] * jnp.arange(1.0, 7.0))

    f_jit, g_jit = jax.jit(f), jax.jit(jax.grad(f))
    for p in (0.7, 1.3, 2.0, 9.0):
        g = float(g_jit(p))
        fd = (float(f_jit(p + 1e-6)) - float(f_jit(p - 1e-6))) / 2e-6
        assert math.isfinite(g) and abs(g - fd) < 1e-6 * max(1.0, abs(g))


def test_kernel_rows_equal_the_reference_kernel():
    # kernel_jet_rows is transfer_kernel_lnz with what depends on p alone computed once per p
    # (the memory sum evaluates many z at one p): same branches and truncations, another order
    # of floating-point operations. So they agree to the reference's rounding, which near
    # z = 12 + p (cancellation in the 0F1 series) is ~1e-11 of max_z |d^n T/dlnz^n| (docs
    # section 2); measured 1.8e-13, 6e-12, 1.8e-11, 2.8e-11 for n = 0..3. T also against scipy,
    # to the 1e-9 of test_transfer_against_scipy_bessel.
    ps = np.concatenate([[0.5, 0.75, 1.0, 1.5, 2.0, 3.0, 7.3, 13.0, 25.0], np.linspace(0.6, 24.0, 12)])
    lam = np.linspace(math.log(1e-3), math.log(80.0), 1201)
    lam2 = np.broadcast_to(lam, (ps.size, lam.size))
    p, lam_j = jnp.asarray(ps), jnp.asarray(lam2)
    rows = jax.jit(lambda p, lam: S.kernel_jet_rows(S.kernel_coefficients(p), p, lam, order=3))(p, lam_j)
    ref = jax.jit(S.transfer_kernel_lnz)(p[:, None], jnp.exp(lam_j))
    for n, tol in enumerate((1e-12, 3e-11, 1e-10, 1e-10)):
        scale = np.max(np.abs(np.asarray(ref[n])), axis=1, keepdims=True)
        assert np.max(np.abs(np.asarray(rows[n]) - np.asarray(ref[n])) / scale) < tol, n
    z = np.exp(lam2)
    below = z <= 30.0
    tr, _ = _transfer_scipy(np.broadcast_to(ps[:, None], z.shape), z)
    assert np.max(np.abs(np.asarray(rows[0]) - tr)[below]) < 1e-9
