"""One scenario end to end: config -> history -> observables -> run record.

This is the solver layer: it calls the physics (``background``) and produces what the
file layer (``io``) writes. Later stages (propagator, closure, fixed point) slot in
between the history and the observables without changing this interface.
"""

from __future__ import annotations

import functools
import math
import time
from dataclasses import dataclass, field

import numpy as np

from .config import Config
from .io import RunRecord


@dataclass
class RunResult:
    """A solved scenario: the history (M_p units), the datasets and scalars in physical
    units, warnings, and the record ready for :func:`backreact.io.write_run`."""

    config: Config
    history: object
    datasets: dict[str, np.ndarray]
    today: dict[str, float]
    diagnostics: dict[str, object]
    warnings: list[str] = field(default_factory=list)
    converged: bool = True
    iterations: int = 0
    residuals: np.ndarray = field(default_factory=lambda: np.zeros(0))

    def record(self) -> RunRecord:
        return RunRecord(
            config_toml=self.config.text,
            history=self.datasets,
            today=self.today,
            converged=self.converged,
            iterations=self.iterations,
            residuals=self.residuals,
            warnings=list(self.warnings),
            diagnostics=self.diagnostics,
        )


@functools.cache
def _plain_solver():
    """The background without a spectator as one jitted function for the process (the
    model's parameters are array leaves, so new values reuse its compiled code)."""
    import equinox as eqx

    from .background import expansion_history

    return eqx.filter_jit(expansion_history)


def _check_finite(history) -> None:
    """Stop with the quantity and N where a NaN/Inf first appears."""
    n = np.asarray(history.efolds)
    for name in ("ln_hubble", "epsilon", "cosmic_time"):
        v = np.asarray(getattr(history, name))
        bad = ~np.isfinite(v)
        if bad.any():
            i = int(np.argmax(bad))
            raise FloatingPointError(f"background: {name} is not finite at N = {n[i]:.4f} (grid point {i})")


def run_scenario(cfg: Config, progress=None, *, engine: SolveEngine | None = None) -> RunResult:
    """Solve a validated config end to end: the plain history, then (with a closure) the
    self-consistent fixed point, and the observables of the result.

    ``progress``: optional host callback progress(pass, residual) of the fixed point;
    ``engine``: a :class:`SolveEngine` whose compiled code is reused (sweeps); default a
    fresh one.
    """

    from .background import model_from_config
    from .closures import closure_from_config
    from .observables import (
        history_datasets,
        propagator_datasets,
        propagator_warnings,
        run_warnings,
        today_index,
        today_summary,
    )

    t0 = time.perf_counter()
    model = model_from_config(cfg)
    closure = closure_from_config(cfg)
    plain = _plain_solver()(model)
    plain_np = _to_numpy(plain)
    _check_finite(plain_np)
    diagnostics: dict[str, object] = {}
    residuals = np.zeros(0)
    converged = True
    iterations = 0
    extra_warnings: list[str] = []
    t1 = time.perf_counter()
    engine = engine if engine is not None else SolveEngine()
    if closure is None:
        history = plain_np
        prop = engine.propagator(cfg, plain)
        out = None
    else:
        from .solve import status_message

        fp = engine.fixed_point(cfg, model, closure, plain, progress)
        history = _to_numpy(fp.history)
        prop = {k: np.asarray(v) for k, v in fp.propagator.items()}
        out = _to_numpy(fp.output)
        iterations = int(fp.passes)
        residuals = np.asarray(fp.residuals)[:iterations]
        status = int(fp.status)
        converged = status == 0
        diagnostics.update(_solver_diagnostics(cfg, fp, closure))
        closure = fp.closure
        if not converged:
            why = status_message(status) + _failure_numbers(fp, status)
            extra_warnings.append(f"the fixed point did not converge: {why}")
            diagnostics["solver_status"] = why
    prop_seconds = time.perf_counter() - t1
    _check_finite(history)
    datasets = history_datasets(history)
    today = today_summary(history, cfg, datasets)
    prop_warnings: list[str] = []
    if prop:
        _check_finite_arrays(history, prop, "propagator")
        datasets.update(propagator_datasets(prop))
        today["propagator_GeV2"] = float(datasets["propagator"][today_index(history)])
        prop_warnings = propagator_warnings(history, cfg, prop)
        diagnostics.update(_unphysical_sensitivities(history, prop, closure))
    if out is not None:
        from .observables import spectator_datasets, spectator_summary, validity_verdict

        _check_finite_arrays(history, {"density": out.density, "pressure": out.pressure}, "closure")
        datasets.update(spectator_datasets(out))
        today.update(spectator_summary(history, datasets))
        verdict, verdict_warnings = validity_verdict(history, cfg, datasets, prop, diagnostics)
        diagnostics.update(verdict)
        extra_warnings += verdict_warnings
        if not converged:
            # The verdict of a state that is not the solution is the failure; the validity
            # of the last finite state often says why it failed, so it follows.
            was = diagnostics["validity_verdict"]
            diagnostics["validity_verdict"] = "not converged"
            text = f"the fixed point did not converge: {diagnostics['solver_status']}"
            if was == "invalid":
                text += f". On the last finite pass, {diagnostics['validity_explanation']}"
            diagnostics["validity_explanation"] = text
            stale = set(verdict_warnings)
            extra_warnings = [
                w for w in extra_warnings if w not in stale and not w.startswith("the fixed point did not")
            ] + [text]
    from .observables import lcdm_deviation

    diagnostics.update(lcdm_deviation(cfg, datasets))
    diagnostics["solve_seconds"] = time.perf_counter() - t0
    if prop:
        diagnostics["propagator_seconds"] = prop_seconds
        diagnostics["propagator_method"] = cfg.propagator.method
    if model.potential is not None and np.isfinite(float(history.field_pivot)):
        ns, r_sr = model.potential.slow_roll_observables(float(history.field_pivot))
        diagnostics["slow_roll_n_s"] = float(ns)
        diagnostics["slow_roll_r"] = float(r_sr)
    if math.isfinite(today.get("hubble_at_pivot_exit_GeV", math.nan)):
        diagnostics["pivot_exit_efolds_before_end"] = float(history.end_of_inflation - history.pivot_exit)
    warnings = list(cfg.warnings) + run_warnings(history, cfg, today) + prop_warnings + extra_warnings
    return RunResult(
        cfg,
        history,
        datasets,
        today,
        diagnostics,
        warnings,
        converged=converged,
        iterations=iterations,
        residuals=residuals,
    )


