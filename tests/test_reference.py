"""Tests of the built-in flat LambdaCDM reference (backreact.reference).

Every numerical check names its source (external code, closed form, independent
quadrature, or internal identity) and its tolerance with the reason for it.
"""

from __future__ import annotations

import dataclasses
import math
import subprocess
import sys
import time

import numpy as np
import pytest
from scipy.integrate import quad

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
from backreact.reference import (
    FlatLCDM,
    _age_integral,
    _comoving_integral,
    _lookback_integral,
)

#: Project requirement for agreement with an external reference code.
ASTROPY_RTOL = 1e-6
#: Accuracy goal of the built-in quadrature against an exact (adaptive, epsrel=1e-13) one.
QUAD_RTOL = 1e-11


def _rel(a, b):
    """Maximum relative deviation |a/b - 1|."""
    return float(np.max(np.abs(np.asarray(a, dtype=float) / np.asarray(b, dtype=float) - 1.0)))


@pytest.fixture(scope="module")
def planck():
    return FlatLCDM.planck2018()


# --- parameters and constructors -------------------------------------------------------------


def test_planck2018_parameters(planck):
    # Source: Planck 2018 VI (A&A 641, A6) Table 2, TT,TE,EE+lowE+lensing+BAO, via constants.py;
    # exact equality because they are copied, not computed.
    assert planck.H0_km_s_Mpc == PLANCK18_H0 == 67.66
    assert planck.omega_b == PLANCK18_OMEGA_B == 0.02242
    assert planck.omega_c == PLANCK18_OMEGA_C == 0.11933
    assert planck.cmb_temperature_K == T_CMB_K
    assert planck.n_eff == N_EFF
    assert planck.h == pytest.approx(0.6766, rel=1e-15)  # definition h = H0/100; round-off only
    # Source: Planck 2018 VI Table 2 quotes Omega_m = 0.3111 +- 0.0056 for this column; our
    # Omega_m = (omega_b + omega_c)/h^2 omits Planck's 0.06 eV neutrino (omega_nu ~ 6.4e-4,
    # i.e. ~0.0014 in Omega_m), so agreement to 0.002 absolute is what is expected.
    assert planck.Omega_m == pytest.approx(0.3111, abs=2e-3)


def test_radiation_content(planck):
    # Source: the defining formula omega_r = omega_gamma (1 + (7/8)(4/11)^(4/3) N_eff) with
    # constants.py values; rel 1e-15 = a few ulps of round-off.
    expected = OMEGA_GAMMA_H2_FIDUCIAL * (1.0 + NEUTRINO_PER_SPECIES * N_EFF)
    assert planck.omega_r == pytest.approx(expected, rel=1e-15)
    assert planck.omega_gamma + planck.omega_nu == pytest.approx(planck.omega_r, rel=1e-15)
    assert planck.Omega_gamma + planck.Omega_nu == pytest.approx(planck.Omega_r, rel=1e-15)
    # Source: standard value omega_gamma = 2.473e-5 at T = 2.7255 K (e.g. Planck 2018 VI
    # sec. 2); 1e-3 relative because the literature value is quoted to 4 digits.
    assert planck.omega_gamma == pytest.approx(2.473e-5, rel=1e-3)
    # T^4 scaling: exact power law in the definition; round-off tolerance.
    hot = FlatLCDM(67.66, 0.02242, 0.11933, cmb_temperature_K=2 * T_CMB_K)
    assert hot.omega_gamma == pytest.approx(16.0 * planck.omega_gamma, rel=1e-15)
    assert FlatLCDM(67.66, 0.02242, 0.11933, n_eff=0.0).omega_nu == 0.0


def test_flatness_sum_is_one(planck):
    # Internal identity: Omega_lambda is defined as 1 - Omega_m - Omega_r; 1e-15 = round-off.
    assert planck.Omega_m + planck.Omega_r + planck.Omega_lambda == pytest.approx(1.0, abs=1e-15)


