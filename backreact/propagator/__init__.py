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
from .modes import ModePlan, ModeSettings, exact_propagator, mode_count, mode_plan

__all__ = [
    "HistorySpline",
    "ModePlan",
    "ModeSettings",
    "exact_propagator",
    "mode_plan",
    "prior_variance",
    "propagator_along",
    "propagator_function",
    "propagator_sizes",
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


def _mode_settings(pc) -> ModeSettings:
    return ModeSettings(
        modes_per_efold=float(pc.modes_per_efold),
        start_x=float(pc.start_x),
        handover_x=float(pc.handover_x),
        stop_x=float(pc.stop_x),
        rtol=float(pc.rtol),
        atol=float(pc.rtol) * 1e-2,
    )


def propagator_sizes(cfg, history, at_least=None):
    """The static sizes the propagator of ``cfg`` needs for ``history`` (numpy side): the
    k-node count of the memory kernel, or the ModePlan of the exact method; None for
    method = "none". ``at_least`` (sizes of other histories) is merged in, so that many
    histories (a sweep) can share one compiled propagator: more k nodes than a history
    needs only push the UV cutoff further out, where the renormalized A does not depend
    on it (measured: A changes by 4e-10, A' by 9e-8 relative with 60 extra modes)."""
    pc = cfg.propagator
    if pc.method == "none":
        return None
    spline0 = spline_from_history(history)
    if pc.method == "exact":
        settings = _mode_settings(pc)
        n_k = mode_count(spline0, settings)
        if at_least is not None:
            n_k = max(n_k, at_least.n_k)
        plan = mode_plan(spline0, spline0.efolds, settings, n_k=n_k)
        if at_least is not None:
            plan = ModePlan(n_k, max(plan.saves1, at_least.saves1), max(plan.saves2, at_least.saves2))
        return plan
    from .memory import required_k_nodes

    n_k = required_k_nodes(spline0, float(np.asarray(history.end_of_inflation)), float(pc.modes_per_efold))
    return n_k if at_least is None else max(n_k, int(at_least))


def propagator_function(cfg, history, *, third: bool = False, sizes=None, prior_argument: bool = False):
    """A jit-traceable map History -> propagator dict (M_p units at the history's nodes) for
    the method of ``cfg`` ([propagator]), with the static sizes (k grid, save slots) fixed
    from ``history`` (or given as ``sizes``, see :func:`propagator_sizes`); None for
    method = "none". The passes of the fixed point reuse it.

    With ``prior_argument`` the map is (History, prior_variance) -> dict, the prior variance
    (M_p^2, see :func:`prior_variance`) a traced argument, so that one compiled function
    serves every value of it."""
    pc = cfg.propagator
    if pc.method == "none":
        return None
    if sizes is None:
        sizes = propagator_sizes(cfg, history)
    ln_h0 = float(np.asarray(history.ln_hubble)[0])
    a_prior = prior_variance(cfg, ln_h0)
    ln_mu_offset = math.log(pc.mu_over_start_hubble)
    if pc.method == "exact":
        settings = _mode_settings(pc)

        def with_prior(h, prior):
            sp = spline_from_history(h)
            return exact_propagator(
                sp,
                sp.efolds,
                sizes,
                ln_mu=sp.ln_hubble_nodes[0] + ln_mu_offset,
                prior_variance=prior,
                settings=settings,
                third=third,
            )

    else:
        from .memory import memory_kernel_propagator

        modes_per_efold = float(pc.modes_per_efold)

        def with_prior(h, prior):
            sp = spline_from_history(h)
            return memory_kernel_propagator(
                sp,
                sp.efolds,
                end_of_inflation=h.end_of_inflation,
                ln_mu=sp.ln_hubble_nodes[0] + ln_mu_offset,
                prior_variance=prior,
                modes_per_efold=modes_per_efold,
                n_k=int(sizes),
                third=third,
            )

    if prior_argument:
        return with_prior
    return lambda h: with_prior(h, a_prior)


def propagator_along(history, cfg, *, third: bool = False) -> dict[str, np.ndarray]:
    """A, A', A'', Box A (and with ``third`` the third derivative "d3A") in M_p units, numpy,
    at every grid node of a solved history; an empty dict for propagator.method = "none"."""
    import equinox as eqx

    propagate = propagator_function(cfg, history, third=third)
    if propagate is None:
        return {}
    return {k: np.asarray(v) for k, v in eqx.filter_jit(propagate)(history).items()}
