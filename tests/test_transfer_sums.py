"""Sums of the kernel over the ln k nodes (backreact/propagator/_transfer_sums.py), DESIGN 2.3.3.

References: the dense sum of the reference kernel ``special.transfer_kernel_lnz`` over every
node (what the memory kernel evaluated before these sums) and direct geometric sums.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from backreact._jax import jax, jnp
from backreact.propagator import _transfer_sums as TS
from backreact.propagator import special as S

H = 0.05  # 20 nodes per e-fold, the default density
N_K = 500
# rows: every p regime, and ln z of node 0 such that the row lies wholly below z = 4, straddles
# all three ranges, starts in the window or starts beyond z = 36
_P = np.array([0.5, 0.8, 1.0, 1.5, 2.0, 3.3, 7.0, 12.5, 25.0])
_LAM0 = np.array([-30.0, -20.0, -10.0, -3.3, 0.0, 1.2, 2.5, 3.6, 5.0])
P_ROWS, LAM0_ROWS = (jnp.asarray(v.ravel()) for v in np.meshgrid(_P, _LAM0, indexing="ij"))
# extra nodes as the memory kernel uses them (derivative weights at the ends, the end node)
POINTS = (
    jnp.asarray([0.0, 430 * H, 430.37 * H]),
    jnp.asarray([0.0, 0.0, 0.02]),
    jnp.asarray([1e-4, -2e-4, -1e-5]),
)


def _alpha(signs: bool):
    s = np.arange(N_K) * H
    a = H * np.exp(-0.05 * s) * (1.0 + 0.3 * np.sin(3.0 * s))
    a[0] *= 0.5
    a[431:] = 0.0  # nodes above the last exit carry no weight, as in the memory kernel
    if signs:
        a = a * np.random.default_rng(3).choice([-1.0, 1.0], N_K)
    return jnp.asarray(a)


def _kernel_scale(p):
    """max over z <= 36 of |d^n K/dlnz^n| for each p (n = 0..3): the size of the terms."""
    z = jnp.exp(jnp.linspace(math.log(1e-3), math.log(36.0), 2000))
    grid = jax.jit(S.transfer_kernel_lnz)(p[:, None], jnp.broadcast_to(z, (p.size, z.size)))
    return [np.max(np.abs(np.asarray(grid[n])), axis=1) for n in range(4)]


@pytest.fixture(scope="module")
def sums():
    """(alpha, fast sums, dense reference sums, kernel scale per row and order)."""
    alpha = _alpha(signs=False)
    pre = TS.precompute(alpha, H)
    fast = jax.jit(lambda p, lam0, pre: TS.row_sums(p, lam0, pre, H, POINTS))(P_ROWS, LAM0_ROWS, pre)
    lam = LAM0_ROWS[:, None] + H * jnp.arange(N_K)
    kern = jax.jit(S.transfer_kernel_lnz)
    dense = kern(P_ROWS[:, None], jnp.exp(lam))
    pts = kern(P_ROWS[:, None], jnp.exp(LAM0_ROWS[:, None] + POINTS[0]))
    ref = [dense[n] @ alpha + pts[n] @ POINTS[1] + pts[n + 1] @ POINTS[2] for n in range(3)]
    return alpha, [np.asarray(v) for v in fast], [np.asarray(v) for v in ref], _kernel_scale(P_ROWS)


def test_row_sums_equal_the_dense_reference(sums):
    # The three ranges reproduce sum_j alpha_j K^(n)(lambda_j) (plus the extra nodes) of the
    # reference kernel. The error is measured against sum |alpha| x max |K^(n)| (the size of
    # the terms; for n = 0, sum |alpha|, since T <= 1): the dense reference itself rounds at
    # that level (the 0F1 series near z = 12 + p, and the blend's T(36) + (<T> - T(36)) past
    # z = 36). Measured 8e-16, 3.3e-14, 5e-14 for n = 0, 1, 2.
    alpha, fast, ref, scale = sums
    total = float(jnp.sum(jnp.abs(alpha)))
    for n, tol in enumerate((1e-14, 3e-13, 5e-13)):
        err = np.abs(fast[n] - ref[n]) / (total * scale[n] + np.abs(POINTS[2]).sum() * scale[n + 1])
        assert np.max(err) < tol, (n, np.max(err))


def test_row_sums_relative_where_the_reference_is_well_conditioned(sums):
    # Where most of a row lies below z = 4 (the sum is O(sum alpha)), fast and dense sums agree
    # to rounding relative to the sum itself (measured 9e-16).
    _, fast, ref, _ = sums
    sel = np.asarray(LAM0_ROWS) <= -10.0
    assert np.max(np.abs(fast[0][sel] / ref[0][sel] - 1.0)) < 1e-13


def test_chebyshev_bound_for_any_weights():
    # Range (iii) interpolates G_J(r) = sum_m alpha_(J+m) r^m in r; the error bound
    # 4 rho^-n/(rho - 1) sum |alpha| <= 1e-15 sum |alpha| holds for every alpha, so test weights
    # of random sign (no cancellation-free structure to rely on) against the direct sum.
    # Measured 8e-17 (the margin to 1e-14 covers the rounding of the recurrence over 500 nodes).
    alpha = _alpha(signs=True)
    pre = TS.precompute(alpha, H)
    _, _, r_lo, r_hi = TS._chebyshev(H)
    r = np.concatenate([[r_lo, r_hi], np.random.default_rng(5).uniform(r_lo, r_hi, 198)])
    x = jnp.asarray((2.0 * r - r_lo - r_hi) / (r_hi - r_lo))
    total = float(jnp.sum(jnp.abs(alpha)))
    a = np.asarray(alpha)
    for j in (0, 57, 300, N_K - 1):
        interp = np.asarray(TS._clenshaw(pre["tail"][:, j][None], x[None]))[0]
        direct = np.array([np.sum(a[j:] * rr ** np.arange(N_K - j)) for rr in r])
        assert np.max(np.abs(interp - direct)) < 1e-14 * total, j
    assert TS.chebyshev_nodes(H) == 80


def test_sums_are_differentiable_in_ln_z_and_p():
    # S_1, S_2, S_3 are the ln z derivatives of S_0, S_1, S_2 (all nodes of a row move together in
    # ln z): forward-mode derivatives through every range and its boundaries must agree with
    # them to rounding (1e-12 of sum |alpha| x max |K^(n+1)|; measured 1.6e-15, 2e-14). The
    # gradient in p (the history enters through eps) matches central differences (step 1e-5;
    # 1e-7 of the term scale for truncation ~ step^2 |d^3 S/dp^3| and rounding ~ 1e-16/step;
    # measured 8e-11).
    alpha = _alpha(signs=False)
    pre = TS.precompute(alpha, H)
    p, lam0 = P_ROWS[::4], LAM0_ROWS[::4]
    total = float(jnp.sum(jnp.abs(alpha)))
    scale = _kernel_scale(p)

    def sums_at(lam0, p):
        return TS.row_sums(p, lam0, pre, H, POINTS, orders=4)

    def with_tangent(lam0, p):
        return jax.jvp(lambda x: sums_at(x, p), (lam0,), (jnp.ones_like(lam0),))

    vals, tangents = jax.jit(with_tangent)(lam0, p)
    # (orders=4: S_3 too, for the memory kernel's third derivative; measured 2.5e-14 for it)
    for n in range(3):
        err = np.abs(np.asarray(tangents[n]) - np.asarray(vals[n + 1])) / (total * scale[n + 1])
        assert np.max(err) < 1e-12, (n, np.max(err))

    def weighted(p, lam0):
        return jnp.sum(sums_at(lam0, p)[0] * jnp.arange(1.0, 1.0 + p.size))

    grad = np.asarray(jax.jit(jax.grad(weighted))(p, lam0))
    f = jax.jit(weighted)
    for i in range(p.size):
        e = jnp.zeros(p.size).at[i].set(1e-5)
        fd = (float(f(p + e, lam0)) - float(f(p - e, lam0))) / 2e-5
        assert abs(grad[i] - fd) < 1e-7 * (i + 1) * total, i


def test_fourth_ln_z_derivative_of_the_kernel():
    # kernel_jet_rows(order=4) gives K^(4) = d^4 K/dlnz^4 (the memory sums need it at the end
    # nodes for S_3) from the Bessel equation; it must be the ln z derivative of the reference's
    # K^(3) (forward mode through ``special.transfer_kernel_lnz``) in every branch: series,
    # Hankel expansion, the C^3 blend over z = 30..36 and the phase average. Relative to
    # max |K^(4)| per p; 1e-10 covers the 0F1 series' rounding near z = 12 + p, which the
    # derivative amplifies (measured 2.1e-11).
    p = jnp.asarray(_P)
    lam = jnp.linspace(math.log(1e-2), math.log(80.0), 401) + 1e-3  # off the branch boundaries
    lam = jnp.broadcast_to(lam, (p.size, lam.size))
    co = S.kernel_coefficients(p)
    jet = jax.jit(lambda co, p, lam: S.kernel_jet_rows(co, p, lam, order=4))(co, p, lam)

    def k3(lam):
        return S.transfer_kernel_lnz(p[:, None], jnp.exp(lam))[3]

    _, d4 = jax.jit(lambda lam: jax.jvp(k3, (lam,), (jnp.ones_like(lam),)))(lam)
    ref = np.asarray(d4)
    scale = np.max(np.abs(ref), axis=1, keepdims=True)
    err = np.abs(np.asarray(jet[4]) - ref) / scale
    assert np.max(err) < 1e-10, np.max(err)
    # and the lower orders are the reference's (as for order 3)
    ref3 = np.asarray(k3(lam))
    assert np.max(np.abs(np.asarray(jet[3]) - ref3) / np.max(np.abs(ref3), axis=1, keepdims=True)) < 1e-10