def _solver_settings_and_target(cfg):
    """(SolverSettings, Target or None) of a config's [solver] and [calibration] sections."""
    from . import constants as C
    from ._jax import jnp
    from .solve import SolverSettings, Target

    sc = cfg.solver
    settings = SolverSettings(
        tolerance=float(sc.tolerance),
        max_passes=int(sc.max_passes),
        acceleration=sc.acceleration,
        memory=int(sc.memory) if sc.memory is not None else 3,
        damping=float(sc.damping) if sc.damping is not None else 1.0,
    )
    cal = cfg.calibration
    target = None
    if cal.target == "H0":
        h0 = cal.H0_km_s_Mpc / 100.0 * C.H100_GEV / C.REDUCED_PLANCK_MASS_GEV
        target = Target(jnp.asarray(h0), "H0")
    elif cal.target == "fraction_spectator":
        target = Target(jnp.asarray(cal.fraction_spectator), "fraction_spectator")
    return settings, target


_SETTINGS_FIELDS = ("tolerance", "max_passes", "acceleration", "memory", "damping")


class SolveEngine:
    """Compiled solver pieces shared by every scenario of one static shape (a sweep).

    The fixed point is compiled once per static signature: the propagator method and its
    settings, the static sizes of its k grid (``sizes``, see
    :func:`backreact.propagator.propagator_sizes`; default: each history's own), the solver
    settings and the calibration target's kind. Everything that varies between points of
    a sweep (the background parameters, the closure's parameters, the prior variance, the
    target value) enters as traced arguments, so a new point reuses the compiled code.
    ``compilations`` counts the distinct solver functions built.
    """

    def __init__(self, sizes=None):
        self.sizes = sizes
        self.compilations = 0
        self._solvers: dict = {}

    def _sizes_for(self, cfg, plain):
        from .propagator import propagator_sizes

        return self.sizes if self.sizes is not None else propagator_sizes(cfg, plain)

    @staticmethod
    def _key(cfg, sizes, *extra):
        pc = cfg.propagator
        sz = (sizes.n_k, sizes.saves1, sizes.saves2) if hasattr(sizes, "n_k") else sizes
        fields = ("modes_per_efold", "start_x", "handover_x", "stop_x", "rtol", "mu_over_start_hubble")
        return (pc.method, *(getattr(pc, f, None) for f in fields), sz, *extra)

    def fixed_point(self, cfg, model, closure, plain, progress=None):
        """The self-consistent FixedPoint of one scenario (see backreact.solve)."""
        import equinox as eqx

        from ._jax import jnp
        from .propagator import prior_variance, propagator_function
        from .solve import Target, solve_fixed_point

        settings, target = _solver_settings_and_target(cfg)
        sizes = self._sizes_for(cfg, plain)
        kind = None if target is None else target.kind
        key = self._key(
            cfg,
            sizes,
            closure.needs_third,
            tuple(getattr(settings, f) for f in _SETTINGS_FIELDS),
            kind,
            progress,
        )
        fn = self._solvers.get(key)
        if fn is None:
            third = closure.needs_third
            prop = propagator_function(cfg, plain, third=third, sizes=sizes, prior_argument=True)

            def solve(m, cl, start, prior, target_value):
                tgt = None if kind is None else Target(target_value, kind)
                return solve_fixed_point(
                    m, cl, lambda h: prop(h, prior), settings, tgt, start=start, progress=progress
                )

            fn = eqx.filter_jit(solve)
            self._solvers[key] = fn
            self.compilations += 1
        prior = jnp.asarray(prior_variance(cfg, float(np.asarray(plain.ln_hubble)[0])))
        value = target.value if target is not None else jnp.asarray(0.0)
        return fn(model, closure, plain, prior, value)

    def propagator(self, cfg, plain) -> dict[str, np.ndarray]:
        """The propagator along a fixed history (no closure), numpy, M_p units."""
        import equinox as eqx

        from ._jax import jnp
        from .propagator import prior_variance, propagator_function

        if cfg.propagator.method == "none":
            return {}
        sizes = self._sizes_for(cfg, plain)
        key = self._key(cfg, sizes, "plain")
        fn = self._solvers.get(key)
        if fn is None:
            fn = eqx.filter_jit(propagator_function(cfg, plain, sizes=sizes, prior_argument=True))
            self._solvers[key] = fn
            self.compilations += 1
        prior = jnp.asarray(prior_variance(cfg, float(np.asarray(plain.ln_hubble)[0])))
        return {k: np.asarray(v) for k, v in fn(plain, prior).items()}


