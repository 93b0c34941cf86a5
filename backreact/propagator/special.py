"""Special functions of the memory kernel (DESIGN 2.3.3), in JAX (float64, jit-able, differentiable).

- ``freeze_factor`` C(eps): frozen super-horizon amplitude of a massless mode in power-law
  inflation, M = H(N1)^2 C(eps) / (2 k^3), from the late-time limit of the Hankel-function mode.
- ``reentry_factor`` F(eps): phase-averaged transfer deep inside the horizon after re-entry
  during an era of constant eps > 1, <T> -> F(eps) (a(N2)/a(N))^2.
- ``local_constant`` c(eps): finite constant of the local (renormalized, minimally subtracted)
  part of the coincident propagator; its 1/eps poles cancel, so near eps = 0 a Taylor series
  (and a Chebyshev expansion up to 0.4) is used. c has a pole at eps = 1/2; the local part uses
  ``local_constant_capped`` = c(min(eps, LOCAL_EPS_MAX)).
- ``bessel_transfer`` T(p, z) = 0F1(; p + 1/2; -z^2/4)^2
  = [Gamma(p + 1/2) (z/2)^(1/2 - p) J_(p - 1/2)(z)]^2, the uniform Bessel kernel of a frozen mode
  in an era of constant eps > 1 (p = 1/(eps - 1), z = p k/(aH)); ``transfer_kernel`` is the same
  function replaced smoothly by its phase average above z = Z_AVERAGE_START.
- ``kernel_coefficients`` / ``kernel_jet_rows``: ``transfer_kernel_lnz`` at many z for one p,
  with what depends on p alone computed once (the memory sum's inner loop); the reference
  functions above stay as they are and the tests compare the two.

Everything goes through gammaln/digamma: Gamma(nu)^2 overflows for eps > 0.994. The derivations
and measured accuracies are in docs/propagator_memory_kernel.md.
"""

from __future__ import annotations

import math

import numpy as np
from jax.scipy.special import digamma, gammaln

from .._jax import jax, jnp

__all__ = [
    "LOCAL_EPS_MAX",
    "P_MAX",
    "P_MIN",
    "Z_AVERAGE_END",
    "Z_AVERAGE_START",
    "bessel_transfer",
    "bessel_transfer_average",
    "freeze_factor",
    "kernel_coefficients",
    "kernel_jet_rows",
    "local_constant",
    "local_constant_capped",
    "log_freeze_factor",
    "reentry_factor",
    "transfer_kernel",
    "transfer_kernel_lnz",
]

P_MAX = 25.0
"""Cap of the kernel index p = 1/(eps - 1) (it diverges as eps -> 1+)."""
P_MIN = 0.5
"""Floor of p: eps <= 3 (w <= 1, kination) in every history of canonical matter."""
LOCAL_EPS_MAX = 0.4
"""The local part uses c(min(eps, LOCAL_EPS_MAX)): c has a pole at eps = 1/2."""
Z_AVERAGE_START = 30.0
"""``transfer_kernel`` equals T(p, z) exactly for z <= Z_AVERAGE_START ..."""
Z_AVERAGE_END = 36.0
"""... and its phase average for z >= Z_AVERAGE_END (C^3 blend in ln z in between)."""

_SERIES_EPS = 0.1  # c(eps) by its Taylor series below this, by the closed form above
# Taylor coefficients of c(eps) about eps = 0 (c(0) = 0), a_1 ... a_24: Cauchy integrals of the
# closed form on |eps| = 1/4 at 60 significant digits (mpmath, 512 nodes), computed once.
# Radius of convergence 1/2 (the pole of c); truncation error at eps = 0.1 below 1e-16.
_C_TAYLOR = (
    1.405315745747627696815739,
    1.025540052849323194752352,
    1.950915600448108123806094,
    3.57467742098511709713927,
    6.746882039631215927617227,
    13.00348813868858852749573,
    25.38481308453160761919795,
    49.94859322462174527056356,
    98.78031414600231557910535,
    196.0071170603284501945642,
    389.818278949253956029129,
    776.4957623938027434888521,
    1548.459879628569151900927,
    3090.337586349480059363251,
    6171.064654669712234211852,
    12328.03857671030804139399,
    24635.34744770704330685021,
    49240.11266447981707762826,
    98435.0021431910781845317,
    196802.9990460023245637656,
    393506.5534129363296519171,
    786865.307676301846724229,
    1573510.682368059328281317,
    3146693.751278768892440253,
)

