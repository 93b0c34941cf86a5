"""Built-in flat LambdaCDM reference cosmology (numpy + scipy only, no JAX).

The radiation content matches the project's thermal history after e+e- annihilation:
photons at ``cmb_temperature_K`` plus ``n_eff`` massless neutrino species,

    omega_r = OMEGA_GAMMA_H2_FIDUCIAL * (T / T_CMB_K)^4 * (1 + NEUTRINO_PER_SPECIES * n_eff),

scaling exactly as a^-4.  This is valid for z << 1e8 (below the e+e- annihilation era);
the formulas are evaluated for any finite z > -1, but they only describe the real
Universe in that range.

Expansion rate, with u = ln(1 + z) = -ln a:

    E(z)^2 = Omega_r (1+z)^4 + Omega_m (1+z)^3 + Omega_lambda.

Integrals
---------
All line-of-sight and time integrals are written in u, where the integrands
(1+z)/E and 1/E are smooth, exponentially tame functions whose nearest complex
singularities (zeros of E^2) sit at |Im u| ~ pi/3 (pi/4 for radiation + Lambda only).  They are
evaluated per point with composite 16-node Gauss-Legendre quadrature on a fixed grid of
panels of width 0.25 in u anchored at the lower limit: the full panels are summed
cumulatively and the last, partial panel [grid node, u] gets its own 16-node rule, so
every redshift receives a genuine composite Gauss-Legendre estimate (no interpolation).
For such an analytic integrand the 16-node rule on a panel of width 0.25 has an error
far below double-precision round-off; the test suite checks this against
``scipy.integrate.quad`` at 1e-11 relative.

The age integral t(a) = int_0^a da' / (a' H(a')) is split at a_lo = 1e-6: below a_lo the
Lambda term (relative size Omega_lambda a^4 / Omega_r <= 1e-20) is dropped and the
radiation + matter integral is done in closed form,

    H0 t(a) = (2/3) a^2 (s + 2 r) / (s + r)^2,   r = sqrt(Omega_r), s = sqrt(Omega_r + Omega_m a),

a round-off-stable rewriting of (2 / (3 Omega_m^2)) [s^3 - 3 r^2 s + 2 r^3]; above a_lo the
Gauss-Legendre scheme in u takes over.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from backreact.constants import (
    GYR_S,
    H100_GEV,
    HBAR_GEV_S,
    N_EFF,
    NEUTRINO_PER_SPECIES,
    OMEGA_GAMMA_H2_FIDUCIAL,
    PLANCK18_H0,
    PLANCK18_OMEGA_B,
    PLANCK18_OMEGA_C,
    SPEED_OF_LIGHT_KM_S,
    T_CMB_K,
)

__all__ = ["FlatLCDM"]

# --- quadrature machinery ------------------------------------------------------------------

#: Gauss-Legendre nodes/weights on [-1, 1].
_GL_ORDER = 16
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(_GL_ORDER)
#: Panel width in u = ln(1+z).
_PANEL_WIDTH = 0.25
#: Scale factor below which the age integral is done in closed form (Lambda dropped).
_A_TAIL = 1e-6
_U_TAIL = -math.log(_A_TAIL)
#: Round-off slack accepted in Omega_lambda = 1 - Omega_m - Omega_r (see FlatLCDM).
_OMEGA_LAMBDA_SLACK = 1e-13


def _gl_panels(f, left, width):
    """Gauss-Legendre estimate of int_left^{left+width} f, vectorized over panels."""
    left = np.asarray(left, dtype=float)[..., None]
    width = np.asarray(width, dtype=float)[..., None]
    x = left + 0.5 * width * (_GL_NODES + 1.0)
    return 0.5 * width[..., 0] * np.sum(_GL_WEIGHTS * f(x), axis=-1)


def _composite_integral(f, x0, x, h=_PANEL_WIDTH):
    """int_{x0}^{x} f(t) dt for every entry of the 1-d array ``x`` (either side of x0).

    Uses the fixed panel grid x0 + j h; the full panels between x0 and the grid node
    below x are summed (separately on each side of x0, so that neither side's round-off
    leaks into the other), then the partial panel up to x is added.
    """
    x = np.asarray(x, dtype=float)
    if x.size == 0:
        return np.zeros_like(x)
    k = np.floor((x - x0) / h).astype(np.int64)
    result = np.zeros_like(x)

    kmax = int(k.max())
    if kmax > 0:  # nodes above x0: cum_pos[j] = int_{x0}^{x0 + j h}
        panels = _gl_panels(f, x0 + h * np.arange(kmax), h)
        cum_pos = np.concatenate([[0.0], np.cumsum(panels)])
        pos = k > 0
        result[pos] = cum_pos[k[pos]]
    kmin = int(k.min())
    if kmin < 0:  # nodes below x0: cum_neg[m] = int_{x0 - m h}^{x0}
        panels = _gl_panels(f, x0 - h * np.arange(1, -kmin + 1), h)
        cum_neg = np.concatenate([[0.0], np.cumsum(panels)])
        neg = k < 0
        result[neg] = -cum_neg[-k[neg]]

    node = x0 + h * k
    return result + _gl_panels(f, node, x - node)


def _e2_of_u(u, omega_r, omega_m, omega_lambda):
    """E^2 as a function of u = ln(1+z)."""
    return omega_r * np.exp(4.0 * u) + omega_m * np.exp(3.0 * u) + omega_lambda


def _comoving_integral(u, omega_r, omega_m, omega_lambda):
    """int_0^z dz'/E(z') = int_0^u e^u'/E(u') du', dimensionless (units of c/H0)."""

    def integrand(t):
        return np.exp(t) / np.sqrt(_e2_of_u(t, omega_r, omega_m, omega_lambda))

    return _composite_integral(integrand, 0.0, u)


