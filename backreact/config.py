"""Scenario configuration: TOML in, validated frozen dataclasses out.

This module is pure Python (standard library plus :mod:`backreact.constants`), so a
configuration can be checked, and a bad one rejected with a one-line message, before
JAX is imported.

Everything is derived from one declarative table, :data:`SCHEMA`, with one row
(:class:`Field`) per key.  From it come

* validation (:func:`parse_config`, :func:`load_config`, :meth:`Config.with_overrides`),
* the frozen dataclasses of the sections and of the whole :class:`Config`,
* the canonical TOML text (:meth:`Config.to_toml`), and
* the Markdown reference (:func:`config_reference_markdown`).

To add a section, add a :class:`Section` row to :data:`SECTIONS` and its :class:`Field`
rows to :data:`SCHEMA`; nothing else has to change.  Rules that involve more than one
key live in the ``check`` (error) and ``warn`` (warning) hooks of a row; such a hook sees
the values already validated, i.e. the rows before it in :data:`SCHEMA`.

Conventions:

* A field that carries ``only=(selector, values)`` applies only when the selector key
  (``model``/``kind`` of its section, or a dotted key of an earlier section) has one of
  ``values``; giving it otherwise is an error, and in the dataclass it is ``None``.
* A missing key takes its default; a key whose default is :data:`REQUIRED` must be given
  whenever it applies.  Every section is optional except those marked ``required``.
* ``Config`` compares equal when all its sections do; ``text``, ``source``, ``sha256``
  and ``warnings`` do not take part in the comparison.
"""

from __future__ import annotations

import dataclasses
import difflib
import hashlib
import math
import re
import tomllib
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

from backreact import constants

__all__ = [
    "REQUIRED",
    "SCHEMA",
    "SECTIONS",
    "SECTION_CLASSES",
    "Config",
    "ConfigError",
    "Field",
    "Interval",
    "Section",
    "G_STAR_REHEATING",
    "HUBBLE_OBSERVATIONAL_BOUND_GEV",
    "all_keys",
    "config_reference_markdown",
    "default_config",
    "default_config_path",
    "load_config",
    "max_reheating_temperature_gev",
    "parse_config",
]

M_P_GEV = constants.REDUCED_PLANCK_MASS_GEV

#: Upper bound on the Hubble rate during inflation from the tensor-to-scalar ratio:
#: P_t = 2 H^2 / (pi^2 M_p^2) = r A_s  =>  H_max = pi M_p sqrt(A_s r / 2)  (about 4.7e13 GeV).
HUBBLE_OBSERVATIONAL_BOUND_GEV = (
    math.pi * M_P_GEV * math.sqrt(constants.PLANCK_AS * constants.R_UPPER_BOUND / 2)
)

#: Relativistic degrees of freedom of the Standard Model plasma above the electroweak scale.
G_STAR_REHEATING = 106.75


def max_reheating_temperature_gev(hubble_gev: float) -> float:
    """Temperature of instant thermalization of rho = 3 H^2 M_p^2 with g* = 106.75 (GeV)."""
    return (90.0 / (math.pi**2 * G_STAR_REHEATING)) ** 0.25 * math.sqrt(hubble_gev * M_P_GEV)


# ======================================================================================
# errors and value display
# ======================================================================================


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


class ConfigError(ValueError):
    """A configuration that cannot be used; the message is always a single line.

    ``source`` is where the configuration came from, ``key`` the dotted key (or section
    name) at fault, or ``None`` when the problem is not tied to one key.
    """

    def __init__(self, message: str, *, source: str = "<string>", key: str | None = None):
        super().__init__(_one_line(message))
        self.source = source
        self.key = key


def _toml_string(text: str) -> str:
    out = ['"']
    for ch in text:
        code = ord(ch)
        if ch == '"':
            out.append('\\"')
        elif ch == "\\":
            out.append("\\\\")
        elif ch == "\n":
            out.append("\\n")
        elif ch == "\t":
            out.append("\\t")
        elif ch == "\r":
            out.append("\\r")
        elif code < 0x20 or code == 0x7F:
            out.append(f"\\u{code:04X}")
        else:
            out.append(ch)
    out.append('"')
    return "".join(out)