def _failure_numbers(fp, status: int) -> str:
    """The figures behind a failed fixed point: for an impossible calibration the variance
    today and the density the target needs; otherwise the last residuals."""
    from . import constants as C
    from .solve import FAULT_STAGES, Status

    res = np.asarray(fp.residuals)[: int(fp.passes)]
    h = fp.history
    if status != int(Status.CALIBRATION_FAILED):
        text = ""
        stage = int(fp.fault_stage)
        if stage >= 0:
            n = float(np.asarray(h.efolds)[int(fp.fault_node)])
            z = math.expm1(-n)
            text += f" in the {FAULT_STAGES[stage]} at N = {n:.4g} (z = {z:.3g}), pass {int(fp.passes)}"
        tail = ", ".join(f"{r:.3g}" for r in res[-3:])
        return text + f" (last residuals max |delta ln H|: {tail})"
    i0 = int(np.argmin(np.abs(np.asarray(h.efolds))))
    a0 = float(np.asarray(fp.propagator["A"])[i0])
    mp = C.REDUCED_PLANCK_MASS_GEV
    text = f"; the spectator's variance today is A = {a0:.3g} M_p^2 ({a0 * mp**2:.3g} GeV^2)"
    if a0 <= 0.0:
        text += (
            ", not positive: the modes of the history have re-entered the horizon and decayed, so "
            "a frozen field with a positive potential has no energy to calibrate (a longer "
            "inflation or a prehistory, [prehistory], gives it a variance)"
        )
    return text


