"""Thermodynamics of the Standard-Model plasma: rho(T), s(T), g_*(T), g_*s(T).

The radiation component is described by its comoving entropy S = s a^3. Between
sources (reheating) S is conserved, so s(N) = S e^{-3N} and rho_r(N) = rho(s(N)).
This module builds, once per parameter set and in numpy, the table
ln rho(ln s) and ln T(ln s) that the JAX background evaluates.

Model (a documented approximation, see docs/physics.md):
- every Standard-Model species is an ideal Bose or Fermi gas with its zero-temperature
  mass (PDG 2022 values), exact Fermi/Bose integrals, zero chemical potential;
- the QCD crossover is a smooth switch, in ln T, between an ideal quark-gluon gas and an
  ideal gas of the light hadrons (pi, K, eta, rho, omega, nucleons), at T_c = 155 MeV
  (lattice pseudo-critical temperature ~156 MeV, HotQCD 2019, PLB 795, 15) with width
  0.35 in ln T; the pressure is switched and rho, s follow from it thermodynamically
  (s = dp/dT, rho = T s - p), so the switch conserves energy;
- neutrinos are N_eff species (2 N_eff helicity states) whose temperature follows the
  entropy of the photon-electron plasma, T_nu = T (g_{gamma e}(T) / (11/2))^(1/3):
  T_nu = T while e+- are relativistic and T_nu -> (4/11)^(1/3) T after annihilation
  (instantaneous decoupling while e+- are relativistic; Kolb & Turner 1990, sec. 3.3).

The pressure used in the dynamics is not taken from the gas formulas but from the
tabulated curve itself, w = d ln rho / d ln s - 1, which makes the radiation fluid
conserve energy exactly (to rounding) for the interpolant that is actually used. It
equals the physical pressure to the interpolation accuracy (~1e-9).
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicSpline

from .. import constants as C

# (name, degrees of freedom, mass in GeV, fermion?) -- masses PDG 2022 (Workman et al.,
# PTEP 2022, 083C01); quark masses MS-bar (light quarks at 2 GeV), top pole mass.
_LEPTONS_AND_BOSONS = (
    ("electron", 4, 0.51099895e-3, True),
    ("muon", 4, 0.1056583755, True),
    ("tau", 4, 1.77686, True),
    ("W", 6, 80.377, False),
    ("Z", 3, 91.1876, False),
    ("higgs", 1, 125.25, False),
)
_QUARK_GLUON = (
    ("up", 12, 2.16e-3, True),
    ("down", 12, 4.67e-3, True),
    ("strange", 12, 93.4e-3, True),
    ("charm", 12, 1.27, True),
    ("bottom", 12, 4.18, True),
    ("top", 12, 172.69, True),
    ("gluon", 16, 0.0, False),
)
_HADRONS = (
    ("pi+-", 2, 0.13957039, False),
    ("pi0", 1, 0.1349768, False),
    ("K+-", 2, 0.493677, False),
    ("K0", 2, 0.497611, False),
    ("eta", 1, 0.547862, False),
    ("rho", 9, 0.77526, False),
    ("omega", 3, 0.78266, False),
    ("nucleons", 8, 0.93827, True),
)
_ELECTRON_MASS_GEV = _LEPTONS_AND_BOSONS[0][2]
_QCD_T_GEV = 0.155
_QCD_WIDTH_LN_T = 0.35

# Table range: below and above it the plasma is a fixed set of massless species, so
# rho is exactly proportional to s^(4/3) there and the table extends linearly in logs.
_LN_T_MIN = math.log(1e-16)
_LN_T_MAX = math.log(1e19)
_TABLE_STEP = 0.01  # in ln T; the uniform ln s grid uses 3x this

_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(200)


def _gas_quadrature(mu: np.ndarray, fermion: bool) -> tuple[np.ndarray, np.ndarray]:
    """Ideal-gas p/T^4 and rho/T^4 per degree of freedom at m/T = mu, by quadrature.

    p/T^4 = 1/(6 pi^2) int_0^inf y^4/eps f(eps) dy, rho/T^4 = 1/(2 pi^2) int y^2 eps f dy,
    eps = sqrt(y^2 + mu^2), f = 1/(e^eps -+ 1). Gauss-Legendre on two panels of [0, Y],
    e^-eps = e^-80 at Y; relative accuracy ~1e-14 (the tests check the massless limits).
    """
    m = np.asarray(mu, dtype=float)[:, None]
    top = np.sqrt((m + 80.0) ** 2 - m**2)
    p_sum = np.zeros(m.shape[0])
    r_sum = np.zeros(m.shape[0])
    for lo_f, hi_f in ((0.0, 0.1), (0.1, 1.0)):
        lo, hi = lo_f * top, hi_f * top
        y = 0.5 * (hi - lo) * _GL_NODES[None, :] + 0.5 * (hi + lo)
        w = 0.5 * (hi - lo) * _GL_WEIGHTS[None, :]
        eps = np.sqrt(y**2 + m**2)
        # Written with e^-eps so nothing overflows at large mass.
        f = np.exp(-eps) / (1.0 + np.exp(-eps)) if fermion else np.exp(-eps) / -np.expm1(-eps)
        p_sum += np.sum(w * y**4 / eps * f, axis=1)
        r_sum += np.sum(w * y**2 * eps * f, axis=1)
    return p_sum / (6.0 * math.pi**2), r_sum / (2.0 * math.pi**2)


_LN_MU_MIN, _LN_MU_MAX, _N_MU = math.log(1e-5), math.log(700.0), 3000


@functools.lru_cache(maxsize=2)
def _gas_splines(fermion: bool):
    """Splines of ln(p/T^4) and ln(rho/T^4) in ln(m/T) (exact quadrature at the nodes)."""
    lnmu = np.linspace(_LN_MU_MIN, _LN_MU_MAX, _N_MU)
    p, r = _gas_quadrature(np.exp(lnmu), fermion)
    return CubicSpline(lnmu, np.log(p)), CubicSpline(lnmu, np.log(r))


def _gas_integrals(mu: np.ndarray, fermion: bool) -> tuple[np.ndarray, np.ndarray]:
    """p/T^4 and rho/T^4 per degree of freedom at m/T = mu (spline of the quadrature).

    Below mu = 1e-5 the massless values are used (corrections ~ mu^2 < 1e-10); above
    mu = 700 the gas is absent (e^-700). Spline error < 1e-9 relative (tests).
    """
    mu = np.asarray(mu, dtype=float)
    sp, sr = _gas_splines(fermion)
    lnmu = np.log(np.clip(mu, np.exp(_LN_MU_MIN), np.exp(_LN_MU_MAX)))
    p = np.exp(sp(lnmu))
    r = np.exp(sr(lnmu))
    dead = mu >= np.exp(_LN_MU_MAX)
    p[dead] = 0.0
    r[dead] = 0.0
    return p, r


def _species_sum(species, temperature: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sum of p/T^4 and rho/T^4 over a species list at photon temperature T (GeV)."""
    p = np.zeros_like(temperature)
    r = np.zeros_like(temperature)
    for _, dof, mass, fermion in species:
        pi_, ri_ = _gas_integrals(mass / temperature, fermion)
        p += dof * pi_
        r += dof * ri_
    return p, r