def _lookback_integral(u, omega_r, omega_m, omega_lambda):
    """int_0^z dz'/((1+z')E(z')) = int_0^u du'/E(u'), dimensionless (units of 1/H0)."""

    def integrand(t):
        return 1.0 / np.sqrt(_e2_of_u(t, omega_r, omega_m, omega_lambda))

    return _composite_integral(integrand, 0.0, u)


def _age_tail(a, omega_r, omega_m):
    """H0 t(a) for radiation + matter only, closed form (see module docstring)."""
    r = math.sqrt(omega_r)
    s = np.sqrt(omega_r + omega_m * a)
    return (2.0 / 3.0) * a**2 * (s + 2.0 * r) / (s + r) ** 2


def _age_integral(u, omega_r, omega_m, omega_lambda):
    """int_z^inf dz'/((1+z')E(z')) = H0 t(a = e^-u), dimensionless (units of 1/H0).

    Requires omega_r > 0 or omega_m > 0 (the integral diverges otherwise).
    """
    u = np.asarray(u, dtype=float)
    result = np.empty_like(u)
    early = u >= _U_TAIL
    result[early] = _age_tail(np.exp(-u[early]), omega_r, omega_m)
    late = ~early
    if np.any(late):

        def integrand(t):
            return 1.0 / np.sqrt(_e2_of_u(t, omega_r, omega_m, omega_lambda))

        tail = float(_age_tail(_A_TAIL, omega_r, omega_m))
        result[late] = tail - _composite_integral(integrand, _U_TAIL, u[late])
    return result


def _redshift_array(z):
    """Validate z (finite, > -1); return (flat float array, original shape)."""
    arr = np.asarray(z, dtype=float)
    if not np.all(np.isfinite(arr)):
        raise ValueError("z must be finite (allowed range: -1 < z < inf)")
    if np.any(arr <= -1.0):
        raise ValueError(f"z must be > -1 (allowed range: -1 < z < inf); got min(z) = {arr.min()}")
    return arr.ravel(), arr.shape


def _shaped(values, shape):
    """Reshape a flat result to the input's shape; 0-d inputs give a Python float."""
    out = np.asarray(values, dtype=float).reshape(shape)
    return float(out) if out.ndim == 0 else out


# --- the reference model ----------------------------------------------------------------------


