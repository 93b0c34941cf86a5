"""The exact method: the coincident propagator from a vectorized mode sum.

Mode equation in e-folds (massless minimally coupled spectator, M_p = 1):

    u'' + (3 - eps) u' + x^2 u = 0,   x = k/(aH),   Wronskian u u*' - u' u* = i/(a^3 H),

A(N) = int dk k^2 |u|^2 / (2 pi^2), renormalized (DESIGN 2.3.1, derivation in
docs/physics.md). Recipe (DESIGN 2.3.4):

1. k grid uniform in ln k from k_IR = a_start H_start, ``modes_per_efold`` per e-fold, to
   beyond 10 max(aH).
2. Stage 1 (complex): every mode starts in the adiabatic (4th-order WKB) vacuum at
   x = ``start_x``. Modes with x < start_x at the first point start earlier on the
   history's backward extension with constant eps (the spline continues ln H linearly),
   which is the exact constant-eps (Hankel) Bunch-Davies mode at the first point.
   Integrate to the hand-over x = ``handover_x`` outside the horizon.
3. Stage 2 (real): g'' + (3 - eps) g' + x^2 g = 0, g = 1, g' = Re(u'/u) at the hand-over,
   u = |u_h| g; integrated until the last time the mode has x <= ``stop_x`` (from the
   reverse running maximum of aH), so modes that exit again in a late accelerating era
   are integrated straight through. Modes that never reach the hand-over during
   inflation stay complex to the same stop.
4. After the stop a mode is deep inside: its Bogoliubov envelope
   E = |alpha|^2 + |beta|^2 = (W^2 |v|^2 + |v_eta|^2)/W (v = a u, W^2 = k^2 - a''/a) is an
   adiabatic invariant, and its phase-averaged |u|^2 = E/(2 a^2 W).
5. k integration at each output time of the renormalized integrand (docs/physics.md 3.1):
   the adiabatic vacuum B4 is subtracted with a smooth weight s(x) and added back
   analytically with the counterterms. Until the end of inflation modes are summed directly
   (composite Simpson in ln k) and blended into B4 at large x. Afterwards each mode is
   decomposed exactly on the second-order WKB basis into its envelope S (Simpson) and its
   rotating interference J, whose demodulated amplitude J e^{2 i k eta} is smooth in k and
   is integrated by Filon quadrature (``_kspace.py``): no aliasing of the standing waves
   of re-entered modes. After its stop a mode keeps S and its interference rotates with the
   WKB phase.
6. A', A'' by exact Taylor-mode differentiation at each output time: per mode, u and u'
   are continued as a polynomial in N using the mode equation (u'' and u''' exactly), the
   history from the spline; no finite differences. ``third=True`` continues them one order
   further (the fourth derivative of u from the mode equation, eps_NN from the spline) and
   adds A''' (docs/physics.md 3.3a).
7. The kinetic sum K = <g^{mu nu} d sigma d sigma> renormalized on its own (same scheme,
   its own adiabatic terms K2, K4, K6), for the Box identity Box A = 2 (K_ren + L).

``oracle=True`` skips the hand-over (complex modes all the way to the stop): the test
oracle of DESIGN 2.3.4.
"""

from __future__ import annotations

import math

import diffrax
import equinox as eqx
import numpy as np

from .._jax import jax, jnp
from ._history import HistorySpline
from ._kspace import Clocks, _lagrange_to_monomial, filon_weights

# Smooth weights in ln x. They are C-infinity transitions: the sum over a uniform ln k grid
# of a profile moving with N aliases at the grid frequency 2 pi/dlnk, and A'' amplifies
# that by (2 pi/dlnk)^2; a polynomial smoothstep (finite smoothness) leaves ~1e-2 relative
# errors in A'', a C-infinity one ~1e-7 (measured in de Sitter).
_X_SUB = (1.5, 12.0)  # s(x): subtraction of the adiabatic vacuum B4 switches on
_X_TAPER = (6.0, 28.0)  # w(x): vacuum modes before their first exit: direct -> phase average
_X_TAPER_KIN = (6.0, 24.0)  # the same for the kinetic sum (its ODE errors grow like x^4: 1e-5 at 24)
# Every other mode (exited, re-entered, or after the end of inflation) is summed directly
# below x ~ 1 and as envelope + interference above (_X_SPLIT), with the WKB frequency
# switched on between x = 1 and 2 (_X_FREQ). The interference of re-entered modes is a
# standing wave: it is integrated by Filon quadrature (no aliasing at any phase per step)
# and phased out between x = 30 and 300 (_X_INTERFERENCE), where its k integral is < 1e-8
# of the kinetic sum per unit ln k (sum of cos(2x) dx/x beyond the taper, measured).
_X_SPLIT = (0.5, 2.0)
_X_FREQ = (1.0, 2.0)
_X_INTERFERENCE = (30.0, 300.0)


# Stage 2 saves at up to every output time (frozen modes are followed to the end):
# Tsit5's cheaper dense output beats Dopri8 there (measured in benchmarks/).
STAGE2_SOLVER = diffrax.Tsit5()

_TIME_BATCH = 64  # output times per batch of the k integration


