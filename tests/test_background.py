"""Physics checks of the expansion history (backreact/background/)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from helpers import make_config, solved
from scipy.integrate import quad, solve_ivp

from backreact import constants as C
from backreact.background.friedmann import _junction_w
from backreact.background.thermal import thermal_table
from backreact.observables import history_datasets, today_index
from backreact.reference import FlatLCDM

PLATEAU_LCDM = (
    "[inflation]\nmodel = 'plateau'\n[reheating]\nkind = 'instant'\n"
    "[cosmology]\nomega_lambda = 0.315995734205\n"
)
PROFILE = "[inflation]\nmodel = 'profile'\n"


def _segment(model, name):
    return model.segment_slices[name]


# ----------------------------------------------------------------- inflation limits


@pytest.mark.parametrize("eps", [0.1, 0.3])
def test_power_law_profile_gives_closed_form_hubble(eps):
    # Constant eps: H = H_start e^{-eps (N - N_start)} exactly (H' = -eps H). The only
    # other components during inflation are absent (no radiation, matter, Lambda), so
    # the closed form must hold to rounding (1e-12 in ln H over 65 e-folds).
    cfg, model, h = solved(
        PROFILE, inflation__eps_start=eps, inflation__eps_end=eps, inflation__hubble_at="start"
    )
    s = _segment(model, "inflation")
    n = h.efolds[s]
    expected = math.log(cfg.inflation.hubble_GeV / C.REDUCED_PLANCK_MASS_GEV) - eps * (n - n[0])
    np.testing.assert_allclose(h.ln_hubble[s], expected, rtol=0, atol=1e-12)
    np.testing.assert_allclose(h.epsilon[s], eps, rtol=0, atol=1e-12)
    # Cosmic time of power-law inflation: t = (e^{eps dN} - 1)/(eps H_start).
    h0 = math.exp(h.ln_hubble[s][0])
    t_exact = np.expm1(eps * (n - n[0])) / (eps * h0)
    np.testing.assert_allclose(h.cosmic_time[s], t_exact, rtol=1e-12)


def test_de_sitter_profile_limit():
    # eps -> 0: the profile with eps_start = 0 and a tiny eps_end = 1e-12 is de Sitter to
    # 1e-12 x N_inf; a = e^N by construction and t = (N - N_start)/H.
    cfg, model, h = solved(
        PROFILE, inflation__eps_start=0.0, inflation__eps_end=1e-12, inflation__hubble_at="start"
    )
    s = _segment(model, "inflation")
    n = h.efolds[s]
    lnh = math.log(cfg.inflation.hubble_GeV / C.REDUCED_PLANCK_MASS_GEV)
    np.testing.assert_allclose(h.ln_hubble[s], lnh, rtol=0, atol=1e-10)
    np.testing.assert_allclose(h.cosmic_time[s], (n - n[0]) / math.exp(lnh), rtol=1e-10)


def test_field_inflation_matches_independent_scipy_integration():
    # The plateau inflaton integrated again with scipy (DOP853, rtol 1e-13) from the same
    # initial field: H at every inflation node agrees to 1e-9 relative (the two
    # integrators' tolerances are 1e-11 and 1e-13; 1e-9 leaves margin for the 65-e-fold
    # accumulation).
    cfg, model, h = solved("[inflation]\nmodel = 'plateau'\n")
    pot = model.potential
    b = math.sqrt(2.0 / 3.0)

    def v(phi):
        e = math.exp(-b * phi)
        return (1 - e) ** 2, 2 * b * e * (1 - e)

    def rhs(m, y):
        phi, dphi = y
        vv, dv = v(phi)
        h2 = vv / (3 - 0.5 * dphi**2)
        return [dphi, -(3 - 0.5 * dphi**2) * dphi - dv / h2]

    phi0 = float(pot.slow_roll_field(cfg.inflation.efolds + 8.0))
    v0, dv0 = v(phi0)

    def end(m, y):
        return 0.5 * y[1] ** 2 - 1.0

    end.terminal = True
    sol = solve_ivp(
        rhs,
        (0, 200),
        [phi0, -dv0 / v0],
        method="DOP853",
        rtol=1e-13,
        atol=1e-15,
        events=end,
        dense_output=True,
    )
    m_end = sol.t_events[0][0]
    s = _segment(model, "inflation")
    n = h.efolds[s]
    m = m_end - (n[-1] - n)
    phi, dphi = sol.sol(m)
    vv = np.array([v(p)[0] for p in phi])
    lnh = 0.5 * np.log(vv / (3 - 0.5 * dphi**2))
    # H is normalised at the end of inflation: compare shapes.
    np.testing.assert_allclose(h.ln_hubble[s] - h.ln_hubble[s][-1], lnh - lnh[-1], rtol=0, atol=1e-9)
    np.testing.assert_allclose(h.epsilon[s], 0.5 * dphi**2, rtol=0, atol=1e-8)


# ------------------------------------------------------- late universe vs LambdaCDM


def test_plateau_history_with_lambda_reproduces_lcdm():
    # Same radiation (photons + N_eff massless neutrinos), matter and Lambda: at z < 1e4
    # (after e+e- annihilation, where rho_r ~ a^-4 exactly) E(z) must agree with the
    # analytic flat LambdaCDM to 1e-6 (the requirement); we see ~1e-10.
    cfg, model, h = solved(PLATEAU_LCDM)
    ds = history_datasets(h)
    i0 = today_index(h)
    h0 = ds["hubble_km_s_Mpc"][i0]
    ref = FlatLCDM(H0_km_s_Mpc=h0, omega_b=cfg.cosmology.omega_b, omega_c=cfg.cosmology.omega_c)
    z = ds["redshift"]
    sel = (z < 1e4) & (z >= -0.4)
    e_run = ds["hubble_km_s_Mpc"][sel] / h0
    np.testing.assert_allclose(e_run, ref.E(z[sel]), rtol=1e-6)
    assert abs(h0 / 67.66 - 1) < 1e-6  # omega_lambda of configs/lcdm.toml is chosen for H0 = 67.66
    # Distances (comoving, from the run's own quadrature) and the age, 1e-6.
    past = sel & (z > 1e-3)
    np.testing.assert_allclose(
        ds["comoving_distance_Mpc"][past], ref.comoving_distance_Mpc(z[past]), rtol=1e-6
    )
    age = float(h.age) / C.REDUCED_PLANCK_MASS_GEV * C.INV_GEV_S / C.GYR_S
    assert abs(age / ref.age_Gyr() - 1) < 1e-6


def test_today_is_where_the_photon_temperature_is_t_cmb():
    # a = 1 is defined by T = T_CMB (DESIGN 2.1): the temperature at the N = 0 node,
    # from the radiation table, equals 2.7255 K to the table's interpolation accuracy.
    cfg, model, h = solved(PLATEAU_LCDM)
    i0 = today_index(h)
    assert h.efolds[i0] == 0.0
    t0 = math.exp(h.ln_temperature[i0]) * C.REDUCED_PLANCK_MASS_GEV / C.BOLTZMANN_GEV_K
    assert abs(t0 / C.T_CMB_K - 1) < 1e-9


# --------------------------------------------------- e-folds after inflation (Liddle & Leach)


def _liddle_leach_instant(rho_end_mp4: float) -> float:
    """ln(a0/a_end) for instant thermalization (Liddle & Leach 2003, PRD 68, 103503, eq. 7;
    Planck 2018 X eq. 47): ln(T_th/T0) + (1/3) ln(g_s,th/g_s0), with T_th from
    rho_end = (pi^2/30) g_*(T_th) T_th^4 and g's from the same thermal table."""
    tab = thermal_table()
    mp = C.REDUCED_PLANCK_MASS_GEV
    rho_gev = rho_end_mp4 * mp**4
    t = (rho_gev / (math.pi**2 / 30 * 106.83)) ** 0.25
    for _ in range(20):
        g, _ = tab.g_star(np.array([t]))
        t = (rho_gev / (math.pi**2 / 30 * g[0])) ** 0.25
    _, gs_th = tab.g_star(np.array([t]))
    t0 = C.T_CMB_K * C.BOLTZMANN_GEV_K
    _, gs0 = tab.g_star(np.array([t0]))
    return math.log(t / t0) + math.log(gs_th[0] / gs0[0]) / 3.0


