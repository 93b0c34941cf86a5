"""Baryon acoustic oscillation distances: the shipped DESI DR2 data, the sound horizon and chi^2.

numpy only (no JAX).

Observables (flat space, c in km/s, H in km/s/Mpc, distances in Mpc)
--------------------------------------------------------------------
    D_M(z) = D_C(z) = c int_0^z dz'/H(z'),   D_H(z) = c/H(z),   D_V(z) = (z D_M^2 D_H)^(1/3),

each measured in units of the sound horizon at the drag epoch, r_d.

Data
----
``data/desi_dr2_bao.csv`` (DESI Collaboration 2025, arXiv:2503.14738): per tracer a
Gaussian in (D_M/r_d, D_H/r_d) with correlation coefficient rho, the BGS sample in D_V/r_d
alone.  The covariance is block diagonal: one 2x2 block
[[s_M^2, rho s_M s_H], [rho s_M s_H, s_H^2]] per tracer, s_V^2 for BGS.

chi^2 with r_d from the model, and r_d-free
-------------------------------------------
With x the model distances in Mpc, d the data and W = C^-1, chi^2(r_d) =
(d - x/r_d)^T W (d - x/r_d) is a quadratic in s = 1/r_d, minimised at

    s* = x^T W d / x^T W x,     chi^2_min = d^T W d - (x^T W d)^2 / (x^T W x).

Because every model distance scales as 1/H0 at fixed shape E(z), the data constrain only
the product H0 r_d; the r_d-free chi^2 needs no model of recombination.

The sound horizon of a run
--------------------------
r_d = int_{z_d}^inf c_s/H dz needs the drag redshift z_d to ~0.02% to be useful at DESI
precision; the Eisenstein & Hu (1998) fit for z_d makes r_d about 2.5% too large.  This
module uses the fit of Aubourg et al. (2015, PRD 92, 123516, eq. 16) calibrated on a
Boltzmann code with full recombination,

    r_d = 55.154 exp(-72.3 (omega_nu + 0.0006)^2) / (omega_cb^0.25351 omega_b^0.12807) Mpc,

with omega_nu = 0 (massless neutrinos, as in every backreact history); coefficients from
memory, checked here against the r_drag = 147.21 +- 0.23 Mpc that Planck 2018 reports for
its parameters (A&A 641, A6, Table 2): the fit gives 147.20 Mpc.  Quoted accuracy ~0.02%
(from memory).  It holds only for a standard early universe: N_eff within 0.05 of 3.046,
T_CMB = 2.7255 K, and a spectator whose energy fraction before and during recombination
is negligible.  :func:`sound_horizon_Mpc` refuses otherwise (a fraction f changes H, and
with it r_d, by about f/2; the limit 1e-3 keeps that below the fit's own error budget at
DESI precision).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from importlib import resources

import numpy as np

from backreact.constants import SPEED_OF_LIGHT_KM_S, T_CMB_K

__all__ = [
    "BAOData",
    "BAOFit",
    "load_desi_dr2",
    "parse_bao_table",
    "model_distances_Mpc",
    "bao_chi_square",
    "sound_horizon_Mpc",
    "SoundHorizonError",
    "EARLY_FRACTION_LIMIT",
]

#: Largest spectator energy fraction at z >= EARLY_REDSHIFT for which r_d is computed.
EARLY_FRACTION_LIMIT = 1e-3
#: Redshift window in which the early universe must be standard: recombination and the
#: radiation era before it that the sound-horizon integral sees (its integrand falls as
#: 1/z^2 there, so z > 1e8 contributes below 1e-5 of r_d; inflation is not checked).
EARLY_REDSHIFT = 1000.0
EARLY_REDSHIFT_MAX = 1e8
_NEFF_STANDARD = 3.046
_NEFF_SLACK = 0.05
_TCMB_SLACK = 1e-3


class SoundHorizonError(ValueError):
    """The sound-horizon fit does not apply to this run; the message says why (one line)."""


@dataclass(frozen=True)
class BAOData:
    """BAO measurements as one data vector with its covariance.

    ``tracer``, ``kind`` ("DM", "DH" or "DV", each over r_d) and ``z`` per entry;
    ``value`` (dimensionless), ``sigma`` and the full ``covariance``.
    """

    tracer: list[str]
    kind: list[str]
    z: np.ndarray
    value: np.ndarray
    sigma: np.ndarray
    covariance: np.ndarray
    comments: list[str] = field(default_factory=list)
    name: str = "bao"

    def __len__(self) -> int:
        return int(self.z.shape[0])


def _cell(cells: dict[str, str], key: str, where: str) -> float | None:
    text = cells.get(key, "").strip()
    if not text:
        return None
    try:
        value = float(text)
    except ValueError:
        raise ValueError(f"{where}: {key} is not a number ({text!r})") from None
    if not math.isfinite(value):
        raise ValueError(f"{where}: {key} must be finite, got {text!r}")
    return value


def parse_bao_table(text: str, source: str = "<bao>", name: str = "bao") -> BAOData:
    """Parse a BAO table in the layout of the shipped DESI DR2 file (see module docstring)."""
    comments: list[str] = []
    header: list[str] | None = None
    tracer, kind, zs, values, sigmas = [], [], [], [], []
    blocks: list[np.ndarray] = []
    for lineno, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith("#"):
            comments.append(stripped[1:].strip())
            continue
        parts = [p.strip() for p in stripped.split(",")]
        if header is None:
            header = parts
            continue
        where = f"{source} line {lineno}"
        if len(parts) != len(header):
            raise ValueError(f"{where}: expected {len(header)} cells, got {len(parts)}")
        cells = dict(zip(header, parts, strict=True))
        z = _cell(cells, "z_eff", where)
        if z is None or z <= 0:
            raise ValueError(f"{where}: z_eff must be a number > 0")
        dm, sdm = _cell(cells, "DM_over_rd", where), _cell(cells, "sigma_DM", where)
        dh, sdh = _cell(cells, "DH_over_rd", where), _cell(cells, "sigma_DH", where)
        dv, sdv = _cell(cells, "DV_over_rd", where), _cell(cells, "sigma_DV", where)
        if dm is not None and dh is not None:
            rho = _cell(cells, "corr_DM_DH", where) or 0.0
            if sdm is None or sdh is None or sdm <= 0 or sdh <= 0 or not -1 < rho < 1:
                raise ValueError(f"{where}: needs sigma_DM > 0, sigma_DH > 0 and -1 < corr_DM_DH < 1")
            tracer += [cells["tracer"]] * 2
            kind += ["DM", "DH"]
            zs += [z, z]
            values += [dm, dh]
            sigmas += [sdm, sdh]
            blocks.append(np.array([[sdm**2, rho * sdm * sdh], [rho * sdm * sdh, sdh**2]]))
        elif dv is not None:
            if sdv is None or sdv <= 0:
                raise ValueError(f"{where}: needs sigma_DV > 0")
            tracer.append(cells["tracer"])
            kind.append("DV")
            zs.append(z)
            values.append(dv)
            sigmas.append(sdv)
            blocks.append(np.array([[sdv**2]]))
        else:
            raise ValueError(f"{where}: a row needs DM_over_rd and DH_over_rd, or DV_over_rd")
    n = len(values)
    cov = np.zeros((n, n))
    i = 0
    for b in blocks:
        k = b.shape[0]
        cov[i : i + k, i : i + k] = b
        i += k
    return BAOData(
        tracer,
        kind,
        np.asarray(zs, dtype=np.float64),
        np.asarray(values, dtype=np.float64),
        np.asarray(sigmas, dtype=np.float64),
        cov,
        comments,
        name,
    )


def load_desi_dr2() -> BAOData:
    """The shipped DESI DR2 BAO measurements (13 numbers: BGS D_V, six tracers' D_M and D_H)."""
    text = resources.files("backreact").joinpath("data", "desi_dr2_bao.csv").read_text(encoding="utf-8")
    return parse_bao_table(text, source="shipped:desi_dr2_bao.csv", name="desi_dr2")


def model_distances_Mpc(data: BAOData, hubble, comoving_distance) -> np.ndarray:
    """D_M, D_H or D_V (Mpc) of a model at each entry of ``data``.

    ``hubble(z)`` gives H in km/s/Mpc and ``comoving_distance(z)`` D_C in Mpc (flat).
    """
    dm = np.asarray(comoving_distance(data.z), dtype=np.float64)
    dh = SPEED_OF_LIGHT_KM_S / np.asarray(hubble(data.z), dtype=np.float64)
    dv = np.cbrt(data.z * dm**2 * dh)
    kind = np.asarray(data.kind)
    return np.where(kind == "DM", dm, np.where(kind == "DH", dh, dv))


@dataclass(frozen=True)
class BAOFit:
    """chi^2 of model distances ``x`` (Mpc) against BAO data: r_d-free, and with a given r_d."""

    data: BAOData
    distances_Mpc: np.ndarray
    chi2_free: float
    best_rd_Mpc: float
    rd_Mpc: float | None = None
    chi2_rd: float | None = None

    @property
    def points(self) -> int:
        return len(self.data)

    def pulls(self, rd_Mpc: float | None = None) -> np.ndarray:
        """(data - model)/sigma per entry, at ``rd_Mpc`` (default: the model's r_d if known,
        else the best-fit r_d)."""
        rd = rd_Mpc if rd_Mpc is not None else (self.rd_Mpc if self.rd_Mpc is not None else self.best_rd_Mpc)
        return (self.data.value - self.distances_Mpc / rd) / self.data.sigma


def _quadratic_terms(data: BAOData, x: np.ndarray) -> tuple[float, float, float]:
    chol = np.linalg.cholesky(data.covariance)
    wd = np.linalg.solve(chol, data.value)
    wx = np.linalg.solve(chol, x)
    return float(wd @ wd), float(wx @ wd), float(wx @ wx)


def bao_chi_square(data: BAOData, distances_Mpc, rd_Mpc: float | None = None) -> BAOFit:
    """chi^2 minimised over r_d analytically (module docstring) and, if ``rd_Mpc`` is given, at it."""
    x = np.asarray(distances_Mpc, dtype=np.float64)
    dd, xd, xx = _quadratic_terms(data, x)
    chi2_free = dd - xd * xd / xx
    chi2_rd = None
    if rd_Mpc is not None:
        s = 1.0 / rd_Mpc
        chi2_rd = dd - 2.0 * s * xd + s * s * xx
    return BAOFit(data, x, float(max(chi2_free, 0.0)), float(xx / xd), rd_Mpc, chi2_rd)


def _aubourg_rd(omega_b: float, omega_cb: float, omega_nu: float = 0.0) -> float:
    return 55.154 * math.exp(-72.3 * (omega_nu + 0.0006) ** 2) / (omega_cb**0.25351 * omega_b**0.12807)


def sound_horizon_Mpc(
    omega_b: float,
    omega_c: float,
    *,
    n_eff: float = _NEFF_STANDARD,
    cmb_temperature_K: float = T_CMB_K,
    redshift=None,
    spectator_fraction=None,
) -> float:
    """r_d in Mpc from the calibrated fit (module docstring) for a standard early universe.

    ``redshift`` and ``spectator_fraction`` (arrays along a run's history, optional) are
    checked: the spectator's energy fraction must stay below EARLY_FRACTION_LIMIT for
    EARLY_REDSHIFT <= z <= EARLY_REDSHIFT_MAX.  Raises SoundHorizonError (one line) when
    the fit does not apply.
    """
    if not (omega_b > 0 and omega_c >= 0):
        raise SoundHorizonError(
            f"the r_d fit needs omega_b > 0 and omega_c >= 0, got {omega_b:g}, {omega_c:g}"
        )
    if abs(n_eff - _NEFF_STANDARD) > _NEFF_SLACK:
        raise SoundHorizonError(
            f"the r_d fit holds for N_eff = {_NEFF_STANDARD} +- {_NEFF_SLACK}, this run has {n_eff:g}; "
            "use the r_d-free chi^2"
        )
    if abs(cmb_temperature_K - T_CMB_K) > _TCMB_SLACK:
        raise SoundHorizonError(
            f"the r_d fit holds for T_CMB = {T_CMB_K} K, this run has {cmb_temperature_K:g} K; "
            "use the r_d-free chi^2"
        )
    if spectator_fraction is not None:
        z = np.asarray(redshift, dtype=np.float64)
        f = np.abs(np.asarray(spectator_fraction, dtype=np.float64))
        early = (z >= EARLY_REDSHIFT) & (z <= EARLY_REDSHIFT_MAX) & np.isfinite(f)
        if early.any():
            k = int(np.argmax(np.where(early, f, -1.0)))
            if f[k] > EARLY_FRACTION_LIMIT:
                raise SoundHorizonError(
                    f"the spectator carries {f[k]:.3g} of the energy at z = {z[k]:.4g} (limit "
                    f"{EARLY_FRACTION_LIMIT:g} for z >= {EARLY_REDSHIFT:g}): the early universe is not "
                    "standard, so no r_d fit applies; use the r_d-free chi^2"
                )
    return _aubourg_rd(omega_b, omega_b + omega_c)
