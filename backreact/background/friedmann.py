"""The complete expansion history on one e-fold grid: inflation to a little past today.

Equations (M_p = 1, N = ln a, a = 1 when the photon temperature is T_CMB):

    3 H^2 = rho_total,   eps = -d ln H/dN = (3/2) (rho + p)_total / rho_total,

with every component conserved on its own, rho_i' = -3 (rho_i + p_i) (+ exchange):

- inflaton: a canonical field (``inflation.py``) or a prescribed-eps fluid; after the end
  of inflation a fluid whose equation of state is blended smoothly (C^1 in eps) over
  ``junction`` e-folds from its end-of-inflation value to 0 (perturbative reheating) or
  1/3 (instant reheating), decaying into radiation at rate Gamma:
  rho_phi' = -3 (1 + w_phi) rho_phi - (Gamma/H) rho_phi (Kolb & Turner 1990, ch. 5);
- radiation: comoving entropy S = s a^3 with dS/dN = (Gamma/H) rho_phi / (rho_r (1 + w_r)) S,
  rho_r = rho(s) and w_r = d ln rho/d ln s - 1 from the Standard-Model table
  (``thermal.py``); S is conserved once the decay is over;
- matter rho_m = rho_m0 a^-3 from the end of reheating on (baryons and dark matter are
  decay products; extrapolating a^-3 into inflation would be unphysical), so H jumps
  there by the relative amount (rho_m/rho_r) ~ T_eq/T_reheat-end (1e-18 at T_rh = 1e9 GeV,
  ~1e-7 at the 4 MeV bound); cosmological constant rho_Lambda throughout;
- spectator rho_q(N), p_q(N): an input on the grid (zero for a plain background), cubic
  Hermite-interpolated between nodes with slopes rho_q' = -3 (rho_q + p_q).

Stages: (A) inflation and reheating are integrated in a frame n with n = 0 at the first
point (diffrax, Dopri8, explicit tolerances); the comoving entropy left by reheating
fixes where T = T_CMB, i.e. the shift n0 to the frame N = n - n0 with a = 1 today;
(B) after reheating everything is algebraic in N.

The grid has a fixed number of points set by the config; nodes are placed relative to
physical landmarks (start and end of inflation, end of reheating, a late redshift,
today, the final redshift) so they move smoothly with the parameters: a history is a
fixed-shape pytree that jit, vmap and grad can use.
"""

from __future__ import annotations

import math

import diffrax
import equinox as eqx
import numpy as np
import optimistix as optx

from .. import constants as C
from .._interp import hermite_nodes, hermite_uniform
from .._jax import jax, jnp
from .inflation import EpsilonProfile, InflatonPotential
from .thermal import ThermalTable

# Grid shapes near the end of inflation: nodes are uniform in psi(d) = d + L ln(1 + d/d0),
# d the distance in e-folds from the end of inflation, so the density there is (1 + L/d0)
# times the far density: eps rises within the last e-fold and the junction lasts a
# fraction of one, and both must be resolved (DESIGN 2.2).
_INFLATION_CLUSTER = (5.0, 0.5)  # (L, d0)
_REHEATING_CLUSTER = (3.0, 0.3)
# Field models start this many slow-roll e-folds before the history's first point, so
# the approach to the slow-roll attractor (decaying like e^{-3N}) is over by then.
_ATTRACTOR_MARGIN = 8.0
# Seconds of a spare e-fold budget for finding the end of inflation.
_END_SEARCH = 40.0
# Landmark of the end of reheating: e-folds after H = Gamma (the inflaton fraction left
# there is ~exp(-200)), and after the junction for instant reheating.
_REHEAT_TAIL = 3.0
_INSTANT_TAIL = 1.0
# Fraction of the late-segment points placed before today (the rest run into the future).
_PAST_FRACTION = 0.8
_GL_X, _GL_W = (jnp.asarray(v) for v in np.polynomial.legendre.leggauss(8))