class ModeSettings(eqx.Module):
    """Numerical settings of the exact method (all static)."""

    modes_per_efold: float = eqx.field(static=True, default=20.0)
    start_x: float = eqx.field(static=True, default=50.0)
    handover_x: float = eqx.field(static=True, default=1e-2)
    stop_x: float = eqx.field(static=True, default=30.0)
    rtol: float = eqx.field(static=True, default=1e-10)
    atol: float = eqx.field(static=True, default=1e-12)
    k_margin: float = eqx.field(static=True, default=math.log(40.0))
    chunk: int = eqx.field(static=True, default=64)  # modes per vmap batch (0: all at once)


def _smoothstep(y):
    """C-infinity step: 0 for y <= 0, 1 for y >= 1, e^{-1/y} / (e^{-1/y} + e^{-1/(1-y)})."""
    y = jnp.clip(y, 1e-6, 1.0 - 1e-6)
    a = jnp.exp(-1.0 / y)
    b = jnp.exp(-1.0 / (1.0 - y))
    return a / (a + b)


def _smoothstep_np(y):
    y = min(max(y, 1e-6), 1.0 - 1e-6)
    a = math.exp(-1.0 / y)
    b = math.exp(-1.0 / (1.0 - y))
    return a / (a + b)


def _sub_constants():
    """lambda0 = ln X1 - int_{X0}^{X1} s dlnx, lambda2 = int_{X0}^{X1} s/x^2 dlnx + 1/(2 X1^2)."""
    from scipy.integrate import quad

    x0, x1 = _X_SUB

    def s(lnx):
        return _smoothstep_np((lnx - math.log(x0)) / math.log(x1 / x0))

    i0 = quad(s, math.log(x0), math.log(x1), epsabs=1e-15)[0]
    i2 = quad(lambda t: s(t) * math.exp(-2 * t), math.log(x0), math.log(x1), epsabs=1e-15)[0]
    return math.log(x1) - i0, i2 + 0.5 / x1**2


_LAMBDA0, _LAMBDA2 = _sub_constants()


def mode_count(spline: HistorySpline, settings: ModeSettings) -> int:
    """Number of k modes for a history (numpy, outside jit): k_IR .. margin x max(aH)."""
    lah = np.asarray(spline.efolds) + np.asarray(spline.ln_hubble_nodes)
    span = lah.max() - lah[0] + settings.k_margin
    n = int(math.ceil(span * settings.modes_per_efold)) + 1
    return n + (1 - n % 2)  # odd, for Simpson


def _simpson_weights(n, h):
    w = np.ones(n)
    w[1:-1:2] = 4.0
    w[2:-1:2] = 2.0
    return jnp.asarray(w * h / 3.0)


# ----------------------------------------------------------------------- mode windows


def _crossing_times(spline: HistorySpline, lnk, ln_x):
    """Times where ln(k/(aH)) = ln_x: first crossing during the rise of aH (start,
    hand-over) and last time with x <= e^{ln_x} (stop), per mode."""
    n = spline.efolds
    lah = n + spline.ln_hubble_nodes
    i_max = jnp.argmax(lah)
    # first time aH reaches k/x: on the rising part, interpolate in lah (monotone there)
    target = lnk - ln_x
    rising = jnp.where(jnp.arange(n.shape[0]) <= i_max, lah, lah[i_max] + 1e-9 * jnp.arange(n.shape[0]))
    rising = jax.lax.cummax(rising)
    t_first = jnp.interp(target, rising, n, left=jnp.nan, right=jnp.nan)
    # before the first node: backward constant-eps extension, ln(aH) = lah0 + (1 - eps0)(N - N0)
    eps0 = spline.epsilon_nodes[0]
    t_back = n[0] + (target - lah[0]) / (1.0 - eps0)
    t_first = jnp.where(target < lah[0], t_back, t_first)
    # last time with ln(aH) >= target: reverse running maximum
    rev = jax.lax.cummax(lah[::-1])[::-1]
    last_ok = lah[-1] >= target
    # index of the last node with rev >= target
    idx = jnp.clip(jnp.sum(rev[None, :] >= target[:, None], axis=1) - 1, 0, n.shape[0] - 2)
    frac = jnp.clip((lah[idx] - target) / (lah[idx] - lah[idx + 1]), 0.0, 1.0)
    t_last = jnp.where(last_ok, n[-1], n[idx] + frac * (n[idx + 1] - n[idx]))
    return t_first, t_last


# ------------------------------------------------------------------------ the ODEs


def _x_of(spline, lnk, n):
    lnh, eps = spline.ln_hubble_and_epsilon(n)
    return jnp.exp(lnk - n - lnh), eps


def _complex_rhs(n, y, args):
    spline, lnk = args
    qr, qi, pr, pi = y
    x, eps = _x_of(spline, lnk, n)
    x2 = x * x
    return (pr, pi, -(3.0 - eps) * pr - x2 * qr, -(3.0 - eps) * pi - x2 * qi)


def _real_rhs(n, y, args):
    spline, lnk = args
    g, gp = y
    x, eps = _x_of(spline, lnk, n)
    return (gp, -(3.0 - eps) * gp - x * x * g)


def _solve(rhs, t0, t1, y0, ts, args, settings, solver=None):
    return diffrax.diffeqsolve(
        diffrax.ODETerm(rhs),
        solver if solver is not None else diffrax.Dopri8(),
        t0,
        t1,
        dt0=None,
        y0=y0,
        args=args,
        saveat=diffrax.SaveAt(ts=ts),
        stepsize_controller=diffrax.PIDController(rtol=settings.rtol, atol=settings.atol),
        max_steps=200_000,
    )


