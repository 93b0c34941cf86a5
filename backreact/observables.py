"""Observables of a solved history, in physical units (numpy, outside jit).

Converts a :class:`~backreact.background.History` (reduced Planck units) into the
datasets of the run file: H in GeV and km/s/Mpc, densities in GeV^4, cosmic time in
GeV^-1, distances in Mpc, and the scalars of the ``today`` group.

Pivot-scale quantities (DESIGN 2.1): H_* at the exit of k_* = 0.05 Mpc^-1 and the
tensor-to-scalar ratio it implies with the Planck amplitude of scalar perturbations,
r = 2 H_*^2 / (pi^2 M_p^2 A_s) (tensor power P_t = 2 H^2/(pi^2 M_p^2), e.g. Planck 2018 X,
A&A 641, A10, eq. 18 with eps -> 0).
"""

from __future__ import annotations

import math

import numpy as np

from . import constants as C

COMPONENTS = ("radiation", "matter", "inflaton", "lambda", "spectator")


def _np(x):
    return np.asarray(x, dtype=float)


def today_index(history) -> int:
    """Index of the grid node at N = 0 (placed exactly there by the grid)."""
    n = _np(history.efolds)
    return int(np.argmin(np.abs(n)))


def history_datasets(history) -> dict[str, np.ndarray]:
    """Datasets of the ``history`` group (names and units as in ``io.HISTORY_DATASETS``)."""
    mp = C.REDUCED_PLANCK_MASS_GEV
    n = _np(history.efolds)
    ln_h = _np(history.ln_hubble)
    hubble = np.exp(ln_h) * mp
    rho = {
        "radiation": _np(history.rho_radiation),
        "matter": _np(history.rho_matter),
        "inflaton": _np(history.rho_inflaton),
        "lambda": _np(history.rho_lambda),
        "spectator": _np(history.rho_spectator),
    }
    total = sum(rho.values())
    eps = _np(history.epsilon)
    chi_mpc = _np(history.comoving_distance) / mp * C.INV_GEV_MPC
    a = np.exp(n)
    z = np.expm1(-n)
    out = {
        "efolds": n,
        "scale_factor": a,
        "redshift": z,
        "cosmic_time": _np(history.cosmic_time) / mp,
        "hubble": hubble,
        "hubble_km_s_Mpc": C.hubble_gev_to_km_s_mpc(hubble),
        "epsilon": eps,
        "w_effective": -1.0 + 2.0 * eps / 3.0,
        "temperature": np.where(
            np.isfinite(_np(history.ln_temperature)), np.exp(_np(history.ln_temperature)) * mp, np.nan
        ),
        "comoving_distance_Mpc": chi_mpc,
        "luminosity_distance_Mpc": (1.0 + z) * chi_mpc,
        "angular_diameter_distance_Mpc": chi_mpc / (1.0 + z),
    }
    for name, r in rho.items():
        if name == "spectator" and not np.any(r):
            continue  # a run without a spectator does not compute it: absent, not zero
        out[f"density_{name}"] = r * mp**4
        out[f"fraction_{name}"] = r / total
    if not np.any(rho["lambda"]):
        out.pop("density_lambda")
        out.pop("fraction_lambda")
    return out


def tensor_to_scalar_ratio(hubble_gev: float) -> float:
    """r = 2 H^2 / (pi^2 M_p^2 A_s) with the Planck 2018 A_s."""
    return 2.0 * (hubble_gev / C.REDUCED_PLANCK_MASS_GEV) ** 2 / (math.pi**2 * C.PLANCK_AS)


def today_summary(history, cfg, datasets: dict[str, np.ndarray] | None = None) -> dict[str, float]:
    """Scalars of the ``today`` group (``datasets``: the history's datasets, if already made)."""
    mp = C.REDUCED_PLANCK_MASS_GEV
    i0 = today_index(history)
    ds = datasets if datasets is not None else history_datasets(history)
    h0 = float(ds["hubble_km_s_Mpc"][i0])
    out = {
        "H0_km_s_Mpc": h0,
        "age_Gyr": float(history.age) / mp * C.INV_GEV_S / C.GYR_S,
        "efolds_inflation": float(cfg.inflation.efolds),
        "efolds_end_of_inflation_to_today": -float(history.end_of_inflation),
        "efolds_end_of_inflation": float(history.end_of_inflation),
        "efolds_history_start": float(ds["efolds"][0]),
        "hubble_end_of_inflation_GeV": math.exp(float(history.ln_hubble_end)) * mp,
    }
    for c in COMPONENTS:
        if f"fraction_{c}" in ds and c != "inflaton":
            out[f"fraction_{c}"] = float(ds[f"fraction_{c}"][i0])
    h_star = (
        math.exp(float(history.ln_hubble_pivot)) * mp
        if np.isfinite(float(history.ln_hubble_pivot))
        else math.nan
    )
    out["hubble_at_pivot_exit_GeV"] = h_star
    out["tensor_to_scalar_ratio"] = tensor_to_scalar_ratio(h_star) if np.isfinite(h_star) else math.nan
    if cfg.reheating.kind == "perturbative":
        out["reheating_temperature_GeV"] = float(cfg.reheating.temperature_GeV)
    return out