class ThermalArrays(eqx.Module):
    """The radiation table as JAX arrays (see ``thermal.ThermalTable``)."""

    lns0: jax.Array
    step: jax.Array
    lnrho_nodes: jax.Array
    lnrho_slopes: jax.Array
    lnT_nodes: jax.Array
    lnT_slopes: jax.Array

    @classmethod
    def from_table(cls, t: ThermalTable) -> ThermalArrays:
        a = jnp.asarray
        return cls(a(t.lns0), a(t.step), a(t.lnrho), a(t.dlnrho), a(t.lnT), a(t.dlnT))

    def lnrho(self, lns):
        """ln rho_r and 1 + w_r = d ln rho / d ln s at ln s (M_p units)."""
        return hermite_uniform(lns, self.lns0, self.step, self.lnrho_nodes, self.lnrho_slopes)

    def ln_temperature(self, lns):
        return hermite_uniform(lns, self.lns0, self.step, self.lnT_nodes, self.lnT_slopes)[0]

    def lns_of_lnrho(self, lnrho):
        """Invert ln rho(ln s) by Newton (monotone, slope in [1.2, 4/3])."""

        def newton(_, lns):
            f, df = self.lnrho(lns)
            return lns - (f - lnrho) / df

        return jax.lax.fori_loop(0, 8, newton, 0.75 * lnrho)


class ExpansionModel(eqx.Module):
    """Parameters of one expansion history (array leaves) and its grid (static).

    Units: M_p = 1. ``ln_hubble_ref`` = ln(H/M_p) at the start of the history or at the
    end of inflation (``hubble_at_end``); ``ln_gamma`` = ln(Gamma/M_p) of the inflaton
    decay (unused for instant reheating); ``rho_matter0``, ``rho_lambda`` in M_p^4;
    ``lns_today`` = ln s(T_CMB) in M_p^3.
    """

    ln_hubble_ref: jax.Array
    efolds: jax.Array
    junction: jax.Array
    ln_gamma: jax.Array
    rho_matter0: jax.Array
    rho_lambda: jax.Array
    lns_today: jax.Array
    ln1pz_late: jax.Array
    final_efold: jax.Array
    thermal: ThermalArrays
    profile: EpsilonProfile | None
    potential: InflatonPotential | None
    hubble_at_end: bool = eqx.field(static=True)
    instant_reheating: bool = eqx.field(static=True)
    points: tuple[int, int, int, int] = eqx.field(static=True)
    rtol: float = eqx.field(static=True, default=1e-11)
    atol: float = eqx.field(static=True, default=1e-13)

    @property
    def size(self) -> int:
        return sum(self.points)

    @property
    def segment_slices(self) -> dict[str, slice]:
        ni, nr, nm, nl = self.points
        return {
            "inflation": slice(0, ni),
            "reheating": slice(ni, ni + nr),
            "radiation_matter": slice(ni + nr, ni + nr + nm),
            "late": slice(ni + nr + nm, ni + nr + nm + nl),
        }


class History(eqx.Module):
    """One expansion history on the grid (M_p = 1, N = ln a with a = 1 today).

    Arrays of shape (size,): ``efolds`` N, ``ln_hubble`` ln(H/M_p), ``epsilon``,
    ``rho_inflaton``, ``rho_radiation``, ``rho_matter``, ``rho_lambda``, ``rho_spectator``,
    ``pressure`` (total), ``ln_temperature`` (ln(T/M_p), -inf before reheating starts),
    ``cosmic_time`` (M_p^-1, from the first point), ``comoving_distance`` (M_p^-1, from
    today, signed; NaN before the end of reheating). Scalars: ``end_of_inflation`` and
    ``end_of_reheating`` (N of the landmarks), ``hubble_end`` (ln H at the end of
    inflation), ``pivot_exit`` (N where k = 0.05/Mpc left the horizon, NaN if before the
    first point), ``ln_hubble_pivot``, ``field_pivot`` (inflaton value there; NaN for a
    profile), ``age`` (cosmic time today), ``ln_hubble_today``.
    """

    efolds: jax.Array
    ln_hubble: jax.Array
    epsilon: jax.Array
    rho_inflaton: jax.Array
    rho_radiation: jax.Array
    rho_matter: jax.Array
    rho_lambda: jax.Array
    rho_spectator: jax.Array
    pressure: jax.Array
    ln_temperature: jax.Array
    cosmic_time: jax.Array
    comoving_distance: jax.Array
    end_of_inflation: jax.Array
    end_of_reheating: jax.Array
    ln_hubble_end: jax.Array
    pivot_exit: jax.Array
    ln_hubble_pivot: jax.Array
    field_pivot: jax.Array
    age: jax.Array
    ln_hubble_today: jax.Array

    @property
    def rho_total(self):
        return self.rho_inflaton + self.rho_radiation + self.rho_matter + self.rho_lambda + self.rho_spectator


# --------------------------------------------------------------------------- grid