@pytest.mark.parametrize(
    "omega_b, omega_c, omega_lambda",
    [(0.02242, 0.11933, 0.3177), (0.0, 0.3, 0.2), (0.05, 0.0, 0.0), (0.022, 0.12, 1e-6)],
)
def test_from_physical_round_trip(omega_b, omega_c, omega_lambda):
    model = FlatLCDM.from_physical(omega_b, omega_c, omega_lambda)
    h2 = omega_b + omega_c + model.omega_r + omega_lambda
    # Definition h^2 = sum of physical densities; 1e-15 = round-off of sqrt and squaring.
    assert model.h**2 == pytest.approx(h2, rel=1e-15)
    # Flatness by construction: the density parameters sum to one to round-off (1e-15).
    assert model.Omega_m + model.Omega_r + model.Omega_lambda == pytest.approx(1.0, abs=1e-15)
    # Round trip of the inputs.  omega_b, omega_c are stored unchanged (exact);
    # Omega_lambda h^2 recovers omega_lambda up to the absolute round-off ~ 1e-16 h^2 of
    # 1 - Omega_m - Omega_r, hence abs=1e-15.
    assert model.omega_b == omega_b and model.omega_c == omega_c
    assert model.omega_lambda == pytest.approx(omega_lambda, abs=1e-15)


def test_from_physical_matches_direct_construction(planck):
    # Internal identity: building from (omega_b, omega_c, omega_lambda of Planck) must give the
    # Planck H0 back; rel 1e-14 = round-off through 1 - Omega_m - Omega_r and a square root.
    again = FlatLCDM.from_physical(planck.omega_b, planck.omega_c, planck.omega_lambda)
    assert again.H0_km_s_Mpc == pytest.approx(planck.H0_km_s_Mpc, rel=1e-14)


def test_frozen(planck):
    with pytest.raises(dataclasses.FrozenInstanceError):
        planck.H0_km_s_Mpc = 70.0  # type: ignore[misc]


def test_unit_conversions(planck):
    # Source: the conversions prescribed in the brief, 1/H0 = hbar / (hbar H0 in GeV) and
    # c/H0 = c[km/s] / H0[km/s/Mpc]; rel 1e-15 = round-off.
    expected_t = HBAR_GEV_S / (planck.H0_km_s_Mpc / 100.0 * H100_GEV) / GYR_S
    assert planck.hubble_time_Gyr == pytest.approx(expected_t, rel=1e-15)
    assert planck.hubble_distance0_Mpc == pytest.approx(SPEED_OF_LIGHT_KM_S / 67.66, rel=1e-15)
    # Source: textbook value 1/H0 = 9.7778 h^-1 Gyr (e.g. any cosmology text's unit table);
    # rel 1e-4 because the textbook value is given to 5 digits.
    assert planck.hubble_time_Gyr * planck.h == pytest.approx(9.7778, rel=1e-4)


# --- validation ---------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (
            dict(H0_km_s_Mpc=0.0, omega_b=0.02, omega_c=0.12),
            r"H0_km_s_Mpc must be > 0.*0 < H0_km_s_Mpc < inf",
        ),
        (dict(H0_km_s_Mpc=-70.0, omega_b=0.02, omega_c=0.12), r"H0_km_s_Mpc must be > 0"),
        (dict(H0_km_s_Mpc=math.nan, omega_b=0.02, omega_c=0.12), r"H0_km_s_Mpc must be > 0"),
        (dict(H0_km_s_Mpc=math.inf, omega_b=0.02, omega_c=0.12), r"H0_km_s_Mpc must be > 0"),
        (dict(H0_km_s_Mpc=70.0, omega_b=-0.01, omega_c=0.12), r"omega_b must be >= 0.*0 <= omega_b < inf"),
        (dict(H0_km_s_Mpc=70.0, omega_b=0.02, omega_c=-1e-9), r"omega_c must be >= 0.*0 <= omega_c < inf"),
        (dict(H0_km_s_Mpc=70.0, omega_b=0.02, omega_c="0.12"), r"omega_c must be a real number"),
        (
            dict(H0_km_s_Mpc=70.0, omega_b=0.02, omega_c=0.12, cmb_temperature_K=0.0),
            r"cmb_temperature_K must be > 0.*0 < cmb_temperature_K < inf",
        ),
        (dict(H0_km_s_Mpc=70.0, omega_b=0.02, omega_c=0.12, n_eff=-1.0), r"n_eff must be >= 0.*0 <= n_eff"),
        # Omega_m = 0.6 / 0.49 > 1 forces Omega_lambda < 0.
        (
            dict(H0_km_s_Mpc=70.0, omega_b=0.1, omega_c=0.5),
            r"Omega_lambda = 1 - Omega_m - Omega_r must be >= 0",
        ),
    ],
)
def test_invalid_parameters(kwargs, match):
    with pytest.raises(ValueError, match=match):
        FlatLCDM(**kwargs)


