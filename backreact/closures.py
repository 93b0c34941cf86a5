"""Closures: the spectator's energy density and pressure built from its propagator history.

A closure maps the propagator history (A, A', A'' and, where needed, A''' on the e-fold
grid, with ln H and eps of the same history) to (rho_q, p_q) and a validity ratio
(DESIGN 2.4). Everything is in reduced Planck units (M_p = 1): A in M_p^2, H in M_p,
rho_q and p_q in M_p^4, N = ln a.

For closures defined by rho_q alone the pressure follows from covariant conservation,

    p_q = -rho_q - rho_q'/3,     w_q = -1 - (1/3) d ln rho_q/dN,

with rho_q' = d rho_q/dN by forward-mode differentiation of rho_q(A, A', A'', ln H, eps)
along the history, the tangents being (A', A'', A''', -eps, eps_N): no finite differences.

Families (each an equinox Module: parameters are array leaves, switches static):

- :class:`GaussianSpectator`: a frozen Gaussian field of variance A, rho_q = <U(sigma)>,
  valid while |<U''>|/H^2 << 1 (the field is light and its kinetic energy negligible);
  potentials :class:`Quadratic`, :class:`Quartic`, :class:`Cosine`, :class:`Exponential`
  in closed form and :class:`CustomPotential` by Gauss-Hermite quadrature.
- :class:`DerivativeClosure`: rho_q = -kappa Box A = kappa H^2 (A'' + (3 - eps) A').
- :class:`UserClosure`: a JAX-traceable callable named in the config by module path.

The call of every closure is ``closure(inputs, state=None) -> ClosureOutput``; a closure
that carries state between passes (an ensemble evolved along the history) returns it in
``ClosureOutput.state``.
"""

from __future__ import annotations

import importlib
import math
from collections.abc import Callable
from typing import ClassVar

import equinox as eqx
import numpy as np

from . import constants as C
from ._jax import jax, jnp

__all__ = [
    "Closure",
    "ClosureInput",
    "ClosureOutput",
    "Cosine",
    "CustomPotential",
    "DerivativeClosure",
    "Exponential",
    "GaussianSpectator",
    "Potential",
    "Quadratic",
    "Quartic",
    "UserClosure",
    "closure_from_config",
    "load_callable",
]


class ClosureInput(eqx.Module):
    """The propagator history a closure sees (M_p units, arrays on the e-fold grid).

    ``d3A`` is None unless the closure asked for it (``needs_third``).
    """

    A: jax.Array
    dA: jax.Array
    d2A: jax.Array
    d3A: jax.Array | None
    ln_hubble: jax.Array
    epsilon: jax.Array
    epsilon_n: jax.Array


class ClosureOutput(eqx.Module):
    """rho_q, p_q (M_p^4), the validity ratio along the grid (NaN where the closure has no
    criterion) and the closure's state (None for stateless closures)."""

    density: jax.Array
    pressure: jax.Array
    validity: jax.Array
    state: object = None


class Closure(eqx.Module):
    """Base of all closures.

    Subclasses define ``density`` (rho_q from the propagator history) or override
    ``__call__``; ``parameter``/``with_parameter`` expose the one parameter a calibration
    may solve for (``parameter_name``; ``parameter_positive`` = solve in its logarithm).
    """

    needs_third: ClassVar[bool] = False
    parameter_name: ClassVar[str] = ""
    parameter_positive: ClassVar[bool] = True
    validity_name: ClassVar[str] = ""

    def density(self, A, dA, d2A, ln_hubble, epsilon):
        raise NotImplementedError

    def validity(self, x: ClosureInput):
        return jnp.full_like(x.A, jnp.nan)

    def parameter(self) -> jax.Array:
        raise NotImplementedError

    def with_parameter(self, value) -> Closure:
        raise NotImplementedError

    def __call__(self, x: ClosureInput, state=None) -> ClosureOutput:
        rho, drho = _density_and_slope(self.density, x)
        return ClosureOutput(rho, -rho - drho / 3.0, self.validity(x), state)