def _clustered(u, span, cluster):
    """Distances d in [0, span] uniform in psi(d) = d + L ln(1 + d/d0) at fractions u."""
    big_l, d0 = cluster
    target = u * (span + big_l * jnp.log1p(span / d0))

    def newton(_, d):  # psi is increasing and concave: Newton from below converges
        f = d + big_l * jnp.log1p(d / d0) - target
        d = d - f / (1.0 + big_l / (d0 + d))
        # where, not clip: clip halves autodiff derivatives at the end points (ties)
        return jnp.where(d < 0.0, 0.0, jnp.where(d > span, span, d))

    return jax.lax.fori_loop(0, 40, newton, u * span)


def _uniform(n, include_first):
    return jnp.asarray(
        np.arange(0 if include_first else 1, n + (0 if include_first else 1))
        / (n - 1 if include_first else n)
    )


# ------------------------------------------------------------------ the reheating fluid


def _junction_w(x, delta, w_end, dw_end, w_final):
    """Inflaton-fluid w at x = n - n_end >= 0: C^1 blend over [0, delta] then w_final."""
    tau = jnp.clip(x / delta, 0.0, 1.0)
    s = tau**3 * (10.0 - 15.0 * tau + 6.0 * tau**2)
    xc = jnp.minimum(x, delta)
    return (1.0 - s) * (w_end + dw_end * xc) + s * w_final


def _junction_w_integral(x, delta, w_end, dw_end, w_final):
    """int_0^x w dx' of ``_junction_w`` (closed form)."""
    xc = jnp.clip(x, 0.0, delta)
    tau = xc / delta
    s1 = tau**4 * (2.5 - 3.0 * tau + tau**2)  # int_0^tau s
    s2 = tau**5 * (2.0 - 2.5 * tau + 6.0 / 7.0 * tau**2)  # int_0^tau tau' s
    inside = (
        w_end * xc + 0.5 * dw_end * xc**2 - w_end * delta * s1 - dw_end * delta**2 * s2 + w_final * delta * s1
    )
    return inside + w_final * jnp.maximum(x - delta, 0.0)


# ------------------------------------------------------------------------- the solver


def _spectator_interp(nodes, rho_q, p_q):
    slopes = -3.0 * (rho_q + p_q)

    def f(n):
        return hermite_nodes(n, nodes, rho_q, slopes)[0]

    def fp(n):
        v, d = hermite_nodes(n, nodes, rho_q, slopes)
        return v, -v - d / 3.0

    return f, fp


def _ode(rhs, t0, t1, y0, ts, model, event=None, dense=False):
    saveat = (
        diffrax.SaveAt(ts=ts, t1=True, dense=dense)
        if ts is not None
        else diffrax.SaveAt(t1=True, dense=dense)
    )
    return diffrax.diffeqsolve(
        diffrax.ODETerm(rhs),
        diffrax.Dopri8(),
        t0,
        t1,
        dt0=1e-3,
        y0=y0,
        saveat=saveat,
        stepsize_controller=diffrax.PIDController(rtol=model.rtol, atol=model.atol),
        event=event,
        max_steps=100_000,
    )


def _inflation_landmarks(model: ExpansionModel):
    """Return (n_end, lnH_end_unscaled-free quantities) for the inflation stage.

    For a field model: the field frame offset m_s, m_e (pass 1, no other components),
    ln V0 from the reference Hubble rate. For a profile: the closed form.
    """
    if model.profile is not None:
        prof = model.profile
        lnh0 = model.ln_hubble_ref + jnp.where(
            model.hubble_at_end, prof.integrated_epsilon(model.efolds), 0.0
        )
        return {"n_end": model.efolds, "lnh0": lnh0}
    pot = model.potential
    phi0 = pot.slow_roll_field(model.efolds + _ATTRACTOR_MARGIN)
    v0, dv0 = pot.potential(phi0)

    def rhs(m, y, args):
        phi, dphi = y
        v, dv = pot.potential(phi)
        h2 = v / (3.0 - 0.5 * dphi**2)
        return (dphi, -(3.0 - 0.5 * dphi**2) * dphi - dv / h2)

    def cond(t, y, args, **kw):
        return 0.5 * y[1] ** 2 - 1.0

    event = diffrax.Event(cond, root_finder=optx.Newton(rtol=1e-12, atol=1e-12))
    sol = _ode(
        rhs,
        0.0,
        model.efolds + _ATTRACTOR_MARGIN + _END_SEARCH,
        (phi0, -dv0 / v0),
        None,
        model,
        event=event,
        dense=True,
    )
    m_e = sol.ts[-1]
    m_s = m_e - model.efolds
    ref_m = jnp.where(model.hubble_at_end, m_e, m_s)
    phi_r, dphi_r = sol.evaluate(ref_m)
    v_r, _ = pot.potential(phi_r)
    ln_h_unit = 0.5 * jnp.log(v_r / (3.0 - 0.5 * dphi_r**2))
    ln_v0 = 2.0 * (model.ln_hubble_ref - ln_h_unit)
    return {
        "n_end": model.efolds,
        "m_s": m_s,
        "phi0": phi0,
        "dphi0": -dv0 / v0,
        "ln_v0": ln_v0,
        "phi_end": sol.ys[0][-1],
    }


