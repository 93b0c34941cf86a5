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
5. k integration at each output time of the renormalized integrand, written so that
   what is summed on the ln k grid is smooth and decays (no cut-off moving through the
   grid): the 4th-order adiabatic vacuum B4 is subtracted with a smooth weight s(x)
   (0 below x = 3, 1 above 6) and added back analytically with the counterterms; the
   standing-wave interference of modes inside is tapered smoothly to its phase average
   between x = 8 and 24 (weight w). Composite Simpson in ln k.
6. A', A'' by exact Taylor-mode differentiation at each output time: per mode, u and u'
   are continued as a polynomial in N using the mode equation (u'', u''' exactly), the
   history from the spline; no finite differences.

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

# Smooth weights in ln x. They are C-infinity transitions: the sum over a uniform ln k grid
# of a profile moving with N aliases at the grid frequency 2 pi/dlnk, and A'' amplifies
# that by (2 pi/dlnk)^2; a polynomial smoothstep (finite smoothness) leaves ~1e-2 relative
# errors in A'', a C-infinity one ~1e-7 (measured in de Sitter).
_X_SUB = (1.5, 12.0)  # s(x): subtraction of the adiabatic vacuum B4 switches on
_X_TAPER = (6.0, 28.0)  # w(x): vacuum modes before their first exit: direct -> phase average
# Re-entered modes carry standing waves whose phase changes by ~2x dlnk/(eps - 1) between
# neighbouring k nodes; sampled at dlnk = 0.05 they alias above x ~ 6. Their interference
# is therefore averaged away earlier, between x = 2 and 6, where the WKB envelope is
# already accurate (exact for radiation, V = 0; O((V/k^2)^2) ~ 1e-3 at x = 3 in matter).
_X_TAPER_REENTERED = (2.0, 6.0)


# Stage 2 saves at up to every output time (frozen modes are followed to the end):
# Tsit5's cheaper dense output beats Dopri8 there (measured in benchmarks/).
STAGE2_SOLVER = diffrax.Tsit5()


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


def _weights(lnx):
    s = _smoothstep((lnx - math.log(_X_SUB[0])) / math.log(_X_SUB[1] / _X_SUB[0]))
    w = 1.0 - _smoothstep((lnx - math.log(_X_TAPER[0])) / math.log(_X_TAPER[1] / _X_TAPER[0]))
    w_re = 1.0 - _smoothstep(
        (lnx - math.log(_X_TAPER_REENTERED[0])) / math.log(_X_TAPER_REENTERED[1] / _X_TAPER_REENTERED[0])
    )
    return s, w, w_re


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


def _mode_taylor(u, up, x, eps, deps, t):
    """u(N+t) and u'(N+t) as polynomials in t from the mode equation, exact to second order
    in t: all that A' and A'' at t = 0 need (|u|^2, |u'|^2 and |u + u'|^2 take their second
    t-derivative from u, u', u'' and the third derivative of u)."""
    x2 = x * x
    upp = -(3.0 - eps) * up - x2 * u
    # (x^2)' = -2 (1 - eps) x^2
    uppp = deps * up - (3.0 - eps) * upp + 2.0 * (1.0 - eps) * x2 * u - x2 * up
    ut = u + up * t + upp * t**2 / 2
    upt = up + upp * t + uppp * t**2 / 2
    return ut, upt


def _functional(
    t, n, spline, lnk, q, qp, scale2, in_window, after_stop, pre_exit, e_stop, ln_mu, ln_kir, weights
):
    """Renormalized A at time n + t (t = 0 is the output time; differentiated in t).

    q, qp: scaled mode data at n (q = u sqrt(2k) a_a); scale2 = ln(k^2/(2 a_a^2)) per mode.
    """
    m = n + t
    lnh0, eps0 = spline.ln_hubble_and_epsilon(n)
    deps0 = jax.grad(lambda z: spline.ln_hubble_and_epsilon(z)[1])(n)
    x0 = jnp.exp(lnk - n - lnh0)
    qt, qpt = _mode_taylor(q, qp, x0, eps0, deps0, t)
    lnh, eps = spline.ln_hubble_and_epsilon(m)
    h2 = jnp.exp(2.0 * lnh)
    lnx = lnk - m - lnh
    x = jnp.exp(lnx)
    c = 2.0 - eps
    s, w_vac, w_re = _weights(lnx)
    w = jnp.where(pre_exit, w_vac, w_re)
    # Q = (3 V^2 - V_etaeta)/(a^4 H^4) with V = (2 - eps) a^2 H^2
    lah = m + lnh

    def vred(z):
        lz, ez = spline.ln_hubble_and_epsilon(z)
        return (2.0 - ez) * jnp.exp(2.0 * (z + lz - lah))

    dv = jax.jacfwd(vred)
    qq = 3.0 * c * c - ((1.0 - eps) * dv(m) + jax.jacfwd(dv)(m))
    # per-mode pieces, in units of H^2
    k3m_h2 = jnp.exp(scale2 - 2.0 * lnh) * jnp.abs(qt) ** 2  # k^3 |u|^2 / H^2
    vac_h2 = 0.5 * x * x  # k^2/(2 a^2) / H^2
    x_safe = jnp.maximum(x, 1.0)  # B4 is only used where s > 0 (x > 1.5)
    b4_h2 = c / 4.0 + qq / (16.0 * x_safe * x_safe)
    wt = jnp.sqrt(jnp.maximum(x * x - c, 1e-2))  # only used where x > 6
    # envelope E = (a/a_a)^2 [wt^2 |q|^2 + |q + q'|^2] / (2 x wt), (a/a_a)^2 = ratio
    ratio = jnp.exp(scale2 - 2.0 * lnh) / vac_h2
    e_now = ratio * (wt * wt * jnp.abs(qt) ** 2 + jnp.abs(qt + qpt) ** 2) / (2.0 * x * wt)
    e_eff = jnp.where(in_window, e_now, jnp.where(after_stop, e_stop, 1.0))
    e_eff = jnp.where(pre_exit, 1.0, e_eff)
    excit = (x**3 / (2.0 * wt)) * (e_eff - 1.0)
    direct = jnp.where(in_window, k3m_h2 - vac_h2, 0.0)
    # The integrand k^3 (M - 1/(2 k a^2)) is blended with its phase average excit + B4 by w
    # (so standing waves inside are averaged away smoothly), and s B4 is subtracted (added
    # back analytically with the counterterms):
    #   w direct + (1 - w)(excit + B4) - s B4 = w direct + (1 - w) excit + (1 - w - s) B4.
    # Before a mode first exits it is in the adiabatic vacuum: E - 1 is only the error of
    # the WKB data, which x^3 would amplify, so excit = 0 there (e_eff = 1 above).
    # Outside its window (x > 28, w = 0, s = 1) only excit remains.
    r = w * direct + (1.0 - w) * excit + (1.0 - w - s) * b4_h2
    r = jnp.where(in_window | after_stop, r, 0.0)
    total = jnp.sum(weights * r) * h2 / (2.0 * jnp.pi**2)
    local = -(c * h2 / (8.0 * jnp.pi**2)) * (_LAMBDA0 + lnh - ln_mu) + qq * h2 * _LAMBDA2 / (32.0 * jnp.pi**2)
    ir = -jnp.exp(2.0 * (ln_kir - m)) / (8.0 * jnp.pi**2)
    return total + local + ir


class ModeSolution(eqx.Module):
    """Per-mode data at the output times (scaled; see ``_functional``)."""

    lnk: jax.Array
    q: jax.Array  # (n_k, T) complex
    qp: jax.Array
    scale2: jax.Array  # (n_k,)
    in_window: jax.Array  # (n_k, T) bool
    after_stop: jax.Array
    pre_exit: jax.Array
    e_stop: jax.Array  # (n_k,)


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


def mode_plan(spline: HistorySpline, out_n, settings: ModeSettings, oracle: bool = False) -> ModePlan:
    """Sizes for ``solve_modes`` (numpy side, outside jit; leaves 20% + 8 slack)."""
    n_k = mode_count(spline, settings)
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
    after_stop = (out_n[None, :] > n_stop[:, None]) & (n_stop[:, None] < n_last)
    first_change = jnp.where(jnp.isfinite(n_exit), jnp.minimum(n_exit, n_peak), n_peak)
    pre_exit = in_window & (out_n[None, :] < first_change[:, None])
    # envelope at the stop
    lnh_b, eps_b = spline.ln_hubble_and_epsilon(n_stop)
    xb = jnp.exp(lnk - n_stop - lnh_b)
    wtb = jnp.sqrt(jnp.maximum(xb * xb - (2.0 - eps_b), 1e-30))
    ratio_b = jnp.exp(scale2 - 2.0 * lnh_b) / (0.5 * xb * xb)
    e_stop = ratio_b * (wtb * wtb * jnp.abs(qb) ** 2 + jnp.abs(qb + pb) ** 2) / (2.0 * xb * wtb)
    return ModeSolution(lnk, q, qp, scale2, in_window, after_stop, pre_exit, e_stop)


def exact_propagator(
    spline: HistorySpline,
    out_n,
    plan: ModePlan,
    *,
    ln_mu,
    prior_variance=0.0,
    settings: ModeSettings = ModeSettings(),
    oracle: bool = False,
):
    """A, A', A'' and Box A (M_p units) at the output times by the exact method."""
    sol = solve_modes(spline, out_n, plan, settings, oracle)
    ln_kir = spline.efolds[0] + spline.ln_hubble_nodes[0]
    weights = _simpson_weights(plan.n_k, 1.0 / settings.modes_per_efold)

    def at_time(n, q, qp, inw, aft, pre):
        def f(t):
            return _functional(
                t, n, spline, sol.lnk, q, qp, sol.scale2, inw, aft, pre, sol.e_stop, ln_mu, ln_kir, weights
            )

        d1 = jax.jacfwd(f)
        return f(0.0), d1(0.0), jax.jacfwd(d1)(0.0)

    a, da, d2a = jax.vmap(at_time, in_axes=(0, 1, 1, 1, 1, 1))(
        out_n, sol.q, sol.qp, sol.in_window, sol.after_stop, sol.pre_exit
    )
    lnh, eps = spline.ln_hubble_and_epsilon(out_n)
    box = -jnp.exp(2.0 * lnh) * (d2a + (3.0 - eps) * da)
    return {"A": a + prior_variance, "dA": da, "d2A": d2a, "box": box}
