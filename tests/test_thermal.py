"""The Standard-Model plasma table (backreact/background/thermal.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from backreact import constants as C
from backreact.background.thermal import _gas_integrals, _gas_quadrature, _plasma, thermal_table


def test_massless_gas_integrals_are_the_stefan_boltzmann_values():
    # rho/T^4 = (pi^2/30) per bosonic and (7/8)(pi^2/30) per fermionic degree of freedom,
    # p = rho/3 (Kolb & Turner 1990, eq. 3.52). Quadrature relative accuracy 1e-12.
    for fermion, factor in ((False, 1.0), (True, 7.0 / 8.0)):
        p, r = _gas_quadrature(np.array([1e-9]), fermion)
        assert abs(r[0] / (factor * math.pi**2 / 30) - 1) < 1e-12
        assert abs(p[0] / (r[0] / 3) - 1) < 1e-12


def test_gas_spline_matches_quadrature():
    # The species sums use a spline of the quadrature in ln(m/T); 1e-8 relative is far
    # below anything the history resolves.
    mu = np.exp(np.linspace(-10, 6, 301))
    for fermion in (False, True):
        p0, r0 = _gas_quadrature(mu, fermion)
        p1, r1 = _gas_integrals(mu, fermion)
        np.testing.assert_allclose(p1, p0, rtol=1e-8)
        np.testing.assert_allclose(r1, r0, rtol=1e-8)


def test_g_star_limits():
    tab = thermal_table()
    g, gs = tab.g_star(np.array([1e6, 5e-3, 1e-9]))
    # Above the top mass: the Standard-Model count 106.75 (common practice: 28 bosonic +
    # (7/8) 90 fermionic states), plus (7/4) x 0.044 for N_eff = 3.044 neutrino species.
    np.testing.assert_allclose(g[0], 106.75 + 1.75 * (C.N_EFF - 3), rtol=1e-6)
    # At 5 MeV: photons, e+-, neutrinos: 2 + 7/2 + (7/4) N_eff = 10.827; the muon tail
    # (e^-21) and the electron mass correction ((m_e/T)^2 ~ 1e-2 of the e+- part, i.e.
    # ~0.05 in g*) set the tolerance 0.1.
    assert abs(g[1] - (5.5 + 1.75 * C.N_EFF)) < 0.1
    # After e+e- annihilation: g* = 2 (1 + (7/8)(4/11)^(4/3) N_eff), g*s = 2 + (7/4)(4/11) N_eff
    # (instantaneous decoupling; Kolb & Turner 1990 sec. 3.3). Exact in this model: 1e-9.
    np.testing.assert_allclose(g[2], 2 * (1 + C.NEUTRINO_PER_SPECIES * C.N_EFF), rtol=1e-9)
    np.testing.assert_allclose(gs[2], 2 + 1.75 * (4 / 11) * C.N_EFF, rtol=1e-9)


def test_radiation_today_equals_photons_plus_massless_neutrinos():
    # rho_r(T_CMB) / rho_crit,100 = Omega_gamma h^2 (1 + 0.2271073 N_eff), with
    # Omega_gamma h^2 = 2.4730e-5 (DESIGN reference numbers; a_B T^4 with CODATA constants).
    tab = thermal_table()
    t0 = C.T_CMB_K * C.BOLTZMANN_GEV_K
    rho = tab.density_at_temperature(t0)
    crit = 3 * (C.H100_GEV / C.REDUCED_PLANCK_MASS_GEV) ** 2
    omega_r = rho / crit
    assert abs(omega_r / (2.4730e-5 * (1 + 0.2271073 * C.N_EFF)) - 1) < 2e-5  # 5 digits quoted


def test_entropy_is_increasing_so_temperature_is_well_defined():
    tab = thermal_table()
    assert np.all(np.diff(tab.lnrho) > 0)
    # 1 + w = d ln rho / d ln s lies between 1.2 (QCD-crossover softening) and 4/3.
    assert tab.dlnrho.min() > 1.15 and tab.dlnrho.max() < 4 / 3 + 1e-9


@pytest.mark.parametrize("temperature", [1e3, 10.0, 0.3, 0.155, 0.05, 2e-3, 1e-4])
def test_table_pressure_is_the_thermodynamic_pressure(temperature):
    # The dynamics uses w = d ln rho/d ln s - 1 of the interpolated table. (a) Along an
    # adiabat of the exact gas model the same derivative, by a finite difference of step
    # 1e-4 in ln T, must agree to 5e-6 (spline derivative error at step 0.03 in ln s plus
    # the difference's O(step^2)). (b) Where the neutrinos share the plasma temperature
    # (T >> m_e: T_nu/T - 1 ~ (m_e/T)^2/30 < 1e-8 above 10 GeV), thermodynamics gives
    # p = T s - rho, so 1 + w = T s/rho: 1e-6.
    tab = thermal_table()
    ln_mp = math.log(C.REDUCED_PLANCK_MASS_GEV)
    rho, s = _plasma(np.array([temperature]), tab.n_eff)
    lns = math.log(s[0]) - 3 * ln_mp
    u = (lns - tab.lns0) / tab.step
    i = int(u)
    t = u - i
    h = tab.step
    # slope of the cubic Hermite at t
    d00, d10, d01, d11 = 6 * t * t - 6 * t, 3 * t * t - 4 * t + 1, -6 * t * t + 6 * t, 3 * t * t - 2 * t
    slope = (d00 * tab.lnrho[i] + d01 * tab.lnrho[i + 1]) / h + d10 * tab.dlnrho[i] + d11 * tab.dlnrho[i + 1]
    eps = 1e-4
    r_plus, s_plus = _plasma(np.array([temperature * (1 + eps)]), tab.n_eff)
    r_minus, s_minus = _plasma(np.array([temperature * (1 - eps)]), tab.n_eff)
    exact = (math.log(r_plus[0]) - math.log(r_minus[0])) / (math.log(s_plus[0]) - math.log(s_minus[0]))
    assert abs(slope - exact) < 5e-6
    if temperature >= 10.0:
        assert abs(slope - temperature * s[0] / rho[0]) < 1e-6
