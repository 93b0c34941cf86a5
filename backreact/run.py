"""One scenario end to end: config -> history -> observables -> run record.

This is the solver layer: it calls the physics (``background``) and produces what the
file layer (``io``) writes. Later stages (propagator, closure, fixed point) slot in
between the history and the observables without changing this interface.
"""

from __future__ import annotations

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

    def record(self) -> RunRecord:
        return RunRecord(
            config_toml=self.config.text,
            history=self.datasets,
            today=self.today,
            converged=self.converged,
            iterations=self.iterations,
            residuals=np.zeros(0),
            warnings=list(self.warnings),
            diagnostics=self.diagnostics,
        )


def _check_finite(history) -> None:
    """Stop with the quantity and N where a NaN/Inf first appears."""
    n = np.asarray(history.efolds)
    for name in ("ln_hubble", "epsilon", "cosmic_time"):
        v = np.asarray(getattr(history, name))
        bad = ~np.isfinite(v)
        if bad.any():
            i = int(np.argmax(bad))
            raise FloatingPointError(f"background: {name} is not finite at N = {n[i]:.4f} (grid point {i})")


def run_scenario(cfg: Config) -> RunResult:
    """Solve the expansion history of a validated config and collect its observables."""
    import equinox as eqx

    from .background import expansion_history, model_from_config
    from .observables import (
        history_datasets,
        propagator_datasets,
        propagator_warnings,
        run_warnings,
        today_index,
        today_summary,
    )
    from .propagator import propagator_along

    t0 = time.perf_counter()
    model = model_from_config(cfg)
    history = eqx.filter_jit(expansion_history)(model)
    history = _to_numpy(history)
    elapsed = time.perf_counter() - t0
    _check_finite(history)
    datasets = history_datasets(history)
    today = today_summary(history, cfg, datasets)
    t1 = time.perf_counter()
    prop = propagator_along(history, cfg)
    prop_seconds = time.perf_counter() - t1
    prop_warnings = []
    if prop:
        _check_finite_arrays(history, prop, "propagator")
        datasets.update(propagator_datasets(prop))
        today["propagator_GeV2"] = float(datasets["propagator"][today_index(history)])
        prop_warnings = propagator_warnings(history, cfg, prop)
    diagnostics: dict[str, object] = {"solve_seconds": elapsed}
    if prop:
        diagnostics["propagator_seconds"] = prop_seconds
        diagnostics["propagator_method"] = cfg.propagator.method
    if model.potential is not None and np.isfinite(float(history.field_pivot)):
        ns, r_sr = model.potential.slow_roll_observables(float(history.field_pivot))
        diagnostics["slow_roll_n_s"] = float(ns)
        diagnostics["slow_roll_r"] = float(r_sr)
    if math.isfinite(today.get("hubble_at_pivot_exit_GeV", math.nan)):
        diagnostics["pivot_exit_efolds_before_end"] = float(history.end_of_inflation - history.pivot_exit)
    warnings = list(cfg.warnings) + run_warnings(history, cfg, today) + prop_warnings
    return RunResult(cfg, history, datasets, today, diagnostics, warnings)


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
