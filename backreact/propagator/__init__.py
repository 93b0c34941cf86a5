"""The coincident propagator A(N) = <sigma^2> of a massless spectator along a history.

Two methods (DESIGN 2.3): the exact vectorized mode sum (``modes.py``, default) and the
fast memory kernel (``memory.py``, valid during inflation and decelerating eras only).
Both take the history as a spline of ln H (``_history.py``) and return, in M_p units,
"A", "dA" (dA/dN), "d2A" and "box" (Box A = -H^2 (A'' + (3 - eps) A')), with ``third=True``
also "d3A" (d^3A/dN^3); the memory kernel also "valid". The prior variance of modes that left
before the first point (2.3.5) is added to A.
"""

from __future__ import annotations

import math

import numpy as np

from ._history import HistorySpline, spline_from_history
from .modes import ModePlan, ModeSettings, exact_propagator, mode_plan

__all__ = [
    "HistorySpline",
    "ModePlan",
    "ModeSettings",
    "exact_propagator",
    "mode_plan",
    "prior_variance",
    "propagator_along",
    "spline_from_history",
]


def prior_variance(cfg, ln_hubble_start: float) -> float:
    """A_prior in M_p^2 from the [prehistory] section (DESIGN 2.3.5).

    kind = "variance": the given variance; kind = "de_sitter_efolds": Delta N earlier de
    Sitter e-folds at the starting Hubble rate, A_prior = H_start^2 Delta N / (4 pi^2).
    """
    pre = cfg.prehistory
    if pre.kind == "variance":
        return float(pre.variance_Mp2)
    if pre.kind == "de_sitter_efolds":
        return math.exp(2.0 * ln_hubble_start) * float(pre.de_sitter_efolds) / (4.0 * math.pi**2)
    return 0.0


def propagator_along(history, cfg, *, third: bool = False) -> dict[str, np.ndarray]:
    """A, A', A'', Box A (M_p units, numpy) at every grid node of a solved history.

    ``cfg`` is a validated Config; its [propagator] section picks the method. Returns an
    empty dict for method = "none". ``third``: also "d3A" = d^3A/dN^3 (M_p^2), analytic in
    both methods (at a grid node the one-sided value of the interval to the right, where
    eps_N of the spline jumps).
    """
    import equinox as eqx

    pc = cfg.propagator
    if pc.method == "none":
        return {}
    spline = spline_from_history(history)
    out = spline.efolds
    ln_h0 = float(np.asarray(history.ln_hubble)[0])
    ln_mu = ln_h0 + math.log(pc.mu_over_start_hubble)
    a_prior = prior_variance(cfg, ln_h0)
    if pc.method == "exact":
        settings = ModeSettings(
            modes_per_efold=float(pc.modes_per_efold),
            start_x=float(pc.start_x),
            handover_x=float(pc.handover_x),
            stop_x=float(pc.stop_x),
            rtol=float(pc.rtol),
            atol=float(pc.rtol) * 1e-2,
        )
        plan = mode_plan(spline, out, settings)
        run = eqx.filter_jit(
            lambda sp, n, mu, ap: exact_propagator(
                sp, n, plan, ln_mu=mu, prior_variance=ap, settings=settings, third=third
            )
        )
        res = run(spline, out, ln_mu, a_prior)
    else:
        from .memory import memory_kernel_propagator, required_k_nodes

        n_e = float(np.asarray(history.end_of_inflation))
        n_k = required_k_nodes(spline, n_e, float(pc.modes_per_efold))
        run = eqx.filter_jit(
            lambda sp, n, mu, ap: memory_kernel_propagator(
                sp,
                n,
                end_of_inflation=n_e,
                ln_mu=mu,
                prior_variance=ap,
                modes_per_efold=float(pc.modes_per_efold),
                n_k=n_k,
                third=third,
            )
        )
        res = run(spline, out, ln_mu, a_prior)
    return {k: np.asarray(v) for k, v in res.items()}