def _density_and_slope(density: Callable, x: ClosureInput):
    """rho_q and d rho_q/dN by one forward-mode pass along the history."""
    d3 = jnp.zeros_like(x.A) if x.d3A is None else x.d3A
    primals = (x.A, x.dA, x.d2A, x.ln_hubble, x.epsilon)
    tangents = (x.dA, x.d2A, d3, -x.epsilon, x.epsilon_n)
    return jax.jvp(density, primals, tangents)


# ------------------------------------------------------------------------ potentials


class Potential(eqx.Module):
    """U(sigma) of the spectator (M_p units) and its Gaussian averages.

    ``mean(A)`` = <U> and ``mean_curvature(A)`` = <U''> over a Gaussian of variance A.
    """

    def mean(self, A):
        raise NotImplementedError

    def mean_curvature(self, A):
        raise NotImplementedError

    def parameter(self):
        raise NotImplementedError

    def with_parameter(self, value) -> Potential:
        raise NotImplementedError


class Quadratic(Potential):
    """U = m^2 sigma^2 / 2: <U> = m^2 A / 2, <U''> = m^2. ``mass`` in M_p."""

    mass: jax.Array
    parameter_name: ClassVar[str] = "mass"

    def mean(self, A):
        return 0.5 * self.mass**2 * A

    def mean_curvature(self, A):
        return jnp.full_like(A, self.mass**2)

    def parameter(self):
        return self.mass

    def with_parameter(self, value):
        return Quadratic(jnp.asarray(value))


class Quartic(Potential):
    """U = lambda sigma^4 / 4: <sigma^4> = 3 A^2, so <U> = 3 lambda A^2/4, <U''> = 3 lambda A."""

    coupling: jax.Array
    parameter_name: ClassVar[str] = "coupling"

    def mean(self, A):
        return 0.75 * self.coupling * A**2

    def mean_curvature(self, A):
        return 3.0 * self.coupling * A

    def parameter(self):
        return self.coupling

    def with_parameter(self, value):
        return Quartic(jnp.asarray(value))


class Cosine(Potential):
    """U = Lambda^4 (1 - cos(sigma/f)): <cos(sigma/f)> = exp(-A/(2 f^2)) for a Gaussian, so
    <U> = Lambda^4 (1 - exp(-A/(2 f^2))), <U''> = (Lambda^4/f^2) exp(-A/(2 f^2)).
    ``scale4`` = Lambda^4 in M_p^4, ``decay_constant`` f in M_p."""

    scale4: jax.Array
    decay_constant: jax.Array
    parameter_name: ClassVar[str] = "scale4"

    def mean(self, A):
        return -self.scale4 * jnp.expm1(-A / (2.0 * self.decay_constant**2))

    def mean_curvature(self, A):
        return self.scale4 / self.decay_constant**2 * jnp.exp(-A / (2.0 * self.decay_constant**2))

    def parameter(self):
        return self.scale4

    def with_parameter(self, value):
        return Cosine(jnp.asarray(value), self.decay_constant)


class Exponential(Potential):
    """U = V0 exp(beta sigma): <exp(beta sigma)> = exp(beta^2 A/2), so <U> = V0 exp(beta^2 A/2),
    <U''> = beta^2 <U>. ``amplitude`` V0 in M_p^4, ``slope`` beta in 1/M_p."""

    amplitude: jax.Array
    slope: jax.Array
    parameter_name: ClassVar[str] = "amplitude"

    def mean(self, A):
        return self.amplitude * jnp.exp(0.5 * self.slope**2 * A)

    def mean_curvature(self, A):
        return self.slope**2 * self.mean(A)

    def parameter(self):
        return self.amplitude

    def with_parameter(self, value):
        return Exponential(jnp.asarray(value), self.slope)