def _grid_phase_a(model, n_end, n_reheat):
    ni, nr, _, _ = model.points
    u = _uniform(ni, True)
    inf_nodes = n_end - _clustered(1.0 - u, model.efolds, _INFLATION_CLUSTER)
    v = _uniform(nr, False)
    rh_nodes = n_end + _clustered(v, n_reheat - n_end, _REHEATING_CLUSTER)
    return inf_nodes, rh_nodes


def _phase_a(model: ExpansionModel, lm, rho_q, p_q):
    """Inflation and reheating in the frame n (n = 0 at the first point).

    Returns node arrays and the comoving entropy S_rel (s e^{3n}) after reheating.
    """
    ni, nr, _, _ = model.points
    n_end = lm["n_end"]
    rho_l = model.rho_lambda

    # Matter is absent here: it appears at the end of reheating (module docstring).
    # ---- inflation
    if model.profile is not None:
        prof = model.profile
        lnh0 = lm["lnh0"]
        eps_e, deps_e = prof.epsilon(model.efolds)
        lnh_e_phi = lnh0 - prof.integrated_epsilon(model.efolds)
        rho_e = 3.0 * jnp.exp(2.0 * lnh_e_phi)
        n_reheat = _reheat_landmark(model, n_end, lnh_e_phi)
        inf_nodes, rh_nodes = _grid_phase_a(model, n_end, n_reheat)
        nodes_a = jnp.concatenate([inf_nodes, rh_nodes])
        sq, sqp = _spectator_interp(nodes_a, rho_q[: ni + nr], p_q[: ni + nr])
        eps_phi, _ = prof.epsilon(inf_nodes)
        rho_phi = 3.0 * jnp.exp(2.0 * (lnh0 - prof.integrated_epsilon(inf_nodes)))
        p_phi = rho_phi * (-1.0 + 2.0 * eps_phi / 3.0)
        rq = rho_q[:ni]
        rho_tot = rho_phi + rho_l + rq
        p_tot = p_phi - rho_l + p_q[:ni]

        def hubble_inf(n):
            e_int = prof.integrated_epsilon(n)
            return jnp.sqrt((3.0 * jnp.exp(2.0 * (lnh0 - e_int)) + rho_l + sq(n)) / 3.0)

        t_inf = _cumulative_quad(lambda n: 1.0 / hubble_inf(n), inf_nodes)
        inf = {"rho_phi": rho_phi, "rho_tot": rho_tot, "p_tot": p_tot, "t": t_inf, "field": None}
        w_end = -1.0 + 2.0 * eps_e / 3.0
        dw_end = 2.0 * deps_e / 3.0
        t_end = t_inf[-1]
    else:
        pot = model.potential
        ln_v0 = lm["ln_v0"]
        v0 = jnp.exp(ln_v0)
        m_s = lm["m_s"]
        # nodes in the relative frame need the end landmark and the reheating landmark,
        # which needs H_end: take it from pass 1 (no other components) via the field frame.
        lnh_end_guess = _field_hubble_end(model, lm)
        n_reheat = _reheat_landmark(model, n_end, lnh_end_guess)
        inf_nodes, rh_nodes = _grid_phase_a(model, n_end, n_reheat)
        nodes_a = jnp.concatenate([inf_nodes, rh_nodes])
        sq, sqp = _spectator_interp(nodes_a, rho_q[: ni + nr], p_q[: ni + nr])

        def other(n):  # Lambda and the spectator, in V0 units: (rho, rho + p)
            r, p = sqp(n)
            return (rho_l + r) / v0, (r + p) / v0

        def rhs(m, y, args):
            phi, dphi, t = y
            n = m - m_s
            v, dv = pot.potential(phi)
            ro, rpo = other(n)
            h2 = (v + ro) / (3.0 - 0.5 * dphi**2)
            eps = 0.5 * dphi**2 + 0.5 * rpo / h2
            return (dphi, -(3.0 - eps) * dphi - dv / h2, 1.0 / jnp.sqrt(h2))

        sol = _ode(rhs, 0.0, m_s + n_end, (lm["phi0"], lm["dphi0"], 0.0), m_s + inf_nodes, model)
        phi, dphi, tt = sol.ys
        phi, dphi, tt = phi[:ni], dphi[:ni], tt[:ni]
        v, dv = pot.potential(phi)
        ro, rpo = other(inf_nodes)
        h2 = (v + ro) / (3.0 - 0.5 * dphi**2)
        rho_phi = v0 * (0.5 * h2 * dphi**2 + v)
        p_phi = v0 * (0.5 * h2 * dphi**2 - v)
        rho_tot = 3.0 * v0 * h2
        p_tot = p_phi - rho_l + p_q[:ni]
        t_inf = (tt - tt[0]) / jnp.sqrt(v0)
        # end-of-inflation state and the slope of the inflaton's w there
        h2e = h2[-1]
        w_end = p_phi[-1] / rho_phi[-1]
        # d w_phi/dn from the field equation: w = (K - V)/(K + V), K = H^2 phi'^2/2
        ddphi = -(3.0 - 0.5 * dphi[-1] ** 2) * dphi[-1] - dv[-1] / h2e
        kin = 0.5 * h2e * dphi[-1] ** 2
        dkin = h2e * dphi[-1] * ddphi - 2.0 * kin * (0.5 * dphi[-1] ** 2)
        dpot = dv[-1] * dphi[-1]
        tot = kin + v[-1]
        dw_end = 2.0 * (dkin * v[-1] - kin * dpot) / tot**2
        rho_e = rho_phi[-1]
        t_end = t_inf[-1]
        inf = {"rho_phi": rho_phi, "rho_tot": rho_tot, "p_tot": p_tot, "t": t_inf, "field": phi}

    # ---- reheating
    delta = model.junction
    w_final = 1.0 / 3.0 if model.instant_reheating else 0.0
    rq_rh, pq_rh = rho_q[ni : ni + nr], p_q[ni : ni + nr]
    x_rh = rh_nodes - n_end
    if model.instant_reheating:
        # No decay during the junction: closed form; at its end the fluid (w = 1/3)
        # becomes thermal radiation with the same energy density.
        def ln_rho_phi(x):
            return jnp.log(rho_e) - 3.0 * (x + _junction_w_integral(x, delta, w_end, dw_end, w_final))

        ln_s_conv = model.thermal.lns_of_lnrho(ln_rho_phi(delta))
        lnS = ln_s_conv + 3.0 * (n_end + delta)

        def components(n):
            x = n - n_end
            lns = lnS - 3.0 * n
            lnr, one_w = model.thermal.lnrho(lns)
            is_fluid = x < delta
            r_phi = jnp.where(is_fluid, jnp.exp(ln_rho_phi(x)), 0.0)
            w_phi = _junction_w(x, delta, w_end, dw_end, w_final)
            r_rad = jnp.where(is_fluid, 0.0, jnp.exp(lnr))
            p_rad = r_rad * (one_w - 1.0)
            lnT = jnp.where(is_fluid, -jnp.inf, model.thermal.ln_temperature(lns))
            return r_phi, w_phi * r_phi, r_rad, p_rad, lnT

        def hubble_rh(n):
            r_phi, _, r_rad, _, _ = components(n)
            return jnp.sqrt((r_phi + r_rad + rho_l + sq(n)) / 3.0)

        r_phi, pphi, r_rad, p_rad, lnT = components(rh_nodes)
        t_rh = (
            t_end
            + _cumulative_quad(lambda n: 1.0 / hubble_rh(n), jnp.concatenate([n_end[None], rh_nodes]))[1:]
        )
    else:
        gamma = jnp.exp(model.ln_gamma)

        def state(n, lnphi, lnS):
            lns = lnS - 3.0 * n
            lnr, one_w = model.thermal.lnrho(lns)
            r_phi = jnp.exp(lnphi)
            r_rad = jnp.exp(lnr)
            rq_, pq_ = sqp(n)
            h = jnp.sqrt((r_phi + r_rad + rho_l + rq_) / 3.0)
            return r_phi, r_rad, one_w, h, lns

        def rhs(n, y, args):
            lnphi, lnS, _ = y
            r_phi, r_rad, one_w, h, _ = state(n, lnphi, lnS)
            w_phi = _junction_w(n - n_end, delta, w_end, dw_end, w_final)
            g_h = gamma / h
            return (-3.0 * (1.0 + w_phi) - g_h, g_h * r_phi / (r_rad * one_w), 1.0 / h)

        # Radiation starts on the quasi-static attractor of rho_r' = -4 rho_r + (Gamma/H) rho_phi
        # for w_phi = -1/3 (rho_r = (Gamma/H)/3 rho_phi); see docs/physics.md.
        h_e = jnp.sqrt((rho_e + rho_l + sq(n_end)) / 3.0)
        lnr_seed = jnp.log(rho_e * gamma / h_e / 3.0)
        lnS0 = model.thermal.lns_of_lnrho(lnr_seed) + 3.0 * n_end
        sol = _ode(rhs, n_end, rh_nodes[-1], (jnp.log(rho_e), lnS0, t_end), rh_nodes, model)
        lnphi, lnS_n, t_n = (y[:nr] for y in sol.ys)
        r_phi, r_rad, one_w, _, lns = state(rh_nodes, lnphi, lnS_n)
        w_phi = _junction_w(x_rh, delta, w_end, dw_end, w_final)
        # The decay is complete at the reheating landmark (fraction ~e^-200): drop the rest.
        r_phi = r_phi.at[-1].set(0.0)
        pphi = w_phi * r_phi
        p_rad = r_rad * (one_w - 1.0)
        lnT = model.thermal.ln_temperature(lns)
        lnS = lnS_n[-1]
        t_rh = t_n
    rho_tot_rh = r_phi + r_rad + rho_l + rq_rh
    p_tot_rh = pphi + p_rad - rho_l + pq_rh
    n0_new = (lnS - model.lns_today) / 3.0
    return {
        "inf_nodes": inf_nodes,
        "rh_nodes": rh_nodes,
        "inf": inf,
        "rh": {
            "rho_phi": r_phi,
            "rho_rad": r_rad,
            "rho_tot": rho_tot_rh,
            "p_tot": p_tot_rh,
            "t": t_rh,
            "lnT": lnT,
        },
        "lnS": lnS,
        "n0": n0_new,
        "n_end": n_end,
        "n_reheat": rh_nodes[-1],
        "lnh_end": 0.5 * jnp.log(inf["rho_tot"][-1] / 3.0),
    }