def _phi_derivs(spline, lnk, n):
    """phi(n') = f(n')/(a^2 H^2)(n) with f = k^2 - a''/a, and its first two derivatives at n."""
    lah_n = n + spline.ln_hubble(n)

    def phi(m):
        lnh, eps = spline.ln_hubble_and_epsilon(m)
        return jnp.exp(2.0 * (lnk - lah_n)) - (2.0 - eps) * jnp.exp(2.0 * (m + lnh - lah_n))

    d1 = jax.jacfwd(phi)
    return phi(n), d1(n), jax.jacfwd(d1)(n)


def _wkb_initial(spline, lnk, n):
    """Scaled Bunch-Davies data q = u sqrt(2k) a(n), q' at time n (4th-order WKB)."""
    _, eps = spline.ln_hubble_and_epsilon(n)
    phi, dphi, ddphi = _phi_derivs(spline, lnk, n)
    w2 = phi - ((1.0 - eps) * dphi + ddphi) / (4.0 * phi) + (5.0 / 16.0) * dphi**2 / phi**2
    w = jnp.sqrt(w2)  # W / (aH)
    x, _ = _x_of(spline, lnk, n)
    q = jnp.sqrt(x / w) + 0j  # |v|^2 = 1/(2W)  ->  |q|^2 = k/W = x/(W/aH)
    dlnw = 0.5 * dphi / phi
    qp = q * (-1j * w - 0.5 * dlnw - 1.0)
    return q, qp


# ------------------------------------------------------------ the per-time functional


def _mode_taylor(u, up, x, eps, deps, t, ddeps=None):
    """u(N+t) and u'(N+t) as polynomials in t from the mode equation, exact to second order
    in t: all that A' and A'' at t = 0 need (|u|^2, |u'|^2 and |u + u'|^2 take their second
    t-derivative from u, u', u'' and the third derivative of u).

    Given ``ddeps`` = eps_NN they are exact to third order, for A''' (the third t-derivative
    of |u'|^2 needs the fourth derivative of u: the mode equation differentiated twice)."""
    x2 = x * x
    upp = -(3.0 - eps) * up - x2 * u
    # (x^2)' = -2 (1 - eps) x^2
    uppp = deps * up - (3.0 - eps) * upp + 2.0 * (1.0 - eps) * x2 * u - x2 * up
    if ddeps is None:
        ut = u + up * t + upp * t**2 / 2
        upt = up + upp * t + uppp * t**2 / 2
        return ut, upt
    # d/dN of u''' = eps_N u' - (3 - eps) u'' + 2 (1 - eps) x^2 u - x^2 u'
    u4 = (
        ddeps * up
        + 2.0 * deps * upp
        - (3.0 - eps) * uppp
        - (2.0 * deps + 4.0 * (1.0 - eps) ** 2) * x2 * u
        + 4.0 * (1.0 - eps) * x2 * up
        - x2 * upp
    )
    ut = u + up * t + upp * t**2 / 2 + uppp * t**3 / 6
    upt = up + upp * t + uppp * t**2 / 2 + u4 * t**3 / 6
    return ut, upt


def _step_between(lnx, bounds):
    """C-infinity step in ln x: 0 below bounds[0], 1 above bounds[1]."""
    x0, x1 = bounds
    return _smoothstep((lnx - math.log(x0)) / math.log(x1 / x0))


class _Era(eqx.Module):
    """The history at one time m (scalars) and what every mode needs of it."""

    lnh: jax.Array
    eps: jax.Array
    eps_n: jax.Array
    lah: jax.Array
    q_adiabatic: jax.Array  # Q = (3 V^2 - V_etaeta)/(a^4 H^4)
    eta: jax.Array
    psi: jax.Array


def _era(spline, clocks, m):
    lnh, eps = spline.ln_hubble_and_epsilon(m)
    eps_n = jax.grad(lambda z: spline.ln_hubble_and_epsilon(z)[1])(m)
    lah = m + lnh

    def vred(z):
        lz, ez = spline.ln_hubble_and_epsilon(z)
        return (2.0 - ez) * jnp.exp(2.0 * (z + lz - lah))

    dv = jax.jacfwd(vred)
    qq = 3.0 * (2.0 - eps) ** 2 - ((1.0 - eps) * dv(m) + jax.jacfwd(dv)(m))
    eta, psi = clocks.at(m)
    return _Era(lnh, eps, eps_n, lah, qq, eta, psi)


def _kinetic_adiabatic(spline, m):
    """(Box R/H^4, D_K) at m: the adiabatic kinetic terms per unit ln k in units of H^4,
    k^3 K4/H^4 = Box R/(48 H^4) and k^3 K6/H^4 = D_K/x^2 (K_n = -(1/2)(d_t^2 + 3 H d_t) M_n)."""
    lnh_m, eps_m = spline.ln_hubble_and_epsilon(m)

    def rhat(z):  # R/H(m)^2 = 6 (2 - eps) H^2/H(m)^2
        lz, ez = spline.ln_hubble_and_epsilon(z)
        return 6.0 * (2.0 - ez) * jnp.exp(2.0 * (lz - lnh_m))

    r1 = jax.jacfwd(rhat)
    box_r = -(jax.jacfwd(r1)(m) + (3.0 - eps_m) * r1(m))

    lah_m = m + lnh_m

    def g(z):  # Q(z) a^2 H^4 (z), normalized to a^2 H^4 at m
        lz, ez = spline.ln_hubble_and_epsilon(z)
        e2 = jnp.exp(2.0 * (z + lz - lah_m))

        def vhat(y):
            ly, ey = spline.ln_hubble_and_epsilon(y)
            return (2.0 - ey) * jnp.exp(2.0 * (y + ly - lah_m))

        d1 = jax.jacfwd(vhat)
        qphys = 3.0 * vhat(z) ** 2 - e2 * (jax.jacfwd(d1)(z) + (1.0 - ez) * d1(z))
        return qphys * jnp.exp(-2.0 * (z - m))

    g1 = jax.jacfwd(g)
    d_k = -(jax.jacfwd(g1)(m) + (3.0 - eps_m) * g1(m)) / 32.0
    return box_r, d_k


