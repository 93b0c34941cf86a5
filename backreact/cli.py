"""Command-line interface: ``backreact run``, ``show``, ``compare``, ``lcdm-table``, ``plot`` and ``keys``.

Exit codes (the contract scripts and batch jobs rely on):

* 0 -- success
* 1 -- numerical failure of the solve (or an unexpected internal error)
* 2 -- bad input: configuration, run file, output path or command-line usage
* 130 -- interrupted (Ctrl-C); nothing is written

Every error is reported as a single ``error: ...`` line on stderr, never as a traceback
(set ``BACKREACT_TRACEBACK=1`` to see the traceback of an unexpected internal error).
Warnings are single ``warning: ...`` lines on stderr; tables go to stdout.

This module must not import JAX at import time: a configuration is validated, and the
output location checked, before the computation (and with it JAX) is imported inside
:func:`run`.
"""

from __future__ import annotations

import math
import numbers
import os
import sys
import tomllib
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Annotated, Any

import typer
from rich.console import Console
from rich.table import Table
from rich.text import Text

from backreact import constants
from backreact.config import (
    REQUIRED,
    SCHEMA,
    SECTIONS,
    ConfigError,
    config_reference_markdown,
    default_config_path,
    load_config,
)

__all__ = ["EXIT_OK", "EXIT_NUMERICAL", "EXIT_INPUT", "EXIT_INTERRUPTED", "app", "main", "summary_table"]

EXIT_OK = 0
EXIT_NUMERICAL = 1
EXIT_INPUT = 2
EXIT_INTERRUPTED = 130

_TRACEBACK_ENV = "BACKREACT_TRACEBACK"

try:  # typer >= 0.22 ships its own copy of click
    from typer import _click as _click
except ImportError:  # pragma: no cover - older typer uses click itself
    import click as _click

app = typer.Typer(
    name="backreact",
    help="Self-consistent expansion histories sourced by the inflationary memory of a light spectator.",
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
)


# ======================================================================================
# output helpers
# ======================================================================================


def _one_line(text: object) -> str:
    collapsed = " ".join(str(text).split())
    return collapsed or type(text).__name__


def _error(message: object) -> None:
    """One ``error:`` line on stderr (plain text: no markup, no wrapping)."""
    print(f"error: {_one_line(message)}", file=sys.stderr, flush=True)


def _warning(message: object) -> None:
    print(f"warning: {_one_line(message)}", file=sys.stderr, flush=True)


def _stdout() -> Console:
    # Created per call so that it writes to the current sys.stdout (tests swap it).
    return Console(highlight=False)


def _stderr() -> Console:
    return Console(stderr=True, highlight=False)


def _fail(code: int, message: object) -> typer.Exit:
    _error(message)
    return typer.Exit(code)