class CustomPotential(Potential):
    """U = amplitude * u(sigma) for a JAX-traceable u (sigma in M_p, u dimensionless),
    averaged by Gauss-Hermite quadrature with ``nodes`` points:

        <f(sigma)> = pi^{-1/2} sum_i w_i f(sqrt(2 A) x_i)   (exact for polynomials of degree
        < 2 nodes; Abramowitz & Stegun 25.4.46),

    and <U''> from the second derivative of u by automatic differentiation.
    """

    amplitude: jax.Array
    function: Callable = eqx.field(static=True)
    nodes: int = eqx.field(static=True, default=40)
    parameter_name: ClassVar[str] = "amplitude"

    def _average(self, f, A):
        x, w = np.polynomial.hermite.hermgauss(self.nodes)
        x = jnp.asarray(x)
        w = jnp.asarray(w) / math.sqrt(math.pi)
        sig = jnp.sqrt(2.0 * jnp.asarray(A))[..., None] * x
        return jnp.sum(w * f(sig), axis=-1)

    def _u(self, s):
        return jnp.vectorize(self.function)(s)

    def mean(self, A):
        return self.amplitude * self._average(self._u, A)

    def mean_curvature(self, A):
        u2 = jnp.vectorize(jax.grad(jax.grad(self.function)))
        return self.amplitude * self._average(u2, A)

    def parameter(self):
        return self.amplitude

    def with_parameter(self, value):
        return CustomPotential(jnp.asarray(value), self.function, self.nodes)


# -------------------------------------------------------------------------- closures


class GaussianSpectator(Closure):
    """Frozen Gaussian spectator: sigma Gaussian with variance A(N), rho_q = <U(sigma)>.

    Validity ratio |<U''>|/H^2: the field is frozen (and its kinetic energy negligible)
    only while it is small; beyond ~0.1 the field rolls and this closure is wrong.
    """

    potential: Potential
    validity_name: ClassVar[str] = "|<U''>|/H^2"

    @property
    def parameter_name(self) -> str:  # type: ignore[override]
        return self.potential.parameter_name

    def density(self, A, dA, d2A, ln_hubble, epsilon):
        return self.potential.mean(A)

    def validity(self, x):
        return jnp.abs(self.potential.mean_curvature(x.A)) * jnp.exp(-2.0 * x.ln_hubble)

    def parameter(self):
        return self.potential.parameter()

    def with_parameter(self, value):
        return GaussianSpectator(self.potential.with_parameter(value))


class DerivativeClosure(Closure):
    """rho_q = -kappa Box A = kappa H^2 (A'' + (3 - eps) A') (kappa dimensionless).

    A phenomenological local functional of the memory; it has no validity criterion of
    its own (``closure_validity`` is NaN). Its pressure needs A'''.
    """

    kappa: jax.Array
    needs_third: ClassVar[bool] = True
    parameter_name: ClassVar[str] = "kappa"
    parameter_positive: ClassVar[bool] = False

    def density(self, A, dA, d2A, ln_hubble, epsilon):
        return self.kappa * jnp.exp(2.0 * ln_hubble) * (d2A + (3.0 - epsilon) * dA)

    def parameter(self):
        return self.kappa

    def with_parameter(self, value):
        return DerivativeClosure(jnp.asarray(value))


class UserClosure(Closure):
    """A user's closure: ``function(A, dA, d2A, H, eps, parameter)`` (M_p units: A in M_p^2,
    H in M_p) returning rho_q (M_p^4), or a pair (rho_q, p_q). It must be JAX-traceable
    (jax.numpy only, no Python branching on values). With rho_q alone the pressure follows
    from conservation (forward-mode in N); a returned pressure is used as given, and the
    run's second-Friedmann check then measures how well it conserves energy.
    """

    parameter_value: jax.Array
    function: Callable = eqx.field(static=True)
    needs_third: ClassVar[bool] = True
    parameter_name: ClassVar[str] = "parameter"
    parameter_positive: ClassVar[bool] = False

    def _call(self, A, dA, d2A, ln_hubble, epsilon):
        return self.function(A, dA, d2A, jnp.exp(ln_hubble), epsilon, self.parameter_value)

    def density(self, A, dA, d2A, ln_hubble, epsilon):
        out = self._call(A, dA, d2A, ln_hubble, epsilon)
        return out[0] if isinstance(out, tuple | list) else out

    def __call__(self, x, state=None):
        out = jax.eval_shape(self._call, x.A, x.dA, x.d2A, x.ln_hubble, x.epsilon)
        rho, drho = _density_and_slope(self.density, x)
        if isinstance(out, tuple | list):
            if len(out) != 2:
                raise ValueError(
                    f"user closure {_name(self.function)} returned {len(out)} values: "
                    "allowed rho_q or (rho_q, p_q)"
                )
            p = jnp.broadcast_to(self._call(x.A, x.dA, x.d2A, x.ln_hubble, x.epsilon)[1], rho.shape)
        else:
            p = -rho - drho / 3.0
        return ClosureOutput(jnp.broadcast_to(rho, x.A.shape), p, jnp.full_like(x.A, jnp.nan), state)

    def parameter(self):
        return self.parameter_value

    def with_parameter(self, value):
        return UserClosure(jnp.asarray(value), self.function)


