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
        "hubble_normalized": hubble / hubble[int(np.argmin(np.abs(n)))],
        "deceleration": deceleration(eps),
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


# ------------------------------------------------------------------ spectator and CPL


def spectator_datasets(out) -> dict[str, np.ndarray]:
    """``pressure_spectator`` (GeV^4), ``w_spectator`` and ``closure_validity`` from a
    closure's output (M_p units); w is NaN where rho_q = 0."""
    mp4 = C.REDUCED_PLANCK_MASS_GEV**4
    rho = _np(out.density)
    p = _np(out.pressure)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(rho != 0.0, p / np.where(rho != 0.0, rho, 1.0), np.nan)
    return {"pressure_spectator": p * mp4, "w_spectator": w, "closure_validity": _np(out.validity)}


def cpl_fit(scale_factor, w, a_min: float = 1.0 / 3.0, points: int = 201) -> tuple[float, float, float]:
    """Least-squares fit of w(a) = w0 + wa (1 - a) (Chevallier & Polarski 2001; Linder 2003)
    on ``points`` values uniform in a over [a_min, 1] (0 <= z <= 2 by default).

    ``scale_factor``, ``w``: the history (a increasing or not); w is interpolated linearly
    in a, so a w that is linear in a is recovered exactly. Returns (w0, wa, rms residual).
    """
    a = _np(scale_factor)
    w = _np(w)
    order = np.argsort(a)
    a, w = a[order], w[order]
    if a[0] > a_min or a[-1] < 1.0:
        raise ValueError(f"cpl_fit: the history must cover a in [{a_min:g}, 1], got [{a[0]:g}, {a[-1]:g}]")
    grid = np.linspace(a_min, 1.0, points)
    wg = np.interp(grid, a, w)
    design = np.stack([np.ones_like(grid), 1.0 - grid], axis=1)
    coef, *_ = np.linalg.lstsq(design, wg, rcond=None)
    resid = wg - design @ coef
    return float(coef[0]), float(coef[1]), float(np.sqrt(np.mean(resid**2)))


def spectator_summary(history, datasets: dict[str, np.ndarray]) -> dict[str, float]:
    """w0, wa of the spectator's w_q over 0 <= z <= 2 and the fit's rms residual."""
    w = datasets["w_spectator"]
    a = datasets["scale_factor"]
    late = a >= 0.25
    if not np.all(np.isfinite(w[late])):
        return {"w0": math.nan, "wa": math.nan, "cpl_residual": math.nan}
    w0, wa, res = cpl_fit(a[late], w[late])
    return {"w0": w0, "wa": wa, "cpl_residual": res}


def deceleration(epsilon):
    """q = -a a_tt / a_t^2 = eps - 1."""
    return _np(epsilon) - 1.0


def matching_lcdm(cfg, h0_km_s_mpc: float):
    """The flat LambdaCDM with the run's H0, omega_b, omega_c and radiation (DESIGN 2.8)."""
    from .reference import FlatLCDM

    c = cfg.cosmology
    return FlatLCDM(h0_km_s_mpc, c.omega_b, c.omega_c, c.cmb_temperature_K, c.n_eff)


def lcdm_deviation(cfg, datasets: dict[str, np.ndarray], z_max: float = 3.0) -> dict[str, float]:
    """max over 0 < z < z_max of |H/H_LCDM - 1| against the matching LambdaCDM, and where."""
    z = datasets["redshift"]
    i0 = int(np.argmin(np.abs(z)))
    h0 = float(datasets["hubble_km_s_Mpc"][i0])
    try:
        ref = matching_lcdm(cfg, h0)
    except ValueError:  # matter and radiation alone exceed the critical density: no LCDM match
        return {"lcdm_max_deviation": math.nan, "lcdm_deviation_redshift": math.nan}
    sel = (z > 0.0) & (z < z_max)
    dev = np.abs(datasets["hubble_km_s_Mpc"][sel] / ref.hubble_km_s_Mpc(z[sel]) - 1.0)
    j = int(np.argmax(dev))
    return {
        "lcdm_max_deviation": float(dev[j]),
        "lcdm_deviation_redshift": float(z[sel][j]),
        "lcdm_omega_lambda": float(ref.Omega_lambda),
    }