_X_FREQ2 = (2.0, 4.0)  # the second-order WKB terms of the frequency switch on here


def _frequency(spline, lnk, m):
    """The mode frequency W = aH wt used for the Bogoliubov decomposition, at N = m.

    Second-order WKB (DESIGN 2.3.4), in units of aH(m), with f = k^2 - V:
        W^2 = f - f_etaeta/(4 f) + (5/16) f_eta^2/f^2,
    switched on smoothly from the bare x^2 (x < 1) to f (x > 2) and then to the full form
    (x > 4), and exponentiated (f e^{corr/f} instead of f + corr) so that W^2 > 0 always.
    In the adiabatic vacuum the instantaneous Bogoliubov coefficients on this basis are then
    O(x^-6) (O(x^-4) on the first-order one), which is what keeps the non-rotating part of
    the interference below the Filon quadrature's concern. Returns (x^2 - wt^2, wt^2,
    d ln W/dN) per mode (the last by forward-mode differentiation in N at fixed k).
    """
    lah_ref = m + spline.ln_hubble(m)

    def vred(y):
        ly, ey = spline.ln_hubble_and_epsilon(y)
        return (2.0 - ey) * jnp.exp(2.0 * (y + ly - lah_ref))

    v1f = jax.jacfwd(vred)
    v2f = jax.jacfwd(v1f)

    def squared(z):
        lz, ez = spline.ln_hubble_and_epsilon(z)
        lnx_z = lnk - z - lz
        x2 = jnp.exp(2.0 * (lnk - lah_ref))  # (k/aH(m))^2, fixed in z
        rho = jnp.exp(2.0 * (z + lz - lah_ref))
        v, v1, v2 = vred(z), v1f(z), v2f(z)
        phi1 = _step_between(lnx_z, _X_FREQ)
        phi2 = _step_between(lnx_z, _X_FREQ2)
        fr = x2 - v * phi1
        fs = jnp.maximum(fr, 1e-2 * rho)  # only where phi2 > 0 (there fr > 2 rho)
        corr = -rho * (-v2 - (1.0 - ez) * v1) / (4.0 * fs) + (5.0 / 16.0) * rho * v1 * v1 / (fs * fs)
        arg = phi2 * corr / fs
        return fr * jnp.exp(arg), v * phi1 - fr * jnp.expm1(arg)

    (wt2, d2), (dwt2, _) = jax.jvp(squared, (m,), (jnp.ones_like(m),))
    return d2, wt2, 0.5 * dwt2 / wt2


def _mode_parts(era, lnk, q, qp, scale2, freq):
    """Per-mode pieces at one time, decomposed on the second-order WKB basis.

    With W = aH wt (``_frequency``) and gamma = W_eta/(4 W^2), the instantaneous Bogoliubov
    amplitudes A = alpha e^{-i theta}, B = beta e^{i theta} of v = a u follow from (v, v_eta)
    exactly; then, in units of H^2 (H^4) per unit ln k,

        k^3 |u|^2/H^2      = xw (S + 2 Re J),
        k^3 K_k/H^4        = xw [(d2 - b^2) S + 2 Re(J (x^2 - b^2 + wt^2 - 2 i b wt))],

    with S = |A|^2 + |B|^2, J = A B*, xw = x^3/(2 wt), b = 1 + 2 gamma wt, d2 = x^2 - wt^2.
    These identities are exact for any mode and any positive wt; S is the adiabatic-invariant
    envelope and J the rotating interference. Used where x > _X_SPLIT[0] (x is floored at 0.1).
    """
    lnx = lnk - era.lah
    x = jnp.exp(lnx)
    xs = jnp.maximum(x, 0.1)
    d2, wt2, dlnw = freq
    wt = jnp.sqrt(wt2)
    gamma = dlnw / (4.0 * wt)
    ratio = 2.0 * jnp.exp(scale2 - 2.0 * era.lnh) / (xs * xs)  # k^3 |u|^2/H^2 = ratio (x^2/2) |q|^2
    sig = ratio / (4.0 * xs * wt)
    root = jnp.sqrt(sig)
    ap = root * (wt * q + 1j * (q + qp))
    am = root * (wt * q - 1j * (q + qp))
    amp_a = (1.0 + 1j * gamma) * ap + 1j * gamma * am
    amp_b = -1j * gamma * ap + (1.0 - 1j * gamma) * am
    envelope = jnp.abs(amp_a) ** 2 + jnp.abs(amp_b) ** 2
    interference = amp_a * jnp.conj(amp_b)
    return x, xs, wt, d2, gamma, envelope, interference


