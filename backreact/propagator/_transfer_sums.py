"""Sums of the memory kernel's transfer over the uniform ln k nodes, without a dense array.

After inflation the memory sum at one output time is a weighted sum over the nodes
s_j = s_0 + j h (h = 1/modes_per_efold) of K = ``special.transfer_kernel_lnz`` at one p:

    S_n = sum_j alpha_j K^(n)(p, lambda_j),   lambda_j = ln z_j = lambda_0 + j h,   n = 0, 1, 2 (3),

K^(n) = d^n K/d(ln z)^n. The nodes of one output time are uniform in ln z, so the row splits
into three index ranges, each summed without evaluating K at every node:

(i) z < Z_SERIES = 4, where K = T = g^2 = sum_k tau_k(p) z^(2k) (tau from the 0F1 series of g,
    24 terms): sum_{j < J} alpha_j z_j^(2k) = z_(J-1)^(2k) P_k[J - 1] with the prefix sums
    P_k[J] = sum_{j <= J} alpha_j e^(-2 k h (J - j)), computed once per call.
(ii) a window of ``window_nodes(h)`` nodes, from the first node with z >= 4 to past z = 36:
    K node by node (``special.kernel_jet_rows``, the reference's branches with the p-dependent
    coefficients computed once per output time).
(iii) the nodes past the window (z >= Z_AVERAGE_END = 36), where K is the phase average
    <T> = e0(p) sum_k c_k(p) z^(-2p-2k) (10 terms), so that
    sum_{j >= J} alpha_j z_j^(-q) = z_J^(-q) G_J(e^(-q h)),  G_J(r) = sum_{m >= 0} alpha_(J+m) r^m.
    G_J(r) is computed once per call at the Chebyshev nodes r_l of [r_lo, r_hi] (r = e^(-q h),
    q = 2p + 2k in [2 P_MIN, 2 P_MAX + 18]) and evaluated from its Chebyshev coefficients in r.
    |r^m| <= 1 on the Bernstein ellipse of [r_lo, r_hi] through r = 1 (parameter rho), so the
    interpolation error is below 4 rho^(-n)/(rho - 1) sum_j |alpha_j| for every alpha;
    ``chebyshev_nodes(h)`` picks n for 1e-15 (80 nodes at h = 0.05).

The sums are the reference kernel's, exactly up to rounding and the 1e-15 interpolation bound:
no table, no interpolation of T itself. Range (iii) is even more accurate than the reference
evaluated node by node, which forms <T> as T(36) + (<T> - T(36)) and so keeps only
~1e-16 T(p, 36) absolute where <T> is smaller than that.

Cost: O(n_k (24 + n_cheb)) per call and O(window + 10 n_cheb) per output time: linear in the
number of output times. Every node falls in exactly one range whatever p and lambda_0 are;
gradients flow through alpha, p and lambda_0.
"""

from __future__ import annotations

import functools
import math

import numpy as np

from .._jax import jax, jnp
from .special import P_MAX, P_MIN, Z_AVERAGE_END, kernel_coefficients, kernel_jet_rows

Z_SERIES = 4.0
"""Below this z the kernel is summed through its power series in z^2 (prefix sums)."""

_LN_Z_SERIES = math.log(Z_SERIES)
_LN_Z_AVERAGE = math.log(Z_AVERAGE_END)
# Terms of the series of T = g^2 in z^2. At z = 4 the first omitted term is below 1e-19 for every
# p >= 0 (worst case p = 0, T = cos^2 z: (2z)^48/(2 48!)); its terms reach ~200 at z = 4, so
# rounding costs ~1e-14 absolute.
_TAYLOR_TERMS = 24
_AVERAGE_TERMS = 10  # the phase average's expansion in 1/z^2, as in ``special``
_CHEB_TOL = 1e-15