# Chebyshev coefficients of c(eps) on [0.1, 0.4] (t = (2 eps - 0.5)/0.3), from the closed form at
# 50 digits on 48 Chebyshev nodes (mpmath), computed once; 34 terms, truncation error < 1e-16.
_CHEB_LO, _CHEB_HI = 0.1, 0.4
_C_CHEB = (
    0.57928969447063313087,
    0.51556996621276601353,
    0.11734163581513196684,
    0.036854917352917583287,
    0.011914765111492321203,
    0.0039151408741505486571,
    0.0012959097062313838376,
    0.00043042246587399627659,
    0.00014320443036326417334,
    0.000047686922839013549167,
    0.000015887034361211025303,
    5.2941180794386161316e-6,
    1.7644215070853802488e-6,
    5.8808837390178408958e-7,
    1.9601987396821369431e-7,
    6.5338191216800462719e-8,
    2.1779070695949813398e-8,
    7.2596298419251398319e-9,
    2.4198654254867190141e-9,
    8.0661973348306604442e-10,
    2.6887285935040558867e-10,
    8.9624214916931382232e-11,
    2.9874725012776834729e-11,
    9.9582391997035597055e-12,
    3.3194126069977156367e-12,
    1.1064707835101624759e-12,
    3.6882357859721461106e-13,
    1.2294118990568915343e-13,
    4.0980396084300698956e-14,
    1.3660131925548235845e-14,
    4.5533772894248104472e-15,
    1.5177924262539227367e-15,
    5.059308080895281736e-16,
    1.6864360257328635932e-16,
)

_LN_PI = math.log(math.pi)
_LN_2 = math.log(2.0)


# ------------------------------------------------------------------ C, F, c


@jax.jit
def log_freeze_factor(eps):
    """ln C(eps) for eps < 1 (-inf for eps >= 1, where C -> 0 faster than any power)."""
    eps = jnp.asarray(eps, dtype=float)
    inside = eps < 1.0
    e = jnp.where(inside, eps, 0.0)  # safe value for the unused branch (finite gradients)
    inv = 1.0 / (1.0 - e)
    val = 2.0 * gammaln(0.5 + inv) + inv * (2.0 * _LN_2 + 2.0 * jnp.log1p(-e)) - _LN_PI
    return jnp.where(inside, val, -jnp.inf)


@jax.jit
def freeze_factor(eps):
    """C(eps) = (1/pi) Gamma^2(1/2 + 1/(1 - eps)) [4 (1 - eps)^2]^(1/(1 - eps)); 0 for eps >= 1.

    Exact frozen amplitude |u|^2 = H(N1)^2 C / (2 k^3) of a massless mode in power-law inflation
    (Hankel mode; Lyth & Stewart 1992). C(0) = 1, C(1/2) = 9/16.
    """
    eps = jnp.asarray(eps, dtype=float)
    inside = eps < 1.0
    return jnp.where(inside, jnp.exp(log_freeze_factor(jnp.where(inside, eps, 0.0))), 0.0)


@jax.jit
def reentry_factor(eps):
    """F(eps) = (1/(2 pi)) Gamma^2(1/2 + p) [4/p^2]^p, p = 1/(eps - 1), for eps > 1 (NaN otherwise).

    Phase average of the transfer deep inside: <T> -> F (a(N2)/a(N))^2. F(2) = 1/2,
    F(3/2) = 9/32, F(3) = 2/pi.
    """
    eps = jnp.asarray(eps, dtype=float)
    ok = eps > 1.0
    e = jnp.where(ok, eps, 2.0)
    p = 1.0 / (e - 1.0)
    val = jnp.exp(2.0 * gammaln(0.5 + p) + p * (2.0 * _LN_2 - 2.0 * jnp.log(p)) - _LN_2 - _LN_PI)
    return jnp.where(ok, val, jnp.nan)


def _local_constant_closed(eps):
    nu = 0.5 + 1.0 / (1.0 - eps)
    psi = digamma(1.5 - nu) + digamma(-0.5 - nu) + digamma(1.5 + nu) + digamma(-0.5 + nu)
    return freeze_factor(eps) * (1.0 - eps) / (2.0 * eps) + 0.5 * (2.0 - eps) * (
        _LN_2 - 0.5 - jnp.log1p(-eps) - 0.25 * psi
    )


