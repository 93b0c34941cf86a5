"""Observables of a solved history (backreact/observables.py): CPL fit, distances, age."""

from __future__ import annotations

import numpy as np
import pytest
from helpers import solved

from backreact import constants as C
from backreact.observables import cpl_fit, deceleration, history_datasets, today_index

# The shipped LambdaCDM check scenario's physics (configs/lcdm.toml: Planck 2018 densities and
# a cosmological constant chosen for H0 = 67.66) on the small CI grid.
LCDM = "[inflation]\nmodel = 'plateau'\n[cosmology]\nomega_lambda = 0.316\n"


@pytest.mark.parametrize("w0, wa", [(-1.0, 0.0), (-0.9, 0.3), (-0.7, -1.2)])
def test_cpl_fit_recovers_a_linear_w_of_a_exactly(w0, wa):
    # w(a) = w0 + wa (1 - a) sampled on an uneven grid that extends beyond [1/3, 1]: the
    # linear interpolation in a and the least squares are exact for it, so only round-off
    # remains (1e-12 absolute), and the residual vanishes.
    a = np.sort(np.concatenate([np.geomspace(0.05, 1.6, 157), [1.0 / 3.0, 1.0]]))
    f0, fa, res = cpl_fit(a, w0 + wa * (1.0 - a))
    assert abs(f0 - w0) < 1e-12 and abs(fa - wa) < 1e-12 and res < 1e-12


def test_cpl_fit_refuses_a_history_that_does_not_reach_today():
    with pytest.raises(ValueError, match="must cover a in"):
        cpl_fit(np.linspace(0.2, 0.9, 10), np.full(10, -1.0))


def test_deceleration_is_epsilon_minus_one():
    # q = -a a_tt/a_t^2 = -(1 + H_t/H^2) = eps - 1: de Sitter -1, radiation +1, matter +1/2.
    np.testing.assert_array_equal(deceleration(np.array([0.0, 2.0, 1.5])), [-1.0, 1.0, 0.5])


@pytest.fixture(scope="module")
def lcdm_run():
    cosmology = pytest.importorskip("astropy.cosmology")
    units = pytest.importorskip("astropy.units")
    cfg, _, h = solved(LCDM)
    ds = history_datasets(h)
    c = cfg.cosmology
    h0 = float(ds["hubble_km_s_Mpc"][today_index(h)])
    little_h = h0 / 100.0
    # astropy FlatLambdaCDM with massless neutrinos and the run's radiation (photons at T_CMB
    # and N_eff = 3.044): the "LambdaCDM limit" of a run (DESIGN 2.8).
    ref = cosmology.FlatLambdaCDM(
        H0=h0,
        Om0=(c.omega_b + c.omega_c) / little_h**2,
        Tcmb0=c.cmb_temperature_K,
        Neff=c.n_eff,
        m_nu=0 * units.eV,
        Ob0=c.omega_b / little_h**2,
    )
    return h, ds, ref, units


def test_run_distances_match_astropy_in_the_lambda_cdm_limit(lcdm_run):
    # Source: astropy FlatLambdaCDM comoving, luminosity and angular-diameter distances
    # (quadrature to ~1e-8). Tolerance 1e-6, the bar; the run's radiation before
    # e+e- annihilation differs from astropy's pure a^-4 law, which is invisible at z < 10.
    h, ds, ref, units = lcdm_run
    z = ds["redshift"]
    sel = (z > 1e-3) & (z < 10.0)
    for name, f in (
        ("comoving_distance_Mpc", ref.comoving_distance),
        ("luminosity_distance_Mpc", ref.luminosity_distance),
        ("angular_diameter_distance_Mpc", ref.angular_diameter_distance),
    ):
        np.testing.assert_allclose(ds[name][sel], f(z[sel]).to_value(units.Mpc), rtol=1e-6, err_msg=name)


def test_run_expansion_rate_and_age_match_astropy(lcdm_run):
    # Source: astropy FlatLambdaCDM efunc and age. 1e-6 (the bar). The age of the
    # run counts from the first point of the history; the inflationary and reheating stages
    # and the Standard-Model plasma (g_* > 3.36 above the MeV scale) change it by ~1e-12.
    h, ds, ref, units = lcdm_run
    z = ds["redshift"]
    i0 = today_index(h)
    sel = (z >= 0.0) & (z < 1e3)
    e_run = ds["hubble_km_s_Mpc"][sel] / ds["hubble_km_s_Mpc"][i0]
    np.testing.assert_allclose(e_run, ref.efunc(z[sel]), rtol=1e-6)
    age = float(h.age) / C.REDUCED_PLANCK_MASS_GEV * C.INV_GEV_S / C.GYR_S
    assert age == pytest.approx(ref.age(0).to_value(units.Gyr), rel=1e-6)


def test_normalized_expansion_rate_and_deceleration_datasets(lcdm_run):
    # E = H/H0 is 1 today exactly (the grid has a node at N = 0); q = eps - 1 (definition).
    h, ds, ref, units = lcdm_run
    assert ds["hubble_normalized"][today_index(h)] == 1.0
    np.testing.assert_array_equal(ds["deceleration"], ds["epsilon"] - 1.0)
    # Source: astropy FlatLambdaCDM q(z) = Omega_m(z)/2 + Omega_r(z) - Omega_Lambda(z) today;
    # for Planck-like parameters q0 ~ -0.53 (from memory), here to 1e-6 of astropy's value.
    z0 = 0.0
    q0 = 0.5 * ref.Om(z0) + ref.Ogamma(z0) + ref.Onu(z0) - ref.Ode(z0)
    assert ds["deceleration"][today_index(h)] == pytest.approx(q0, rel=1e-6)