@pytest.mark.parametrize(
    "args, match",
    [
        ((-0.01, 0.12, 0.3), r"omega_b must be >= 0"),
        ((0.02, -0.12, 0.3), r"omega_c must be >= 0"),
        ((0.02, 0.12, -0.3), r"omega_lambda must be >= 0.*0 <= omega_lambda < inf"),
        ((0.02, 0.12, math.nan), r"omega_lambda must be >= 0"),
    ],
)
def test_invalid_physical_parameters(args, match):
    with pytest.raises(ValueError, match=match):
        FlatLCDM.from_physical(*args)


def test_invalid_physical_thermal_parameters():
    with pytest.raises(ValueError, match=r"cmb_temperature_K must be > 0"):
        FlatLCDM.from_physical(0.02, 0.12, 0.3, cmb_temperature_K=-1.0)
    with pytest.raises(ValueError, match=r"n_eff must be >= 0"):
        FlatLCDM.from_physical(0.02, 0.12, 0.3, n_eff=-0.5)


@pytest.mark.parametrize("bad_z", [-1.0, -2.0, [0.5, -1.0], math.nan, math.inf, [1.0, math.nan]])
@pytest.mark.parametrize(
    "method",
    [
        "E",
        "hubble_km_s_Mpc",
        "hubble_distance_Mpc",
        "comoving_distance_Mpc",
        "transverse_comoving_distance_Mpc",
        "luminosity_distance_Mpc",
        "angular_diameter_distance_Mpc",
        "age_Gyr",
        "lookback_time_Gyr",
        "density_fractions",
    ],
)
def test_invalid_redshift(planck, method, bad_z):
    with pytest.raises(ValueError, match=r"z must be"):
        getattr(planck, method)(bad_z)


# --- shapes ----------------------------------------------------------------------------------------


def test_scalar_and_array_shapes(planck):
    z2d = np.array([[0.0, 0.5, 1.0], [2.0, 3.0, 1100.0]])
    for name in (
        "E",
        "hubble_km_s_Mpc",
        "hubble_distance_Mpc",
        "comoving_distance_Mpc",
        "luminosity_distance_Mpc",
        "angular_diameter_distance_Mpc",
        "age_Gyr",
        "lookback_time_Gyr",
    ):
        method = getattr(planck, name)
        assert isinstance(method(0.5), float), name
        out = method(z2d)
        assert isinstance(out, np.ndarray) and out.shape == z2d.shape, name
        # Vectorized and scalar evaluation use the same per-point rule: identical results.
        assert out[1, 2] == method(1100.0), name
        assert method(np.array([])).shape == (0,), name
    fractions = planck.density_fractions(z2d)
    assert set(fractions) == {"radiation", "matter", "lambda"}
    assert all(v.shape == z2d.shape for v in fractions.values())
    assert isinstance(planck.density_fractions(1.0)["matter"], float)


def test_no_jax_import():
    # The reference must stay importable without JAX (numpy + scipy only).
    code = "import sys, backreact.reference; assert 'jax' not in sys.modules, 'jax was imported'"
    subprocess.run([sys.executable, "-c", code], check=True)


# --- comparison with astropy ------------------------------------------------------------------------


@pytest.fixture(scope="module")
def astropy_pair(planck):
    cosmology = pytest.importorskip("astropy.cosmology")
    units = pytest.importorskip("astropy.units")
    # Massless neutrinos, same radiation content as the reference.  (astropy's built-in Planck18
    # object carries a 0.06 eV neutrino and must not be used here.)
    ref = cosmology.FlatLambdaCDM(
        H0=planck.H0_km_s_Mpc,
        Om0=(planck.omega_b + planck.omega_c) / planck.h**2,
        Tcmb0=planck.cmb_temperature_K,
        Neff=planck.n_eff,
        m_nu=0 * units.eV,
        Ob0=planck.omega_b / planck.h**2,
    )
    return planck, ref, units


Z_LOW = np.linspace(0.0, 10.0, 201)
Z_HIGH = np.array([20.0, 100.0, 1100.0, 3400.0, 1e4])


def test_astropy_density_parameters(astropy_pair):
    model, ref, _ = astropy_pair
    # Source: astropy FlatLambdaCDM.  Measured ~4e-13: astropy hard-codes
    # 7/8 (4/11)^(4/3) = 0.22710731766 (11 digits), otherwise the same CODATA/IAU constants.
    # Tolerance 1e-11 covers that truncation with margin.
    assert ref.Ogamma0 + ref.Onu0 == pytest.approx(model.Omega_r, rel=1e-11)
    assert ref.Om0 == pytest.approx(model.Omega_m, rel=1e-15)
    assert ref.Ode0 == pytest.approx(model.Omega_lambda, rel=1e-12)


