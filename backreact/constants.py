"""Physical constants and unit conversions.

Everything inside backreact is in reduced Planck units, M_p = (8 pi G)^(-1/2) = 1,
with hbar = c = k_B = 1.  Physical units appear only at the edges (config and
output); this module holds every conversion factor, each with its source.
"""

from __future__ import annotations

import math

# --- exact SI definitions (SI 2019 redefinition, CODATA 2018/2022) ---------------
SPEED_OF_LIGHT_M_S = 299_792_458.0  # exact (SI)
ELEMENTARY_CHARGE_C = 1.602_176_634e-19  # exact (SI): 1 eV in J
PLANCK_CONSTANT_J_S = 6.626_070_15e-34  # exact (SI)
BOLTZMANN_J_K = 1.380_649e-23  # exact (SI)
HBAR_J_S = PLANCK_CONSTANT_J_S / (2.0 * math.pi)

# --- measured ------------------------------------------------------------------
NEWTON_G_SI = 6.674_30e-11  # m^3 kg^-1 s^-2, CODATA 2022 recommended value

# --- derived natural-unit conversions --------------------------------------------
GEV_J = ELEMENTARY_CHARGE_C * 1e9
HBAR_GEV_S = HBAR_J_S / GEV_J  # 6.582119569e-25 GeV s (CODATA 2018, exact)
HBAR_C_GEV_M = HBAR_GEV_S * SPEED_OF_LIGHT_M_S  # 1.973269804e-16 GeV m
BOLTZMANN_GEV_K = BOLTZMANN_J_K / GEV_J  # 8.617333262e-14 GeV/K

#: Reduced Planck mass (8 pi G)^(-1/2) in GeV: sqrt(hbar c^5 / (8 pi G)), CODATA 2022 G.
#: = 2.435323e18 GeV.
REDUCED_PLANCK_MASS_GEV = math.sqrt(HBAR_J_S * SPEED_OF_LIGHT_M_S**5 / (8.0 * math.pi * NEWTON_G_SI)) / GEV_J

# --- astronomical lengths and times -----------------------------------------------
ASTRONOMICAL_UNIT_M = 149_597_870_700.0  # exact, IAU 2012 Resolution B2
PARSEC_M = 648_000.0 / math.pi * ASTRONOMICAL_UNIT_M  # exact, IAU 2015 Resolution B2
MPC_M = 1e6 * PARSEC_M  # 3.0856775814913673e22 m
JULIAN_YEAR_S = 365.25 * 86_400.0  # IAU definition of the Julian year
GYR_S = 1e9 * JULIAN_YEAR_S

#: 100 km/s/Mpc expressed as an energy (hbar H): 2.133120e-42 GeV.
H100_GEV = HBAR_GEV_S * 1e5 / MPC_M
#: 1 Mpc^-1 as an energy (hbar c / Mpc), for comoving wavenumbers: 6.39493e-39 GeV.
INV_MPC_GEV = HBAR_C_GEV_M / MPC_M
#: 1 GeV^-1 in seconds and in Mpc.
INV_GEV_S = HBAR_GEV_S
INV_GEV_MPC = HBAR_C_GEV_M / MPC_M
#: Speed of light in km/s (distance conversions c/H).
SPEED_OF_LIGHT_KM_S = SPEED_OF_LIGHT_M_S / 1e3

# --- thermal history ----------------------------------------------------------------
#: CMB temperature today, Fixsen 2009, ApJ 707, 916.
T_CMB_K = 2.7255
#: Effective number of neutrino species, Bennett et al. 2021, JCAP 04, 073.
N_EFF = 3.044
#: rho_nu / rho_gamma per neutrino species after e+e- annihilation, (7/8)(4/11)^(4/3)
#: (instantaneous decoupling; standard result, e.g. Kolb & Turner 1990, sec. 3.3).
NEUTRINO_PER_SPECIES = 7.0 / 8.0 * (4.0 / 11.0) ** (4.0 / 3.0)
#: Photon density parameter per h^2 at T = 2.7255 K from a_B T^4 (Stefan-Boltzmann,
#: pi^2/15 T^4 in natural units) and the constants above: 2.47298e-5.
OMEGA_GAMMA_H2_FIDUCIAL = (
    (math.pi**2 / 15.0) * (T_CMB_K * BOLTZMANN_GEV_K) ** 4 / (3.0 * H100_GEV**2 * REDUCED_PLANCK_MASS_GEV**2)
)

# --- inflation observables ----------------------------------------------------------------
#: Pivot scale of the primordial spectra, 0.05 Mpc^-1 (Planck 2018 X convention).
PIVOT_K_MPC = 0.05
#: Amplitude of scalar perturbations at the pivot, Planck 2018 VI (A&A 641, A6), Table 2,
#: TT,TE,EE+lowE+lensing+BAO: 10^9 A_s = 2.105.
PLANCK_AS = 2.105e-9
#: Planck 2018 VI Table 2 (same column): scalar spectral index.
PLANCK_NS = 0.9665
#: Upper bound on the tensor-to-scalar ratio at 0.05 Mpc^-1 (95% CL), BICEP/Keck 2021,
#: PRL 127, 151301: r < 0.036.
R_UPPER_BOUND = 0.036

# --- bounds used in validation -----------------------------------------------------------
#: Lowest reheating temperature allowed by nucleosynthesis, ~4 MeV (from memory:
#: Hannestad 2004, PRD 70, 043506; de Salas et al. 2015 give 4.7 MeV).
T_REHEAT_MIN_GEV = 4e-3

# --- Planck 2018 base LambdaCDM (A&A 641, A6, Table 2, TT,TE,EE+lowE+lensing+BAO) ----------
PLANCK18_H0 = 67.66
PLANCK18_OMEGA_B = 0.02242
PLANCK18_OMEGA_C = 0.11933


def hubble_gev_to_km_s_mpc(h_gev):
    """Convert H from GeV (hbar H) to km/s/Mpc."""
    return h_gev / H100_GEV * 100.0


def hubble_km_s_mpc_to_gev(h_kms):
    """Convert H from km/s/Mpc to GeV (hbar H)."""
    return h_kms / 100.0 * H100_GEV
