"""Inflation models: a prescribed eps(N) profile and canonical inflatons.

Each model describes the inflaton sector from the first point of the history to the
end of inflation (eps = 1, or the profile's last e-fold). Time is e-folds N; inside this
module everything is dimensionless (M_p = 1; for potentials V0 = 1, the overall scale
is fixed afterwards from the configured Hubble rate, because the e-fold dynamics of a
canonical field does not depend on V0).

Profile (exact, cheap; for tests and controlled studies). With n = N - N_start in
[0, N_inf] the inflaton fluid's slow-roll parameter is

    eps(n) = eps_0 + (eps_1 - eps_0) (e^{n/D} - 1) / (e^{N_inf/D} - 1),

rising from eps_0 at the start to eps_1 at the end over the last few D e-folds; its
density obeys rho' = -2 eps rho, i.e. ln H_phi(n) = ln H_phi(0) - int_0^n eps, in
closed form. eps_0 = eps_1 gives power-law inflation, eps_0 = eps_1 = 0 de Sitter.

Canonical field (M_p = 1, V0 = 1): phi'' + (3 - eps) phi' + V_phi/H^2 = 0 with
H^2 = (V + rho_other)/(3 - phi'^2/2) and eps = phi'^2/2 + (rho + p)_other/(2 H^2).
Plateau family V = (1 - e^{-b phi})^2, b = sqrt(2/(3 alpha)) (alpha = 1: the R^2-like
plateau); quadratic V = phi^2/2 (m^2 = 1 in V0 units).
"""

from __future__ import annotations

import abc

import equinox as eqx

from .._jax import jax, jnp


class InflatonPotential(eqx.Module):
    """A canonical inflaton potential V(phi)/V0 with M_p = 1."""

    @abc.abstractmethod
    def potential(self, phi):
        """V/V0 and dV/dphi / V0."""

    @abc.abstractmethod
    def slow_roll_field(self, efolds):
        """Field value that leaves ``efolds`` slow-roll e-folds before eps_V = 1."""

    @abc.abstractmethod
    def second_derivative(self, phi):
        """d^2V/dphi^2 / V0 (slow-roll n_s)."""

    def slow_roll_observables(self, phi):
        """(n_s, r) at first order in slow roll: n_s = 1 - 6 eps_V + 2 eta_V, r = 16 eps_V."""
        v, dv = self.potential(phi)
        eps_v = 0.5 * (dv / v) ** 2
        eta_v = self.second_derivative(phi) / v
        return 1.0 - 6.0 * eps_v + 2.0 * eta_v, 16.0 * eps_v


class PlateauPotential(InflatonPotential):
    """V = V0 (1 - exp(-sqrt(2/(3 alpha)) phi))^2, valid for phi > 0."""

    alpha: float = 1.0

    @property
    def _b(self):
        return jnp.sqrt(2.0 / (3.0 * self.alpha))

    def potential(self, phi):
        e = jnp.exp(-self._b * phi)
        return (1.0 - e) ** 2, 2.0 * self._b * e * (1.0 - e)

    def second_derivative(self, phi):
        b = self._b
        e = jnp.exp(-b * phi)
        return 2.0 * b * b * e * (2.0 * e - 1.0)

    def slow_roll_field(self, efolds):
        # Slow roll: N(phi) = (e^{b phi}/b - phi)/(2 b) - N(phi_end), eps_V(phi_end) = 1,
        # e^{-b phi_end} = 1/(1 + sqrt(2) b). Solve for phi by Newton (monotone, convex).
        b = self._b
        phi_end = jnp.log1p(jnp.sqrt(2.0) * b) / b

        def n_of(phi):
            return (jnp.exp(b * phi) / b - phi) / (2.0 * b)

        target = efolds + n_of(phi_end)

        def newton(_, phi):
            return phi - (n_of(phi) - target) / ((jnp.exp(b * phi) - 1.0) / (2.0 * b))

        return jax.lax.fori_loop(0, 60, newton, jnp.log(2.0 * b * b * target + 1.0) / b + 1.0)


class QuadraticPotential(InflatonPotential):
    """V = m^2 phi^2 / 2 (with m^2 = 1 in V0 units)."""

    def potential(self, phi):
        return 0.5 * phi**2, phi

    def second_derivative(self, phi):
        return jnp.ones_like(phi)

    def slow_roll_field(self, efolds):
        # N = (phi^2 - phi_end^2)/4, eps_V(phi_end) = 2/phi_end^2 = 1.
        return jnp.sqrt(4.0 * efolds + 2.0)


class EpsilonProfile(eqx.Module):
    """Prescribed slow-roll parameter of the inflaton fluid (see module docstring).

    All fields are array leaves: eps_start in [0, 1), eps_end in (0, 1] (>= eps_start),
    rise_efolds > 0, efolds (N_inf) > 0.
    """

    eps_start: float
    eps_end: float
    rise_efolds: float
    efolds: float

    def _norm(self):
        # (eps_1 - eps_0) / (e^{N_inf/D} - 1), written with expm1 for large D.
        return (self.eps_end - self.eps_start) / jnp.expm1(self.efolds / self.rise_efolds)

    def epsilon(self, n):
        """eps(n) and d eps / dn at n = N - N_start."""
        c = self._norm()
        d = self.rise_efolds
        e = jnp.exp(n / d)
        return self.eps_start + c * (e - 1.0), c * e / d

    def integrated_epsilon(self, n):
        """int_0^n eps dn' (so ln H(n) = ln H(0) - this)."""
        c = self._norm()
        d = self.rise_efolds
        return self.eps_start * n + c * (d * jnp.expm1(n / d) - n)