def test_astropy_expansion_rate(astropy_pair):
    model, ref, units = astropy_pair
    z = np.concatenate([Z_LOW, Z_HIGH])
    # Source: astropy FlatLambdaCDM.efunc.  Tolerance: project requirement 1e-6.
    # Measured ~2e-13 (the Omega_r truncation above, weighted by Omega_r(z) <= 1/4 at z <= 1e4).
    assert _rel(model.E(z), ref.efunc(z)) <= ASTROPY_RTOL
    assert _rel(model.hubble_km_s_Mpc(z), ref.H(z).to_value(units.km / units.s / units.Mpc)) <= ASTROPY_RTOL


def test_astropy_distances(astropy_pair):
    model, ref, units = astropy_pair
    z = Z_LOW[1:]
    # Source: astropy FlatLambdaCDM distances (scipy.quad, epsrel ~1.5e-8).  Tolerance: project
    # requirement 1e-6.  Measured ~2.3e-12 for all three, limited by astropy's quadrature.
    assert _rel(model.comoving_distance_Mpc(z), ref.comoving_distance(z).to_value(units.Mpc)) <= ASTROPY_RTOL
    assert (
        _rel(model.luminosity_distance_Mpc(z), ref.luminosity_distance(z).to_value(units.Mpc)) <= ASTROPY_RTOL
    )
    assert (
        _rel(model.angular_diameter_distance_Mpc(z), ref.angular_diameter_distance(z).to_value(units.Mpc))
        <= ASTROPY_RTOL
    )
    # Source: astropy hubble_distance (c/H0).  Measured: identical; tolerance 1e-6 (requirement).
    assert _rel(model.hubble_distance_Mpc(0.0), ref.hubble_distance.to_value(units.Mpc)) <= ASTROPY_RTOL


def test_astropy_times(astropy_pair):
    model, ref, units = astropy_pair
    # Source: astropy FlatLambdaCDM.age / lookback_time / hubble_time.  Tolerance: project
    # requirement 1e-6.  Measured: age today 4e-15, age at z = 1 1e-14, lookback (z <= 10)
    # 6e-15, 1/H0 1e-16.
    assert _rel(model.age_Gyr(), ref.age(0.0).to_value(units.Gyr)) <= ASTROPY_RTOL
    assert _rel(model.age_Gyr(1.0), ref.age(1.0).to_value(units.Gyr)) <= ASTROPY_RTOL
    z = Z_LOW[1:]
    assert _rel(model.lookback_time_Gyr(z), ref.lookback_time(z).to_value(units.Gyr)) <= ASTROPY_RTOL
    assert _rel(model.hubble_time_Gyr, ref.hubble_time.to_value(units.Gyr)) <= ASTROPY_RTOL


# --- independent adaptive quadrature -----------------------------------------------------------------


def _quad(f, lo, hi, points=()):
    pts = [p for p in points if min(lo, hi) < p < max(lo, hi)]
    return quad(f, lo, hi, epsrel=1e-13, epsabs=0.0, limit=500, points=pts or None)[0]


Z_QUAD = [1e-8, 1e-3, 0.1, 0.5, 1.0, 2.0, 3.0, 10.0, 100.0, 1100.0, 1e4, -0.5, -0.9, -0.999]


@pytest.mark.parametrize("z", Z_QUAD)
def test_integrals_against_quad_in_z(planck, z):
    Or, Om, OL = planck.Omega_r, planck.Omega_m, planck.Omega_lambda

    def E(x):
        return math.sqrt(Or * (1 + x) ** 4 + Om * (1 + x) ** 3 + OL)

    u = np.array([math.log1p(z)])
    # Source: scipy.integrate.quad (epsrel=1e-13) directly in z, independent of the ln(1+z)
    # substitution and Gauss-Legendre panels of the module.  Tolerance QUAD_RTOL = 1e-11
    # (brief: 1e-10 goal); measured <= 4e-16.
    chi = _quad(lambda x: 1.0 / E(x), 0.0, z)
    assert _comoving_integral(u, Or, Om, OL)[0] == pytest.approx(chi, rel=QUAD_RTOL)
    lookback = _quad(lambda x: 1.0 / ((1 + x) * E(x)), 0.0, z)
    assert _lookback_integral(u, Or, Om, OL)[0] == pytest.approx(lookback, rel=QUAD_RTOL)