def _integrand(kind, era, xs, wt, d2, gamma, envelope):
    """The mode's value P S + Re(J G) - sub, split as (excitation P (S - 1), vacuum part P - sub,
    complex interference coefficient G), with sub = x^2/2 (A) or (1 - eps) x^2/2 (K).

    ``kind`` = "A" (units H^2) or "K" (units H^4). The vacuum part is written without the
    cancellation of its two terms (it is O(1) while each is O(x^2)).
    """
    c = 2.0 - era.eps
    vac = 0.5 * xs * xs
    xw = xs**3 / (2.0 * wt)
    one_minus = d2 / (wt * (xs + wt))  # x/wt - 1
    if kind == "A":
        return xw * (envelope - 1.0), vac * one_minus, 2.0 * xw
    b = 1.0 + 2.0 * gamma * wt
    vac_part = vac * ((d2 - b * b) * one_minus + d2 - c - 4.0 * gamma * wt * (1.0 + gamma * wt))
    g = 2.0 * xw * (xs * xs - b * b + wt * wt - 2j * b * wt)
    return xw * (d2 - b * b) * (envelope - 1.0), vac_part, g


def _sums(t, n, ctx, lnk, q, qp, in_window, after_stop, pre_exit, kind, third=False):
    """Renormalized A (kind "A") or K (kind "K") at time n + t (t = 0 is the output time).

    q, qp: scaled mode data at n (q = u sqrt(2k) a_a, scale2 = ln(k^2/(2 a_a^2)) per mode).
    ``third``: carry the mode data to n + t exact to third order in t (what A''' needs).
    """
    spline, clocks = ctx["spline"], ctx["clocks"]
    m = n + t
    lnh0, eps0 = spline.ln_hubble_and_epsilon(n)
    deps0 = jax.grad(lambda z: spline.ln_hubble_and_epsilon(z)[1])(n)
    x0 = jnp.exp(lnk - n - lnh0)
    ddeps0 = None
    if third:
        # eps of the cubic Hermite ln H is piecewise quadratic, so eps_NN is piecewise constant
        # (one-sided at a node: the interval to the right, like eps_N)
        ddeps0 = jax.grad(jax.grad(lambda z: spline.ln_hubble_and_epsilon(z)[1]))(n)
    qt, qpt = _mode_taylor(q, qp, x0, eps0, deps0, t, ddeps0)
    era = _era(spline, clocks, m)
    h2 = jnp.exp(2.0 * era.lnh)
    c = 2.0 - era.eps
    scale2 = ctx["scale2"]
    x, xs, wt, d2, gamma, env_now, j_now = _mode_parts(era, lnk, qt, qpt, scale2, _frequency(spline, lnk, m))
    lnx = lnk - era.lah
    s = _step_between(lnx, _X_SUB)
    p = _step_between(lnx, _X_SPLIT)
    w_int = 1.0 - _step_between(lnx, _X_INTERFERENCE)
    x_safe = jnp.maximum(x, 1.0)  # the adiabatic terms are only used where s > 0 (x > 1.5)
    k3m = jnp.exp(scale2 - 2.0 * era.lnh) * jnp.abs(qt) ** 2  # k^3 |u|^2 / H^2
    if kind == "A":
        direct = k3m - 0.5 * x * x
        adiabatic = c / 4.0 + era.q_adiabatic / (16.0 * x_safe * x_safe)  # B4
        w_vac = 1.0 - _step_between(lnx, _X_TAPER)
    else:
        k3up = jnp.exp(scale2 - 2.0 * era.lnh) * jnp.abs(qpt) ** 2  # k^3 |u'|^2 / H^2
        direct = x * x * k3m - k3up - (1.0 - era.eps) * 0.5 * x * x
        box_r, d_k = _kinetic_adiabatic(spline, m)
        adiabatic = box_r / 48.0 + d_k / (x_safe * x_safe)
        w_vac = 1.0 - _step_between(lnx, _X_TAPER_KIN)
    # envelope and demodulated interference: in the window from the modes, after the stop
    # continued from the stop (S is an adiabatic invariant, J rotates with the WKB phase)
    k = jnp.exp(lnk)
    y_now = j_now * jnp.exp(2j * k * era.eta)
    y_cont = ctx["z_stop"] * jnp.exp(-1j * era.psi / k)
    env = jnp.where(in_window, env_now, ctx["s_stop"])
    y = jnp.where(in_window, y_now, y_cont)
    excitation, vac_part, g_int = _integrand(kind, era, xs, wt, d2, gamma, env)
    live = in_window | after_stop
    # until the end of inflation: direct, blended into the adiabatic vacuum at large x
    r_vac = w_vac * direct + (1.0 - w_vac - s) * adiabatic
    # afterwards, in the window: direct below x ~ 1, envelope + interference above (an exact
    # identity); the interference is integrated by Filon quadrature and phased out between
    # x = 30 and 300. After the stop: the excitation on top of the adiabatic vacuum (the
    # first-order WKB vacuum part differs from the adiabatic one at O(1) in K).
    r_window = (1.0 - p) * direct + p * (excitation + vac_part) - s * adiabatic
    r_after = excitation + (1.0 - s) * adiabatic
    r_other = jnp.where(in_window, r_window, r_after)
    r = jnp.where(live, jnp.where(pre_exit, r_vac, r_other), 0.0)
    f_int = jnp.where(live & ~pre_exit, p * w_int * g_int * y / xs, 0.0)
    tau = jnp.exp(era.lah) * era.eta
    # The interference is non-zero only for _X_SPLIT[0] < x < _X_INTERFERENCE[1]: Filon
    # quadrature on that window of nodes (fixed size, placed from the output time n, so it
    # does not move under the t-derivatives), not on the whole grid.
    size = ctx["filon_window"]
    if size < lnk.shape[0]:
        lah_n = n + lnh0
        i0 = jnp.searchsorted(lnk, jax.lax.stop_gradient(lah_n) + math.log(_X_SPLIT[0])) - 2
        i0 = jnp.clip(i0, 0, lnk.shape[0] - size)
        lnx_w = jax.lax.dynamic_slice(lnx, (i0,), (size,))
        f_w = jax.lax.dynamic_slice(f_int, (i0,), (size,))
    else:
        lnx_w, f_w = lnx, f_int
    omega = filon_weights(lnx_w, tau, ctx["dlnk"], ctx["lmat"])
    total = jnp.sum(ctx["weights"] * r) + jnp.real(jnp.sum(omega * f_w))
    ln_kir = ctx["ln_kir"]
    ln_mu = ctx["ln_mu"]
    ir_a = jnp.exp(2.0 * (ln_kir - m)) / (8.0 * jnp.pi**2)  # k_IR^2/(8 pi^2 a^2)
    if kind == "A":
        local = -(c * h2 / (8.0 * jnp.pi**2)) * (
            _LAMBDA0 + era.lnh - ln_mu
        ) + era.q_adiabatic * h2 * _LAMBDA2 / (32.0 * jnp.pi**2)
        return total * h2 / (2.0 * jnp.pi**2) + local - ir_a
    h4 = h2 * h2
    local = -(box_r * h4 / (96.0 * jnp.pi**2)) * (_LAMBDA0 + era.lnh - ln_mu) + d_k * h4 * _LAMBDA2 / (
        2.0 * jnp.pi**2
    )
    return total * h4 / (2.0 * jnp.pi**2) + local - (1.0 - era.eps) * h2 * ir_a