def _toml_value(value: object) -> str:
    """A value as TOML would write it (also used to echo values in messages)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return _short_float(value)
    if isinstance(value, str):
        return _toml_string(value)
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, Mapping):
        return "{" + ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items()) + "}"
    if hasattr(value, "isoformat"):
        return value.isoformat()
    return repr(value)


def _tidy_exponent(text: str) -> str:
    """'1e+05' -> '1e+5'."""
    if "e" not in text:
        return text
    mantissa, exponent = text.split("e")
    return f"{mantissa}e{int(exponent):+d}"


def _short_float(x: float) -> str:
    """Shortest text that reads back as exactly x and is a TOML float ('1e+13', '65.0')."""
    best = repr(x)
    for digits in range(1, 18):
        text = f"{x:.{digits}g}"
        if float(text) == x:
            text = _tidy_exponent(text)
            if not any(c in text for c in ".einf"):
                text += ".0"
            if len(text) < len(best):
                best = text
            break
    return best


def _show(value: object, limit: int = 60) -> str:
    text = _one_line(_toml_value(value))
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _num(x: float) -> str:
    """Short display of a bound."""
    if isinstance(x, int) and not isinstance(x, bool):
        return str(x)
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return _tidy_exponent(f"{x:.6g}")


def _kind_of(value: object) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a float"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list | tuple):
        return "an array"
    if isinstance(value, Mapping):
        return "a table"
    return f"a {type(value).__name__}"


def _suggest(word: str, options: list[str] | tuple[str, ...]) -> str | None:
    for option in options:
        if option.lower() == word.lower():
            return option
    close = difflib.get_close_matches(word, list(options), n=1, cutoff=0.6)
    return close[0] if close else None


# ======================================================================================
# the schema
# ======================================================================================


class _Required:
    def __repr__(self) -> str:
        return "REQUIRED"


#: Default of a key that must be given whenever it applies.
REQUIRED: Any = _Required()

FLOAT, INT, STR, CHOICE = "float", "int", "str", "choice"
_PHYSICAL_UNITS = {"GeV", "K", "M_p^2", "eV", "GeV^4", "M_p", "1/M_p", "km/s/Mpc"}


@dataclasses.dataclass(frozen=True)
class Interval:
    """A range of numbers; ``brackets`` is one of "[]", "[)", "(]", "()"."""

    brackets: str
    lo: float
    hi: float

    def __post_init__(self):
        if self.brackets not in ("[]", "[)", "(]", "()"):
            raise ValueError(f"bad brackets {self.brackets!r}")

    def violation(self, x: float) -> str | None:
        if self.brackets[0] == "[" and x < self.lo:
            return f"must be >= {_num(self.lo)}"
        if self.brackets[0] == "(" and x <= self.lo:
            return f"must be > {_num(self.lo)}"
        if self.brackets[1] == "]" and x > self.hi:
            return f"must be <= {_num(self.hi)}"
        if self.brackets[1] == ")" and x >= self.hi:
            return f"must be < {_num(self.hi)}"
        return None

    def __str__(self) -> str:
        return f"{self.brackets[0]}{_num(self.lo)}, {_num(self.hi)}{self.brackets[1]}"


# check hooks return (what is wrong, allowed text or None); warn hooks a message or None.
CheckHook = Callable[[Any, Mapping[str, Any]], "tuple[str, str | None] | None"]
WarnHook = Callable[[Any, Mapping[str, Any]], "str | None"]


@dataclasses.dataclass(frozen=True)
class Field:
    """One configuration key (one row of :data:`SCHEMA`)."""

    section: str
    key: str
    type: str  # FLOAT, INT, STR or CHOICE
    default: Any
    description: str
    unit: str = ""
    range: Interval | None = None
    choices: tuple[str, ...] = ()
    only: tuple[str, tuple[str, ...]] | None = None  # (selector key, values it applies to)
    allowed_doc: str = ""  # overrides the generated "allowed" text
    check: CheckHook | None = None
    warn: WarnHook | None = None
    allowed_fn: Callable[[Mapping[str, Any]], str] | None = None  # context-dependent allowed text

    @property
    def dotted(self) -> str:
        return f"{self.section}.{self.key}"

    @property
    def selector(self) -> str | None:
        """Dotted key of the selector this field depends on, if any."""
        if self.only is None:
            return None
        name = self.only[0]
        return name if "." in name else f"{self.section}.{name}"

    def applies(self, values: Mapping[str, Any]) -> bool:
        return self.only is None or values.get(self.selector) in self.only[1]

    def allowed(self, values: Mapping[str, Any] | None = None) -> str:
        if self.allowed_fn is not None and values is not None:
            return self.allowed_fn(values)
        if self.allowed_doc:
            text = self.allowed_doc
        elif self.choices:
            text = ", ".join(repr(c) for c in self.choices)
        elif self.range is not None:
            text = str(self.range)
        elif self.type == STR:
            text = "any string"
        else:
            text = "any"
        if self.unit in _PHYSICAL_UNITS and (self.range is not None or self.allowed_doc):
            text += f" {self.unit}"
        return text

    def applies_doc(self, dotted: bool = False) -> str:
        """E.g. "model = 'profile'" (or "inflation.model = 'profile'" if dotted)."""
        if self.only is None:
            return ""
        name = self.selector if dotted else self.only[0]
        return f"{name} = " + " or ".join(repr(v) for v in self.only[1])


@dataclasses.dataclass(frozen=True)
class Section:
    """One TOML table of the configuration."""

    name: str
    description: str
    required: bool = False


# --- cross-key rules -------------------------------------------------------------------


def _warn_hubble(value: float, values: Mapping[str, Any]) -> str | None:
    if value <= HUBBLE_OBSERVATIONAL_BOUND_GEV:
        return None
    return (
        f"inflation.hubble_GeV = {_show(value)} exceeds the observational bound "
        f"{HUBBLE_OBSERVATIONAL_BOUND_GEV:.2g} GeV (r < {constants.R_UPPER_BOUND:g}, BICEP/Keck 2021, "
        "with Planck 2018 A_s); the run goes on"
    )


def _check_eps_end(value: float, values: Mapping[str, Any]):
    eps_start = values["inflation.eps_start"]
    if value < eps_start:
        return f"must be >= inflation.eps_start (= {_show(eps_start)})", None
    return None


def _temperature_allowed(values: Mapping[str, Any]) -> str:
    hubble = values["inflation.hubble_GeV"]
    t_max = max_reheating_temperature_gev(hubble)
    return f"[{_num(constants.T_REHEAT_MIN_GEV)}, {t_max:.2g}] GeV"


def _check_temperature(value: float, values: Mapping[str, Any]):
    hubble = values["inflation.hubble_GeV"]
    t_max = max_reheating_temperature_gev(hubble)
    if value < constants.T_REHEAT_MIN_GEV:
        return (
            f"is below the nucleosynthesis bound (at least {_num(constants.T_REHEAT_MIN_GEV)} GeV "
            f"= {constants.T_REHEAT_MIN_GEV * 1e3:g} MeV, so that reheating ends before nucleosynthesis)",
            None,
        )
    if value > t_max:
        return (
            f"is above the end-of-inflation scale (at most {t_max:.2g} GeV for "
            f"inflation.hubble_GeV = {_show(hubble)})",
            None,
        )
    return None


_NAME_CHARS = re.compile(r"[A-Za-z0-9_.\-]")


def _check_name(value: str, values: Mapping[str, Any]):
    if not value:
        return "must not be empty (it is used in file names)", None
    if len(value) > 64:
        return f"is {len(value)} characters long, at most 64 allowed", None
    bad = [c for c in value if not _NAME_CHARS.fullmatch(c)]
    if bad:
        return f"contains {bad[0]!r}, which may not appear in a name (it is used in file names)", None
    return None


def _check_h5(value: str, values: Mapping[str, Any]):
    if value and not value.endswith(".h5"):
        return "must end with '.h5'", None
    return None


_CALLABLE_PATH = re.compile(r"[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)*:[A-Za-z_][A-Za-z0-9_]*")


def _check_callable_path(value: str, values: Mapping[str, Any]):
    if not _CALLABLE_PATH.fullmatch(value):
        return "is not of the form 'module.path:function'", None
    return None


def _check_closure_method(value: str, values: Mapping[str, Any]):
    if value != "none" and values.get("propagator.method") == "none":
        return "needs the propagator, but propagator.method is 'none'", "'none', or set propagator.method"
    return None


def _check_calibration_target(value: str, values: Mapping[str, Any]):
    if value != "none" and values.get("spectator.closure") == "none":
        return "needs a closure to calibrate (spectator.closure is 'none')", None
    return None


SECTIONS: tuple[Section, ...] = (
    Section("scenario", "Name and description of the run."),
    Section("inflation", "The inflationary stage: model, scale and duration.", required=True),
    Section("prehistory", "What preceded the explicit e-folds of inflation (memory of the spectator)."),
    Section("reheating", "The transition from inflation to the radiation era."),
    Section("cosmology", "Late-universe contents (today's physical densities)."),
    Section("grid", "Output sampling of the history and integrator tolerances."),
    Section("propagator", "The spectator's coincident propagator A = <sigma^2> along the history."),
    Section("spectator", "The closure: the spectator's energy density built from its propagator."),
    Section("calibration", "Solve for the closure's parameter so that a target today is met."),
    Section("solver", "The self-consistent fixed point over the expansion history."),
    Section("output", "Where the results are written."),
)

_F = Field
# fmt: off
SCHEMA: tuple[Field, ...] = (
    # --- [scenario]
    _F("scenario", "name", STR, "demo", "name of the scenario, used for output file names",
       check=_check_name, allowed_doc="1-64 characters of [A-Za-z0-9_.-]"),
    _F("scenario", "description", STR, "", "free-form description"),
    # --- [inflation]
    _F("inflation", "model", CHOICE, "plateau",
       "profile: prescribed eps(N); plateau: V = V0 (1 - exp(-sqrt(2/(3 alpha)) phi))^2; "
       "quadratic: V = m^2 phi^2 / 2",
       choices=("profile", "plateau", "quadratic")),
    _F("inflation", "hubble_GeV", FLOAT, 1.0e13, "Hubble rate imposed at the point given by hubble_at",
       unit="GeV", range=Interval("()", 0.0, M_P_GEV), allowed_doc=f"(0, M_p = {M_P_GEV:.6g})",
       warn=_warn_hubble),
    _F("inflation", "hubble_at", CHOICE, "end",
       "where hubble_GeV is imposed: the first point of the history or the end of inflation",
       choices=("start", "end")),
    _F("inflation", "efolds", FLOAT, 65.0, "explicit e-folds of inflation before its end", unit="e-folds",
       range=Interval("[]", 1.0, 500.0)),
    _F("inflation", "eps_start", FLOAT, 0.005, "slow-roll parameter eps at the first point",
       range=Interval("[)", 0.0, 1.0), only=("model", ("profile",))),
    _F("inflation", "eps_end", FLOAT, 1.0, "slow-roll parameter eps at the end of inflation (>= eps_start)",
       range=Interval("(]", 0.0, 1.0), only=("model", ("profile",)), check=_check_eps_end),
    _F("inflation", "rise_efolds", FLOAT, 5.0, "e-folds over which eps rises from eps_start to eps_end",
       unit="e-folds", range=Interval("(]", 0.0, 1000.0), only=("model", ("profile",))),
    _F("inflation", "plateau_alpha", FLOAT, 1.0, "alpha of the plateau potential",
       range=Interval("(]", 0.0, 1000.0), only=("model", ("plateau",))),
    _F("inflation", "junction_efolds", FLOAT, 0.3,
       "e-folds over which the equation of state is smoothed from the end of inflation into reheating",
       unit="e-folds", range=Interval("(]", 0.01, 3.0)),
    # --- [prehistory]
    _F("prehistory", "kind", CHOICE, "none",
       "none: the spectator starts at zero variance; variance: a given prior variance; "
       "de_sitter_efolds: a given number of earlier de Sitter e-folds",
       choices=("none", "variance", "de_sitter_efolds")),
    _F("prehistory", "variance_Mp2", FLOAT, 0.0, "prior variance of the spectator", unit="M_p^2",
       range=Interval("[]", 0.0, 1e6), only=("kind", ("variance",))),
    _F("prehistory", "de_sitter_efolds", FLOAT, 0.0, "e-folds of de Sitter expansion before the history",
       unit="e-folds", range=Interval("[]", 0.0, 1e12), only=("kind", ("de_sitter_efolds",))),
    # --- [reheating]
    _F("reheating", "kind", CHOICE, "instant", "instant: radiation right after inflation; "
       "perturbative: an inflaton-dominated stage decaying into radiation",
       choices=("instant", "perturbative")),
    _F("reheating", "temperature_GeV", FLOAT, REQUIRED, "reheating temperature", unit="GeV",
       only=("kind", ("perturbative",)), check=_check_temperature, allowed_fn=_temperature_allowed,
       allowed_doc=f"[{_num(constants.T_REHEAT_MIN_GEV)}, T_max] with "
       "T_max = (90 / (pi^2 106.75))^(1/4) sqrt(hubble_GeV M_p)"),
    # --- [cosmology]
    _F("cosmology", "omega_b", FLOAT, constants.PLANCK18_OMEGA_B,
       "physical baryon density Omega_b h^2 (default: Planck 2018)", range=Interval("()", 0.0, 1.0)),
    _F("cosmology", "omega_c", FLOAT, constants.PLANCK18_OMEGA_C,
       "physical CDM density Omega_c h^2 (default: Planck 2018)", range=Interval("()", 0.0, 1.0)),
    _F("cosmology", "omega_lambda", FLOAT, 0.0,
       "physical cosmological-constant density Omega_Lambda h^2; "
       "rho_Lambda = 3 (100 km/s/Mpc)^2 M_p^2 omega_lambda",
       range=Interval("[)", 0.0, 10.0)),
    _F("cosmology", "cmb_temperature_K", FLOAT, constants.T_CMB_K,
       "CMB temperature today (default: Fixsen 2009)", unit="K", range=Interval("[]", 1.0, 10.0)),
    _F("cosmology", "n_eff", FLOAT, constants.N_EFF, "effective number of neutrino species",
       range=Interval("[]", 0.0, 10.0)),
    _F("cosmology", "final_redshift", FLOAT, -0.5, "the history continues past today to this redshift",
       range=Interval("()", -0.9, 0.0)),
    # --- [grid]
    _F("grid", "points_inflation", INT, 400, "output points during inflation",
       range=Interval("[]", 20, 100000)),
    _F("grid", "points_reheating", INT, 120, "output points during reheating",
       range=Interval("[]", 10, 100000)),
    _F("grid", "points_radiation_matter", INT, 400, "output points from reheating to late_start_redshift",
       range=Interval("[]", 20, 100000)),
    _F("grid", "points_late", INT, 200, "output points from late_start_redshift to final_redshift",
       range=Interval("[]", 10, 100000)),
    _F("grid", "late_start_redshift", FLOAT, 30.0, "redshift where the dense late segment begins",
       range=Interval("[]", 1.0, 1e4)),
    _F("grid", "rtol", FLOAT, 1e-11, "relative tolerance of the integrator",
       range=Interval("[]", 1e-14, 1e-4)),
    _F("grid", "atol", FLOAT, 1e-13, "absolute tolerance of the integrator",
       range=Interval("[]", 1e-16, 1e-4)),
    # --- [propagator]
    _F("propagator", "method", CHOICE, "exact",
       "exact: vectorized mode sum (accurate in every era); memory_kernel: fast approximation, "
       "valid only during inflation and decelerating eras; none: do not compute A",
       choices=("exact", "memory_kernel", "none")),
    _F("propagator", "modes_per_efold", FLOAT, 20.0, "density of the k grid in modes per e-fold of ln k",
       range=Interval("[]", 4.0, 200.0)),
    _F("propagator", "mu_over_start_hubble", FLOAT, 1.0,
       "renormalization scale mu in units of H at the first point of the history",
       range=Interval("()", 0.0, 1e30)),
    _F("propagator", "start_x", FLOAT, 50.0,
       "exact method: modes start in the adiabatic vacuum at x = k/(aH) = start_x",
       range=Interval("[]", 30.0, 1000.0), only=("method", ("exact",))),
    _F("propagator", "handover_x", FLOAT, 1e-2,
       "exact method: x outside the horizon where complex modes hand over to the real transfer",
       range=Interval("[]", 1e-4, 0.1), only=("method", ("exact",))),
    _F("propagator", "stop_x", FLOAT, 30.0,
       "exact method: x inside the horizon after which a mode continues by its Bogoliubov envelope",
       range=Interval("[]", 28.0, 1000.0), only=("method", ("exact",))),
    _F("propagator", "rtol", FLOAT, 1e-10, "exact method: relative tolerance of the mode integrations",
       range=Interval("[]", 1e-13, 1e-6), only=("method", ("exact",))),
    # --- [spectator]
    _F("spectator", "closure", CHOICE, "none",
       "none: no back-reaction; gaussian: frozen Gaussian field, rho = <U(sigma)> with variance A; "
       "derivative: rho = -kappa Box A; user: a JAX function named by module path",
       choices=("none", "gaussian", "derivative", "user"), check=_check_closure_method),
    _F("spectator", "potential", CHOICE, "quadratic",
       "potential U(sigma) of the Gaussian spectator: quadratic m^2 sigma^2/2, quartic lambda sigma^4/4, "
       "cosine Lambda^4 (1 - cos(sigma/f)), exponential V0 exp(beta sigma), custom: amplitude u(sigma)",
       choices=("quadratic", "quartic", "cosine", "exponential", "custom"),
       only=("closure", ("gaussian",))),
    _F("spectator", "mass_eV", FLOAT, REQUIRED, "spectator mass m (H0 is about 1.4e-33 eV)", unit="eV",
       range=Interval("()", 0.0, 1e30), only=("potential", ("quadratic",))),
    _F("spectator", "coupling", FLOAT, REQUIRED, "quartic self-coupling lambda",
       range=Interval("()", 0.0, 1e3), only=("potential", ("quartic",))),
    _F("spectator", "scale_GeV", FLOAT, REQUIRED, "scale Lambda of the cosine potential", unit="GeV",
       range=Interval("()", 0.0, 1e19), only=("potential", ("cosine",))),
    _F("spectator", "decay_constant_Mp", FLOAT, REQUIRED, "decay constant f of the cosine potential",
       unit="M_p", range=Interval("()", 0.0, 1e6), only=("potential", ("cosine",))),
    _F("spectator", "amplitude_GeV4", FLOAT, REQUIRED, "amplitude V0 of the exponential or custom potential",
       unit="GeV^4", range=Interval("()", 0.0, 1e76), only=("potential", ("exponential", "custom"))),
    _F("spectator", "slope_Mp", FLOAT, REQUIRED, "slope beta of the exponential potential (in 1/M_p)",
       unit="1/M_p", range=Interval("[]", -1e3, 1e3), only=("potential", ("exponential",))),
    _F("spectator", "potential_function", STR, REQUIRED,
       "custom potential u(sigma) (sigma in M_p, dimensionless result) as 'module.path:function'; "
       "it must be JAX-traceable; U = amplitude_GeV4 u(sigma)",
       only=("potential", ("custom",)), check=_check_callable_path, allowed_doc="'module.path:function'"),
    _F("spectator", "quadrature_nodes", INT, 40, "Gauss-Hermite nodes for the custom potential's averages",
       range=Interval("[]", 4, 400), only=("potential", ("custom",))),
    _F("spectator", "kappa", FLOAT, REQUIRED, "coupling kappa of rho = -kappa Box A (dimensionless)",
       range=Interval("[]", -1e300, 1e300), only=("closure", ("derivative",))),
    _F("spectator", "closure_function", STR, REQUIRED,
       "user closure f(A, dA, d2A, H, eps, parameter) -> rho or (rho, p), all in M_p units, as "
       "'module.path:function'; it must be JAX-traceable",
       only=("closure", ("user",)), check=_check_callable_path, allowed_doc="'module.path:function'"),
    _F("spectator", "parameter", FLOAT, 0.0, "the parameter passed to the user closure",
       range=Interval("[]", -1e300, 1e300), only=("closure", ("user",))),
    _F("spectator", "validity_threshold", FLOAT, 0.1,
       "the run is flagged invalid where the closure's validity ratio exceeds this",
       range=Interval("(]", 0.0, 1e3)),
    # --- [calibration]
    _F("calibration", "target", CHOICE, "none",
       "none: use the closure's parameter as given; H0: solve it so that H0 has a value; "
       "fraction_spectator: so that Omega_q today has a value",
       choices=("none", "H0", "fraction_spectator"), check=_check_calibration_target),
    _F("calibration", "H0_km_s_Mpc", FLOAT, REQUIRED, "target Hubble rate today", unit="km/s/Mpc",
       range=Interval("()", 1.0, 1000.0), only=("target", ("H0",))),
    _F("calibration", "fraction_spectator", FLOAT, REQUIRED, "target density fraction of the spectator today",
       range=Interval("()", 0.0, 1.0), only=("target", ("fraction_spectator",))),
    # --- [solver]
    _F("solver", "tolerance", FLOAT, 1e-10, "stop when max |delta ln H| between passes is below this",
       range=Interval("[]", 1e-14, 1e-3)),
    _F("solver", "max_passes", INT, 30, "give up after this many passes", range=Interval("[]", 1, 1000)),
    _F("solver", "acceleration", CHOICE, "anderson",
       "anderson: Anderson acceleration of the fixed point; picard: plain (damped) iteration",
       choices=("anderson", "picard")),
    _F("solver", "memory", INT, 3, "Anderson: number of previous passes mixed",
       range=Interval("[]", 1, 10), only=("acceleration", ("anderson",))),
    _F("solver", "damping", FLOAT, 1.0, "Picard: fraction of the new source taken each pass",
       range=Interval("(]", 0.0, 1.0), only=("acceleration", ("picard",))),
    # --- [output]
    _F("output", "directory", STR, "runs", "directory of the output file"),
    _F("output", "file", STR, "", "output file name; empty: <scenario.name>.h5 (inside directory)",
       check=_check_h5, allowed_doc='"" or a name ending in .h5'),
)
# fmt: on
del _F


def all_keys(section: str | None = None) -> tuple[str, ...]:
    """Dotted names of all known keys (of one section if given), in schema order."""
    return tuple(f.dotted for f in SCHEMA if section is None or f.section == section)


_SECTION_NAMES = tuple(s.name for s in SECTIONS)
_FIELDS: dict[str, dict[str, Field]] = {s.name: {} for s in SECTIONS}


def _check_schema() -> None:
    """Consistency of the table itself (runs once, at import)."""
    seen: list[str] = []
    for f in SCHEMA:
        if f.section not in _FIELDS:
            raise RuntimeError(f"schema: {f.dotted}: section not in SECTIONS")
        if f.key in _FIELDS[f.section]:
            raise RuntimeError(f"schema: {f.dotted}: duplicate key")
        if f.type not in (FLOAT, INT, STR, CHOICE):
            raise RuntimeError(f"schema: {f.dotted}: bad type {f.type!r}")
        if (f.type == CHOICE) != bool(f.choices):
            raise RuntimeError(f"schema: {f.dotted}: choices go with type choice")
        if f.selector is not None:
            if f.selector not in seen:
                raise RuntimeError(f"schema: {f.dotted}: selector {f.selector} must come earlier")
            sel = _FIELDS[f.selector.split(".")[0]][f.selector.split(".")[1]]
            if sel.type != CHOICE or not set(f.only[1]) <= set(sel.choices):
                raise RuntimeError(f"schema: {f.dotted}: selector values are not choices of {f.selector}")
        _FIELDS[f.section][f.key] = f
        seen.append(f.dotted)


_check_schema()


# ======================================================================================
# validation
# ======================================================================================


def _coerce(f: Field, value: object, fail: Callable[..., ConfigError]) -> object:
    """Type, range and choice checks of one value; returns the typed value."""
    given = value  # echoed in messages as written
    if f.type == FLOAT:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise fail(f, value, f"must be a finite number, got {_kind_of(value)}")
        try:
            x = float(value)
        except OverflowError:
            x = math.inf
        if not math.isfinite(x):
            raise fail(f, value, f"must be a finite number, got {_show(value)}")
        value = x
    elif f.type == INT:
        if isinstance(value, bool) or not isinstance(value, int):
            hint = ""
            if isinstance(value, float) and math.isfinite(value) and value == int(value):
                hint = f" (write {int(value)}, not {_show(value)})"
            raise fail(f, value, f"must be an integer, got {_kind_of(value)}{hint}")
    else:
        if not isinstance(value, str):
            raise fail(f, value, f"must be a string, got {_kind_of(value)}")
        try:
            value.encode("utf-8")
        except UnicodeEncodeError:
            raise fail(f, value, "must be valid Unicode text") from None
    if f.range is not None:
        reason = f.range.violation(value)
        if reason is not None:
            raise fail(f, given, reason)
    if f.choices and value not in f.choices:
        guess = _suggest(value, f.choices)
        hint = f" (did you mean {guess!r}?)" if guess else ""
        raise fail(f, value, f"not a known {f.key}{hint}")
    return value


def _validate(data: object, source: str) -> tuple[dict[str, Any], tuple[str, ...]]:
    """Validate a nested mapping; returns ({dotted key: value or None}, warnings)."""

    def err(message: str, key: str | None = None) -> ConfigError:
        return ConfigError(f"config error in {source}: {message}", source=source, key=key)

    values: dict[str, Any] = {}

    def fail(f: Field, value: object, reason: str, allowed: str | None = None) -> ConfigError:
        allowed = allowed if allowed is not None else f.allowed(values)
        return err(f"{f.dotted} = {_show(value)}: {reason}; allowed: {allowed}", f.dotted)

    if not isinstance(data, Mapping):
        raise err(f"a configuration must be a TOML table, got {_kind_of(data)}")
    for name, content in data.items():
        if name in _FIELDS:
            if not isinstance(content, Mapping):
                raise err(f"[{name}] must be a table, got {name} = {_show(content)}", name)
            for key in content:
                if key not in _FIELDS[name]:
                    raise err(_unknown_key_message(name, str(key)), f"{name}.{key}")
            continue
        if isinstance(content, Mapping):
            guess = _suggest(str(name), _SECTION_NAMES)
            hint = f"did you mean [{guess}]?" if guess else "known sections: " + ", ".join(_SECTION_NAMES)
            raise err(f"unknown section [{name}]; {hint}", str(name))
        owners = [f.dotted for f in SCHEMA if f.key == name]
        hint = f"; did you mean {owners[0]!r} (in section [{owners[0].split('.')[0]}])?" if owners else ""
        raise err(f"unknown top-level key {str(name)!r}: keys belong in a [section]{hint}", str(name))
    for section in SECTIONS:
        if section.required and section.name not in data:
            raise err(f"missing section [{section.name}]", section.name)

    warnings: list[str] = []
    for f in SCHEMA:
        given = data.get(f.section, {})
        present = f.key in given
        if not f.applies(values):
            if present:
                sel = f.only[0]
                choices = " or ".join(repr(v) for v in f.only[1])
                raise fail(
                    f,
                    given[f.key],
                    f"applies only to {sel} = {choices} ({sel} is {values[f.selector]!r})",
                    f"leave it out, or set {f.selector} = {choices}",
                )
            values[f.dotted] = None
            continue
        if present:
            value = _coerce(f, given[f.key], fail)
        elif f.default is REQUIRED:
            condition = f" when {f.applies_doc(dotted=True)}" if f.only else ""
            raise err(
                f"{f.dotted} is missing: it is required{condition}; allowed: {f.allowed(values)}", f.dotted
            )
        else:
            value = f.default
        if f.check is not None:
            problem = f.check(value, values)
            if problem is not None:
                raise fail(f, value, *problem)
        values[f.dotted] = value
        if f.warn is not None:
            message = f.warn(value, values)
            if message:
                warnings.append(_one_line(message))
    return values, tuple(warnings)


def _unknown_key_message(section: str, key: str) -> str:
    known = list(_FIELDS[section])
    guess = _suggest(key, known)
    if guess is not None:
        return f"unknown key '{section}.{key}'; did you mean '{section}.{guess}'?"
    elsewhere = [f.dotted for f in SCHEMA if f.key == key]
    if elsewhere:
        return f"unknown key '{section}.{key}'; did you mean '{elsewhere[0]}'?"
    return f"unknown key '{section}.{key}'; the keys of [{section}] are: " + ", ".join(known)


# ======================================================================================
# dataclasses
# ======================================================================================

_TYPES = {FLOAT: "float", INT: "int", STR: "str", CHOICE: "str"}


def _make_section_class(section: Section) -> type:
    fields = []
    for f in SCHEMA:
        if f.section == section.name:
            annotation = _TYPES[f.type] + (" | None" if f.only is not None else "")
            fields.append((f.key, annotation))
    name = section.name.capitalize() + "Config"
    cls = dataclasses.make_dataclass(
        name, fields, frozen=True, namespace={"__doc__": f"[{section.name}] {section.description}"}
    )
    cls.__module__ = __name__
    globals()[name] = cls  # importable by name (and picklable)
    return cls


#: Frozen dataclass of each section, by section name (e.g. ``SECTION_CLASSES["inflation"]``
#: is ``InflationConfig``).
SECTION_CLASSES: dict[str, type] = {s.name: _make_section_class(s) for s in SECTIONS}


class _ConfigMethods:
    """Methods of :class:`Config` (whose fields are generated from :data:`SECTIONS`)."""

    def values(self) -> dict[str, Any]:
        """{dotted key: value} of every key, ``None`` for keys that do not apply."""
        return {f.dotted: getattr(getattr(self, f.section), f.key) for f in SCHEMA}

    def as_dict(self) -> dict[str, dict[str, Any]]:
        """Nested {section: {key: value}} of the keys that apply (what to_toml writes)."""
        flat = self.values()
        out: dict[str, dict[str, Any]] = {s.name: {} for s in SECTIONS}
        for f in SCHEMA:
            if f.applies(flat):
                out[f.section][f.key] = flat[f.dotted]
        return out

    def to_toml(self) -> str:
        """Canonical TOML text with every applicable key; parses back to an equal Config."""
        lines = ["# backreact configuration (canonical form)"]
        for name, content in self.as_dict().items():
            lines.append("")
            lines.append(f"[{name}]")
            lines.extend(f"{key} = {_toml_value(value)}" for key, value in content.items())
        return "\n".join(lines) + "\n"

    def with_overrides(self, mapping: Mapping[str, object]) -> Config:
        """A new Config with dotted keys replaced (``None`` restores the default).

        Keys inherited from this config that no longer apply (after a change of
        ``model``/``kind``) are dropped; the result is validated again and its text is
        the canonical :meth:`to_toml`.
        """
        source = f"{self.source} (with overrides)"
        data = self.as_dict()
        explicit = set()
        for dotted, value in mapping.items():
            if not isinstance(dotted, str) or dotted.count(".") != 1:
                raise ConfigError(
                    f"config error in {source}: override key {dotted!r} must have the form 'section.key'",
                    source=source,
                    key=str(dotted),
                )
            section, key = dotted.split(".")
            if value is None:
                data.get(section, {}).pop(key, None)
            else:
                data.setdefault(section, {})[key] = value
                explicit.add(dotted)
        for f in SCHEMA:
            if f.only is not None and f.dotted not in explicit and f.key in data.get(f.section, {}):
                sel_section, sel_key = f.selector.split(".")
                default = _FIELDS[sel_section][sel_key].default
                if data.get(sel_section, {}).get(sel_key, default) not in f.only[1]:
                    del data[f.section][f.key]
        values, warnings = _validate(data, source)
        config = _build(values, warnings, text="", source=source)
        return _build(values, warnings, text=config.to_toml(), source=source)

    def output_path(self) -> Path:
        """The output file: output.file (or <scenario.name>.h5) inside output.directory."""
        name = self.output.file or f"{self.scenario.name}.h5"
        return Path(self.output.directory) / name


_meta = {"compare": False}
Config = dataclasses.make_dataclass(
    "Config",
    [(s.name, SECTION_CLASSES[s.name].__name__) for s in SECTIONS]
    + [
        ("text", "str", dataclasses.field(repr=False, **_meta)),
        ("source", "str", dataclasses.field(**_meta)),
        ("sha256", "str", dataclasses.field(repr=False, **_meta)),
        ("warnings", "tuple[str, ...]", dataclasses.field(**_meta)),
    ],
    bases=(_ConfigMethods,),
    frozen=True,
    namespace={
        "__doc__": "A validated configuration: one frozen dataclass per section, plus the source "
        "TOML text, where it came from, the SHA-256 of the text and the warnings raised."
    },
)
Config.__module__ = __name__
del _meta


def _build(values: Mapping[str, Any], warnings: tuple[str, ...], *, text: str, source: str) -> Config:
    sections = {
        s.name: SECTION_CLASSES[s.name](**{f.key: values[f.dotted] for f in SCHEMA if f.section == s.name})
        for s in SECTIONS
    }
    digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
    return Config(**sections, text=text, source=source, sha256=digest, warnings=warnings)


# ======================================================================================
# entry points
# ======================================================================================


def parse_config(text: str, source: str = "<string>") -> Config:
    """Parse and validate TOML text; raises :class:`ConfigError` with a one-line message."""
    if not isinstance(text, str):
        raise TypeError(f"parse_config expects TOML text (str), got {type(text).__name__}")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"config error in {source}: TOML syntax error: {exc}", source=source) from None
    values, warnings = _validate(data, source)
    return _build(values, warnings, text=text, source=source)


def config_from_mapping(data: Mapping[str, Any], source: str = "<mapping>") -> Config:
    """Validate already-parsed TOML data (section -> key -> value); the Config's text is
    its canonical TOML. Raises :class:`ConfigError` with a one-line message."""
    values, warnings = _validate(dict(data), source)
    cfg = _build(values, warnings, text="", source=source)
    return _build(values, warnings, text=cfg.to_toml(), source=source)


def load_config(path: str | Path) -> Config:
    """Read a TOML file (UTF-8) and validate it."""
    path = Path(path)
    source = str(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        reason = exc.strerror or exc.__class__.__name__
        raise ConfigError(f"config error in {source}: cannot read file: {reason}", source=source) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(
            f"config error in {source}: not UTF-8 text (invalid byte at offset {exc.start})", source=source
        ) from None
    return parse_config(text, source=source)


def default_config_path() -> Path:
    """The packaged demo scenario, ``backreact/data/scenarios/demo.toml``."""
    return Path(__file__).resolve().parent / "data" / "scenarios" / "demo.toml"


def default_config() -> Config:
    """The configuration with every key at its default (the text is canonical)."""
    values, warnings = _validate({"inflation": {}}, "<defaults>")
    text = _build(values, warnings, text="", source="<defaults>").to_toml()
    return _build(values, warnings, text=text, source="<defaults>")


# ======================================================================================
# reference documentation
# ======================================================================================


def _md(text: str) -> str:
    return text.replace("|", "\\|")


def config_reference_markdown() -> str:
    """Markdown reference: one table per section (key, type, unit, default, allowed, meaning)."""
    out = ["# Configuration reference", ""]
    out.append(
        "Every section is optional except "
        + ", ".join(f"`[{s.name}]`" for s in SECTIONS if s.required)
        + "; a missing key takes its default. A key that applies only to some "
        "`model`/`kind` is an error otherwise."
    )
    for section in SECTIONS:
        out += ["", f"## [{section.name}]", "", section.description, ""]
        out.append("| key | type | unit | default | allowed | meaning |")
        out.append("|---|---|---|---|---|---|")
        for f in SCHEMA:
            if f.section != section.name:
                continue
            default = "required" if f.default is REQUIRED else f"`{_toml_value(f.default)}`"
            meaning = f.description
            if f.only is not None:
                meaning = f"*only for {f.applies_doc()}:* {meaning}"
            row = [f"`{f.key}`", _TYPES[f.type], f.unit or "-", default, f.allowed(), meaning]
            out.append("| " + " | ".join(_md(cell) for cell in row) + " |")
    return "\n".join(out) + "\n"
