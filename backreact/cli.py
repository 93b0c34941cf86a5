"""Command-line interface: ``backreact run``, ``backreact show`` and ``backreact keys``.

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