def _field_hubble_end(model, lm):
    """ln H at the end of inflation of pass 1 (field alone): eps = 1, so H^2 = V/2 (V0 units)."""
    v, _ = model.potential.potential(lm["phi_end"])
    return 0.5 * (lm["ln_v0"] + jnp.log(v / 2.0))


def _reheat_landmark(model, n_end, lnh_end):
    if model.instant_reheating:
        return n_end + model.junction + _INSTANT_TAIL
    # H falls like a^{-3/2} in the matter-like reheating era: H = Gamma after (2/3) ln(H_end/Gamma).
    span = jnp.maximum(model.junction, 2.0 / 3.0 * (lnh_end - model.ln_gamma))
    return n_end + span + _REHEAT_TAIL


def _cumulative_quad(f, nodes):
    """int_{nodes[0]}^{nodes[i]} f, 8-point Gauss-Legendre on every interval."""
    a = nodes[:-1][:, None]
    b = nodes[1:][:, None]
    x = 0.5 * (b - a) * _GL_X[None, :] + 0.5 * (a + b)
    vals = f(x)
    per = jnp.sum(vals * _GL_W[None, :], axis=1) * 0.5 * (b - a)[:, 0]
    return jnp.concatenate([jnp.zeros(1), jnp.cumsum(per)])