def _fmt(value: object) -> str:
    """A number with 5 significant digits; NaN as 'n/a'."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if not isinstance(value, numbers.Real):
        return str(value)
    x = float(value)
    if math.isnan(x):
        return "n/a"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    if x == 0:
        return "0"
    if 1e-3 <= abs(x) < 1e6:
        return f"{x:.5g}"
    mantissa, exponent = f"{x:.4e}".split("e")
    return f"{mantissa}e{int(exponent):+d}"


# ======================================================================================
# the summary table (shared by run and show)
# ======================================================================================

# (key in today, label, unit)
_TODAY_ROWS: tuple[tuple[str, str, str], ...] = (
    ("H0_km_s_Mpc", "H0", "km/s/Mpc"),
    ("age_Gyr", "age", "Gyr"),
    ("fraction_radiation", "Omega_radiation", ""),
    ("fraction_matter", "Omega_matter", ""),
    ("fraction_lambda", "Omega_lambda", ""),
    ("fraction_spectator", "Omega_spectator", ""),
    ("w0", "w0 (dark energy)", ""),
    ("wa", "wa (dark energy)", ""),
    ("efolds_inflation", "e-folds of inflation", ""),
    ("efolds_end_of_inflation_to_today", "e-folds from end of inflation to today", ""),
    ("hubble_end_of_inflation_GeV", "H at end of inflation", "GeV"),
    ("hubble_at_pivot_exit_GeV", f"H at pivot exit (k = {constants.PIVOT_K_MPC:g}/Mpc)", "GeV"),
    ("tensor_to_scalar_ratio", "tensor-to-scalar ratio r", ""),
    ("propagator_GeV2", "spectator variance A = <sigma^2> today", "GeV^2"),
)

# (key in diagnostics, label, unit)
_DIAGNOSTIC_ROWS: tuple[tuple[str, str, str], ...] = (
    ("slow_roll_n_s", "slow-roll n_s", ""),
    ("slow_roll_r", "slow-roll r", ""),
    ("propagator_method", "propagator method", ""),
    ("closure", "closure", ""),
    ("calibrated_parameter", "calibrated parameter", ""),
    ("calibrated_value", "calibrated value", ""),
    ("calibration_sensitivity", "d ln(target) / d ln(parameter)", ""),
    ("passes", "fixed-point passes", ""),
    ("final_residual", "final residual max |delta ln H|", ""),
    ("second_friedmann_residual", "second Friedmann equation residual", ""),
    ("lcdm_max_deviation", "max |H/H_LCDM - 1|, 0 < z < 3", ""),
    ("lcdm_deviation_redshift", "  at redshift", ""),
    ("dlnA_dlnmu", "d ln A0 / d ln mu (renormalization scale)", ""),
    ("dlnH0_dlnmu", "d ln H0 / d ln mu", ""),
    ("dlnA_dNstart", "d ln A0 / d N_start (start of the history)", ""),
    ("dlnH0_dNstart", "d ln H0 / d N_start", ""),
    ("prior_variance_Mp2", "prior variance A_prior", "M_p^2"),
    ("prior_de_sitter_efolds", "  as de Sitter e-folds at H_start", ""),
    ("validity_max", "largest closure validity ratio", ""),
    ("validity_verdict", "validity verdict", ""),
    ("propagator_seconds", "propagator and solve time (incl. compilation)", "s"),
)

_R_KEYS = {"tensor_to_scalar_ratio", "slow_roll_r"}


def _r_note(value: object) -> str:
    if isinstance(value, numbers.Real) and not isinstance(value, bool):
        if math.isfinite(float(value)) and float(value) > constants.R_UPPER_BOUND:
            return f"above bound r < {constants.R_UPPER_BOUND:g}"
    return ""


def _table(title: str, *columns: tuple[str, dict[str, Any]]) -> Table:
    """A table whose title and cells are plain text (never parsed as rich markup)."""
    table = Table(title=Text(title), title_justify="left")
    for name, options in columns:
        table.add_column(name, **{"overflow": "fold", **options})
    return table


def _add_row(table: Table, *cells: str) -> None:
    table.add_row(*(Text(cell) for cell in cells))


def summary_table(
    today: Mapping[str, Any], diagnostics: Mapping[str, Any] | None = None, title: str | None = "summary"
) -> Table:
    """Rows (quantity, value, unit, note) of a run's ``today`` scalars and diagnostics.

    Entries missing from ``today``/``diagnostics`` are left out; NaN is shown as "n/a".
    """
    diagnostics = diagnostics or {}
    table = _table(
        title or "",
        ("quantity", {}),
        ("value", {"justify": "right", "no_wrap": True}),
        ("unit", {"no_wrap": True}),
        ("note", {}),
    )
    for source, rows in ((today, _TODAY_ROWS), (diagnostics, _DIAGNOSTIC_ROWS)):
        for key, label, unit in rows:
            if key not in source:
                continue
            value = source[key]
            note = _r_note(value) if key in _R_KEYS else ""
            _add_row(table, label, _fmt(value), unit, note)
    if "reheating_temperature_GeV" in today:
        _add_row(table, "reheating temperature", _fmt(today["reheating_temperature_GeV"]), "GeV", "")
    return table


def _print_verdict(out: Console, diagnostics: Mapping[str, Any]) -> None:
    """The validity verdict and its explanation, as a paragraph under the summary table."""
    text = diagnostics.get("validity_explanation")
    if text:
        verdict = str(diagnostics.get("validity_verdict", ""))
        out.print(f"verdict: {verdict}: {text}", markup=False, soft_wrap=False)


def _metadata_table(record: Any, path: Path) -> Table:
    attrs = record.attrs
    table = _table(f"run file {path}", ("field", {"no_wrap": True}), ("value", {}))
    sha = str(attrs.get("config_sha256", ""))
    rows = [
        ("package version", str(attrs.get("package_version", ""))),
        ("schema version", str(attrs.get("schema_version", ""))),
        ("created", str(attrs.get("created_utc", "")) or "n/a"),
        ("config sha256", sha[:16] or "n/a"),
        ("converged", "yes" if record.converged else "no"),
        ("iterations", str(record.iterations)),
    ]
    for name, version in sorted((attrs.get("dependency_versions") or {}).items()):
        rows.append((f"version of {name}", "not installed" if version is None else str(version)))
    if record.warnings:
        rows.extend(("warning", _one_line(w)) for w in record.warnings)
    else:
        rows.append(("warnings", "none"))
    for label, value in rows:
        _add_row(table, label, value)
    return table


# ======================================================================================
# run
# ======================================================================================


def _output_path(output: Path | None, cfg: Any) -> Path:
    path = output if output is not None else cfg.output_path()
    if path.suffix != ".h5":
        raise _fail(EXIT_INPUT, f"output file {path} must end in .h5")
    return path


@app.command()
def run(
    config: Annotated[
        Path | None,
        typer.Argument(
            help="Scenario TOML file; default: the packaged demo scenario.",
            show_default=False,
            metavar="CONFIG",
        ),
    ] = None,
    output: Annotated[
        Path | None,
        typer.Option(
            "--output",
            "-o",
            help="Run file to write (must end in .h5); default: output.directory/output.file "
            "of the config, relative to the current directory.",
            show_default=False,
            metavar="OUT.h5",
        ),
    ] = None,
    quiet: Annotated[
        bool,
        typer.Option("--quiet", "-q", help="Print only errors, warnings and the path written."),
    ] = False,
) -> None:
    """Solve the expansion history of a scenario and write it to an HDF5 run file."""
    from backreact.io import RunFileError, check_writable, write_run

    # 1. the configuration (no JAX yet)
    config_path = config if config is not None else default_config_path()
    try:
        cfg = load_config(config_path)
    except ConfigError as exc:
        raise _fail(EXIT_INPUT, exc) from None

    # 2. where the result goes, checked before any computation
    path = _output_path(output, cfg)
    try:
        check_writable(path)
    except RunFileError as exc:
        raise _fail(EXIT_INPUT, exc) from None
    for message in cfg.warnings:
        _warning(message)

    # 3. the computation (imports JAX)
    try:
        if quiet:
            result = _solve(cfg)
        else:
            with _stderr().status("solving the expansion history (the first pass compiles) ...") as status:

                def progress(passes: int, residual: float) -> None:
                    status.update(
                        f"self-consistent history: pass {int(passes)} done, "
                        f"max |delta ln H| = {float(residual):.2e} (target {cfg.solver.tolerance:g})"
                    )

                result = _solve(cfg, progress)
    except KeyboardInterrupt:
        raise _interrupted() from None
    except (FloatingPointError, RuntimeError) as exc:
        raise _fail(EXIT_NUMERICAL, exc) from None
    for message in result.warnings:
        if message not in cfg.warnings:
            _warning(message)

    # 4. the file (atomic: an interruption or error leaves no partial file behind)
    try:
        write_run(path, result.record())
    except KeyboardInterrupt:
        raise _interrupted() from None
    except (OSError, RunFileError) as exc:
        reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else exc
        raise _fail(EXIT_INPUT, f"cannot write run file {path}: {reason}") from None

    out = _stdout()
    if not quiet:
        out.print(summary_table(result.today, result.diagnostics, title=f"scenario {cfg.scenario.name}"))
        _print_verdict(out, result.diagnostics)
    out.print(f"wrote {path}", markup=False, soft_wrap=True)
    if not result.converged:
        # The file is kept (marked converged = no) so that the residual history can be read.
        status = result.diagnostics.get("solver_status", "the fixed point did not converge")
        raise _fail(EXIT_NUMERICAL, f"not converged ({path} is marked so): {status}")


def _solve(cfg: Any, progress: Any = None) -> Any:
    from backreact.run import run_scenario

    return run_scenario(cfg, progress=progress)


def _interrupted() -> typer.Exit:
    print("interrupted: nothing written", file=sys.stderr, flush=True)
    return typer.Exit(EXIT_INTERRUPTED)


# ======================================================================================
# show
# ======================================================================================


@app.command()
def show(
    run_file: Annotated[
        Path,
        typer.Argument(help="Run file written by 'backreact run'.", show_default=False, metavar="RUN.h5"),
    ],
) -> None:
    """Print the summary and the provenance of a run file."""
    from backreact.io import RunFileError, read_run

    try:
        record = read_run(run_file)
    except RunFileError as exc:
        raise _fail(EXIT_INPUT, exc) from None
    out = _stdout()
    out.print(summary_table(record.today, record.diagnostics, title=_scenario_title(record.config_toml)))
    _print_verdict(out, record.diagnostics)
    out.print()
    out.print(_metadata_table(record, run_file))


def _scenario_title(config_toml: str) -> str:
    """'scenario <name>' from the stored config text, or 'summary' if it has none."""
    try:
        name = tomllib.loads(config_toml).get("scenario", {}).get("name")
    except (tomllib.TOMLDecodeError, AttributeError, TypeError):
        name = None
    return f"scenario {name}" if isinstance(name, str) and name else "summary"


# ======================================================================================
# compare
# ======================================================================================

_STAT_ROWS: tuple[tuple[str, str], ...] = (
    ("ratio_mean", "mean H_model / H_table"),
    ("ratio_min", "min H_model / H_table"),
    ("ratio_max", "max H_model / H_table"),
    ("max_abs_deviation", "max |H_model / H_table - 1| in range"),
    ("chi2", "chi^2"),
    ("chi2_per_point", "chi^2 per point"),
)


def _fmt_ratio(value: float) -> str:
    """A ratio near 1 with 7 decimals, so that small departures show."""
    return f"{value:.7f}" if math.isfinite(value) else _fmt(value)


def _read_run_or_fail(path: Path) -> Any:
    from backreact.io import RunFileError, read_run

    try:
        return read_run(path)
    except RunFileError as exc:
        raise _fail(EXIT_INPUT, exc) from None


def _tables_or_fail(specs: Sequence[str]) -> list[Any]:
    from backreact.tables import TableError, resolve_table

    try:
        return [resolve_table(spec) for spec in specs]
    except TableError as exc:
        raise _fail(EXIT_INPUT, exc) from None


def _comparison_tables(result: Any, run_name: str) -> list[Table]:
    lcdm = result.lcdm_model
    z_lo, z_hi = result.z_range
    out = []
    for t in result.tables:
        table = _table(
            f"{run_name} vs {t.table.name} ({t.points_in_range} of {len(t.table)} points "
            f"in [{_fmt(z_lo)}, {_fmt(z_hi)}])",
            ("statistic", {}),
            ("run", {"justify": "right", "no_wrap": True}),
            ("matching LambdaCDM", {"justify": "right", "no_wrap": True}),
        )
        for key, label in _STAT_ROWS:
            if key in t.run:
                show = _fmt_ratio if key.startswith("ratio") else _fmt
                _add_row(table, label, show(t.run[key]), show(t.lcdm[key]))
        out.append(table)
    if result.lcdm is not None:
        stats = result.lcdm.statistics()
        table = _table(
            f"{run_name} / matching LambdaCDM "
            f"({len(result.lcdm.redshift)} z in [{_fmt(z_lo)}, {_fmt(z_hi)}])",
            ("statistic", {}),
            ("value", {"justify": "right", "no_wrap": True}),
        )
        _add_row(table, "mean H_run / H_LCDM", _fmt_ratio(stats["ratio_mean"]))
        _add_row(table, "min H_run / H_LCDM", _fmt_ratio(stats["ratio_min"]))
        _add_row(table, "max H_run / H_LCDM", _fmt_ratio(stats["ratio_max"]))
        _add_row(table, "max |H_run / H_LCDM - 1|", _fmt(stats["max_abs_deviation"]))
        _add_row(table, "  at redshift", _fmt(stats["redshift_of_max_deviation"]))
        out.append(table)
    if result.bao is not None:
        out.extend(_bao_tables(result.bao, run_name))
    params = _table(
        "matching flat LambdaCDM",
        ("parameter", {}),
        ("value", {"justify": "right", "no_wrap": True}),
    )
    for label, value in (
        ("H0 [km/s/Mpc]", lcdm.H0_km_s_Mpc),
        ("omega_b", lcdm.omega_b),
        ("omega_c", lcdm.omega_c),
        ("T_CMB [K]", lcdm.cmb_temperature_K),
        ("N_eff (massless)", lcdm.n_eff),
        ("Omega_m", lcdm.Omega_m),
        ("Omega_r", lcdm.Omega_r),
        ("Omega_lambda", lcdm.Omega_lambda),
    ):
        _add_row(params, label, _fmt(value))
    out.append(params)
    return out


def _bao_tables(bao: Any, run_name: str) -> list[Table]:
    run, ref = bao.run, bao.lcdm
    table = _table(
        f"{run_name} vs BAO {run.data.name} ({run.points} numbers)",
        ("statistic", {}),
        ("run", {"justify": "right", "no_wrap": True}),
        ("matching LambdaCDM", {"justify": "right", "no_wrap": True}),
    )
    na = "n/a"
    _add_row(
        table,
        "r_d [Mpc] (calibrated fit)",
        _fmt(run.rd_Mpc) if run.rd_Mpc is not None else na,
        _fmt(ref.rd_Mpc),
    )
    _add_row(
        table,
        "chi^2 with that r_d",
        _fmt(run.chi2_rd) if run.chi2_rd is not None else na,
        _fmt(ref.chi2_rd),
    )
    _add_row(
        table,
        "  per point",
        _fmt(run.chi2_rd / run.points) if run.chi2_rd is not None else na,
        _fmt(ref.chi2_rd / ref.points),
    )
    _add_row(table, "chi^2 minimized over r_d", _fmt(run.chi2_free), _fmt(ref.chi2_free))
    _add_row(table, "  per point", _fmt(run.chi2_free / run.points), _fmt(ref.chi2_free / ref.points))
    _add_row(table, "  best-fit r_d [Mpc]", _fmt(run.best_rd_Mpc), _fmt(ref.best_rd_Mpc))
    _add_row(
        table,
        "  best-fit H0 r_d [km/s]",
        _fmt(bao.H0_run * run.best_rd_Mpc),
        _fmt(bao.H0_lcdm * ref.best_rd_Mpc),
    )
    pulls = _table(
        "pulls (data - model)/sigma"
        + (" at the calibrated r_d" if run.rd_Mpc is not None else " at the best-fit r_d"),
        ("tracer", {"no_wrap": True}),
        ("z", {"justify": "right"}),
        ("quantity", {"no_wrap": True}),
        ("data", {"justify": "right"}),
        ("run", {"justify": "right", "no_wrap": True}),
        ("matching LambdaCDM", {"justify": "right", "no_wrap": True}),
    )
    # both sides at the same kind of r_d, so that the columns compare like with like
    rd_ref = ref.rd_Mpc if run.rd_Mpc is not None else ref.best_rd_Mpc
    p_run, p_ref = run.pulls(), ref.pulls(rd_ref)
    for i in range(run.points):
        d = run.data
        _add_row(
            pulls,
            d.tracer[i],
            f"{d.z[i]:.3f}",
            f"{d.kind[i]}/r_d",
            _fmt(d.value[i]),
            f"{p_run[i]:+.2f}",
            f"{p_ref[i]:+.2f}",
        )
    tables = [table, pulls]
    if bao.rd_note:
        note = _table("note", ("", {}))
        _add_row(note, f"no r_d for the run: {bao.rd_note}")
        tables.append(note)
    return tables


@app.command()
def compare(
    run_file: Annotated[
        Path,
        typer.Argument(help="Run file written by 'backreact run'.", show_default=False, metavar="RUN.h5"),
    ],
    table: Annotated[
        list[str] | None,
        typer.Option(
            "--table",
            "-t",
            help="H(z) table to compare with: a CSV file (z, H in km/s/Mpc, optional sigma) or the "
            "name of a shipped data set (cosmic_chronometers). Repeat for several.",
            show_default=False,
            metavar="TABLE",
        ),
    ] = None,
    lcdm: Annotated[
        bool,
        typer.Option("--lcdm", help="Also compare H(z) with the run's matching flat LambdaCDM on a grid."),
    ] = False,
    bao: Annotated[
        bool,
        typer.Option(
            "--bao", help="Also compare with the shipped DESI DR2 BAO distances (with and without r_d)."
        ),
    ] = False,
    z_min: Annotated[float, typer.Option("--z-min", help="Lower end of the redshift range.")] = 0.0,
    z_max: Annotated[float, typer.Option("--z-max", help="Upper end of the redshift range.")] = 2.5,
    store: Annotated[
        bool,
        typer.Option("--store/--no-store", help="Store the result in the run file's comparison group."),
    ] = True,
) -> None:
    """Compare a run's H(z) with H(z) tables, BAO distances and its matching flat LambdaCDM."""
    from backreact.compare import compare_run
    from backreact.io import RunFileError, update_comparison

    specs = list(table or [])
    if not specs and not lcdm and not bao:
        raise _fail(EXIT_INPUT, "nothing to compare: give --table TABLE (repeatable), --lcdm and/or --bao")
    record = _read_run_or_fail(run_file)
    tables = _tables_or_fail(specs)
    if not record.converged:
        _warning(f"{run_file} is marked not converged; its H(z) is the last finite pass")
    try:
        result = compare_run(
            record.history,
            record.config_toml,
            record.today.get("H0_km_s_Mpc", float("nan")),
            tables,
            with_lcdm=lcdm,
            with_bao=bao,
            z_range=(z_min, z_max),
        )
    except ValueError as exc:
        raise _fail(EXIT_INPUT, f"cannot compare {run_file}: {exc}") from None
    out = _stdout()
    for i, t in enumerate(_comparison_tables(result, run_file.name)):
        if i:
            out.print()
        out.print(t)
    if store:
        try:
            update_comparison(run_file, result.as_group())
        except KeyboardInterrupt:
            raise _interrupted() from None
        except (OSError, RunFileError) as exc:
            reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else exc
            raise _fail(EXIT_INPUT, f"cannot store the comparison in {run_file}: {reason}") from None
        out.print(f"stored in {run_file} (group comparison)", markup=False, soft_wrap=True)