def _unphysical_sensitivities(history, prop, closure) -> dict[str, float]:
    """Sensitivity of A today and of H0 to the two unphysical choices (DESIGN 2.7), to first
    order: the renormalization scale mu enters A only through the counterterm
    -(2 - eps) H^2 ln(H/mu)/(8 pi^2) (DESIGN 2.3.1), so dA/d ln mu = (2 - eps) H^2/(8 pi^2)
    exactly; moving the first point of the history earlier by dN adds the modes that exit
    in that e-fold, frozen at (1 - eps) H^2 C(eps)/(4 pi^2) per e-fold (DESIGN 2.3.3, C the
    freeze factor), so dA/dN_start = -(1 - eps_s) H_s^2 C(eps_s)/(4 pi^2) at every later time.
    H0 responds through the closure: d ln H0 = d rho_q0/(2 rho_total0), the closure's rho
    differentiated in forward mode along the change of (A, A', A''); the history's own
    response to the changed rho_q is of the order of the fixed point's contraction factor.
    """
    import jax

    from ._jax import jnp
    from .closures import ClosureInput
    from .observables import today_index
    from .propagator import spline_from_history
    from .propagator.special import freeze_factor

    i0 = today_index(history)
    sp = spline_from_history(history)
    a0 = float(prop["A"][i0])

    def shift_mu(n):
        lnh, eps = sp.ln_hubble_and_epsilon(n)
        return (2.0 - eps) * jnp.exp(2.0 * lnh) / (8.0 * jnp.pi**2)

    n0 = jnp.asarray(float(history.efolds[i0]))
    d1 = jax.jacfwd(shift_mu)
    mu_jet = (shift_mu(n0), d1(n0), jax.jacfwd(d1)(n0))
    eps_s = float(history.epsilon[0])
    h2_s = float(np.exp(2.0 * history.ln_hubble[0]))
    d_start = -(1.0 - eps_s) * h2_s * float(freeze_factor(eps_s)) / (4.0 * math.pi**2)
    out = {"dlnA_dlnmu": float(mu_jet[0]) / a0, "dlnA_dNstart": d_start / a0}
    if closure is None:
        return out
    x0 = ClosureInput(
        *(jnp.asarray(prop[k][i0 : i0 + 1]) for k in ("A", "dA", "d2A")),
        None,
        jnp.asarray(history.ln_hubble[i0 : i0 + 1]),
        jnp.asarray(history.epsilon[i0 : i0 + 1]),
        jnp.zeros(1),
    )
    rho_total0 = float(np.asarray(history.rho_total)[i0])

    def rho_change(tangent):
        def f(a, da, d2a):
            return closure.density(a, da, d2a, x0.ln_hubble, x0.epsilon)[0]

        return float(jax.jvp(f, (x0.A, x0.dA, x0.d2A), tuple(jnp.full(1, t) for t in tangent))[1])

    out["dlnH0_dlnmu"] = rho_change(tuple(float(v) for v in mu_jet)) / (2.0 * rho_total0)
    out["dlnH0_dNstart"] = rho_change((d_start, 0.0, 0.0)) / (2.0 * rho_total0)
    return out


def _solver_diagnostics(cfg, fp, closure) -> dict[str, object]:
    from .closures import parameter_to_config_units

    out: dict[str, object] = {
        "passes": int(fp.passes),
        "final_residual": float(np.asarray(fp.residuals)[int(fp.passes) - 1]) if int(fp.passes) else math.nan,
        "second_friedmann_residual": float(fp.friedmann2),
        "contraction_factor": float(fp.contraction),
        "closure": cfg.spectator.closure
        + (f" ({cfg.spectator.potential})" if cfg.spectator.closure == "gaussian" else ""),
    }
    if cfg.calibration.target != "none":
        key, value = parameter_to_config_units(cfg, float(fp.closure.parameter()))
        out["calibrated_parameter"] = key
        out["calibrated_value"] = value
        out["calibration_target"] = cfg.calibration.target
        out["calibration_sensitivity"] = float(fp.sensitivity)
    return out


def _check_finite_arrays(history, arrays: dict, stage: str) -> None:
    n = np.asarray(history.efolds)
    for name, v in arrays.items():
        v = np.asarray(v)
        if v.dtype == bool:
            continue
        bad = ~np.isfinite(v)
        if bad.any():
            i = int(np.argmax(bad))
            raise FloatingPointError(f"{stage}: {name} is not finite at N = {n[i]:.4f} (grid point {i})")


def _to_numpy(history):
    import jax

    return jax.tree_util.tree_map(lambda x: np.asarray(x), history)