def _horner(coefs, x):
    """sum_n coefs[n] x^(n+1) (no constant term), by a rolled Horner loop."""
    c = jnp.asarray(coefs[::-1])

    def body(i, acc):
        return (acc + c[i]) * x

    return jax.lax.fori_loop(0, c.shape[0], body, jnp.zeros_like(x))


def _local_constant_series(eps):
    return _horner(_C_TAYLOR, eps)


def _local_constant_cheb(eps):
    t = (2.0 * eps - (_CHEB_LO + _CHEB_HI)) / (_CHEB_HI - _CHEB_LO)
    c = jnp.asarray(_C_CHEB[:0:-1])  # a_N ... a_1

    def body(i, b):  # Clenshaw
        b1, b2 = b
        return 2.0 * t * b1 - b2 + c[i], b1

    b1, b2 = jax.lax.fori_loop(0, c.shape[0], body, (jnp.zeros_like(t), jnp.zeros_like(t)))
    return t * b1 - b2 + _C_CHEB[0]


def _local_constant_poly(eps):
    """Taylor series below 0.1, Chebyshev expansion on [0.1, 0.4] (use for eps <= 0.4)."""
    small = eps < _SERIES_EPS
    series = _local_constant_series(jnp.where(small, eps, 0.0))
    cheb = _local_constant_cheb(jnp.where(small, _SERIES_EPS, eps))
    return jnp.where(small, series, cheb)


@jax.jit
def local_constant_capped(eps):
    """c(min(eps, LOCAL_EPS_MAX)), the form the local part uses (DESIGN 2.3.3).

    Taylor series about 0 for eps < 0.1 and a Chebyshev expansion on [0.1, 0.4] (both agree
    with the closed form to 1e-15); polynomial, so its derivatives are cheap and exact.
    At and above the cap the value is c(0.4) and the derivative zero.
    """
    eps = jnp.asarray(eps, dtype=float)
    return _local_constant_poly(jnp.where(eps < LOCAL_EPS_MAX, eps, LOCAL_EPS_MAX))


@jax.jit
def local_constant(eps):
    """c(eps), the finite constant of the local part (DESIGN 2.3.3), for eps < 1/2.

    c(eps) = C(eps)(1 - eps)/(2 eps) + ((2 - eps)/2) [ln 2 - 1/2 - ln(1 - eps)
             - (1/4)(psi(3/2 - nu) + psi(-1/2 - nu) + psi(3/2 + nu) + psi(-1/2 + nu))],
    nu = 1/2 + 1/(1 - eps). The 1/eps poles cancel: Taylor series (radius 1/2) for eps < 0.1,
    Chebyshev expansion on [0.1, 0.4], the closed form above 0.4. c(0) = 0,
    c'(0) = 1.405315746. Pole at eps = 1/2: the local part uses c(min(eps, LOCAL_EPS_MAX)).
    """
    eps = jnp.asarray(eps, dtype=float)
    low = eps <= LOCAL_EPS_MAX
    closed = _local_constant_closed(jnp.where(low, 0.45, eps))
    return jnp.where(low, _local_constant_poly(jnp.where(low, eps, 0.0)), closed)


# ------------------------------------------------------------------ T(p, z)

_SERIES_TERMS = 64  # 0F1 power series (enough for z <= 12 + p, p <= 25)
_HANKEL_TERMS = 24  # Hankel asymptotic expansion of J_nu (terminates for integer p)
_AVERAGE_TERMS = 10  # asymptotic expansion of J_nu^2 + Y_nu^2
_SERIES_ZMAX_OFFSET = 12.0  # the series is used for z <= 12 + p, the Hankel expansion above


def _series_g(p, z):
    """g = 0F1(; b; -z^2/4) and G1 = z dg/dz by the power series (b = p + 1/2)."""
    b = p + 0.5
    w = -0.25 * z * z

    def body(n, c):
        t, s0, s1 = c
        t = t * w / (n * (b + n - 1.0))
        return t, s0 + t, s1 + 2.0 * n * t

    one = jnp.ones_like(z)
    _, s0, s1 = jax.lax.fori_loop(1, _SERIES_TERMS, body, (one, one, jnp.zeros_like(z)))
    return s0, s1


