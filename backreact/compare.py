"""Compare a run's expansion rate with H(z) tables and with its matching flat LambdaCDM.

numpy only (no JAX): a stored run file is all this module needs.

The run's H(z)
--------------
The run stores ln H and epsilon = -d ln H/dN on its e-fold grid N = ln a.  H at any
redshift is the cubic Hermite interpolant of ln H in N with those exact slopes,

    ln H(N) = Hermite(N; ln H_i, -epsilon_i),   N = -ln(1 + z),

whose error is at most h^4 max|d^4 ln H/dN^4| / 384 on a grid of spacing h: a few 1e-9
relative for the default late-time spacing h = 0.0215 (measured: 2.8e-9 at most over
0 <= z <= 2.5 for the demo run, whose H(z) is LambdaCDM's to 1e-14 at the nodes).
Redshifts outside the stored history are refused.

The matching LambdaCDM
----------------------
In a run H0 is an output (a = 1 is fixed by the CMB temperature).  Its *matching*
LambdaCDM is the flat LambdaCDM with the run's H0, omega_b, omega_c and radiation content
(T_CMB and N_eff of its config), and Omega_lambda = 1 - Omega_m - Omega_r.  The comparison
records exactly these parameters.

Statistics, per table (for the run and for the matching LambdaCDM side by side)
------------------------------------------------------------------------------
ratio H_model/H_table at every table redshift (mean, min, max); max |H_model/H_table - 1|
over the chosen z range; chi^2 = sum ((H_model - H_i)/sigma_i)^2 and chi^2 per point when
the table has errors.  Against the matching LambdaCDM directly: H_run/H_LCDM on a grid
uniform in z over the chosen range, its mean, extremes and max |ratio - 1| with its z.
Against BAO distances (DESI DR2 by default): chi^2 r_d-free and with the r_d of the
calibrated fit, per-entry pulls, for both (see :mod:`backreact.bao`); D_M = D_C is the
integral of the same Hermite curve, so it inherits only the interpolation error.
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import numpy as np

from backreact.bao import (
    BAOData,
    BAOFit,
    SoundHorizonError,
    bao_chi_square,
    load_desi_dr2,
    model_distances_Mpc,
    sound_horizon_Mpc,
)
from backreact.constants import SPEED_OF_LIGHT_KM_S
from backreact.reference import FlatLCDM
from backreact.tables import HubbleTable, chi_square

__all__ = [
    "RunHubble",
    "TableComparison",
    "LCDMComparison",
    "Comparison",
    "matching_lcdm",
    "compare_table",
    "compare_with_lcdm",
    "compare_bao",
    "BAOComparison",
    "compare_run",
]

#: Default redshift range of the statistics (covers the shipped measured data).
DEFAULT_Z_RANGE = (0.0, 2.5)
#: Points of the direct run / LambdaCDM grid.
DEFAULT_GRID_POINTS = 251


def _hermite(x, nodes, values, slopes):
    """Cubic Hermite interpolation on increasing nodes (numpy); x inside [nodes[0], nodes[-1]]."""
    i = np.clip(np.searchsorted(nodes, x, side="right") - 1, 0, nodes.shape[0] - 2)
    h = nodes[i + 1] - nodes[i]
    t = (x - nodes[i]) / h
    t2 = t * t
    t3 = t2 * t
    return (
        (2 * t3 - 3 * t2 + 1) * values[i]
        + (t3 - 2 * t2 + t) * h * slopes[i]
        + (-2 * t3 + 3 * t2) * values[i + 1]
        + (t3 - t2) * h * slopes[i + 1]
    )


@dataclass(frozen=True)
class RunHubble:
    """H(z) of a stored run, in km/s/Mpc, by Hermite interpolation of ln H in N."""

    efolds: np.ndarray
    ln_hubble: np.ndarray
    slope: np.ndarray

    @classmethod
    def from_history(cls, history: Mapping[str, np.ndarray]) -> RunHubble:
        """From a run's ``history`` (needs ``efolds``, ``hubble_km_s_Mpc``; uses ``epsilon``)."""
        for name in ("efolds", "hubble_km_s_Mpc"):
            if name not in history:
                raise ValueError(f"the run's history has no {name!r} dataset, so H(z) is unknown")
        n = np.asarray(history["efolds"], dtype=np.float64)
        h = np.asarray(history["hubble_km_s_Mpc"], dtype=np.float64)
        if not np.all(h > 0):  # also catches NaN
            raise ValueError("the run's H(z) is not positive and finite everywhere (a failed run?)")
        ln_h = np.log(h)
        if "epsilon" in history:
            slope = -np.asarray(history["epsilon"], dtype=np.float64)
        else:  # older or foreign files: slopes from a spline-like central difference
            slope = np.gradient(ln_h, n)
        if not (np.all(np.isfinite(ln_h)) and np.all(np.isfinite(slope))):
            raise ValueError("the run's H(z) is not finite everywhere (a failed run?)")
        return cls(n, ln_h, slope)

    @property
    def z_max(self) -> float:
        return float(np.expm1(-self.efolds[0]))

    @property
    def z_min(self) -> float:
        return float(np.expm1(-self.efolds[-1]))

    def _ln_h(self, n):
        return _hermite(n, self.efolds, self.ln_hubble, self.slope)

    def _efolds_of(self, z) -> np.ndarray:
        z = np.asarray(z, dtype=np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            n = -np.log1p(z)
        outside = (n < self.efolds[0]) | (n > self.efolds[-1]) | ~np.isfinite(n)
        if np.any(outside):
            raise ValueError(
                f"redshift {float(np.ravel(z[outside])[0]):g} lies outside the run's history "
                f"({self.z_min:.3g} <= z <= {self.z_max:.3g})"
            )
        return n

    def comoving_distance_Mpc(self, z) -> np.ndarray:
        """Line-of-sight comoving distance D_C(z) = c int_{N(z)}^0 e^{-N} dN / H(N) in Mpc.

        Integrates the same Hermite curve as ``__call__`` interval by interval with an
        8-node Gauss-Legendre rule (the curve is a smooth function inside each interval,
        so the rule is exact to round-off there): D_C inherits only the interpolation error.
        """
        n = self._efolds_of(z)
        nodes = self.efolds
        x, w = np.polynomial.legendre.leggauss(8)

        def integral(lo, hi):  # int_lo^hi c e^-N / H(N) dN, vectorized over intervals
            mid, half = 0.5 * (hi + lo), 0.5 * (hi - lo)
            t = mid[..., None] + half[..., None] * x
            f = SPEED_OF_LIGHT_KM_S * np.exp(-t - self._ln_h(t))
            return half * np.sum(w * f, axis=-1)

        cumulative = np.concatenate([[0.0], np.cumsum(integral(nodes[:-1], nodes[1:]))])

        def at(m):  # int_{N_0}^{m} for an array m
            i = np.clip(np.searchsorted(nodes, m, side="right") - 1, 0, nodes.shape[0] - 2)
            return cumulative[i] + integral(nodes[i], m)

        return at(np.zeros(1))[0] - at(n)

    def __call__(self, z) -> np.ndarray:
        return np.exp(self._ln_h(self._efolds_of(z)))


def _config_cosmology(config_toml: str) -> dict[str, float]:
    """omega_b, omega_c, cmb_temperature_K, n_eff of a stored config (defaults filled in)."""
    from backreact.config import parse_config

    cfg = parse_config(config_toml, source="the run's stored config")
    c = cfg.cosmology
    return {
        "omega_b": float(c.omega_b),
        "omega_c": float(c.omega_c),
        "cmb_temperature_K": float(c.cmb_temperature_K),
        "n_eff": float(c.n_eff),
    }


def matching_lcdm(config_toml: str, H0_km_s_Mpc: float) -> FlatLCDM:
    """The flat LambdaCDM with a run's H0, omega_b, omega_c and radiation (module docstring).

    Raises ValueError when the run's H0 is too low for matter and radiation alone
    (Omega_lambda would be negative), naming both numbers.
    """
    pars = _config_cosmology(config_toml)
    try:
        return FlatLCDM(float(H0_km_s_Mpc), **pars)
    except ValueError as exc:
        raise ValueError(
            f"no flat LambdaCDM matches this run: its H0 = {H0_km_s_Mpc:.6g} km/s/Mpc is below the value "
            f"of its matter and radiation alone ({exc})"
        ) from None


def lcdm_parameters(lcdm: FlatLCDM) -> dict[str, float]:
    """The parameters that define a FlatLCDM, as they are recorded with a comparison."""
    return {
        "lcdm_H0_km_s_Mpc": lcdm.H0_km_s_Mpc,
        "lcdm_omega_b": lcdm.omega_b,
        "lcdm_omega_c": lcdm.omega_c,
        "lcdm_cmb_temperature_K": lcdm.cmb_temperature_K,
        "lcdm_n_eff": lcdm.n_eff,
        "lcdm_Omega_m": lcdm.Omega_m,
        "lcdm_Omega_r": lcdm.Omega_r,
        "lcdm_Omega_lambda": lcdm.Omega_lambda,
    }


def _range_mask(z: np.ndarray, z_range: tuple[float, float]) -> np.ndarray:
    return (z >= z_range[0]) & (z <= z_range[1])


def _ratio_stats(model: np.ndarray, data: np.ndarray, inside: np.ndarray) -> dict[str, float]:
    ratio = model / data
    return {
        "ratio_mean": float(np.mean(ratio)),
        "ratio_min": float(np.min(ratio)),
        "ratio_max": float(np.max(ratio)),
        "max_abs_deviation": float(np.max(np.abs(ratio[inside] - 1.0))) if inside.any() else float("nan"),
    }


@dataclass(frozen=True)
class TableComparison:
    """A run and its matching LambdaCDM against one H(z) table."""

    table: HubbleTable
    hubble_run: np.ndarray
    hubble_lcdm: np.ndarray
    z_range: tuple[float, float]
    run: dict[str, float] = field(default_factory=dict)
    lcdm: dict[str, float] = field(default_factory=dict)

    @property
    def points_in_range(self) -> int:
        return int(_range_mask(self.table.z, self.z_range).sum())

    def attributes(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "table_name": self.table.name,
            "table_source": self.table.source,
            "points": len(self.table),
            "points_in_range": self.points_in_range,
        }
        out.update({f"run_{k}": v for k, v in self.run.items()})
        out.update({f"lcdm_{k}": v for k, v in self.lcdm.items()})
        return out

    def datasets(self) -> dict[str, np.ndarray]:
        out = {"redshift": self.table.z, "hubble_table": self.table.H}
        if self.table.sigma is not None:
            out["sigma_table"] = self.table.sigma
        out["hubble_run"] = self.hubble_run
        out["hubble_lcdm"] = self.hubble_lcdm
        return out


def compare_table(
    run_hubble: RunHubble,
    lcdm: FlatLCDM,
    table: HubbleTable,
    z_range: tuple[float, float] = DEFAULT_Z_RANGE,
) -> TableComparison:
    """Statistics of the run and of its matching LambdaCDM against ``table`` (module docstring)."""
    h_run = run_hubble(table.z)
    h_lcdm = np.asarray(lcdm.hubble_km_s_Mpc(table.z), dtype=np.float64)
    inside = _range_mask(table.z, z_range)
    stats = {}
    for label, model in (("run", h_run), ("lcdm", h_lcdm)):
        s = _ratio_stats(model, table.H, inside)
        if table.sigma is not None:
            chi2 = chi_square(model, table)
            s["chi2"] = chi2
            s["chi2_per_point"] = chi2 / len(table)
        stats[label] = s
    return TableComparison(table, h_run, h_lcdm, z_range, stats["run"], stats["lcdm"])


@dataclass(frozen=True)
class LCDMComparison:
    """The run's H(z) against its matching LambdaCDM on a redshift grid."""

    redshift: np.ndarray
    hubble_run: np.ndarray
    hubble_lcdm: np.ndarray

    @property
    def ratio(self) -> np.ndarray:
        return self.hubble_run / self.hubble_lcdm

    def statistics(self) -> dict[str, float]:
        dev = np.abs(self.ratio - 1.0)
        k = int(np.argmax(dev))
        return {
            "ratio_mean": float(np.mean(self.ratio)),
            "ratio_min": float(np.min(self.ratio)),
            "ratio_max": float(np.max(self.ratio)),
            "max_abs_deviation": float(dev[k]),
            "redshift_of_max_deviation": float(self.redshift[k]),
        }

    def datasets(self) -> dict[str, np.ndarray]:
        return {
            "redshift": self.redshift,
            "hubble_run": self.hubble_run,
            "hubble_lcdm": self.hubble_lcdm,
            "ratio": self.ratio,
        }


def compare_with_lcdm(
    run_hubble: RunHubble,
    lcdm: FlatLCDM,
    z_range: tuple[float, float] = DEFAULT_Z_RANGE,
    points: int = DEFAULT_GRID_POINTS,
) -> LCDMComparison:
    """H_run/H_LCDM on ``points`` redshifts uniform over ``z_range``."""
    z = np.linspace(z_range[0], z_range[1], int(points))
    return LCDMComparison(z, run_hubble(z), np.asarray(lcdm.hubble_km_s_Mpc(z), dtype=np.float64))


@dataclass(frozen=True)
class BAOComparison:
    """The run and its matching LambdaCDM against BAO distances (see backreact.bao).

    ``rd_run_Mpc`` is None (with ``rd_note`` saying why) when the sound-horizon fit does
    not apply to the run; the r_d-free chi^2 is always there.
    """

    run: BAOFit
    lcdm: BAOFit
    H0_run: float
    H0_lcdm: float
    rd_note: str = ""

    def attributes(self) -> dict[str, Any]:
        out: dict[str, Any] = {"data": self.run.data.name, "points": self.run.points}
        for label, fit, h0 in (("run", self.run, self.H0_run), ("lcdm", self.lcdm, self.H0_lcdm)):
            out[f"{label}_chi2_free"] = fit.chi2_free
            out[f"{label}_chi2_free_per_point"] = fit.chi2_free / fit.points
            out[f"{label}_best_rd_Mpc"] = fit.best_rd_Mpc
            out[f"{label}_best_H0_rd_km_s"] = h0 * fit.best_rd_Mpc
            if fit.rd_Mpc is not None:
                out[f"{label}_rd_Mpc"] = fit.rd_Mpc
                out[f"{label}_chi2_rd"] = fit.chi2_rd
                out[f"{label}_chi2_rd_per_point"] = fit.chi2_rd / fit.points
        if self.rd_note:
            out["rd_note"] = self.rd_note
        return out

    def datasets(self) -> dict[str, np.ndarray]:
        d = self.run.data
        return {
            "redshift": d.z,
            "tracer": np.asarray(d.tracer, dtype=str),
            "kind": np.asarray(d.kind, dtype=str),
            "value": d.value,
            "sigma": d.sigma,
            "distance_run_Mpc": self.run.distances_Mpc,
            "distance_lcdm_Mpc": self.lcdm.distances_Mpc,
            "pull_run": self.run.pulls(),
            "pull_lcdm": self.lcdm.pulls(),
        }


def compare_bao(
    run_hubble: RunHubble,
    lcdm: FlatLCDM,
    history: Mapping[str, np.ndarray],
    data: BAOData | None = None,
) -> BAOComparison:
    """chi^2 of the run and its matching LambdaCDM against BAO data (default: DESI DR2).

    Both r_d-free and, where the calibrated fit applies, with r_d of the model: the
    matching LambdaCDM and the run share omega_b, omega_c and radiation, so they share r_d
    when the run's spectator is negligible before recombination; otherwise the run has no
    r_d here and ``rd_note`` says why.
    """
    data = data if data is not None else load_desi_dr2()
    rd_lcdm = sound_horizon_Mpc(
        lcdm.omega_b, lcdm.omega_c, n_eff=lcdm.n_eff, cmb_temperature_K=lcdm.cmb_temperature_K
    )
    note = ""
    try:
        rd_run = sound_horizon_Mpc(
            lcdm.omega_b,
            lcdm.omega_c,
            n_eff=lcdm.n_eff,
            cmb_temperature_K=lcdm.cmb_temperature_K,
            redshift=history.get("redshift"),
            spectator_fraction=history.get("fraction_spectator"),
        )
    except SoundHorizonError as exc:
        rd_run, note = None, str(exc)
    x_run = model_distances_Mpc(data, run_hubble, run_hubble.comoving_distance_Mpc)
    x_lcdm = model_distances_Mpc(data, lcdm.hubble_km_s_Mpc, lcdm.comoving_distance_Mpc)
    return BAOComparison(
        bao_chi_square(data, x_run, rd_run),
        bao_chi_square(data, x_lcdm, rd_lcdm),
        float(run_hubble(np.zeros(1))[0]),
        lcdm.H0_km_s_Mpc,
        note,
    )


def _group_name(prefix: str, name: str, taken: set[str]) -> str:
    base = prefix + (re.sub(r"[^A-Za-z0-9_]+", "_", name).strip("_") or "table")
    out, k = base, 2
    while out in taken:
        out, k = f"{base}_{k}", k + 1
    taken.add(out)
    return out


@dataclass(frozen=True)
class Comparison:
    """Everything one comparison of a run produced; ``as_group()`` is what the file stores."""

    lcdm_model: FlatLCDM
    z_range: tuple[float, float]
    tables: list[TableComparison]
    lcdm: LCDMComparison | None = None
    bao: BAOComparison | None = None

    def as_group(self) -> dict[str, Any]:
        """Nested mapping for the run file's ``comparison`` group (scalars -> attributes,
        arrays -> datasets, mappings -> subgroups ``table_<name>`` and ``lcdm``)."""
        group: dict[str, Any] = {
            "created_utc": datetime.now(UTC).isoformat(timespec="seconds"),
            "z_min": float(self.z_range[0]),
            "z_max": float(self.z_range[1]),
            "lcdm_definition": "flat LambdaCDM with the run's H0, omega_b, omega_c, T_CMB and N_eff "
            "(massless neutrinos); Omega_lambda = 1 - Omega_m - Omega_r",
            "tables": ",".join(t.table.name for t in self.tables),
        }
        group.update(lcdm_parameters(self.lcdm_model))
        taken: set[str] = {"lcdm", "bao"}
        for t in self.tables:
            sub: dict[str, Any] = dict(t.attributes())
            sub.update(t.datasets())
            group[_group_name("table_", t.table.name, taken)] = sub
        if self.lcdm is not None:
            sub = dict(self.lcdm.statistics())
            sub.update(self.lcdm.datasets())
            group["lcdm"] = sub
        if self.bao is not None:
            sub = dict(self.bao.attributes())
            sub.update(self.bao.datasets())
            group["bao"] = sub
        return group


def compare_run(
    history: Mapping[str, np.ndarray],
    config_toml: str,
    H0_km_s_Mpc: float,
    tables: Sequence[HubbleTable] = (),
    *,
    with_lcdm: bool = True,
    with_bao: bool = False,
    z_range: tuple[float, float] = DEFAULT_Z_RANGE,
    points: int = DEFAULT_GRID_POINTS,
) -> Comparison:
    """Compare a stored run (its ``history``, config text and H0) with tables and LambdaCDM.

    ``z_range`` = (z_min, z_max) with 0 <= z_min < z_max; raises ValueError naming the
    input otherwise, or when a table's redshifts lie outside the run's history.
    """
    z_lo, z_hi = (float(v) for v in z_range)
    if not (np.isfinite(z_lo) and np.isfinite(z_hi) and 0.0 <= z_lo < z_hi):
        raise ValueError(
            f"the redshift range must satisfy 0 <= z_min < z_max, got z_min = {z_lo:g}, z_max = {z_hi:g}"
        )
    if points < 2:
        raise ValueError(f"the LambdaCDM grid needs at least 2 points, got {points}")
    run_h = RunHubble.from_history(history)
    lcdm = matching_lcdm(config_toml, H0_km_s_Mpc)
    results = [compare_table(run_h, lcdm, t, (z_lo, z_hi)) for t in tables]
    direct = compare_with_lcdm(run_h, lcdm, (z_lo, z_hi), points) if with_lcdm else None
    bao = compare_bao(run_h, lcdm, history) if with_bao else None
    return Comparison(lcdm, (z_lo, z_hi), results, direct, bao)