# ======================================================================================
# lcdm-table
# ======================================================================================


@app.command("lcdm-table")
def lcdm_table(
    output: Annotated[
        Path,
        typer.Argument(help="CSV file to write (z, H in km/s/Mpc).", show_default=False, metavar="OUT.csv"),
    ],
    H0: Annotated[float, typer.Option("--H0", help="Hubble constant [km/s/Mpc].")] = constants.PLANCK18_H0,
    omega_b: Annotated[float, typer.Option("--omega-b", help="Physical baryon density.")] = (
        constants.PLANCK18_OMEGA_B
    ),
    omega_c: Annotated[float, typer.Option("--omega-c", help="Physical cold dark matter density.")] = (
        constants.PLANCK18_OMEGA_C
    ),
    cmb_temperature: Annotated[
        float, typer.Option("--cmb-temperature", help="CMB temperature today [K].")
    ] = constants.T_CMB_K,
    n_eff: Annotated[float, typer.Option("--n-eff", help="Massless neutrino species.")] = constants.N_EFF,
    matching: Annotated[
        Path | None,
        typer.Option(
            "--matching",
            help="Take all parameters from this run file's matching LambdaCDM instead.",
            show_default=False,
            metavar="RUN.h5",
        ),
    ] = None,
    z_max: Annotated[float, typer.Option("--z-max", help="Largest redshift of the table.")] = 2.5,
    points: Annotated[int, typer.Option("--points", help="Redshifts, uniform from 0 to z_max.")] = 26,
    at: Annotated[
        str | None,
        typer.Option(
            "--at",
            help="Use the redshifts of this table (file or shipped name) instead of a uniform grid.",
            show_default=False,
            metavar="TABLE",
        ),
    ] = None,
) -> None:
    """Write a flat LambdaCDM H(z) table (defaults: Planck 2018 parameters, massless neutrinos)."""
    import numpy as np

    from backreact.reference import FlatLCDM
    from backreact.tables import write_hubble_table

    if output.suffix.lower() != ".csv":
        raise _fail(EXIT_INPUT, f"output file {output} must end in .csv")
    if matching is not None:
        from backreact.compare import matching_lcdm

        record = _read_run_or_fail(matching)
        try:
            model = matching_lcdm(record.config_toml, record.today.get("H0_km_s_Mpc", float("nan")))
        except (ValueError, ConfigError) as exc:
            raise _fail(EXIT_INPUT, f"no matching LambdaCDM for {matching}: {exc}") from None
        origin = f"the matching LambdaCDM of run file {matching}"
    else:
        try:
            model = FlatLCDM(H0, omega_b, omega_c, cmb_temperature, n_eff)
        except ValueError as exc:
            raise _fail(EXIT_INPUT, exc) from None
        origin = "parameters given on the command line"
    if at is not None:
        z = _tables_or_fail([at])[0].z
        grid = f"the redshifts of table {at}"
    else:
        if not (math.isfinite(z_max) and z_max > 0):
            raise _fail(EXIT_INPUT, f"--z-max must be a finite number > 0, got {z_max:g}")
        if points < 2:
            raise _fail(EXIT_INPUT, f"--points must be >= 2, got {points}")
        z = np.linspace(0.0, z_max, points)
        grid = f"{points} redshifts uniform in 0 <= z <= {z_max:g}"
    from backreact.io import package_version

    comments = [
        f"Flat LambdaCDM H(z) written by backreact {package_version()} ({origin}; {grid}).",
        f"H0 = {model.H0_km_s_Mpc!r} km/s/Mpc, omega_b = {model.omega_b!r}, omega_c = {model.omega_c!r}, "
        f"T_CMB = {model.cmb_temperature_K!r} K, N_eff = {model.n_eff!r} massless neutrinos.",
        f"Omega_m = {model.Omega_m!r}, Omega_r = {model.Omega_r!r}, Omega_lambda = {model.Omega_lambda!r}.",
        "Units: H in km/s/Mpc. A model calculation, not a measurement.",
    ]
    try:
        path = write_hubble_table(output, z, model.hubble_km_s_Mpc(z), comments=comments)
    except OSError as exc:
        raise _fail(EXIT_INPUT, f"cannot write table {output}: {exc.strerror or exc}") from None
    _stdout().print(f"wrote {path} ({len(z)} rows)", markup=False, soft_wrap=True)