def _hankel_g(p, z):
    """g and G1 = z dg/dz from the Hankel asymptotic expansion of J_nu, nu = p - 1/2."""
    nu = p - 0.5
    mu = 4.0 * nu * nu
    y = 1.0 / z

    def body(k, c):
        term, P, Q, P1, Q1 = c
        kf = k.astype(float)
        term = term * (mu - (2.0 * kf - 1.0) ** 2) * y / (8.0 * kf)
        sgn = jnp.where((k // 2) % 2 == 0, 1.0, -1.0) * term
        even = k % 2 == 0
        P = jnp.where(even, P + sgn, P)
        P1 = jnp.where(even, P1 - kf * sgn, P1)
        Q = jnp.where(even, Q, Q + sgn)
        Q1 = jnp.where(even, Q1, Q1 - kf * sgn)
        return term, P, Q, P1, Q1

    one, zero = jnp.ones_like(z), jnp.zeros_like(z)
    _, P, Q, P1, Q1 = jax.lax.fori_loop(1, _HANKEL_TERMS, body, (one, one, zero, zero, zero))
    om = z - (0.5 * nu + 0.25) * math.pi
    co, si = jnp.cos(om), jnp.sin(om)
    amp = jnp.sqrt(2.0 / (math.pi * z))
    J = amp * (P * co - Q * si)
    zJp = amp * (-0.5 * (P * co - Q * si) + P1 * co - Q1 * si - z * (P * si + Q * co))
    lead = jnp.exp(gammaln(p + 0.5) - nu * jnp.log(0.5 * z))
    return lead * J, lead * (zJp - nu * J)


def _exact_g(p, z):
    """g and G1 = z g_z: series for z <= 12 + p, Hankel expansion above (both branches safe)."""
    zsw = _SERIES_ZMAX_OFFSET + p
    use_series = z <= zsw
    gs, g1s = _series_g(p, jnp.minimum(z, zsw))
    gh, g1h = _hankel_g(p, jnp.maximum(z, zsw))
    return jnp.where(use_series, gs, gh), jnp.where(use_series, g1s, g1h)


def _exact_lnz_jet(p, z):
    """T = g^2 and its first three derivatives in ln z, from g, G1 and the Bessel equation
    g_zz + (2p/z) g_z + g = 0 (G2 = z^2 g_zz, G3 = z^3 g_zzz; no division by z)."""
    g, g1 = _exact_g(p, z)
    z2 = z * z
    g2 = -2.0 * p * g1 - z2 * g
    g3 = 2.0 * p * g1 - 2.0 * p * g2 - z2 * g1
    t0 = g * g
    zt1 = 2.0 * g * g1  # z T_z
    z2t2 = 2.0 * (g1 * g1 + g * g2)  # z^2 T_zz
    z3t3 = 2.0 * (3.0 * g1 * g2 + g * g3)  # z^3 T_zzz
    return t0, zt1, zt1 + z2t2, zt1 + 3.0 * z2t2 + z3t3


@jax.jit
def bessel_transfer(p, z):
    """(T, dT/dz) of T(p, z) = 0F1(; p + 1/2; -z^2/4)^2 = [Gamma(p+1/2) (z/2)^(1/2-p) J_(p-1/2)(z)]^2.

    For 0 < p <= 25, z >= 0: power series for z <= 12 + p, Hankel expansion above; absolute
    accuracy better than 1e-11 for z <= 36 (see the docs). No phase averaging here.
    """
    p = jnp.asarray(p, dtype=float)
    z = jnp.asarray(z, dtype=float)
    g, g1 = _exact_g(p, z)
    zs = jnp.where(z > 0, z, 1.0)
    dg = jnp.where(z > 0, g1 / zs, 0.0)
    return g * g, 2.0 * g * dg


def _average_lnz_jet(p, z):
    """Phase average <T> = Gamma(p+1/2)^2 (z/2)^(1-2p) (J^2 + Y^2)_(p-1/2)(z) / 2 and its
    ln z derivatives; J^2 + Y^2 from its asymptotic expansion in 1/z^2 (DLMF 10.18.17)."""
    nu = p - 0.5
    mu = 4.0 * nu * nu
    lam = jnp.log(z)
    e = jnp.exp(2.0 * gammaln(p + 0.5) + 2.0 * nu * _LN_2 - _LN_PI - 2.0 * p * lam)
    y2 = 1.0 / (z * z)

    def body(k, c):
        term, s0, s1, s2, s3 = c
        kf = k.astype(float)
        term = term * ((2.0 * kf - 1.0) / (2.0 * kf)) * (mu - (2.0 * kf - 1.0) ** 2) * 0.25 * y2
        d = -2.0 * kf
        return term, s0 + term, s1 + d * term, s2 + d * d * term, s3 + d * d * d * term

    one, zero = jnp.ones_like(z), jnp.zeros_like(z)
    _, *s = jax.lax.fori_loop(1, _AVERAGE_TERMS, body, (one, one, zero, zero, zero))
    a = -2.0 * p
    t0 = e * s[0]
    t1 = e * (a * s[0] + s[1])
    t2 = e * (a * a * s[0] + 2.0 * a * s[1] + s[2])
    t3 = e * (a**3 * s[0] + 3.0 * a * a * s[1] + 3.0 * a * s[2] + s[3])
    return t0, t1, t2, t3


@jax.jit
def bessel_transfer_average(p, z):
    """Phase average of T(p, z) for large z: Gamma(p+1/2)^2 (z/2)^(1-2p)/(pi z) [1 + p(p-1)/(2 z^2)
    + ...] = F(eps) (a(N2)/a(N))^2 [1 + O(z^-2)]; exact for p = 1 and p = 2."""
    p = jnp.asarray(p, dtype=float)
    z = jnp.asarray(z, dtype=float)
    return _average_lnz_jet(p, z)[0]


_LN_ZA = math.log(Z_AVERAGE_START)
_LN_ZB = math.log(Z_AVERAGE_END)


@jax.jit
def transfer_kernel_lnz(p, z):
    """The kernel used by the memory method and its derivatives in ln z at fixed p.

    Returns (T, dT/dlnz, d2T/dlnz2, d3T/dlnz3): exact T(p, z) for z <= Z_AVERAGE_START, its
    phase average for z >= Z_AVERAGE_END, blended with a C^3 smoothstep in ln z in between.
    """
    p = jnp.asarray(p, dtype=float)
    z = jnp.asarray(z, dtype=float)
    ex = _exact_lnz_jet(p, jnp.minimum(z, Z_AVERAGE_END))
    av = _average_lnz_jet(p, jnp.maximum(z, Z_AVERAGE_START))
    lam = jnp.log(jnp.maximum(z, 1e-300))
    delta = _LN_ZB - _LN_ZA
    u = jnp.clip((lam - _LN_ZA) / delta, 0.0, 1.0)
    v = 1.0 - u
    s0 = u**4 * (35.0 - 84.0 * u + 70.0 * u * u - 20.0 * u**3)
    s1 = 140.0 * (u * v) ** 3 / delta
    s2 = 420.0 * (u * v) ** 2 * (1.0 - 2.0 * u) / delta**2
    s3 = 840.0 * u * v * (5.0 * u * u - 5.0 * u + 1.0) / delta**3
    s = (s0, s1, s2, s3)
    d = [av[n] - ex[n] for n in range(4)]
    binom = ((1,), (1, 1), (1, 2, 1), (1, 3, 3, 1))
    out = []
    for n in range(4):
        acc = ex[n]
        for i in range(n + 1):
            acc = acc + binom[n][i] * s[i] * d[n - i]
        out.append(acc)
    return tuple(out)


@jax.jit
def transfer_kernel(p, z):
    """(T, dT/dz) of the phase-averaged kernel ``transfer_kernel_lnz`` (z > 0)."""
    t0, t1, _, _ = transfer_kernel_lnz(p, z)
    z = jnp.asarray(z, dtype=float)
    return t0, t1 / z


# ------------------------------------------------------------------ T(p, z), many z at one p
#
# The memory sum evaluates the kernel at many ln z for each output time, all at the same p.
# ``kernel_coefficients`` hoists everything that depends on p alone (series, Hankel and average
# coefficients, the gammaln prefactors) out of the per-node work, and ``kernel_jet_rows``
# evaluates the same branches as ``transfer_kernel_lnz`` from them with Horner's rule (no
# division or loop-carried state per node). It is the same function as the reference; only the
# order of the floating-point operations differs (tests/test_propagator_special.py compares).


def kernel_coefficients(p):
    """The p-dependent coefficients of ``transfer_kernel_lnz`` (arrays of shape p.shape + (n,)).

    "gamma": g = 0F1(; p + 1/2; -w/4) = sum_n gamma_n w^n (w = z^2, 64 terms); "hankel_p",
    "hankel_q": P = sum_i hankel_p_i z^(-2i), Q = sum_i hankel_q_i z^(-2i-1) (Hankel expansion of
    J_(p-1/2), 24 terms); "average": M^2 series c_k of <T> = exp(ln_e0) z^(-2p) sum_k c_k z^(-2k)
    (10 terms, DLMF 10.18.17); "ln_gamma" = ln Gamma(p + 1/2); "ln_e0".
    """
    p = jnp.asarray(p, dtype=float)
    b = p[..., None] + 0.5
    n = jnp.arange(1, _SERIES_TERMS, dtype=float)
    one = jnp.ones(p.shape + (1,))
    gamma = jnp.concatenate([one, jnp.cumprod(-0.25 / (n * (b + n - 1.0)), axis=-1)], axis=-1)
    nu = p[..., None] - 0.5
    mu = 4.0 * nu * nu
    k = jnp.arange(1, _HANKEL_TERMS, dtype=float)
    a = jnp.concatenate([one, jnp.cumprod((mu - (2.0 * k - 1.0) ** 2) / (8.0 * k), axis=-1)], axis=-1)
    sign = np.where((np.arange(_HANKEL_TERMS) // 2) % 2 == 0, 1.0, -1.0)
    a = a * sign
    k = jnp.arange(1, _AVERAGE_TERMS, dtype=float)
    c = (2.0 * k - 1.0) / (2.0 * k) * (mu - (2.0 * k - 1.0) ** 2) * 0.25
    average = jnp.concatenate([one, jnp.cumprod(c, axis=-1)], axis=-1)
    ln_gamma = gammaln(p + 0.5)
    return {
        "gamma": gamma,
        "hankel_p": a[..., 0::2],
        "hankel_q": a[..., 1::2],
        "average": average,
        "ln_gamma": ln_gamma,
        "ln_e0": 2.0 * ln_gamma + 2.0 * (p - 0.5) * _LN_2 - _LN_PI,
    }


def _horner_rows(coefs, x):
    """Polynomials sum_i coefs[m][..., i] x^i for several coefficient arrays m at once (one loop).

    ``coefs``: arrays of shape B + (n,) (same n); ``x``: shape B + (L,). Returns a tuple.
    """
    n = coefs[0].shape[-1]
    c = jnp.stack(coefs, axis=0)[..., None]  # (m,) + B + (n, 1)

    def body(i, acc):
        return acc * x + jax.lax.dynamic_index_in_dim(c, n - 2 - i, axis=-2, keepdims=False)

    acc = jax.lax.fori_loop(0, n - 1, body, jnp.broadcast_to(c[..., n - 1, :], (len(coefs),) + x.shape))
    return tuple(acc)


def kernel_jet_rows(co, p, lam, order: int = 2):
    """(K, dK/dlnz, ...) up to ``order`` (<= 4) of ``transfer_kernel_lnz`` at ln z = ``lam``.

    ``p`` has shape B, ``lam`` shape B + (L,) (L values of ln z per p), ``co`` =
    ``kernel_coefficients(p)``. Same branches as the reference: power series for z <= 12 + p,
    Hankel expansion above, phase average for z >= Z_AVERAGE_END, C^3 blend in between.
    """
    pe = p[..., None]
    nu = pe - 0.5
    lam_e = jnp.minimum(lam, _LN_ZB)
    z = jnp.exp(lam_e)
    z2 = z * z
    zsw = _SERIES_ZMAX_OFFSET + pe
    use_series = z <= zsw
    ws = jnp.minimum(z, zsw) ** 2
    nn = np.arange(_SERIES_TERMS, dtype=float)
    gs, g1s = _horner_rows((co["gamma"], co["gamma"] * (2.0 * nn)), ws)

    lam_h = jnp.maximum(lam_e, jnp.log(zsw))
    zh = jnp.exp(lam_h)
    y = 1.0 / zh
    y2 = y * y
    ii = np.arange(co["hankel_p"].shape[-1], dtype=float)
    hp, hq = co["hankel_p"], co["hankel_q"]
    big_p, big_q, p1, q1 = _horner_rows((hp, hq, hp * (-2.0 * ii), hq * (-(2.0 * ii + 1.0))), y2)
    big_q = y * big_q
    q1 = y * q1
    om = zh - (0.5 * nu + 0.25) * math.pi
    cs, sn = jnp.cos(om), jnp.sin(om)
    amp = jnp.sqrt(2.0 / (math.pi * zh))
    pcqs = big_p * cs - big_q * sn
    jv = amp * pcqs
    zjp = amp * (-0.5 * pcqs + p1 * cs - q1 * sn - zh * (big_p * sn + big_q * cs))
    lead = jnp.exp(co["ln_gamma"][..., None] - nu * (lam_h - _LN_2))
    g = jnp.where(use_series, gs, lead * jv)
    g1 = jnp.where(use_series, g1s, lead * (zjp - nu * jv))

    g2 = -2.0 * pe * g1 - z2 * g
    zt1 = 2.0 * g * g1
    z2t2 = 2.0 * (g1 * g1 + g * g2)
    ex = [g * g, zt1, zt1 + z2t2]
    if order >= 3:
        g3 = 2.0 * pe * g1 - 2.0 * pe * g2 - z2 * g1
        ex.append(zt1 + 3.0 * z2t2 + 2.0 * (3.0 * g1 * g2 + g * g3))
    if order >= 4:
        # ln z derivatives D^n g of g (D = z d/dz) from the Bessel equation, which reads
        # D^2 g = (1 - 2p) D g - z^2 g; differentiating it, D^3 g = (1 - 2p) D^2 g - z^2 (2 g + D g)
        # and D^4 g = (1 - 2p) D^3 g - z^2 (4 g + 4 D g + D^2 g). Then D^4 (g^2) by Leibniz.
        dg2 = (1.0 - 2.0 * pe) * g1 - z2 * g
        dg3 = (1.0 - 2.0 * pe) * dg2 - z2 * (2.0 * g + g1)
        dg4 = (1.0 - 2.0 * pe) * dg3 - z2 * (4.0 * g + 4.0 * g1 + dg2)
        ex.append(2.0 * (g * dg4 + 4.0 * g1 * dg3 + 3.0 * dg2 * dg2))

    lam_a = jnp.maximum(lam, _LN_ZA)
    y2a = jnp.exp(-2.0 * lam_a)
    e = jnp.exp(co["ln_e0"][..., None] - 2.0 * pe * lam_a)
    kk = np.arange(_AVERAGE_TERMS, dtype=float)
    s = _horner_rows(tuple(co["average"] * (-2.0 * kk) ** j for j in range(order + 1)), y2a)
    a = -2.0 * pe
    av = [e * s[0], e * (a * s[0] + s[1]), e * (a * a * s[0] + 2.0 * a * s[1] + s[2])]
    if order >= 3:
        av.append(e * (a**3 * s[0] + 3.0 * a * a * s[1] + 3.0 * a * s[2] + s[3]))
    if order >= 4:
        av.append(e * (a**4 * s[0] + 4.0 * a**3 * s[1] + 6.0 * a * a * s[2] + 4.0 * a * s[3] + s[4]))

    delta = _LN_ZB - _LN_ZA
    u = jnp.clip((lam - _LN_ZA) / delta, 0.0, 1.0)
    v = 1.0 - u
    sw = (
        u**4 * (35.0 - 84.0 * u + 70.0 * u * u - 20.0 * u**3),
        140.0 * (u * v) ** 3 / delta,
        420.0 * (u * v) ** 2 * (1.0 - 2.0 * u) / delta**2,
        840.0 * u * v * (5.0 * u * u - 5.0 * u + 1.0) / delta**3,
    )
    if order >= 4:
        # the blend is a degree-7 polynomial in u: its fourth derivative is not zero at the ends
        # u = 0, 1 (it is only C^3), so it acts strictly inside the blend (a one-sided jet
        # would need a side; a node exactly at z = 30 or 36 takes the outer branch)
        inside = (lam > _LN_ZA) & (lam < _LN_ZB)
        s4 = 840.0 * (1.0 - 12.0 * u + 30.0 * u * u - 20.0 * u**3) / delta**4
        sw = sw + (jnp.where(inside, s4, 0.0),)
    d = [av[n] - ex[n] for n in range(order + 1)]
    binom = ((1,), (1, 1), (1, 2, 1), (1, 3, 3, 1), (1, 4, 6, 4, 1))
    out = []
    for n in range(order + 1):
        acc = ex[n]
        for i in range(n + 1):
            acc = acc + binom[n][i] * sw[i] * d[n - i]
        out.append(acc)
    return tuple(out)