def window_nodes(h: float) -> int:
    """Nodes of range (ii): from z >= 4 to past z = 36 (ln 9 in ln z), plus one for rounding."""
    return int(math.ceil(math.log(Z_AVERAGE_END / Z_SERIES) / h)) + 1


def _r_interval(h: float) -> tuple[float, float]:
    q_lo, q_hi = 2.0 * P_MIN, 2.0 * P_MAX + 2.0 * (_AVERAGE_TERMS - 1)
    return math.exp(-q_hi * h), math.exp(-q_lo * h)


def chebyshev_nodes(h: float) -> int:
    """Chebyshev nodes in r for range (iii): 4 rho^-n/(rho - 1) <= 1e-15 (module docstring)."""
    r_lo, r_hi = _r_interval(h)
    a = (1.0 - 0.5 * (r_lo + r_hi)) / (0.5 * (r_hi - r_lo))
    rho = a + math.sqrt(a * a - 1.0)
    return int(math.ceil(math.log(4.0 / ((rho - 1.0) * _CHEB_TOL)) / math.log(rho)))


@functools.cache
def _chebyshev(h: float):
    """Nodes r_l of the first kind on [r_lo, r_hi] and the matrix from values there to the
    coefficients of sum_n c_n T_n(x), x = (2r - r_lo - r_hi)/(r_hi - r_lo)."""
    n = chebyshev_nodes(h)
    theta = np.pi * (np.arange(n) + 0.5) / n
    r_lo, r_hi = _r_interval(h)
    r = 0.5 * (r_lo + r_hi) + 0.5 * (r_hi - r_lo) * np.cos(theta)
    to_coef = (2.0 / n) * np.cos(np.outer(np.arange(n), theta))
    to_coef[0] *= 0.5
    return r, to_coef, r_lo, r_hi


def precompute(alpha, h: float) -> dict:
    """The per-call parts, over the node index J (zero-padded past the last node): prefix sums of
    range (i), Chebyshev coefficients in r of G_J of range (iii), alpha.

    Both are linear recurrences along the nodes, P_k[J] = e^(-2kh) P_k[J-1] + alpha_J and
    G_J(r_l) = r_l G_(J+1)(r_l) + alpha_J, run in one sequential scan: it compiles and
    differentiates several times faster than a parallel prefix scan, for a fraction of a ms.
    """
    window = window_nodes(h)
    k = np.arange(_TAYLOR_TERMS, dtype=float)
    decay = jnp.asarray(np.exp(-2.0 * k * h))
    r, to_coef, _, _ = _chebyshev(h)
    r = jnp.asarray(r)

    def step(carry, a):
        pk, gl = decay * carry[0] + a[0], r * carry[1] + a[1]
        return (pk, gl), (pk, gl)

    init = (jnp.zeros(k.size), jnp.zeros(r.size))
    _, (prefix, tail) = jax.lax.scan(step, init, jnp.stack([alpha, alpha[::-1]], axis=1))
    prefix = jnp.concatenate([jnp.zeros((k.size, 1)), prefix.T], axis=1)  # column J: nodes j < J
    tail = jnp.concatenate([jnp.asarray(to_coef) @ tail[::-1].T, jnp.zeros((r.size, window + 1))], axis=1)
    return {"prefix": prefix, "tail": tail, "alpha": jnp.concatenate([alpha, jnp.zeros(window)])}


_CONV_INDEX = np.maximum(np.arange(_TAYLOR_TERMS)[:, None] - np.arange(_TAYLOR_TERMS)[None, :], 0)
_CONV_MASK = (np.arange(_TAYLOR_TERMS)[:, None] >= np.arange(_TAYLOR_TERMS)[None, :]).astype(float)


def _taylor_of_square(gamma):
    """tau_k = sum_(i <= k) gamma_i gamma_(k - i): the series of g^2 from that of g."""
    g = gamma[..., :_TAYLOR_TERMS]
    return jnp.sum(g[..., _CONV_INDEX] * _CONV_MASK * g[..., None, :], axis=-1)