class ModeSolution(eqx.Module):
    """Per-mode data at the output times (scaled; see ``_sums``)."""

    lnk: jax.Array
    q: jax.Array  # (n_k, T) complex
    qp: jax.Array
    scale2: jax.Array  # (n_k,)
    in_window: jax.Array  # (n_k, T) bool
    after_stop: jax.Array
    pre_exit: jax.Array
    s_stop: jax.Array  # (n_k,) envelope S at the stop
    z_stop: jax.Array  # (n_k,) complex: J e^{i(2 k eta + psi/k)} at the stop


class ModePlan(eqx.Module):
    """Static sizes of the mode integration (computed once per history in numpy)."""

    n_k: int = eqx.field(static=True)
    saves1: int = eqx.field(static=True)
    saves2: int = eqx.field(static=True)


def _windows(spline, out_n, n_k, settings, oracle):
    lah0 = spline.efolds[0] + spline.ln_hubble_nodes[0]
    dlnk = 1.0 / settings.modes_per_efold
    lnk = lah0 + dlnk * jnp.arange(n_k)
    n_start, _ = _crossing_times(spline, lnk, math.log(settings.start_x))
    n_hand, _ = _crossing_times(spline, lnk, math.log(settings.handover_x))
    _, n_stop = _crossing_times(spline, lnk, math.log(settings.stop_x))
    n_exit, _ = _crossing_times(spline, lnk, 0.0)
    lah = spline.efolds + spline.ln_hubble_nodes
    n_peak = spline.efolds[jnp.argmax(lah)]
    has_hand = jnp.isfinite(n_hand) & (n_hand < n_peak) & (not oracle)
    # modes that never come within start_x (k beyond the grid's reach) start at the peak
    n_start = jnp.where(jnp.isfinite(n_start), n_start, n_peak)
    n_stop = jnp.maximum(n_stop, n_start + 1e-6)
    n_end1 = jnp.where(has_hand, jnp.minimum(n_hand, n_stop), n_stop)
    n_end2 = jnp.where(has_hand, n_stop, n_end1 + 1e-9)
    return lnk, n_start, n_end1, n_end2, n_stop, n_exit, n_peak, has_hand


def _count_in(out_n, t0, t1):
    i0 = jnp.searchsorted(out_n, t0, side="left")
    i1 = jnp.searchsorted(out_n, t1, side="right")
    return i0, i1 - i0


def mode_plan(
    spline: HistorySpline, out_n, settings: ModeSettings, oracle: bool = False, n_k: int | None = None
) -> ModePlan:
    """Sizes for ``solve_modes`` (numpy side, outside jit; leaves 20% + 8 slack).

    ``n_k`` (odd, >= mode_count) asks for more modes than the history needs: the grid then
    reaches further into the UV, where the renormalized sum no longer depends on the cutoff
    (DESIGN 3 item 4), so that histories of a sweep can share one static size."""
    n_min = mode_count(spline, settings)
    if n_k is None:
        n_k = n_min
    elif n_k < n_min or n_k % 2 == 0:
        raise ValueError(f"n_k must be odd and >= {n_min} for this history, got {n_k}")
    lnk, n0, n1, n2, *_ = _windows(spline, jnp.asarray(out_n), n_k, settings, oracle)
    _, c1 = _count_in(jnp.asarray(out_n), n0, n1)
    _, c2 = _count_in(jnp.asarray(out_n), n1, n2)
    slack = lambda c: min(int(np.asarray(out_n).shape[0]), int(1.2 * int(np.max(np.asarray(c)))) + 8)  # noqa: E731
    return ModePlan(n_k, slack(c1), slack(c2))