@dataclass(frozen=True)
class FlatLCDM:
    """Spatially flat LambdaCDM with photons plus massless neutrinos.

    Parameters
    ----------
    H0_km_s_Mpc:
        Hubble constant today in km/s/Mpc (> 0).
    omega_b, omega_c:
        Physical baryon and cold-dark-matter densities Omega_i h^2 (>= 0).
    cmb_temperature_K:
        CMB temperature today in K (> 0); default ``T_CMB_K`` = 2.7255 K.
    n_eff:
        Effective number of massless neutrino species (>= 0); default ``N_EFF`` = 3.044.

    Omega_lambda is fixed by flatness, 1 - Omega_m - Omega_r, and must be >= 0.  A
    negative value down to -1e-13 (round-off, e.g. ``from_physical`` with
    omega_lambda = 0) is accepted and clipped to zero.
    """

    H0_km_s_Mpc: float
    omega_b: float
    omega_c: float
    cmb_temperature_K: float = T_CMB_K
    n_eff: float = N_EFF

    def __post_init__(self):
        object.__setattr__(self, "H0_km_s_Mpc", _checked("H0_km_s_Mpc", self.H0_km_s_Mpc, strict=True))
        object.__setattr__(self, "omega_b", _checked("omega_b", self.omega_b))
        object.__setattr__(self, "omega_c", _checked("omega_c", self.omega_c))
        object.__setattr__(
            self, "cmb_temperature_K", _checked("cmb_temperature_K", self.cmb_temperature_K, strict=True)
        )
        object.__setattr__(self, "n_eff", _checked("n_eff", self.n_eff))
        omega_lambda_raw = 1.0 - self.Omega_m - self.Omega_r
        if omega_lambda_raw < -_OMEGA_LAMBDA_SLACK:
            raise ValueError(
                "Omega_lambda = 1 - Omega_m - Omega_r must be >= 0 (allowed range: 0 <= Omega_lambda <= 1); "
                f"got {omega_lambda_raw} (Omega_m = {self.Omega_m}, Omega_r = {self.Omega_r}); "
                "lower omega_b/omega_c or raise H0_km_s_Mpc"
            )

    # --- constructors ----------------------------------------------------------------------

    @classmethod
    def from_physical(
        cls,
        omega_b: float,
        omega_c: float,
        omega_lambda: float,
        cmb_temperature_K: float = T_CMB_K,
        n_eff: float = N_EFF,
    ) -> FlatLCDM:
        """Build from physical densities; h^2 = omega_b + omega_c + omega_r + omega_lambda."""
        omega_b = _checked("omega_b", omega_b)
        omega_c = _checked("omega_c", omega_c)
        omega_lambda = _checked("omega_lambda", omega_lambda)
        cmb_temperature_K = _checked("cmb_temperature_K", cmb_temperature_K, strict=True)
        n_eff = _checked("n_eff", n_eff)
        h2 = omega_b + omega_c + _physical_radiation(cmb_temperature_K, n_eff) + omega_lambda
        return cls(100.0 * math.sqrt(h2), omega_b, omega_c, cmb_temperature_K, n_eff)

    @classmethod
    def planck2018(cls) -> FlatLCDM:
        """Planck 2018 base LambdaCDM best fit, with massless neutrinos.

        H0 = 67.66 km/s/Mpc, omega_b = 0.02242, omega_c = 0.11933: Planck Collaboration,
        Aghanim N. et al. 2020, "Planck 2018 results. VI. Cosmological parameters",
        A&A 641, A6, Table 2, column TT,TE,EE+lowE+lensing+BAO.  (Planck's own chain has one
        massive neutrino of 0.06 eV; here all N_eff species are massless, as in the
        project's thermal history, so Omega_lambda differs from the paper's in the 4th digit.)
        """
        return cls(PLANCK18_H0, PLANCK18_OMEGA_B, PLANCK18_OMEGA_C, T_CMB_K, N_EFF)

    # --- parameters ------------------------------------------------------------------------

    @property
    def h(self) -> float:
        """Dimensionless Hubble constant H0 / (100 km/s/Mpc)."""
        return self.H0_km_s_Mpc / 100.0

    @property
    def omega_gamma(self) -> float:
        """Physical photon density Omega_gamma h^2."""
        return OMEGA_GAMMA_H2_FIDUCIAL * (self.cmb_temperature_K / T_CMB_K) ** 4

    @property
    def omega_nu(self) -> float:
        """Physical density of the n_eff massless neutrino species, Omega_nu h^2."""
        return self.omega_gamma * NEUTRINO_PER_SPECIES * self.n_eff

    @property
    def omega_r(self) -> float:
        """Physical radiation density Omega_r h^2 (photons + massless neutrinos)."""
        return _physical_radiation(self.cmb_temperature_K, self.n_eff)

    @property
    def omega_m(self) -> float:
        """Physical matter density omega_b + omega_c."""
        return self.omega_b + self.omega_c

    @property
    def omega_lambda(self) -> float:
        """Physical dark-energy density Omega_lambda h^2."""
        return self.Omega_lambda * self.h**2

    @property
    def Omega_gamma(self) -> float:
        """Photon density parameter today."""
        return self.omega_gamma / self.h**2

    @property
    def Omega_nu(self) -> float:
        """Massless-neutrino density parameter today."""
        return self.omega_nu / self.h**2

    @property
    def Omega_r(self) -> float:
        """Radiation density parameter today (photons + neutrinos)."""
        return self.omega_r / self.h**2

    @property
    def Omega_m(self) -> float:
        """Matter density parameter today (baryons + CDM)."""
        return self.omega_m / self.h**2

    @property
    def Omega_lambda(self) -> float:
        """Cosmological-constant density parameter, 1 - Omega_m - Omega_r (flatness)."""
        return max(0.0, 1.0 - self.Omega_m - self.Omega_r)

    @property
    def hubble_time_Gyr(self) -> float:
        """1/H0 in Gyr: hbar / (hbar H0 in GeV), converted from s to Gyr."""
        return HBAR_GEV_S / (self.h * H100_GEV) / GYR_S

    @property
    def hubble_distance0_Mpc(self) -> float:
        """c/H0 in Mpc."""
        return SPEED_OF_LIGHT_KM_S / self.H0_km_s_Mpc

    def _densities(self):
        return self.Omega_r, self.Omega_m, self.Omega_lambda

    # --- expansion rate ----------------------------------------------------------------------

    def E(self, z):
        """H(z)/H0."""
        zz, shape = _redshift_array(z)
        zp1 = 1.0 + zz
        Or, Om, OL = self._densities()
        return _shaped(np.sqrt(Or * zp1**4 + Om * zp1**3 + OL), shape)

    def hubble_km_s_Mpc(self, z):
        """H(z) in km/s/Mpc."""
        return self.H0_km_s_Mpc * self.E(z)

    def hubble_distance_Mpc(self, z=0.0):
        """c / H(z) in Mpc."""
        return self.hubble_distance0_Mpc / self.E(z)

    def density_fractions(self, z) -> dict:
        """Omega_i(z) = rho_i(z) / rho_crit(z) for 'radiation', 'matter', 'lambda' (sum to 1)."""
        zz, shape = _redshift_array(z)
        zp1 = 1.0 + zz
        Or, Om, OL = self._densities()
        rad = Or * zp1**4
        mat = Om * zp1**3
        e2 = rad + mat + OL
        return {
            "radiation": _shaped(rad / e2, shape),
            "matter": _shaped(mat / e2, shape),
            "lambda": _shaped(OL / e2, shape),
        }

    # --- distances -------------------------------------------------------------------------

    def comoving_distance_Mpc(self, z):
        """Line-of-sight comoving distance c/H0 int_0^z dz'/E(z') in Mpc (negative for z < 0)."""
        zz, shape = _redshift_array(z)
        chi = _comoving_integral(np.log1p(zz), *self._densities())
        return _shaped(self.hubble_distance0_Mpc * chi, shape)

    def transverse_comoving_distance_Mpc(self, z):
        """Transverse comoving distance in Mpc; equals the line-of-sight one (flat space)."""
        return self.comoving_distance_Mpc(z)

    def luminosity_distance_Mpc(self, z):
        """Luminosity distance (1+z) D_M in Mpc."""
        zz, shape = _redshift_array(z)
        dm = np.asarray(self.transverse_comoving_distance_Mpc(zz))
        return _shaped((1.0 + zz) * dm, shape)

    def angular_diameter_distance_Mpc(self, z):
        """Angular-diameter distance D_M / (1+z) in Mpc."""
        zz, shape = _redshift_array(z)
        dm = np.asarray(self.transverse_comoving_distance_Mpc(zz))
        return _shaped(dm / (1.0 + zz), shape)

    # --- times -------------------------------------------------------------------------------

    def age_Gyr(self, z=0.0):
        """Cosmic time since a = 0 at redshift z, int_z^inf dz'/((1+z')H(z')), in Gyr."""
        zz, shape = _redshift_array(z)
        t = _age_integral(np.log1p(zz), *self._densities())
        return _shaped(self.hubble_time_Gyr * t, shape)

    def lookback_time_Gyr(self, z):
        """Lookback time int_0^z dz'/((1+z')H(z')) in Gyr (negative for z < 0)."""
        zz, shape = _redshift_array(z)
        t = _lookback_integral(np.log1p(zz), *self._densities())
        return _shaped(self.hubble_time_Gyr * t, shape)


def _checked(name: str, value, strict: bool = False) -> float:
    """Return ``value`` as a float, requiring a finite real number > 0 (strict) or >= 0."""
    bound = "0 < {0} < inf" if strict else "0 <= {0} < inf"
    allowed = f"(allowed range: {bound.format(name)})"
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise ValueError(f"{name} must be a real number {allowed}; got {value!r}")
    value = float(value)
    if not math.isfinite(value) or value < 0.0 or (strict and value == 0.0):
        raise ValueError(f"{name} must be {'> 0' if strict else '>= 0'} {allowed}; got {value}")
    return value


def _physical_radiation(cmb_temperature_K: float, n_eff: float) -> float:
    """omega_r = omega_gamma(T) (1 + NEUTRINO_PER_SPECIES n_eff)."""
    return OMEGA_GAMMA_H2_FIDUCIAL * (cmb_temperature_K / T_CMB_K) ** 4 * (1.0 + NEUTRINO_PER_SPECIES * n_eff)