def conservation_slope(closure: Closure, x: ClosureInput):
    """d rho_q/dN of a closure's density by forward mode (for the conservation check)."""
    return _density_and_slope(closure.density, x)[1]


# ------------------------------------------------------------------------ from config


def _name(fn) -> str:
    return f"{getattr(fn, '__module__', '?')}:{getattr(fn, '__qualname__', repr(fn))}"


def load_callable(path: str, what: str) -> Callable:
    """Import ``module.sub:function`` (the only thing of a config that is ever executed)."""
    if path.count(":") != 1:
        raise ValueError(f"{what} = {path!r}: expected 'module.path:function'")
    mod_name, fn_name = path.split(":")
    try:
        module = importlib.import_module(mod_name)
    except Exception as exc:  # any import failure is the user's module: one line
        raise ValueError(f"{what} = {path!r}: cannot import module {mod_name!r} ({exc})") from None
    fn = getattr(module, fn_name, None)
    if not callable(fn):
        raise ValueError(f"{what} = {path!r}: module {mod_name!r} has no callable {fn_name!r}")
    return fn


_EV_MP = 1e-9 / C.REDUCED_PLANCK_MASS_GEV  # 1 eV in M_p
_GEV4_MP4 = C.REDUCED_PLANCK_MASS_GEV**-4  # 1 GeV^4 in M_p^4


def closure_from_config(cfg) -> Closure | None:
    """The closure of a validated config's [spectator] section (None for closure = 'none')."""
    sc = cfg.spectator
    a = jnp.asarray
    if sc.closure == "none":
        return None
    if sc.closure == "gaussian":
        if sc.potential == "quadratic":
            pot = Quadratic(a(sc.mass_eV * _EV_MP))
        elif sc.potential == "quartic":
            pot = Quartic(a(sc.coupling))
        elif sc.potential == "cosine":
            pot = Cosine(a((sc.scale_GeV / C.REDUCED_PLANCK_MASS_GEV) ** 4), a(sc.decay_constant_Mp))
        elif sc.potential == "exponential":
            pot = Exponential(a(sc.amplitude_GeV4 * _GEV4_MP4), a(sc.slope_Mp))
        else:
            fn = load_callable(sc.potential_function, "spectator.potential_function")
            pot = CustomPotential(a(sc.amplitude_GeV4 * _GEV4_MP4), fn, int(sc.quadrature_nodes))
        return GaussianSpectator(pot)
    if sc.closure == "derivative":
        return DerivativeClosure(a(sc.kappa))
    fn = load_callable(sc.closure_function, "spectator.closure_function")
    return UserClosure(a(sc.parameter), fn)


def parameter_to_config_units(cfg, value: float) -> tuple[str, float]:
    """(dotted config key, value in the config's units) of a closure's calibrated parameter."""
    sc = cfg.spectator
    if sc.closure == "gaussian":
        if sc.potential == "quadratic":
            return "spectator.mass_eV", value / _EV_MP
        if sc.potential == "quartic":
            return "spectator.coupling", value
        if sc.potential == "cosine":
            return "spectator.scale_GeV", value**0.25 * C.REDUCED_PLANCK_MASS_GEV
        return "spectator.amplitude_GeV4", value / _GEV4_MP4
    if sc.closure == "derivative":
        return "spectator.kappa", value
    return "spectator.parameter", value
