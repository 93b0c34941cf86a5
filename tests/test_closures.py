"""Closures (backreact/closures.py): Gaussian averages, conservation, user closures, config."""

from __future__ import annotations

import math

import numpy as np
import pytest
from helpers import make_config, sine_potential_shape

from backreact import constants as C
from backreact._jax import jax, jnp
from backreact.closures import (
    ClosureInput,
    Cosine,
    CustomPotential,
    DerivativeClosure,
    Exponential,
    GaussianSpectator,
    Quadratic,
    Quartic,
    UserClosure,
    closure_from_config,
    load_callable,
    parameter_to_config_units,
)

VARIANCES = jnp.asarray([0.05, 0.5, 2.0])


# --- closed-form Gaussian averages against Gauss-Hermite quadrature ---------------------------
# Gaussian moments: <sigma^2> = A, <sigma^4> = 3 A^2 (Isserlis); <cos(k sigma)> = exp(-k^2 A/2)
# and <exp(b sigma)> = exp(b^2 A/2) (characteristic and moment-generating functions of the
# normal distribution, Abramowitz & Stegun 26.1).  The quadrature is the independent route.
CASES = [
    (Quadratic(jnp.asarray(1.3)), 1.0, lambda s: 0.5 * 1.3**2 * s**2),
    (Quartic(jnp.asarray(0.2)), 1.0, lambda s: 0.25 * 0.2 * s**4),
    (Cosine(jnp.asarray(2.0), jnp.asarray(0.7)), 2.0, sine_potential_shape),
    (Exponential(jnp.asarray(1.5), jnp.asarray(0.8)), 1.5, lambda s: jnp.exp(0.8 * s)),
]


@pytest.mark.parametrize(
    "pot, amplitude, shape", CASES, ids=["quadratic", "quartic", "cosine", "exponential"]
)
def test_closed_form_averages_match_gauss_hermite(pot, amplitude, shape):
    quad = CustomPotential(jnp.asarray(amplitude), shape, nodes=80)
    # 80 nodes integrate polynomials of degree < 160 exactly and cos/exp of these widths to
    # round-off (their Hermite series converge factorially); 1e-12 relative is round-off.
    np.testing.assert_allclose(quad.mean(VARIANCES), pot.mean(VARIANCES), rtol=1e-12)
    np.testing.assert_allclose(quad.mean_curvature(VARIANCES), pot.mean_curvature(VARIANCES), rtol=1e-12)


def _synthetic(A0=2.0):
    """A smooth made-up propagator history on N in [-3, 1] (M_p units), with its exact jet."""
    n = jnp.linspace(-3.0, 1.0, 41)
    A = A0 + 0.3 * n + 0.05 * n**2
    dA, d2A, d3A = 0.3 + 0.1 * n, jnp.full_like(n, 0.1), jnp.zeros_like(n)
    ln_h = -1.0 - 0.7 * n + 0.05 * jnp.sin(n)
    eps = 0.7 - 0.05 * jnp.cos(n)
    return n, ClosureInput(A, dA, d2A, d3A, ln_h, eps, 0.05 * jnp.sin(n))


def test_quadratic_spectator_density_and_equation_of_state():
    # DESIGN 2.4: a frozen quadratic spectator has rho_q = m^2 A/2, so conservation gives
    # w_q = -1 - (1/3) d ln A/dN.  Forward mode is exact here: 1e-13 is round-off.
    _, x = _synthetic()
    out = GaussianSpectator(Quadratic(jnp.asarray(0.4)))(x)
    np.testing.assert_allclose(out.density, 0.5 * 0.16 * x.A, rtol=1e-14)
    np.testing.assert_allclose(out.pressure / out.density, -1.0 - x.dA / (3.0 * x.A), rtol=1e-13)


def test_gaussian_validity_ratio_is_curvature_over_hubble_squared():
    # DESIGN 2.4: the frozen-field criterion |<U''>|/H^2; for U = m^2 s^2/2 it is m^2/H^2.
    _, x = _synthetic()
    out = GaussianSpectator(Quadratic(jnp.asarray(0.4)))(x)
    np.testing.assert_allclose(out.validity, 0.16 * jnp.exp(-2.0 * x.ln_hubble), rtol=1e-14)


def test_derivative_closure_pressure_is_conservation_of_its_density():
    # p = -rho - rho'/3 (covariant conservation, DESIGN 2.4) with rho' the exact N-derivative
    # of the composite rho(A(N), A'(N), A''(N), H(N), eps(N)) taken by jax.grad of the
    # analytic history below: the closure's forward-mode tangents must reproduce it (1e-12).
    def hist(n):
        A = 1.0 + jnp.sin(n) + 0.1 * n**3
        dA = jnp.cos(n) + 0.3 * n**2
        d2A = -jnp.sin(n) + 0.6 * n
        d3A = -jnp.cos(n) + 0.6
        ln_h = -0.5 * n + 0.1 * jnp.sin(2 * n)
        eps = 0.5 - 0.2 * jnp.cos(2 * n)
        eps_n = 0.4 * jnp.sin(2 * n)
        return A, dA, d2A, d3A, ln_h, eps, eps_n

    closure = DerivativeClosure(jnp.asarray(-0.3))
    n = jnp.linspace(-2.0, 2.0, 23)
    x = ClosureInput(*jax.vmap(hist)(n))
    out = closure(x)

    def rho_of_n(m):
        A, dA, d2A, _, ln_h, eps, _ = hist(m)
        return closure.density(A, dA, d2A, ln_h, eps)

    exact = -out.density - jax.vmap(jax.grad(rho_of_n))(n) / 3.0
    np.testing.assert_allclose(out.pressure, exact, rtol=1e-12, atol=1e-14 * float(jnp.max(jnp.abs(exact))))
    assert np.all(np.isnan(out.validity))  # no criterion of its own