def today_node(model: ExpansionModel) -> int:
    """Index of the grid node placed exactly at N = 0 (today); static for a grid shape."""
    ni, nr, nm, nl = model.points
    return ni + nr + nm + max(2, int(round(_PAST_FRACTION * nl))) - 1


def expansion_history(model: ExpansionModel, rho_q=None, p_q=None) -> History:
    """Solve the background for a given spectator rho_q(N), p_q(N) on the grid.

    ``rho_q``, ``p_q``: arrays of shape (model.size,) in M_p^4, on the grid nodes that
    this function places (the node positions do not depend on rho_q); None = zero.
    """
    size = model.size
    zeros = jnp.zeros(size)
    rho_q = zeros if rho_q is None else jnp.asarray(rho_q)
    p_q = zeros if p_q is None else jnp.asarray(p_q)
    ni, nr, nm, nl = model.points
    lm = _inflation_landmarks(model)
    a = _phase_a(model, lm, rho_q, p_q)
    n0 = a["n0"]

    # ---- stage B: algebraic after reheating, in N (a = 1 today)
    n_reheat = a["n_reheat"] - n0
    n_late = -model.ln1pz_late
    rm_nodes = n_reheat + (n_late - n_reheat) * _uniform(nm, False)
    n_past = max(2, int(round(_PAST_FRACTION * nl)))
    n_fut = nl - n_past
    past_nodes = n_late + (0.0 - n_late) * _uniform(n_past, False)
    fut_nodes = model.final_efold * _uniform(n_fut, False)
    b_nodes = jnp.concatenate([rm_nodes, past_nodes, fut_nodes])
    nodes_b_full = jnp.concatenate([jnp.asarray([n_reheat]), b_nodes])
    rq_b = jnp.concatenate([rho_q[ni + nr - 1 : ni + nr], rho_q[ni + nr :]])
    pq_b = jnp.concatenate([p_q[ni + nr - 1 : ni + nr], p_q[ni + nr :]])
    sq_b, _ = _spectator_interp(nodes_b_full, rq_b, pq_b)

    def late_components(N):
        lns = model.lns_today - 3.0 * N
        lnr, one_w = model.thermal.lnrho(lns)
        r_rad = jnp.exp(lnr)
        r_m = model.rho_matter0 * jnp.exp(-3.0 * N)
        return r_rad, r_rad * (one_w - 1.0), r_m, lns

    def hubble_b(N):
        r_rad, _, r_m, _ = late_components(N)
        return jnp.sqrt((r_rad + r_m + model.rho_lambda + sq_b(N)) / 3.0)

    r_rad_b, p_rad_b, r_m_b, lns_b = late_components(b_nodes)
    rq_nodes = rho_q[ni + nr :]
    rho_tot_b = r_rad_b + r_m_b + model.rho_lambda + rq_nodes
    p_tot_b = p_rad_b - model.rho_lambda + p_q[ni + nr :]
    t_b = a["rh"]["t"][-1] + _cumulative_quad(lambda N: 1.0 / hubble_b(N), nodes_b_full)[1:]
    # comoving distance from today: chi(N) = int_N^0 e^{-N'}/H dN'
    chi_cum = _cumulative_quad(lambda N: jnp.exp(-N) / hubble_b(N), nodes_b_full)
    i_today = nm + n_past  # index of N = 0 in nodes_b_full
    chi_b = (chi_cum[i_today] - chi_cum)[1:]
    age = t_b[nm + n_past - 1]

    # ---- assemble
    N = jnp.concatenate([a["inf_nodes"] - n0, a["rh_nodes"] - n0, b_nodes])
    inf, rh = a["inf"], a["rh"]
    rho_tot = jnp.concatenate([inf["rho_tot"], rh["rho_tot"], rho_tot_b])
    p_tot = jnp.concatenate([inf["p_tot"], rh["p_tot"], p_tot_b])
    rho_m_a = jnp.zeros(ni + nr)
    rho_rad = jnp.concatenate([jnp.zeros(ni), rh["rho_rad"], r_rad_b])
    rho_phi = jnp.concatenate([inf["rho_phi"], rh["rho_phi"], jnp.zeros(nm + nl)])
    rho_m = jnp.concatenate([rho_m_a, r_m_b])
    lnT = jnp.concatenate([jnp.full(ni, -jnp.inf), rh["lnT"], model.thermal.ln_temperature(lns_b)])
    t = jnp.concatenate([inf["t"], rh["t"], t_b])
    chi = jnp.concatenate([jnp.full(ni + nr, jnp.nan), chi_b])
    ln_h = 0.5 * jnp.log(rho_tot / 3.0)
    eps = 1.5 * (rho_tot + p_tot) / rho_tot

    # pivot exit: N + ln H = ln k_* during inflation (monotone there), Newton on the
    # Hermite interpolant of ln H (slopes -eps).
    ln_k = jnp.log(C.PIVOT_K_MPC * C.INV_MPC_GEV / C.REDUCED_PLANCK_MASS_GEV)
    n_inf = N[:ni]
    lh_inf = ln_h[:ni]
    e_inf = eps[:ni]
    g = n_inf + lh_inf
    n_star = jnp.interp(ln_k, g, n_inf)
    for _ in range(6):
        v, d = hermite_nodes(n_star, n_inf, lh_inf, -e_inf)
        n_star = n_star - (n_star + v - ln_k) / (1.0 - jnp.clip(-d, 0.0, 0.99))
    inside = (ln_k >= g[0]) & (ln_k <= g[-1])
    n_star = jnp.where(inside, n_star, jnp.nan)
    lh_star = hermite_nodes(n_star, n_inf, lh_inf, -e_inf)[0]
    if inf["field"] is not None:
        phi_star = jnp.interp(n_star, n_inf, inf["field"])
    else:
        phi_star = jnp.asarray(jnp.nan)
    return History(
        efolds=N,
        ln_hubble=ln_h,
        epsilon=eps,
        rho_inflaton=rho_phi,
        rho_radiation=rho_rad,
        rho_matter=rho_m,
        rho_lambda=jnp.full(size, model.rho_lambda),
        rho_spectator=rho_q,
        pressure=p_tot,
        ln_temperature=lnT,
        cosmic_time=t,
        comoving_distance=chi,
        end_of_inflation=a["n_end"] - n0,
        end_of_reheating=n_reheat,
        ln_hubble_end=a["lnh_end"],
        pivot_exit=n_star,
        ln_hubble_pivot=lh_star,
        field_pivot=phi_star,
        age=age,
        ln_hubble_today=0.5 * jnp.log(rho_tot_b[nm + n_past - 1] / 3.0),
    )