@pytest.mark.parametrize("z", [0.0, 0.5, 1.0, 10.0, 1100.0, 1e4, 1e6, 1e8, 1e12, -0.5, -0.9, -0.999])
def test_age_against_quad_in_a(planck, z):
    Or, Om, OL = planck.Omega_r, planck.Omega_m, planck.Omega_lambda
    a = 1.0 / (1.0 + z)
    a_eq = Or / Om
    # Source: scipy.integrate.quad (epsrel=1e-13) of H0 t = int_0^a a' da' / sqrt(Or + Om a' +
    # OL a'^4), over the whole range in a (no closed-form tail, no substitution), with break
    # points around matter-radiation equality.  Tolerance QUAD_RTOL = 1e-11; measured <= 2e-15.
    exact = _quad(
        lambda x: x / math.sqrt(Or + Om * x + OL * x**4), 0.0, a, points=(0.1 * a_eq, a_eq, 10 * a_eq, 1e-2)
    )
    assert _age_integral(np.array([math.log1p(z)]), Or, Om, OL)[0] == pytest.approx(exact, rel=QUAD_RTOL)


@pytest.mark.parametrize("z", [10.0, 1100.0, 1e4, 1e6, 1e8, 1e12])
def test_high_redshift_distances_against_quad_in_a(planck, z):
    Or, Om, OL = planck.Omega_r, planck.Omega_m, planck.Omega_lambda
    a = 1.0 / (1.0 + z)
    a_eq = Or / Om
    u = np.array([math.log1p(z)])
    pts = (0.1 * a_eq, a_eq, 10 * a_eq, 1e-2)
    # Source: scipy.integrate.quad (epsrel=1e-13) in a: chi = int_a^1 da/sqrt(Or + Om a + OL a^4),
    # lookback = int_a^1 da / (a E(a)).  (In a the small-z limit loses digits to 1 - a round-off,
    # so only z >= 10 is checked this way.)  Tolerance QUAD_RTOL = 1e-11; measured <= 5e-16.
    chi = _quad(lambda x: 1.0 / math.sqrt(Or + Om * x + OL * x**4), a, 1.0, points=pts)
    assert _comoving_integral(u, Or, Om, OL)[0] == pytest.approx(chi, rel=QUAD_RTOL)
    lookback = _quad(lambda x: x / math.sqrt(Or + Om * x + OL * x**4), a, 1.0, points=pts)
    assert _lookback_integral(u, Or, Om, OL)[0] == pytest.approx(lookback, rel=QUAD_RTOL)


@pytest.mark.parametrize(
    "model",
    [
        FlatLCDM(67.66, 0.0, 0.0),  # radiation + Lambda only: E^2 zeros nearest the real u axis
        FlatLCDM(40.0, 0.0, 0.159),  # matter dominated, Omega_lambda ~ 6e-3
        FlatLCDM(20.0, 0.001, 0.001),  # Omega_r ~ 1e-3, Omega_m = 0.05
    ],
    ids=["radiation+lambda", "matter-dominated", "low-matter"],
)
@pytest.mark.parametrize("z", [0.1, 1.0, 30.0, 1e4, -0.9])
def test_extreme_models_against_quad(model, z):
    Or, Om, OL = model.Omega_r, model.Omega_m, model.Omega_lambda
    u = np.array([math.log1p(z)])
    # Source: scipy.integrate.quad (epsrel=1e-13) in z for chi and in a for the age, as above,
    # for parameter sets far from Planck.  Tolerance QUAD_RTOL = 1e-11.
    chi = _quad(lambda x: 1.0 / math.sqrt(Or * (1 + x) ** 4 + Om * (1 + x) ** 3 + OL), 0.0, z)
    assert _comoving_integral(u, Or, Om, OL)[0] == pytest.approx(chi, rel=QUAD_RTOL)
    a = 1.0 / (1.0 + z)
    pts = (0.1 * Or / max(Om, 1e-300), Or / max(Om, 1e-300), 1e-2)
    age = _quad(lambda x: x / math.sqrt(Or + Om * x + OL * x**4), 0.0, a, points=pts)
    assert _age_integral(u, Or, Om, OL)[0] == pytest.approx(age, rel=QUAD_RTOL)