def _saved(rhs, t0, t1, y0, out_n, count, args, settings, solver=None):
    """Solve from t0 to t1 saving only at the output times inside [t0, t1] (at most
    ``count`` of them) and at t1. Unused save slots are put at t0, not t1: under vmap the
    saves of one step run as a loop over the whole batch, and padding at t0 makes every
    mode's padding fall in the same (first) step instead of a burst at each mode's end.
    Returns (ys at the slots, their indices into out_n, a validity mask, ys at t1)."""
    i0, c = _count_in(out_n, t0, t1)
    c = jnp.minimum(c, count)
    slot = jnp.arange(count)
    lead = count - c
    idx = i0 + slot - lead
    ok = slot >= lead
    ts = jnp.where(ok, out_n[jnp.clip(idx, 0, out_n.shape[0] - 1)], t0)
    ts = jnp.clip(ts, t0, t1)
    ts = jnp.concatenate([ts, t1[None]])
    sol = _solve(rhs, t0, t1, y0, ts, args, settings, solver)
    return [y[:-1] for y in sol.ys], idx, ok, [y[-1] for y in sol.ys]


def _scatter(values, idx, ok, size, fill):
    out = jnp.full((size,), fill, dtype=values.dtype)
    return out.at[jnp.where(ok, idx, size)].set(values, mode="drop")


def _mode_history(spline, out_n, plan, settings, lnk_j, na, n1, n2, hand):
    """One mode: stage 1 (complex) to n1, stage 2 (real) to n2 if ``hand``; data at out_n."""
    size = out_n.shape[0]
    q0, qp0 = _wkb_initial(spline, lnk_j, na)
    (qr, qi, pr, pi), idx1, ok1, (qr1, qi1, pr1, pi1) = _saved(
        _complex_rhs,
        na,
        n1,
        (q0.real, q0.imag, qp0.real, qp0.imag),
        out_n,
        plan.saves1,
        (spline, lnk_j),
        settings,
    )
    qh = qr1 + 1j * qi1
    ph = pr1 + 1j * pi1
    r = (ph / qh).real
    (g, gp), idx2, ok2, (g2, gp2) = _saved(
        _real_rhs,
        n1,
        n2,
        (jnp.ones(()), r),
        out_n,
        plan.saves2,
        (spline, lnk_j),
        settings,
        STAGE2_SOLVER,
    )
    amp = jnp.abs(qh)
    ok2 = ok2 & hand & (out_n[jnp.clip(idx2, 0, size - 1)] > n1)
    q = _scatter(qr + 1j * qi, idx1, ok1, size, 0j)
    p = _scatter(pr + 1j * pi, idx1, ok1, size, 0j)
    in2 = _scatter(ok2, idx2, ok2, size, False)  # output times covered by stage 2
    q = jnp.where(in2, _scatter(amp * g + 0j, idx2, ok2, size, 0j), q)
    p = jnp.where(in2, _scatter(amp * gp + 0j, idx2, ok2, size, 0j), p)
    qb = jnp.where(hand, amp * g2 + 0j, qh)
    pb = jnp.where(hand, amp * gp2 + 0j, ph)
    return q, p, qb, pb