def test_user_closure_density_only_gets_the_conservation_pressure():
    # A user closure that returns rho_q alone: same pressure law as the built-in closures.
    _, x = _synthetic()
    user = UserClosure(jnp.asarray(0.16), lambda A, dA, d2A, H, eps, m2: 0.5 * m2 * A)
    builtin = GaussianSpectator(Quadratic(jnp.asarray(0.4)))
    np.testing.assert_allclose(user(x).pressure, builtin(x).pressure, rtol=1e-13)


def test_user_closure_pressure_is_used_as_given():
    from helpers import rho_and_pressure

    _, x = _synthetic()
    out = UserClosure(jnp.asarray(2.0), rho_and_pressure)(x)
    np.testing.assert_array_equal(out.pressure, -out.density / 3.0)


def test_user_closure_with_three_values_is_refused():
    from helpers import three_values

    _, x = _synthetic()
    with pytest.raises(ValueError, match="returned 3 values"):
        UserClosure(jnp.asarray(1.0), three_values)(x)


@pytest.mark.parametrize(
    "path, message",
    [
        ("no_colon_here", "expected 'module.path:function'"),
        ("backreact_no_such_module:f", "cannot import module"),
        ("math:no_such_function", "has no callable"),
    ],
)
def test_load_callable_errors_name_the_problem(path, message):
    with pytest.raises(ValueError, match=message):
        load_callable(path, "spectator.closure_function")


BASE = "[inflation]\n[propagator]\nmethod = 'memory_kernel'\n[spectator]\n"


@pytest.mark.parametrize(
    "extra, kind, parameter",
    [
        ("closure = 'gaussian'\nmass_eV = 3e-33\n", Quadratic, ("spectator.mass_eV", 3e-33)),
        (
            "closure = 'gaussian'\npotential = 'quartic'\ncoupling = 0.01\n",
            Quartic,
            ("spectator.coupling", 0.01),
        ),
        (
            "closure = 'gaussian'\npotential = 'cosine'\nscale_GeV = 2e-12\ndecay_constant_Mp = 0.5\n",
            Cosine,
            ("spectator.scale_GeV", 2e-12),
        ),
        (
            "closure = 'gaussian'\npotential = 'exponential'\namplitude_GeV4 = 3e-47\nslope_Mp = 0.2\n",
            Exponential,
            ("spectator.amplitude_GeV4", 3e-47),
        ),
        (
            "closure = 'gaussian'\npotential = 'custom'\namplitude_GeV4 = 3e-47\n"
            "potential_function = 'helpers:sine_potential_shape'\n",
            CustomPotential,
            ("spectator.amplitude_GeV4", 3e-47),
        ),
        ("closure = 'derivative'\nkappa = -2.5\n", DerivativeClosure, ("spectator.kappa", -2.5)),
        (
            "closure = 'user'\nclosure_function = 'helpers:constant_density'\nparameter = 1e-120\n",
            UserClosure,
            ("spectator.parameter", 1e-120),
        ),
    ],
    ids=["quadratic", "quartic", "cosine", "exponential", "custom", "derivative", "user"],
)
def test_config_builds_each_closure_and_its_parameter_round_trips(extra, kind, parameter):
    cfg = make_config(BASE + extra, small=False)
    closure = closure_from_config(cfg)
    made = closure.potential if isinstance(closure, GaussianSpectator) else closure
    assert isinstance(made, kind)
    key, value = parameter_to_config_units(cfg, float(closure.parameter()))
    assert key == parameter[0]
    # unit conversion there and back (eV, GeV^4 or GeV to M_p and back): round-off only
    assert value == pytest.approx(parameter[1], rel=1e-13)


def test_quadratic_mass_is_converted_to_planck_units():
    # 1 eV = 1e-9 GeV; M_p = 2.435e18 GeV (reduced Planck mass, PDG 2024 table 1.1).
    cfg = make_config(BASE + "closure = 'gaussian'\nmass_eV = 1.0\n", small=False)
    m = float(closure_from_config(cfg).parameter())
    assert m == pytest.approx(1e-9 / C.REDUCED_PLANCK_MASS_GEV, rel=1e-15)
    assert math.isclose(C.REDUCED_PLANCK_MASS_GEV, 2.435e18, rel_tol=1e-3)


def test_closure_without_a_propagator_is_a_config_error():
    from backreact.config import ConfigError

    with pytest.raises(ConfigError, match="propagator.method"):
        make_config(
            "[inflation]\n[propagator]\nmethod = 'none'\n[spectator]\nclosure = 'derivative'\nkappa = 1.0\n",
            small=False,
        )