def test_public_methods_match_integrals(planck):
    # Internal identity: the public methods are the dimensionless integrals times c/H0 or 1/H0;
    # rel 1e-15 = one multiplication of round-off.
    z = np.array([0.3, 2.0, 50.0])
    Or, Om, OL = planck.Omega_r, planck.Omega_m, planck.Omega_lambda
    u = np.log1p(z)
    chi = planck.hubble_distance0_Mpc * _comoving_integral(u, Or, Om, OL)
    np.testing.assert_allclose(planck.comoving_distance_Mpc(z), chi, rtol=1e-15)
    t = planck.hubble_time_Gyr * _age_integral(u, Or, Om, OL)
    np.testing.assert_allclose(planck.age_Gyr(z), t, rtol=1e-15)


# --- closed forms --------------------------------------------------------------------------------------


@pytest.mark.parametrize("z", [1e-6, 0.1, 1.0, 5.0, 100.0, 1e5, -0.5])
def test_einstein_de_sitter_closed_forms(z):
    # Source: Einstein-de Sitter (Omega_m = 1, no radiation or Lambda) closed forms
    # H0 chi/c = 2 (1 - (1+z)^-1/2), H0 t = (2/3)(1+z)^-3/2, H0 t_lookback = (2/3)(1 - (1+z)^-3/2).
    # Evaluated on the private integrals with Omega_r = 0 exactly.  Tolerance 1e-13: quadrature
    # is at round-off (the 1e-6 point loses ~3 digits to the cancellation in 1 - (1+z)^-1/2 in
    # the closed form itself, so it gets 1e-9).
    u = np.array([math.log1p(z)])
    rtol = 1e-9 if abs(z) < 1e-3 else 1e-13
    assert _comoving_integral(u, 0.0, 1.0, 0.0)[0] == pytest.approx(2.0 * (1.0 - (1.0 + z) ** -0.5), rel=rtol)
    assert _age_integral(u, 0.0, 1.0, 0.0)[0] == pytest.approx((2.0 / 3.0) * (1.0 + z) ** -1.5, rel=1e-13)
    lookback = (2.0 / 3.0) * (1.0 - (1.0 + z) ** -1.5)
    assert _lookback_integral(u, 0.0, 1.0, 0.0)[0] == pytest.approx(lookback, rel=rtol)


@pytest.mark.parametrize("omega_m", [0.05, 0.3, 0.9])
@pytest.mark.parametrize("z", [0.0, 1.0, 10.0, 1e3])
def test_lcdm_without_radiation_age_closed_form(omega_m, z):
    # Source: closed form for flat matter + Lambda,
    # H0 t(a) = 2 / (3 sqrt(OL)) asinh( sqrt(OL/Om) a^(3/2) ).
    # Private integral with Omega_r = 0 exactly; tolerance 1e-13 (round-off level quadrature).
    omega_l = 1.0 - omega_m
    a = 1.0 / (1.0 + z)
    exact = 2.0 / (3.0 * math.sqrt(omega_l)) * math.asinh(math.sqrt(omega_l / omega_m) * a**1.5)
    assert _age_integral(np.array([math.log1p(z)]), 0.0, omega_m, omega_l)[0] == pytest.approx(
        exact, rel=1e-13
    )


@pytest.mark.parametrize("z", [0.0, 1.0, 1e3, 1e5, 1e9])
def test_radiation_plus_matter_conformal_distance_closed_form(z):
    # Source: closed form for radiation + matter (no Lambda),
    # H0 chi/c = int_a^1 da / sqrt(Or + Om a) = (2/Om) (sqrt(Or + Om) - sqrt(Or + Om a)).
    # Private integral; Or = 0.25 makes radiation important everywhere.  Tolerance 1e-13.
    Or, Om = 0.25, 0.75
    a = 1.0 / (1.0 + z)
    exact = 2.0 / Om * (math.sqrt(Or + Om) - math.sqrt(Or + Om * a))
    u = np.array([math.log1p(z)])
    if z == 0.0:
        assert _comoving_integral(u, Or, Om, 0.0)[0] == 0.0
    else:
        assert _comoving_integral(u, Or, Om, 0.0)[0] == pytest.approx(exact, rel=1e-13)


