"""Shared pieces of the exact-method tests (tests/test_modes.py and
tests/test_modes_convergence.py): the short history with every era, runs of the exact
propagator, and the masks and scales by era used by the tolerances."""

from __future__ import annotations

import functools
import math

import numpy as np
from helpers import solved

import backreact._jax  # noqa: F401  (x64)
from backreact.propagator import HistorySpline, ModeSettings, exact_propagator, mode_plan, spline_from_history

# A short history with every era: 20 e-folds of plateau inflation, instant reheating,
# radiation, matter and a cosmological-constant era (small grid: fast in CI).
SHORT = "[inflation]\nmodel = 'plateau'\nefolds = 20.0\n[cosmology]\nomega_lambda = 0.316\n"


def run(spline, out, settings, oracle=False, ln_mu=0.0, third=False):
    import equinox as eqx
    import jax.numpy as jnp

    out = jnp.asarray(out)
    plan = mode_plan(spline, out, settings, oracle=oracle)
    f = eqx.filter_jit(
        lambda sp, n: exact_propagator(
            sp, n, plan, ln_mu=ln_mu, settings=settings, oracle=oracle, third=third
        )
    )
    return {k: np.asarray(v) for k, v in f(spline, out).items()}


def de_sitter(n_max=8.0):
    import jax.numpy as jnp

    nodes = jnp.linspace(0.0, n_max, 81)
    return HistorySpline(nodes, jnp.zeros_like(nodes), jnp.zeros_like(nodes))


@functools.cache
def short(oracle=False, **kw):
    cfg, model, h = solved(SHORT, **{k: v for k, v in kw.items() if k.startswith("cosmology__")})
    settings = ModeSettings(**{k: v for k, v in kw.items() if not k.startswith("cosmology__")})
    sp = spline_from_history(h)
    return model, h, run(sp, h.efolds, settings, oracle=oracle, ln_mu=float(h.ln_hubble[0]))


def window_max(efolds, values, half_window=0.5):
    """max |values| within +-half_window e-folds of each point: the local size of a quantity
    that changes sign (Box A in reheating), so that a zero crossing is not an error."""
    size = np.abs(values)
    return np.array([np.max(size[np.abs(efolds - t) <= half_window]) for t in efolds])


def eras(h):
    """Masks of the eras of a history: inflation before its last e-fold, +-1 e-fold around the
    end of inflation (the instant-reheating junction), radiation while the infrared end of the
    k grid is still outside the horizon, and the matter and Lambda eras."""
    n, eps = h.efolds, h.epsilon
    lah = n + h.ln_hubble
    n_end = n[np.argmax(lah)]
    x_ir = np.exp(lah[0] - lah)  # k_IR / aH
    return {
        "inflation": n < n_end - 1,
        "end of inflation": np.abs(n - n_end) <= 1,
        "radiation": (n > n_end + 1) & (eps > 1.9) & (x_ir < 0.1),
        "matter and Lambda": (n > n_end + 1) & (eps < 1.6),
    }


def by_era(inflation, end, radiation, matter):
    return {
        "inflation": inflation,
        "end of inflation": end,
        "radiation": radiation,
        "matter and Lambda": matter,
    }


def identity_error(r, h2, efolds=None):
    """|Box A - 2 (K_ren + L)| relative to max(|Box A|, H^4/(16 pi^2)) (DESIGN 3 item 5a),
    with |Box A| its local size (largest within +-0.5 e-fold) when the efolds are given."""
    box = np.asarray(r["box"])
    size = np.abs(box) if efolds is None else window_max(efolds, box)
    scale = np.maximum(size, h2**2 / (16 * math.pi**2))
    return np.abs(box - 2 * (r["kinetic"] + r["local_box"])) / scale