def _chunked_vmap(f, args, chunk):
    """vmap over modes in consecutive chunks (lax.map over chunks).

    Under one vmap all modes march in lockstep for the longest mode's steps and saves;
    neighbouring modes (in k) have similar windows, so chunking in k order wastes less.
    """
    n = args[0].shape[0]
    if chunk <= 0 or chunk >= n:
        return jax.vmap(f)(*args)
    n_chunks = -(-n // chunk)
    pad = n_chunks * chunk - n

    def padded(a):
        return jnp.concatenate([a, jnp.repeat(a[-1:], pad, axis=0)]).reshape((n_chunks, chunk) + a.shape[1:])

    out = jax.lax.map(lambda xs: jax.vmap(f)(*xs), tuple(padded(a) for a in args))
    return tuple(o.reshape((n_chunks * chunk,) + o.shape[2:])[:n] for o in out)


def solve_modes(spline: HistorySpline, out_n, plan: ModePlan, settings: ModeSettings, oracle: bool = False):
    """Integrate every mode and return its data at the output times ``out_n`` (T,)."""
    n_k = plan.n_k
    lnk, n_start, n_end1, n_end2, n_stop, n_exit, n_peak, has_hand = _windows(
        spline, out_n, n_k, settings, oracle
    )
    n_last = spline.efolds[-1]

    def one(lnk_j, na, n1, n2, hand):
        return _mode_history(spline, out_n, plan, settings, lnk_j, na, n1, n2, hand)

    q, qp, qb, pb = _chunked_vmap(one, (lnk, n_start, n_end1, n_end2, has_hand), settings.chunk)
    scale2 = 2.0 * (lnk - n_start) - math.log(2.0)
    in_window = (out_n[None, :] >= n_start[:, None]) & (out_n[None, :] <= n_stop[:, None])
    # modes that never come within stop_x (the top of the k grid) never start: no continuation
    reached = n_stop > n_start + 2e-6
    after_stop = (out_n[None, :] > n_stop[:, None]) & (n_stop[:, None] < n_last) & reached[:, None]
    # Until the peak of aH (the end of inflation) every mode is either in its vacuum or
    # outside the horizon with x < 1: summed directly. After it, envelope + interference.
    pre_exit = in_window & (out_n[None, :] < n_peak)
    # envelope and phase-free interference at the stop (the Bogoliubov continuation)
    clocks = Clocks(spline)
    eras = jax.vmap(lambda m: _era(spline, clocks, m))(n_stop)
    freq = jax.vmap(lambda lk, m: _frequency(spline, lk, m))(lnk, n_stop)
    _, _, _, _, _, s_stop, j_stop = jax.vmap(_mode_parts)(eras, lnk, qb, pb, scale2, freq)
    k = jnp.exp(lnk)
    z_stop = j_stop * jnp.exp(1j * (2.0 * k * eras.eta + eras.psi / k))
    return ModeSolution(lnk, q, qp, scale2, in_window, after_stop, pre_exit, s_stop, z_stop)


def exact_propagator(
    spline: HistorySpline,
    out_n,
    plan: ModePlan,
    *,
    ln_mu,
    prior_variance=0.0,
    settings: ModeSettings = ModeSettings(),
    oracle: bool = False,
    kinetic: bool = True,
    third: bool = False,
):
    """A, A', A'' and Box A (M_p units) at the output times by the exact method.

    With ``third`` also "d3A" = A''' (M_p^2, same shape as "A"), from the mode equation: each
    mode is continued to third order in the time shift (its fourth derivative from the mode
    equation differentiated twice, eps_NN of the spline by forward-mode differentiation),
    never by finite differences. ``third=False`` leaves the default computation unchanged.

    With ``kinetic`` (default) also "kinetic" = K_ren = <g^{mu nu} d_mu sigma d_nu sigma>
    renormalized on its own (DESIGN 2.3.6), "local_box" = L, and so the Box identity
    Box A = 2 (K_ren + L) can be checked.
    """
    sol = solve_modes(spline, out_n, plan, settings, oracle)
    dlnk = 1.0 / settings.modes_per_efold
    ctx = {
        "spline": spline,
        "clocks": Clocks(spline),
        "scale2": sol.scale2,
        "s_stop": sol.s_stop,
        "z_stop": sol.z_stop,
        "dlnk": dlnk,
        "lmat": _lagrange_to_monomial(dlnk),
        "weights": _simpson_weights(plan.n_k, dlnk),
        "filon_window": int(math.ceil(math.log(_X_INTERFERENCE[1] / _X_SPLIT[0]) / dlnk)) + 6,
        "ln_kir": spline.efolds[0] + spline.ln_hubble_nodes[0],
        "ln_mu": ln_mu,
    }

    def at_time(n, q, qp, inw, aft, pre):
        def f(t):
            return _sums(t, n, ctx, sol.lnk, q, qp, inw, aft, pre, "A")

        d1 = jax.jacfwd(f)
        kin = _sums(0.0, n, ctx, sol.lnk, q, qp, inw, aft, pre, "K") if kinetic else jnp.zeros(())
        return f(0.0), d1(0.0), jax.jacfwd(d1)(0.0), kin

    def at_time_third(n, q, qp, inw, aft, pre):
        # A and its first three t-derivatives from one nested forward-mode jet of the
        # third-order mode continuation (A, A', A'' come out of the same evaluation).
        def f(t):
            return _sums(t, n, ctx, sol.lnk, q, qp, inw, aft, pre, "A", third=True)

        def jet1(t):
            return jax.jvp(f, (t,), (jnp.ones_like(t),))

        def jet2(t):
            return jax.jvp(jet1, (t,), (jnp.ones_like(t),))

        ((v, d1), (_, d2)), (_, (_, d3)) = jax.jvp(jet2, (jnp.zeros(()),), (jnp.ones(()),))
        kin = _sums(0.0, n, ctx, sol.lnk, q, qp, inw, aft, pre, "K") if kinetic else jnp.zeros(())
        return v, d1, d2, d3, kin

    # Output times in batches (lax.map): the per-time work is (modes x jet) wide, and all
    # times at once would hold every intermediate for every time (4 GB on 1120 x 1361).
    per_time = (out_n, sol.q.T, sol.qp.T, sol.in_window.T, sol.after_stop.T, sol.pre_exit.T)
    if third:
        # the third-order jet is twice as wide as the second-order one: half the batch
        a, da, d2a, d3a, kin = jax.lax.map(
            lambda args: at_time_third(*args), per_time, batch_size=_TIME_BATCH // 2
        )
    else:
        a, da, d2a, kin = jax.lax.map(lambda args: at_time(*args), per_time, batch_size=_TIME_BATCH)
    lnh, eps = spline.ln_hubble_and_epsilon(out_n)
    box = -jnp.exp(2.0 * lnh) * (d2a + (3.0 - eps) * da)
    out = {"A": a + prior_variance, "dA": da, "d2A": d2a, "box": box}
    if third:
        out["d3A"] = d3a
    if kinetic:
        eps_n = jax.vmap(jax.grad(lambda z: spline.ln_hubble_and_epsilon(z)[1]))(out_n)
        h4 = jnp.exp(4.0 * lnh)
        out["kinetic"] = kin
        out["local_box"] = -(h4 / (16.0 * jnp.pi**2)) * ((2.0 - eps) * (3.0 - 5.0 * eps) - 2.0 * eps_n)
    return out