def test_public_age_matches_radiationless_closed_form_when_radiation_negligible():
    # Source: flat matter + Lambda closed form t0 = 2/(3 H0 sqrt(OL)) asinh(sqrt(OL/Om)).
    # T = 0.01 K gives Omega_r ~ 1.7e-14; radiation shifts the age by ~ -Omega_r / Omega_m^1.5
    # ~ -8e-14 relative (measured -7.9e-14), so tolerance 1e-12.
    model = FlatLCDM(67.66, 0.02242, 0.11933, cmb_temperature_K=0.01)
    Om, OL = model.Omega_m, model.Omega_lambda
    for z in (0.0, 1.0, 3.0):
        a = 1.0 / (1.0 + z)
        exact = 2.0 / (3.0 * math.sqrt(OL)) * math.asinh(math.sqrt(OL / Om) * a**1.5) * model.hubble_time_Gyr
        assert model.age_Gyr(z) == pytest.approx(exact, rel=1e-12)


def test_public_age_radiation_effect_is_of_order_omega_r(planck):
    # Source: same closed form, now for the real Planck radiation content (Omega_r = 9.1e-5).
    # Radiation at fixed Omega_m, Omega_lambda makes the Universe younger by roughly
    # Omega_r / Omega_m^1.5 ~ 5.3e-4 relative (measured -4.3e-4): check the sign and that the
    # size is below that bound and above a tenth of it.
    Om, OL = planck.Omega_m, planck.Omega_lambda
    no_radiation = 2.0 / (3.0 * math.sqrt(OL)) * math.asinh(math.sqrt(OL / Om)) * planck.hubble_time_Gyr
    shift = planck.age_Gyr() / no_radiation - 1.0
    bound = planck.Omega_r / Om**1.5
    assert -bound < shift < -0.1 * bound


def test_public_einstein_de_sitter_limit():
    # Source: Einstein-de Sitter closed forms chi = 2 c/H0 (1 - (1+z)^-1/2), t = 2/(3 H0)(1+z)^-3/2.
    # from_physical(0, 1, 0) at T = 0.01 K: Omega_m = 1 - 1.7e-14, Omega_lambda = 0 (round-off
    # clipped).  Radiation perturbs these by <= Omega_r (1+z) ~ 2e-10 at z = 1e4; tolerance 1e-9.
    model = FlatLCDM.from_physical(0.0, 1.0, 0.0, cmb_temperature_K=0.01)
    assert model.Omega_lambda == 0.0
    assert model.H0_km_s_Mpc == pytest.approx(100.0, rel=1e-13)
    z = np.array([0.5, 3.0, 30.0, 1e4])
    np.testing.assert_allclose(
        model.comoving_distance_Mpc(z),
        2.0 * model.hubble_distance0_Mpc * (1.0 - (1.0 + z) ** -0.5),
        rtol=1e-9,
    )
    np.testing.assert_allclose(
        model.age_Gyr(z), 2.0 / 3.0 * model.hubble_time_Gyr * (1.0 + z) ** -1.5, rtol=1e-9
    )


# --- derivatives and internal identities ---------------------------------------------------------------


@pytest.mark.parametrize("z", [0.01, 0.5, 2.0, 10.0, 1100.0, -0.5])
def test_derivatives_by_finite_differences(planck, z):
    # Source: fundamental theorem of calculus, d chi/dz = c/H(z), d t_lb/dz = 1/((1+z) H),
    # d t/dz = -1/((1+z) H), checked by a 4th-order central difference with step
    # dz = 1e-3 (1+z): truncation ~ dz^4 chi^(5)/30 ~ 1e-13 relative; round-off
    # ~ 1e-16 chi / (dz chi') <= 1e-12.  Tolerance 1e-9 leaves ample margin.
    dz = 1e-3 * (1.0 + z)
    zs = z + dz * np.array([-2.0, -1.0, 1.0, 2.0])
    weights = np.array([1.0, -8.0, 8.0, -1.0]) / (12.0 * dz)
    d_chi = weights @ planck.comoving_distance_Mpc(zs)
    assert d_chi == pytest.approx(planck.hubble_distance_Mpc(z), rel=1e-9)
    t_over_h = planck.hubble_time_Gyr / ((1.0 + z) * planck.E(z))
    assert weights @ planck.lookback_time_Gyr(zs) == pytest.approx(t_over_h, rel=1e-9)
    assert weights @ planck.age_Gyr(zs) == pytest.approx(-t_over_h, rel=1e-9)