def test_efolds_after_instant_reheating_match_liddle_leach():
    # Instant reheating: the only difference from the sudden-thermalization estimate is
    # our C^1 junction, during which w rises from -1/3 to 1/3 over `junction` e-folds
    # instead of jumping. rho then falls more slowly than radiation, so at the end of the
    # junction it is higher by 3 int (1/3 - w) dN, the plasma hotter by a quarter of that,
    # and there are (3/4) int (1/3 - w) dN more e-folds to T_CMB. We compute that
    # correction by quadrature of the documented blend (the profile model gives w_end =
    # -1/3 and its slope in closed form); what is left must vanish to the accuracy of the
    # ODE and of the thermal table (1e-6 e-folds).
    cfg, model, h = solved(PROFILE + "[cosmology]\nomega_lambda = 0.3\n", inflation__junction_efolds=0.3)
    delta = 0.3
    prof = model.profile
    eps_end, deps_end = (float(v) for v in prof.epsilon(prof.efolds))
    assert abs(eps_end - 1.0) < 1e-14

    def w(x):
        return float(_junction_w(np.asarray(x), delta, -1.0 / 3.0, 2.0 / 3.0 * deps_end, 1.0 / 3.0))

    shift = 0.75 * quad(lambda x: 1.0 / 3.0 - w(x), 0.0, delta, epsabs=1e-14)[0]
    rho_end = 3.0 * math.exp(2 * float(h.ln_hubble_end))
    expected = _liddle_leach_instant(rho_end) + shift
    got = -float(h.end_of_inflation)
    assert abs(got - expected) < 1e-6, (got, expected, shift)
    assert 0.05 < shift < 0.2  # the junction costs ~0.1 e-fold (sanity of the correction)