def _clenshaw(coef, x):
    """sum_n coef[..., n] T_n(x) for x of shape coef.shape[:-1] + (m,)."""
    n = coef.shape[-1]
    c = coef[..., None]

    def body(i, b):
        b1, b2 = b
        ci = jax.lax.dynamic_index_in_dim(c, n - 1 - i, axis=-2, keepdims=False)
        return ci + 2.0 * x * b1 - b2, b1

    b1, b2 = jax.lax.fori_loop(0, n - 1, body, (jnp.zeros_like(x), jnp.zeros_like(x)))
    return c[..., 0, :] + x * b1 - b2


def row_sums(p, lam0, pre: dict, h: float, points=None, orders: int = 3):
    """(S_0, S_1, S_2) for output times with index p (shape (T,)) and ln z_0 = ``lam0`` (T,).

    ``pre`` = ``precompute(alpha, h)``. ``points`` (optional): extra nodes, a tuple of arrays
    (d_i, a_i, b_i) of one shape (P,), adding sum_i a_i K^(n)(lambda_0 + d_i)
    + b_i K^(n+1)(lambda_0 + d_i) (evaluated directly, with the window). ``orders`` = 4 also
    returns S_3 (for the third N-derivative of A; the points then need K^(4)).
    """
    n_k = pre["prefix"].shape[1] - 1
    window = window_nodes(h)
    co = kernel_coefficients(p)
    j_a = jnp.ceil((_LN_Z_SERIES - jax.lax.stop_gradient(lam0)) / h)  # first node with z >= 4
    j_a = jnp.clip(j_a, 0, n_k).astype(int)

    # (i) z < 4: the power series through the prefix sums. The clamp acts only where the range
    # is empty (prefix 0) and keeps the exponential finite there.
    k = np.arange(_TAYLOR_TERMS, dtype=float)
    lam_last = jnp.minimum(lam0 + (j_a - 1) * h, _LN_Z_SERIES)
    series = _taylor_of_square(co["gamma"]) * jnp.exp(2.0 * k * lam_last[:, None])
    series = series * pre["prefix"][:, j_a].T
    sums = [jnp.sum(series * (2.0 * k) ** n, axis=-1) for n in range(orders)]

    # (ii) the window node by node (nodes past the last one have alpha = 0), with the points
    idx = j_a[:, None] + np.arange(window)
    lam = lam0[:, None] + h * idx
    n_pts = 0 if points is None else points[0].shape[0]
    if n_pts:
        lam = jnp.concatenate([lam, lam0[:, None] + points[0]], axis=1)
    jet = kernel_jet_rows(co, p, lam, order=orders if n_pts else orders - 1)
    a_win = pre["alpha"][idx]
    for n in range(orders):
        sums[n] = sums[n] + jnp.sum(a_win * jet[n][:, :window], axis=-1)
        if n_pts:
            sums[n] = sums[n] + jet[n][:, window:] @ points[1] + jet[n + 1][:, window:] @ points[2]

    # (iii) z >= 36: the phase average's power laws through G_J(r). lam_w >= ln 36 wherever the
    # range is not empty; the clamp keeps exp finite where it is.
    j_w = j_a + window
    lam_w = jnp.maximum(lam0 + j_w * h, _LN_Z_AVERAGE)
    q = 2.0 * p[:, None] + 2.0 * np.arange(_AVERAGE_TERMS)
    _, _, r_lo, r_hi = _chebyshev(h)
    x = (2.0 * jnp.exp(-q * h) - (r_lo + r_hi)) / (r_hi - r_lo)
    g = _clenshaw(pre["tail"][:, j_w].T, x)
    f = co["average"] * jnp.exp(co["ln_e0"][:, None] - q * lam_w[:, None]) * g
    return tuple(sums[n] + jnp.sum(f * (-q) ** n, axis=-1) for n in range(orders))
