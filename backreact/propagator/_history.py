"""The expansion history as seen by the spectator's modes: ln H(N) and eps(N) anywhere.

The background gives ln H and eps on its grid nodes. Between nodes ln H is the cubic
Hermite interpolant with slopes -eps, and eps(N) is defined as -d ln H/dN of that same
curve, so eps = -H'/H holds exactly along the interpolated history (it is continuous,
piecewise quadratic). Everything in reduced Planck units, N = ln a.
"""

from __future__ import annotations

import equinox as eqx

from .._interp import hermite_nodes
from .._jax import jax, jnp


class HistorySpline(eqx.Module):
    """ln H(N) and eps(N) of a history given on increasing nodes N_i."""

    efolds: jax.Array
    ln_hubble_nodes: jax.Array
    epsilon_nodes: jax.Array

    def ln_hubble(self, n):
        return hermite_nodes(n, self.efolds, self.ln_hubble_nodes, -self.epsilon_nodes)[0]

    def ln_hubble_and_epsilon(self, n):
        """(ln H, eps) at N; eps = -d ln H/dN of the interpolant."""
        v, d = hermite_nodes(n, self.efolds, self.ln_hubble_nodes, -self.epsilon_nodes)
        return v, -d

    def ln_comoving_horizon(self, n):
        """ln(aH) = N + ln H."""
        return n + self.ln_hubble(n)


def spline_from_history(history) -> HistorySpline:
    """The spline of a background ``History`` (arrays in M_p units)."""
    return HistorySpline(
        jnp.asarray(history.efolds), jnp.asarray(history.ln_hubble), jnp.asarray(history.epsilon)
    )