def test_eps_is_continuous_through_the_end_of_inflation():
    # The mode functions see eps: across the end of inflation and the junction, eps may
    # change between neighbouring nodes only by ~eps' x spacing (no jump). Node spacing
    # there is ~0.02-0.05 e-fold and |eps'| < 10: a step above 0.5 would be a jump.
    for text in ("[inflation]\nmodel = 'plateau'\n", "[inflation]\nmodel = 'quadratic'\n"):
        cfg, model, h = solved(text + "[reheating]\nkind = 'perturbative'\ntemperature_GeV = 1e9\n")
        i = model.segment_slices["inflation"].stop
        e = h.epsilon[i - 5 : i + 10]
        assert np.max(np.abs(np.diff(e))) < 0.5, e
        assert abs(h.epsilon[i - 1] - 1.0) < 1e-8  # end of inflation is eps = 1


def test_efolds_after_perturbative_reheating_near_liddle_leach():
    # Perturbative reheating at T_rh: Liddle & Leach with w_int = 0 between the end of
    # inflation and thermalization at T_th = T_rh (eq. 7, ln(rho_end/rho_th)/(3(1+w)) +
    # ln(T_th/T0) + (1/3) ln(g_s,th/g_s0)). The estimate assumes sudden decay at
    # Gamma = H; a continuous decay releases its entropy over ~1 e-fold around that time,
    # so the two differ by a fraction of an e-fold: tolerance 0.3 e-fold (Kolb & Turner
    # 1990, sec. 5.3, discuss the O(1) factor between T_rh definitions; 0.3 e-fold is a
    # 35% change of T_rh).
    t_rh = 1e9
    cfg, model, h = solved(PLATEAU_LCDM, reheating__kind="perturbative", reheating__temperature_GeV=t_rh)
    tab = thermal_table()
    mp = C.REDUCED_PLANCK_MASS_GEV
    rho_end = 3.0 * math.exp(2 * float(h.ln_hubble_end))
    rho_th = tab.density_at_temperature(t_rh)
    g, gs = tab.g_star(np.array([t_rh, C.T_CMB_K * C.BOLTZMANN_GEV_K]))
    expected = (
        math.log(rho_end / rho_th) / 3.0
        + math.log(t_rh / (C.T_CMB_K * C.BOLTZMANN_GEV_K))
        + math.log(gs[0] / gs[1]) / 3.0
    )
    got = -float(h.end_of_inflation)
    assert abs(got - expected) < 0.3, (got, expected)
    del mp


# ------------------------------------------------------------- grid and tolerances