# ======================================================================================
# plot
# ======================================================================================


@app.command()
def plot(
    run_files: Annotated[
        list[Path],
        typer.Argument(
            help="One or more run files; several are overlaid.", show_default=False, metavar="RUN.h5..."
        ),
    ],
    out_dir: Annotated[
        Path | None,
        typer.Option(
            "--output-dir",
            "-o",
            help="Folder for the figures; default: the folder of the first run file.",
            show_default=False,
            metavar="DIR",
        ),
    ] = None,
    table: Annotated[
        list[str] | None,
        typer.Option(
            "--table",
            "-t",
            help="Measured H(z) points to show (file or shipped name); default: cosmic_chronometers.",
            show_default=False,
            metavar="TABLE",
        ),
    ] = None,
    no_data: Annotated[bool, typer.Option("--no-data", help="Show no measured points.")] = False,
    fmt: Annotated[
        list[str] | None,
        typer.Option(
            "--format", "-f", help="Image format (png, pdf, svg); repeatable. Default: png and pdf."
        ),
    ] = None,
    z_max: Annotated[
        float, typer.Option("--z-max", help="Largest redshift of the H(z) and w(z) figures.")
    ] = 2.5,
) -> None:
    """Draw H(z)/H_LCDM - 1, w(z), the density fractions and the propagator of runs."""
    for path in run_files:
        _read_run_or_fail(path)  # a clear one-line error before matplotlib is imported
    if no_data and table:
        raise _fail(EXIT_INPUT, "--no-data and --table exclude each other")
    tables = [] if no_data else (_tables_or_fail(table) if table else None)
    from backreact.plot import plot_runs

    folder = out_dir if out_dir is not None else run_files[0].parent
    try:
        written = plot_runs(
            run_files, folder, tables=tables, formats=tuple(fmt) if fmt else ("png", "pdf"), z_max=z_max
        )
    except ValueError as exc:
        raise _fail(EXIT_INPUT, exc) from None
    except OSError as exc:
        raise _fail(EXIT_INPUT, f"cannot write figures to {folder}: {exc.strerror or exc}") from None
    out = _stdout()
    for path in written:
        out.print(f"wrote {path}", markup=False, soft_wrap=True)