def _plasma(temperature: np.ndarray, n_eff: float) -> tuple[np.ndarray, np.ndarray]:
    """Total rho and s (GeV^4, GeV^3) of the plasma at photon temperature T (GeV)."""
    T = temperature
    # photons
    p_g = np.full_like(T, 2.0 * math.pi**2 / 90.0)
    # leptons and electroweak bosons
    p_l, r_l = _species_sum(_LEPTONS_AND_BOSONS, T)
    # QCD sector: p switched, s = dp/dT includes the switch derivative.
    p_q, r_q = _species_sum(_QUARK_GLUON, T)
    p_h, r_h = _species_sum(_HADRONS, T)
    x = np.log(T / _QCD_T_GEV) / _QCD_WIDTH_LN_T
    sw = 0.5 * (1.0 + np.tanh(x))
    dsw_dlnT = 0.5 / _QCD_WIDTH_LN_T / np.cosh(np.clip(x, -300, 300)) ** 2
    # per T^4: p = (1-sw) p_h + sw p_q ; s T / T^4 = (rho + p)/T^4 + dsw/dlnT (p_q - p_h)
    p_qcd = (1.0 - sw) * p_h + sw * p_q
    sT_qcd = (1.0 - sw) * (r_h + p_h) + sw * (r_q + p_q) + dsw_dlnT * (p_q - p_h)
    r_qcd = sT_qcd - p_qcd
    # electrons + photons define the neutrino temperature
    p_e, r_e = _gas_integrals(_ELECTRON_MASS_GEV / T, True)
    g_ge = (2.0 * math.pi**2 / 90.0 * 4.0 + 4.0 * (r_e + p_e)) / (2.0 * math.pi**2 / 45.0)
    tnu_over_t = np.minimum(1.0, (g_ge / 5.5) ** (1.0 / 3.0))
    nu_dof = 2.0 * n_eff * 7.0 / 8.0
    r_nu = nu_dof * math.pi**2 / 30.0 * tnu_over_t**4
    s_nu = nu_dof * 2.0 * math.pi**2 / 45.0 * tnu_over_t**3
    rho_over_T4 = 3.0 * p_g + r_l + r_qcd + r_nu
    sT_over_T4 = 4.0 * p_g + (r_l + p_l) + sT_qcd + s_nu
    return rho_over_T4 * T**4, sT_over_T4 * T**3