def test_grid_and_tolerance_refinement_change_h_by_less_than_1e_8():
    # Doubling every segment's points keeps the old nodes (the placement formulas nest)
    # and tightening rtol/atol by 100 must not move ln H there by more than 1e-8.
    text = PLATEAU_LCDM
    over = {"reheating__kind": "perturbative", "reheating__temperature_GeV": 1e11}
    base = {
        "grid__points_inflation": 101,
        "grid__points_reheating": 40,
        "grid__points_radiation_matter": 100,
        "grid__points_late": 50,
    }
    fine = {
        "grid__points_inflation": 201,
        "grid__points_reheating": 80,
        "grid__points_radiation_matter": 200,
        "grid__points_late": 100,
        "grid__rtol": 1e-13,
        "grid__atol": 1e-15,
    }
    _, m1, h1 = solved(text, False, **over, **base)
    _, m2, h2 = solved(text, False, **over, **fine)
    for seg in ("inflation", "reheating", "radiation_matter"):
        a = h1.ln_hubble[m1.segment_slices[seg]]
        b = h2.ln_hubble[m2.segment_slices[seg]]
        start = 0 if seg == "inflation" else 1
        coarse_nodes = b[start::2] if seg == "inflation" else b[1::2]
        np.testing.assert_allclose(
            h1.efolds[m1.segment_slices[seg]],
            h2.efolds[m2.segment_slices[seg]][start::2]
            if seg == "inflation"
            else h2.efolds[m2.segment_slices[seg]][1::2],
            rtol=0,
            atol=1e-9,
        )
        np.testing.assert_allclose(a, coarse_nodes, rtol=0, atol=1e-8)


def test_eps_is_minus_dlnh_dn_on_uniform_segments():
    # eps is computed from (rho + p)/rho; the history's ln H must integrate it:
    # ln H(N+2h) - ln H(N) = -int eps (Simpson on uniform nodes). The radiation era has
    # features of width ~0.3 e-fold in eps (QCD crossover, e+e- annihilation), so the
    # nodes here are 0.02 e-fold apart: Simpson's error (h/0.3)^4 x |delta eps| ~ 1e-7.
    cfg, model, h = solved(PLATEAU_LCDM, grid__points_radiation_matter=3000)
    for seg in ("radiation_matter",):
        s = model.segment_slices[seg]
        n, lh, e = h.efolds[s], h.ln_hubble[s], h.epsilon[s]
        step = np.diff(n)
        assert np.allclose(step, step[0], rtol=1e-9)
        simpson = step[0] / 3.0 * (e[:-2:2] + 4 * e[1:-1:2] + e[2::2])
        np.testing.assert_allclose(lh[2::2] - lh[:-2:2], -simpson, rtol=0, atol=3e-7)


# ------------------------------------------------------------- JAX transformations


def test_jit_and_no_jit_agree_and_vmap_over_the_inflation_scale():
    import equinox as eqx
    import jax
    import jax.numpy as jnp

    from backreact.background import expansion_history, model_from_config

    cfg = make_config(PROFILE)
    model = model_from_config(cfg)
    h_jit = eqx.filter_jit(expansion_history)(model)
    # vmap over ln H_inf: every lane equals its own single solve (bitwise up to 1e-12).
    scales = jnp.log(jnp.array([1e10, 1e12]) / C.REDUCED_PLANCK_MASS_GEV)

    def at_scale(lnh):
        return expansion_history(eqx.tree_at(lambda m: m.ln_hubble_ref, model, lnh)).ln_hubble

    batched = eqx.filter_jit(jax.vmap(at_scale))(scales)
    single = eqx.filter_jit(at_scale)(scales[1])
    np.testing.assert_allclose(batched[1], single, rtol=0, atol=1e-12)
    assert batched.shape == (2, model.size)
    with jax.disable_jit():
        h_nojit = expansion_history(model)
    np.testing.assert_allclose(np.asarray(h_nojit.ln_hubble), np.asarray(h_jit.ln_hubble), rtol=0, atol=1e-11)


def test_gradient_of_today_wrt_inflation_scale_is_finite_and_correct():
    # d(e-folds from end of inflation to today)/d ln H_end = 1/2 for instant reheating
    # (rho_end ~ H^2 -> T ~ H^(1/2), entropy conservation), up to the g_* running at
    # ~1e15 GeV (none: constant above the top mass): 1e-6.
    import equinox as eqx
    import jax

    from backreact.background import expansion_history, model_from_config

    model = model_from_config(make_config(PLATEAU_LCDM))

    def n_after(lnh):
        return -expansion_history(eqx.tree_at(lambda m: m.ln_hubble_ref, model, lnh)).end_of_inflation

    g = eqx.filter_jit(jax.grad(n_after))(model.ln_hubble_ref)
    assert np.isfinite(g)
    assert abs(float(g) - 0.5) < 1e-6