# ======================================================================================
# keys
# ======================================================================================


def _default_text(value: object) -> str:
    if value is REQUIRED:
        return "required"
    if isinstance(value, str):
        return f'"{value}"'
    if isinstance(value, float):
        text = f"{value:g}"
        if float(text) != value:
            text = repr(value)
        if not any(c in text for c in ".eEn"):
            text += ".0"
        return text
    return str(value)


def _keys_table(section: Any) -> Table:
    table = _table(
        f"[{section.name}] {section.description}",
        ("key", {"no_wrap": True}),
        ("unit", {"no_wrap": True}),
        ("default", {"no_wrap": True}),
        ("allowed", {}),
        ("meaning", {}),
    )
    for f in SCHEMA:
        if f.section != section.name:
            continue
        meaning = f.description
        if f.only is not None:
            meaning = f"only for {f.applies_doc(dotted=True)}: {meaning}"
        _add_row(table, f.dotted, f.unit or "-", _default_text(f.default), f.allowed(), meaning)
    return table


@app.command()
def keys(
    section: Annotated[
        str | None,
        typer.Argument(help="Show only this section (e.g. inflation).", show_default=False),
    ] = None,
    markdown: Annotated[
        bool, typer.Option("--markdown", help="Print the reference as Markdown (for the docs).")
    ] = False,
) -> None:
    """List every configuration key with its unit, default and allowed range."""
    names = [s.name for s in SECTIONS]
    if section is not None and section.strip("[]") not in names:
        raise _fail(EXIT_INPUT, f"unknown section {section!r}; the sections are: {', '.join(names)}")
    if markdown:
        if section is not None:
            raise _fail(EXIT_INPUT, "--markdown prints the whole reference; leave out the section")
        sys.stdout.write(config_reference_markdown())
        return
    out = _stdout()
    wanted = section.strip("[]") if section is not None else None
    first = True
    for s in SECTIONS:
        if wanted is not None and s.name != wanted:
            continue
        if not first:
            out.print()
        out.print(_keys_table(s))
        first = False