def _ranges_above(z, values, threshold) -> str:
    return _z_ranges(z, np.isfinite(values) & (values > threshold))


def validity_verdict(history, cfg, datasets, prop, diagnostics) -> tuple[dict[str, object], list[str]]:
    """The closure's validity verdict: the largest validity ratio along the history (and
    where), against spectator.validity_threshold; for an invalid frozen Gaussian spectator
    the numbers that explain why (how much memory a frozen field with this energy needs).

    Returns (diagnostics entries, warnings). Only the closure's own invalidity fails the
    verdict; a propagator method used outside its range is a warning (``propagator_warnings``).
    """
    mp = C.REDUCED_PLANCK_MASS_GEV
    thr = float(cfg.spectator.validity_threshold)
    ratio = datasets["closure_validity"]
    z = datasets["redshift"]
    n = datasets["efolds"]
    i0 = today_index(history)
    out: dict[str, object] = {"validity_threshold": thr}
    h_start = float(np.exp(_np(history.ln_hubble)[0]))
    from .propagator import prior_variance

    a_prior = prior_variance(cfg, math.log(h_start))
    if cfg.prehistory.kind != "none":
        out["prior_variance_Mp2"] = a_prior
        out["prior_de_sitter_efolds"] = 4.0 * math.pi**2 * a_prior / h_start**2
    finite = np.isfinite(ratio)
    if not finite.any():
        out["validity_verdict"] = "no criterion"
        out["validity_explanation"] = (
            f"the {cfg.spectator.closure} closure has no validity ratio of its own; judge it by the physics"
        )
        return out, []
    j = int(np.nanargmax(np.where(finite, ratio, -np.inf)))
    rmax = float(ratio[j])
    out["validity_max"] = rmax
    out["validity_max_redshift"] = float(z[j])
    if rmax <= thr:
        out["validity_verdict"] = "valid"
        out["validity_explanation"] = (
            f"|<U''>|/H^2 stays below {rmax:.3g} (threshold {thr:g}) along the whole history, "
            f"largest at z = {z[j]:.3g}"
        )
        return out, []
    out["validity_verdict"] = "invalid"
    where = _ranges_above(z, ratio, thr)
    text = (
        f"the closure is invalid: |<U''>|/H^2 exceeds {thr:g} at {where} (largest {rmax:.3g} at "
        f"z = {z[j]:.3g}); a frozen Gaussian spectator is rolling there, so its rho_q and w_q are wrong"
    )
    if cfg.spectator.closure == "gaussian":
        rho_q0 = float(_np(history.rho_spectator)[i0])
        h2_min = float(np.min(np.exp(2.0 * _np(history.ln_hubble))[n >= 0.0 - 1e-12]))
        a_now = float(prop["A"][i0]) if "A" in prop else math.nan
        if rho_q0 > 0.0 and np.isfinite(a_now):
            need = 2.0 * rho_q0 / (thr * h2_min)
            ds_efolds = 4.0 * math.pi**2 * need / h_start**2
            a_explicit = a_now - a_prior
            text += (
                f". Why: a frozen quadratic field with rho_q0 = {rho_q0 * mp**4:.3g} GeV^4 "
                f"(Omega_q0 = {float(datasets['fraction_spectator'][i0]):.3g}) and m^2 <= {thr:g} H^2 "
                f"needs a variance A >= 2 rho_q0/({thr:g} H_min^2) = {need:.3g} M_p^2, but the history "
                f"gives A = {a_now:.3g} M_p^2 ({a_explicit:.3g} M_p^2 from its "
                f"{cfg.inflation.efolds:g} explicit e-folds, which give at most "
                f"H_start^2 N/(4 pi^2) = {h_start**2 * cfg.inflation.efolds / (4.0 * math.pi**2):.3g} M_p^2 "
                "while their modes stay outside the horizon), "
                f"{need / max(a_now, 1e-300):.3g} times too little; that variance would need about "
                f"{ds_efolds:.3g} de Sitter e-folds at H = {h_start * mp:.3g} GeV before the history "
                "(prehistory.kind = 'de_sitter_efolds' or 'variance')"
            )
    out["validity_explanation"] = text
    return out, [text]
