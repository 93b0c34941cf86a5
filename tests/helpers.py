"""Shared helpers for the tests: small, fast scenarios that still contain every era."""

from __future__ import annotations

import functools

from backreact.config import parse_config

#: Grid small enough for CI (a history in milliseconds after compilation) that still has
#: inflation, reheating, radiation, matter and the late segment.
SMALL_GRID = {
    "grid.points_inflation": 81,
    "grid.points_reheating": 40,
    "grid.points_radiation_matter": 120,
    "grid.points_late": 60,
}


def make_config(text: str = "[inflation]\n", small: bool = True, **overrides):
    """Parse ``text`` and apply dotted-key overrides (``inflation__efolds=30`` style)."""
    cfg = parse_config(text)
    values = dict(SMALL_GRID) if small else {}
    values.update({k.replace("__", "."): v for k, v in overrides.items()})
    return cfg.with_overrides(values)


@functools.cache
def solved(text: str, small: bool = True, **overrides):
    """(model, history) for a config, cached across tests (numpy arrays)."""
    import equinox as eqx
    import jax
    import numpy as np

    from backreact.background import expansion_history, model_from_config

    cfg = make_config(text, small, **overrides)
    model = model_from_config(cfg)
    hist = eqx.filter_jit(expansion_history)(model)
    return cfg, model, jax.tree_util.tree_map(np.asarray, hist)


# ---------------------------------------------------------------- test doubles for the solver
# A cheap propagator with genuine memory, so the fixed-point tests compile in seconds rather
# than minutes: the de Sitter growth law A' = H^2/(4 pi^2) of a light field (Vilenkin & Ford
# 1982, Phys. Rev. D 26, 1231; Starobinsky & Yokoyama 1994, Phys. Rev. D 50, 6357) integrated
# along the history from a prior variance TOY_PRIOR (M_p^2).  Not the physics of the package:
# a test double whose A depends on the whole past H(N).
TOY_PRIOR = 0.9


def toy_propagator(history):
    """{"A", "dA", "d2A", "d3A"} (M_p^2) of the growth law above on a History's nodes."""
    from backreact._jax import jnp

    rate = jnp.exp(2.0 * history.ln_hubble) / (4.0 * jnp.pi**2)
    steps = 0.5 * (rate[1:] + rate[:-1]) * jnp.diff(history.efolds)
    A = TOY_PRIOR + jnp.concatenate([jnp.zeros(1), jnp.cumsum(steps)])
    # A''' is only a tangent of A'' in the closures below, which do not depend on A'': zero.
    return {"A": A, "dA": rate, "d2A": -2.0 * history.epsilon * rate, "d3A": jnp.zeros_like(A)}


#: ln(H/M_p) below which the toy coupling is on: deep in radiation (H0 ~ e^-139 M_p), so the
#: spectator is absent during inflation and reheating and fully on for z < 1e3.
TOY_SWITCH = -125.0


def effective_coupling(A, dA, d2A, H, eps, parameter):
    """rho_q = parameter * A * H^2 * s(H), s a smooth switch on at late times: with A constant
    late, 3 H^2 = rho_other + c A H^2 has the closed form H^2 = rho_other/(3 - c A) (the
    spectator renormalizes the Planck mass), and one Picard pass contracts by c A/3."""
    from backreact._jax import jnp

    switch = 0.5 * (1.0 + jnp.tanh(TOY_SWITCH - jnp.log(H)))
    return parameter * A * H**2 * switch


def constant_density(A, dA, d2A, H, eps, parameter):
    """rho_q = parameter (M_p^4) everywhere: a cosmological constant in closure form."""
    from backreact._jax import jnp

    return jnp.full_like(A, parameter)


def rho_and_pressure(A, dA, d2A, H, eps, parameter):
    """A user closure returning (rho_q, p_q) with p_q = -rho_q/3 given explicitly."""
    rho = parameter * A
    return rho, -rho / 3.0


def three_values(A, dA, d2A, H, eps, parameter):
    """A broken user closure: three return values."""
    return A, A, A


def sine_potential_shape(s):
    """u(sigma) = 1 - cos(sigma/0.7) for the custom-potential quadrature checks."""
    from backreact._jax import jnp

    return 1.0 - jnp.cos(s / 0.7)
