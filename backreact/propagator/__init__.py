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
    "propagator_function",
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


def propagator_function(cfg, history, *, third: bool = False):
    """A jit-traceable map History -> propagator dict (M_p units at the history's nodes) for
    the method of ``cfg`` ([propagator]), with the static sizes (k grid, save slots) fixed
    from ``history``; None for method = "none". The passes of the fixed point reuse it."""
    pc = cfg.propagator
    if pc.method == "none":
        return None
    spline0 = spline_from_history(history)
    ln_h0 = float(np.asarray(history.ln_hubble)[0])
    a_prior = prior_variance(cfg, ln_h0)
    ln_mu_offset = math.log(pc.mu_over_start_hubble)
    if pc.method == "exact":
        settings = ModeSettings(
            modes_per_efold=float(pc.modes_per_efold),
            start_x=float(pc.start_x),
            handover_x=float(pc.handover_x),
            stop_x=float(pc.stop_x),
            rtol=float(pc.rtol),
            atol=float(pc.rtol) * 1e-2,
        )
        plan = mode_plan(spline0, spline0.efolds, settings)

        def propagate(h):
            sp = spline_from_history(h)
            return exact_propagator(
                sp,
                sp.efolds,
                plan,
                ln_mu=sp.ln_hubble_nodes[0] + ln_mu_offset,
                prior_variance=a_prior,
                settings=settings,
                third=third,
            )

        return propagate
    from .memory import memory_kernel_propagator, required_k_nodes

    n_k = required_k_nodes(spline0, float(np.asarray(history.end_of_inflation)), float(pc.modes_per_efold))

    def propagate(h):
        sp = spline_from_history(h)
        return memory_kernel_propagator(
            sp,
            sp.efolds,
            end_of_inflation=h.end_of_inflation,
            ln_mu=sp.ln_hubble_nodes[0] + ln_mu_offset,
            prior_variance=a_prior,
            modes_per_efold=float(pc.modes_per_efold),
            n_k=n_k,
            third=third,
        )

    return propagate


def propagator_along(history, cfg, *, third: bool = False) -> dict[str, np.ndarray]:
    """A, A', A'', Box A (and with ``third`` the third derivative "d3A") in M_p units, numpy,
    at every grid node of a solved history; an empty dict for propagator.method = "none"."""
    import equinox as eqx

    propagate = propagator_function(cfg, history, third=third)
    if propagate is None:
        return {}
    return {k: np.asarray(v) for k, v in eqx.filter_jit(propagate)(history).items()}