# ---------------------------------------------------------------- config -> model


def model_from_config(cfg) -> ExpansionModel:
    """Build the ExpansionModel of a validated ``backreact.config.Config`` (numpy side)."""
    from .inflation import EpsilonProfile, PlateauPotential, QuadraticPotential
    from .thermal import thermal_table

    inf = cfg.inflation
    cos = cfg.cosmology
    rh = cfg.reheating
    grid = cfg.grid
    mp = C.REDUCED_PLANCK_MASS_GEV
    table = thermal_table(float(cos.n_eff))
    profile = potential = None
    if inf.model == "profile":
        profile = EpsilonProfile(
            eps_start=jnp.asarray(inf.eps_start),
            eps_end=jnp.asarray(inf.eps_end),
            rise_efolds=jnp.asarray(inf.rise_efolds),
            efolds=jnp.asarray(inf.efolds),
        )
    elif inf.model == "plateau":
        potential = PlateauPotential(alpha=jnp.asarray(inf.plateau_alpha))
    elif inf.model == "quadratic":
        potential = QuadraticPotential()
    else:  # config validation makes this unreachable
        raise ValueError(f"inflation.model = {inf.model!r}: allowed 'profile', 'plateau', 'quadratic'")
    instant = rh.kind == "instant"
    if instant:
        ln_gamma = -math.inf
    else:
        # Gamma = H at T_rh for a radiation-dominated universe: 3 H^2 = rho_r(T_rh).
        rho_rh = table.density_at_temperature(rh.temperature_GeV)
        ln_gamma = 0.5 * math.log(rho_rh / 3.0)
    rho_crit100 = 3.0 * (C.H100_GEV / mp) ** 2
    ln_t0 = math.log(cos.cmb_temperature_K * C.BOLTZMANN_GEV_K)
    return ExpansionModel(
        ln_hubble_ref=jnp.asarray(math.log(inf.hubble_GeV / mp)),
        efolds=jnp.asarray(float(inf.efolds)),
        junction=jnp.asarray(float(inf.junction_efolds)),
        ln_gamma=jnp.asarray(ln_gamma),
        rho_matter0=jnp.asarray(rho_crit100 * (cos.omega_b + cos.omega_c)),
        rho_lambda=jnp.asarray(rho_crit100 * cos.omega_lambda),
        lns_today=jnp.asarray(table.entropy_density_at(math.exp(ln_t0))),
        ln1pz_late=jnp.asarray(math.log1p(grid.late_start_redshift)),
        final_efold=jnp.asarray(-math.log1p(cos.final_redshift)),
        thermal=ThermalArrays.from_table(table),
        profile=profile,
        potential=potential,
        hubble_at_end=inf.hubble_at == "end",
        instant_reheating=instant,
        points=(grid.points_inflation, grid.points_reheating, grid.points_radiation_matter, grid.points_late),
        rtol=float(grid.rtol),
        atol=float(grid.atol),
    )