def run_warnings(history, cfg, summary) -> list[str]:
    """One-line warnings a cosmologist should see about a solved history."""
    out = []
    r = summary.get("tensor_to_scalar_ratio", math.nan)
    if not np.isfinite(summary.get("hubble_at_pivot_exit_GeV", math.nan)):
        out.append(
            "the pivot scale k = 0.05/Mpc left the horizon before the first point of the history "
            f"(inflation.efolds = {cfg.inflation.efolds:g} is too few to contain it): "
            "H_* and r are not computed"
        )
    elif r > C.R_UPPER_BOUND:
        out.append(
            f"tensor-to-scalar ratio r = {r:.3g} at the pivot exceeds the bound r < {C.R_UPPER_BOUND} "
            "(BICEP/Keck 2021; Planck 2018 A_s): this inflation scale is excluded observationally"
        )
    # Modes inside today's horizon must have left the horizon during the explicit history.
    n = _np(history.efolds)
    ln_h = _np(history.ln_hubble)
    i0 = today_index(history)
    if n[0] + ln_h[0] > n[i0] + ln_h[i0]:
        out.append(
            "inflation is too short to contain today's horizon scale: the mode k = a0 H0 was already "
            "outside the horizon at the first point (raise inflation.efolds, or account for it "
            "in the prehistory)"
        )
    return out


def propagator_datasets(prop: dict) -> dict[str, np.ndarray]:
    """History datasets of the propagator (GeV units) from M_p-unit arrays."""
    mp = C.REDUCED_PLANCK_MASS_GEV
    out = {
        "propagator": prop["A"] * mp**2,
        "propagator_dN": prop["dA"] * mp**2,
        "propagator_dNdN": prop["d2A"] * mp**2,
        "box_propagator": prop["box"] * mp**4,
    }
    if "kinetic" in prop:
        out["kinetic_invariant"] = prop["kinetic"] * mp**4
    if "valid" in prop:
        out["kernel_valid"] = np.asarray(prop["valid"], dtype=float)
    return out


def _z_ranges(z: np.ndarray, mask: np.ndarray) -> str:
    """Human-readable redshift ranges where mask is True (z decreasing along the grid)."""
    parts = []
    i = 0
    n = len(mask)
    while i < n:
        if mask[i]:
            j = i
            while j + 1 < n and mask[j + 1]:
                j += 1
            parts.append(f"z = {z[i]:.3g} .. {z[j]:.3g}")
            i = j + 1
        else:
            i += 1
    return ", ".join(parts)


def propagator_warnings(history, cfg, prop: dict) -> list[str]:
    """Warnings about where the propagator method is outside its validity range."""
    out = []
    n = _np(history.efolds)
    z = np.expm1(-n)
    if "valid" in prop:
        bad = ~np.asarray(prop["valid"], dtype=bool)
        if bad.any():
            out.append(
                "propagator.method = 'memory_kernel' is outside its validity range (the universe "
                f"accelerates again after inflation) at {_z_ranges(z, bad)}: A there is not reliable "
                "(errors of 50-100% are typical); use method = 'exact'"
            )
    if cfg.prehistory.kind != "none":
        # modes of the prior range have k < k_IR = a_start H_start: they re-enter when aH < k_IR
        lah = n + _np(history.ln_hubble)
        after = n > float(history.end_of_inflation)
        if np.any(lah[after] < lah[0]):
            first = n[after][np.argmax(lah[after] < lah[0])]
            out.append(
                "modes of the prehistory (k < a H at the first point) re-enter the horizon from "
                f"z = {np.expm1(-first):.3g} on: the prior variance is not constant after that, and "
                "A is only approximate there"
            )
    return out