# ======================================================================================
# entry point
# ======================================================================================


def _exit_status(code: object) -> int:
    if code is None:
        return EXIT_OK
    if isinstance(code, int):
        return code
    _error(code)
    return EXIT_NUMERICAL


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line ``argv`` (default: ``sys.argv[1:]``) and return the exit status.

    The console script ``backreact`` calls ``sys.exit(main())``.
    """
    args = list(sys.argv[1:] if argv is None else argv)
    command = typer.main.get_command(app)
    try:
        result = command.main(args=args, prog_name="backreact", standalone_mode=False)
    except _click.exceptions.NoArgsIsHelpError as exc:
        # no command given: the help has been printed (rich help prints it directly)
        message = exc.format_message().strip()
        if message:
            print(message)
        return EXIT_INPUT
    except _click.exceptions.UsageError as exc:
        hint = f" (see '{exc.ctx.command_path} --help')" if exc.ctx is not None else ""
        _error(f"{exc.format_message().rstrip('.')}{hint}")
        return EXIT_INPUT
    except typer.Abort:
        print("interrupted", file=sys.stderr, flush=True)
        return EXIT_INTERRUPTED
    except _click.exceptions.ClickException as exc:
        _error(exc.format_message())
        return EXIT_INPUT
    except SystemExit as exc:
        return _exit_status(exc.code)
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr, flush=True)
        return EXIT_INTERRUPTED
    except Exception as exc:
        if os.environ.get(_TRACEBACK_ENV):
            raise
        _error(
            f"internal error ({type(exc).__name__}): {exc} "
            f"(set {_TRACEBACK_ENV}=1 to see the traceback; please report it)"
        )
        return EXIT_NUMERICAL
    return result if isinstance(result, int) and not isinstance(result, bool) else EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