def test_distance_relations(planck):
    z = np.array([1e-4, 0.1, 1.0, 3.0, 1100.0])
    dm = planck.comoving_distance_Mpc(z)
    # Flat space: D_M = chi identically (exact equality).
    np.testing.assert_array_equal(planck.transverse_comoving_distance_Mpc(z), dm)
    # Definitions D_L = (1+z) D_M, D_A = D_M/(1+z) (Etherington reciprocity D_L = (1+z)^2 D_A);
    # rel 1e-15 = round-off.
    np.testing.assert_allclose(planck.luminosity_distance_Mpc(z), (1 + z) * dm, rtol=1e-15)
    np.testing.assert_allclose(planck.angular_diameter_distance_Mpc(z), dm / (1 + z), rtol=1e-15)
    np.testing.assert_allclose(
        planck.luminosity_distance_Mpc(z), (1 + z) ** 2 * planck.angular_diameter_distance_Mpc(z), rtol=1e-15
    )
    # Low-z Hubble law chi -> c z / H0; at z = 1e-4 the next term is ~(1+q0)/2 z ~ 3e-5 relative.
    assert dm[0] == pytest.approx(SPEED_OF_LIGHT_KM_S * 1e-4 / planck.H0_km_s_Mpc, rel=1e-4)
    assert planck.comoving_distance_Mpc(0.0) == 0.0
    assert planck.lookback_time_Gyr(0.0) == 0.0


def test_age_minus_lookback(planck):
    # Internal identity t(0) - t(z) = t_lookback(z), computed by two different paths (age is
    # anchored at a = 1e-6 with a closed-form tail, lookback at z = 0).  Absolute tolerance
    # 1e-13 t0 = round-off of sums of ~60 panels.
    z = np.array([0.01, 0.5, 1.0, 5.0, 100.0, 1e4, -0.5])
    t0 = planck.age_Gyr()
    np.testing.assert_allclose(t0 - planck.age_Gyr(z), planck.lookback_time_Gyr(z), rtol=0, atol=1e-13 * t0)


def test_density_fractions(planck):
    z = np.array([-0.5, 0.0, 0.5, 3.0, 1100.0, 1e6])
    f = planck.density_fractions(z)
    # Internal identity: fractions sum to one (flatness); 1e-15 = round-off.
    np.testing.assert_allclose(f["radiation"] + f["matter"] + f["lambda"], 1.0, rtol=0, atol=1e-15)
    # Definition at z = 0: the present-day density parameters; round-off tolerance.
    assert f["radiation"][1] == pytest.approx(planck.Omega_r, rel=1e-15)
    assert f["matter"][1] == pytest.approx(planck.Omega_m, rel=1e-15)
    assert f["lambda"][1] == pytest.approx(planck.Omega_lambda, rel=1e-15)
    # Definition Omega_m(z) = Omega_m (1+z)^3 / E^2; round-off tolerance.
    np.testing.assert_allclose(f["matter"], planck.Omega_m * (1 + z) ** 3 / planck.E(z) ** 2, rtol=1e-15)
    # Matter-radiation equality at 1 + z_eq = Omega_m / Omega_r (definition): equal fractions.
    z_eq = planck.Omega_m / planck.Omega_r - 1.0
    eq = planck.density_fractions(z_eq)
    assert eq["radiation"] == pytest.approx(eq["matter"], rel=1e-14)
    # Source: Planck 2018 VI Table 2 gives z_eq = 3387 +- 21 for this column; the 0.06 eV
    # neutrino is absent here (counted neither in matter nor radiation), so allow 1%.
    assert z_eq == pytest.approx(3387.0, rel=1e-2)


def test_known_values(planck):
    # Source: Planck 2018 VI Table 2 (TT,TE,EE+lowE+lensing+BAO) quotes age 13.787 +- 0.020 Gyr.
    # Our model drops the 0.06 eV neutrino mass (changes Omega_m by ~0.5%), so allow 0.2%.
    assert planck.age_Gyr() == pytest.approx(13.787, rel=2e-3)


# --- speed ------------------------------------------------------------------------------------------------


def test_runtime_for_1000_redshifts(planck):
    # Brief: < 0.1 s for ~1000 redshifts per call (measured ~0.6 ms per method).
    z = np.sort(np.random.default_rng(1).uniform(0.0, 1100.0, 1000))
    for name in ("comoving_distance_Mpc", "luminosity_distance_Mpc", "age_Gyr", "lookback_time_Gyr"):
        method = getattr(planck, name)
        start = time.perf_counter()
        method(z)
        assert time.perf_counter() - start < 0.1, name
