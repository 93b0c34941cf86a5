"""Piecewise-cubic Hermite interpolation in JAX (values and slopes at the nodes).

Used for the radiation table (uniform nodes in ln s) and for spectator densities given
on the history grid (non-uniform nodes, slopes from the conservation law). The
interpolant is C^1, exact for cubics, and its derivative is returned alongside, so a
quantity and its rate of change always come from the same curve.
"""

from __future__ import annotations

from ._jax import jnp


def _hermite(t, h, y0, y1, m0, m1):
    """Cubic Hermite on one interval, local coordinate t in [0, 1], width h."""
    t2 = t * t
    t3 = t2 * t
    h00 = 2 * t3 - 3 * t2 + 1
    h10 = t3 - 2 * t2 + t
    h01 = -2 * t3 + 3 * t2
    h11 = t3 - t2
    value = h00 * y0 + h10 * h * m0 + h01 * y1 + h11 * h * m1
    d00 = 6 * t2 - 6 * t
    d10 = 3 * t2 - 4 * t + 1
    d01 = -6 * t2 + 6 * t
    d11 = 3 * t2 - 2 * t
    slope = (d00 * y0 + d01 * y1) / h + d10 * m0 + d11 * m1
    return value, slope


def hermite_uniform(x, x0, step, values, slopes):
    """Evaluate a Hermite curve with nodes x0 + i*step; linear beyond the ends.

    Returns (value, d value / dx). ``values`` and ``slopes`` are 1-D arrays of equal
    length >= 2.
    """
    n = values.shape[0]
    u = (x - x0) / step
    i = jnp.clip(jnp.floor(u).astype(jnp.int32), 0, n - 2)
    t = u - i
    # No clip on t: inside the table t is in [0, 1] by construction, outside the linear
    # branches below replace the value. (A clip would halve autodiff derivatives exactly at
    # the nodes: JAX splits the gradient of max/min at ties.)
    v, s = _hermite(t, step, values[i], values[i + 1], slopes[i], slopes[i + 1])
    lo = x < x0
    hi = x > x0 + (n - 1) * step
    v = jnp.where(lo, values[0] + slopes[0] * (x - x0), v)
    v = jnp.where(hi, values[-1] + slopes[-1] * (x - x0 - (n - 1) * step), v)
    s = jnp.where(lo, slopes[0], jnp.where(hi, slopes[-1], s))
    return v, s


def hermite_nodes(x, nodes, values, slopes):
    """Evaluate a Hermite curve on increasing, non-uniform ``nodes``; constant slope outside."""
    n = nodes.shape[0]
    i = jnp.clip(jnp.searchsorted(nodes, x, side="right") - 1, 0, n - 2)
    h = nodes[i + 1] - nodes[i]
    t = (x - nodes[i]) / h
    v, s = _hermite(t, h, values[i], values[i + 1], slopes[i], slopes[i + 1])  # no clip: see above
    lo = x < nodes[0]
    hi = x > nodes[-1]
    v = jnp.where(lo, values[0] + slopes[0] * (x - nodes[0]), v)
    v = jnp.where(hi, values[-1] + slopes[-1] * (x - nodes[-1]), v)
    s = jnp.where(lo, slopes[0], jnp.where(hi, slopes[-1], s))
    return v, s
