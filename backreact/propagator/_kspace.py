"""Tools of the exact method's k integration: conformal clocks and Filon quadrature.

Re-entered modes carry standing waves, |u|^2 ~ S + 2 Re(J), with J = alpha beta* e^{-2 i theta}
rotating at the WKB phase theta ~ k eta. On a k grid of 20 modes per e-fold the phase 2 k eta
changes by 2 x (aH eta) dlnk ~ 0.1 x (aH eta) between neighbours, so a direct sum aliases
above x ~ 3. The demodulated amplitude Y = J e^{2 i k eta} is smooth in k, and
int dk Y(k) e^{-2 i k eta} is done exactly for a piecewise-cubic Y (Filon quadrature): its
error is that of cubic interpolation of a smooth function, whatever the phase per step.

Conformal clocks (M_p = 1, comoving units, N = ln a):
  eta(N) = int_{N_ref}^{N} dN'/(aH)           (conformal time from the peak of aH),
  psi(N) = int_{N}^{N_last} (2 - eps) aH dN'  (the WKB phase correction int V/k deta, times k).
Both are accumulated on the history's nodes from the reference outward (each sum adds terms
of one sign, so nothing cancels) and evaluated anywhere by 8-point Gauss-Legendre from the
node below, which keeps them differentiable in N and in the history.
"""

from __future__ import annotations

import math

import numpy as np

from .._jax import jax, jnp
from ._history import HistorySpline

_GL_X, _GL_W = (jnp.asarray(v) for v in np.polynomial.legendre.leggauss(8))


def _interval_integrals(spline: HistorySpline, a, b):
    """int_a^b dN/(aH) and int_a^b (2 - eps) aH dN by Gauss-Legendre (elementwise)."""
    mid = 0.5 * (a + b)
    half = 0.5 * (b - a)
    z = mid[..., None] + half[..., None] * _GL_X
    lnh, eps = spline.ln_hubble_and_epsilon(z)
    lah = z + lnh
    i_eta = half * jnp.sum(_GL_W * jnp.exp(-lah), axis=-1)
    i_psi = half * jnp.sum(_GL_W * (2.0 - eps) * jnp.exp(lah), axis=-1)
    return i_eta, i_psi


class Clocks:
    """eta and psi on the nodes of a history (plain container; built inside jit)."""

    def __init__(self, spline: HistorySpline):
        n = spline.efolds
        lah = n + spline.ln_hubble_nodes
        ref = jnp.argmax(lah)
        i_eta, i_psi = _interval_integrals(spline, n[:-1], n[1:])
        idx = jnp.arange(n.shape[0] - 1)
        after = jnp.concatenate([jnp.zeros(1), jnp.cumsum(jnp.where(idx >= ref, i_eta, 0.0))])
        before = jnp.concatenate([jnp.cumsum(jnp.where(idx < ref, i_eta, 0.0)[::-1])[::-1], jnp.zeros(1)])
        self.spline = spline
        self.eta_nodes = after - before
        self.psi_nodes = jnp.concatenate([jnp.cumsum(i_psi[::-1])[::-1], jnp.zeros(1)])

    def at(self, m):
        """(eta, psi) at N = m (any shape)."""
        nodes = self.spline.efolds
        i = jnp.clip(
            jnp.searchsorted(nodes, jax.lax.stop_gradient(m), side="right") - 1, 0, nodes.shape[0] - 2
        )
        i_eta, i_psi = _interval_integrals(self.spline, nodes[i], m)
        return self.eta_nodes[i] + i_eta, self.psi_nodes[i] - i_psi


# ------------------------------------------------------------------- Filon quadrature


#: Points of the local interpolant (6: quintic; a cubic leaves ~2e-6 relative errors at dlnk = 0.05
#: even for a Gaussian in ln x, the quintic ~1e-8).
_POINTS = 6
_LEFT = _POINTS // 2 - 1  # nodes j - _LEFT .. j + _POINTS - 1 - _LEFT serve interval j
_SERIES_TERMS = 20


def _lagrange_to_monomial(h):
    """Matrices L[l] with c_n = sum_m L[l][n, m] F_{j - l + m}: the polynomial through F at the
    local abscissae of a grid uniform in ln x, interval [x_j, x_{j+1}] mapped to t in [0, 1],
    for a stencil with l nodes left of x_j (l = _LEFT inside, fewer or more at the ends):
    t_m = (e^{(m - l) h} - 1)/(e^h - 1)."""
    mats = []
    for left in range(_POINTS - 1):
        t = np.array([math.expm1((m - left) * h) / math.expm1(h) for m in range(_POINTS)])
        mats.append(np.linalg.inv(np.vander(t, _POINTS, increasing=True)))
    return jnp.asarray(np.stack(mats))


def _moments(theta):
    """mu_n(theta) = int_0^1 t^n e^{-i theta t} dt for n = 0.._POINTS-1, shape (..., _POINTS).

    Power series for |theta| < 1 (20 terms: error < 1e-19), the upward recursion
    mu_n = (n mu_{n-1} - e^{-i theta}) / (i theta) above (it amplifies rounding by at most
    n!/|theta|^n <= 120 there).
    """
    small = jnp.abs(theta) < 1.0
    ts = jnp.where(small, theta, 0.0)
    z = -1j * ts
    terms = [jnp.ones_like(z)]
    for m in range(1, _SERIES_TERMS):
        terms.append(terms[-1] * z / m)
    series = [sum(terms[m] / (n + m + 1) for m in range(_SERIES_TERMS)) for n in range(_POINTS)]
    tl = jnp.where(small, 1.0, theta)
    e = jnp.exp(-1j * tl)
    rec = [(1.0 - e) / (1j * tl)]
    for n in range(1, _POINTS):
        rec.append((n * rec[-1] - e) / (1j * tl))
    return jnp.stack([jnp.where(small, s, r) for s, r in zip(series, rec)], axis=-1)


def filon_weights(lnx, tau, h, lmat):
    """Complex weights Omega_i with int_{x_0}^{x_{n-1}} F(x) e^{-2 i tau x} dx ~ sum_i Omega_i F_i.

    ``lnx``: ln x on a grid uniform in ln x with step ``h`` (shape (n,), n >= _POINTS);
    ``tau``: the phase rate (here aH eta); ``lmat``: ``_lagrange_to_monomial(h)``. On each
    interval F is the quintic through six neighbouring nodes (centred inside, one-sided at the
    ends, so the end points are exact edges of the integral).
    """
    x = jnp.exp(lnx)
    n = lnx.shape[0]
    j = np.arange(n - 1)
    left = np.minimum(j, np.maximum(_LEFT, j - (n - _POINTS)))  # static: numpy
    dx = x[:-1] * math.expm1(h)
    theta = 2.0 * tau * dx
    mu = _moments(theta)  # (n - 1, _POINTS)
    coef = dx * jnp.exp(-2j * tau * x[:-1])
    w = coef[:, None] * jnp.einsum("jn,jnm->jm", mu, lmat[left])  # weight of node j - left + m
    idx = (j - left)[:, None] + np.arange(_POINTS)[None, :]
    return jnp.zeros(n, dtype=w.dtype).at[idx.ravel()].add(w.ravel())