@dataclass(frozen=True)
class ThermalTable:
    """Radiation equation of state as cubic splines on a uniform grid of ln s.

    All quantities in reduced Planck units (M_p = 1): ln s with s in M_p^3, ln rho with
    rho in M_p^4, ln T with T in M_p. ``lnrho`` and ``dlnrho`` are node values and slopes
    of a C^2 cubic spline, ``lnT``/``dlnT`` likewise, on nodes ``lns0 + i * step``. Beyond
    the ends the curves continue linearly (massless species: rho ~ s^(4/3)).
    """

    lns0: float
    step: float
    lnrho: np.ndarray
    dlnrho: np.ndarray
    lnT: np.ndarray
    dlnT: np.ndarray
    n_eff: float

    def g_star(self, temperature_gev: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """g_*(T) and g_*s(T) from the exact gas formulas (numpy; for reports and tests)."""
        T = np.asarray(temperature_gev, dtype=float)
        rho, s = _plasma(np.atleast_1d(T), self.n_eff)
        Ta = np.atleast_1d(T)
        return rho / (math.pi**2 / 30.0 * Ta**4), s / (2.0 * math.pi**2 / 45.0 * Ta**3)

    def entropy_density_at(self, temperature_gev: float) -> float:
        """ln s (M_p^3) at photon temperature T (GeV), from the exact gas formulas."""
        _, s = _plasma(np.array([temperature_gev]), self.n_eff)
        return float(np.log(s[0]) - 3.0 * math.log(C.REDUCED_PLANCK_MASS_GEV))

    def density_at_temperature(self, temperature_gev: float) -> float:
        """rho (M_p^4) at photon temperature T (GeV), from the exact gas formulas."""
        rho, _ = _plasma(np.array([temperature_gev]), self.n_eff)
        return float(rho[0] / C.REDUCED_PLANCK_MASS_GEV**4)


@functools.lru_cache(maxsize=8)
def thermal_table(n_eff: float = C.N_EFF) -> ThermalTable:
    """Build (and cache) the radiation table for a given N_eff. Takes ~0.5 s."""
    lnT = np.arange(_LN_T_MIN, _LN_T_MAX + 0.5 * _TABLE_STEP, _TABLE_STEP)
    _, s = _plasma(np.exp(lnT), n_eff)
    ln_mp = math.log(C.REDUCED_PLANCK_MASS_GEV)
    lns = np.log(s) - 3.0 * ln_mp
    if not np.all(np.diff(lns) > 0):
        raise RuntimeError("thermal table: entropy density is not increasing with T")
    # Resample on a uniform ln s grid (the JAX evaluator needs uniform nodes).
    T_of_s = CubicSpline(lns, lnT - ln_mp)
    n = int(round((lns[-1] - lns[0]) / (3.0 * _TABLE_STEP)))
    grid = np.linspace(lns[0], lns[-1], n + 1)
    step = float(grid[1] - grid[0])
    # Refine: exact ln rho and ln T at the uniform nodes (Newton on ln s(ln T)).
    t_nodes = T_of_s(grid) + ln_mp
    dlnT_dlns = T_of_s(grid, 1)
    for _ in range(3):
        _, s_n = _plasma(np.exp(t_nodes), n_eff)
        t_nodes = t_nodes - (np.log(s_n) - 3.0 * ln_mp - grid) * dlnT_dlns
    r_n, _ = _plasma(np.exp(t_nodes), n_eff)
    spl_rho = CubicSpline(grid, np.log(r_n) - 4.0 * ln_mp)
    spl_T = CubicSpline(grid, t_nodes - ln_mp)
    return ThermalTable(
        lns0=float(grid[0]),
        step=step,
        lnrho=spl_rho(grid),
        dlnrho=spl_rho(grid, 1),
        lnT=spl_T(grid),
        dlnT=spl_T(grid, 1),
        n_eff=float(n_eff),
    )
