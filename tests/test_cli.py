"""Tests of the command line (backreact.cli), run in-process through ``main(argv)``."""

from __future__ import annotations

import hashlib
import io
import math
import subprocess
import sys
import textwrap
from pathlib import Path

import h5py
import numpy as np
import pytest
from rich.console import Console
from typer.testing import CliRunner

import backreact.run
from backreact import cli, constants
from backreact.config import all_keys, config_reference_markdown
from backreact.io import read_run

# The CLI tests exercise the command line, not the physics: no propagator (its own
# tests are in test_modes.py, test_memory.py and test_run.py), so a run takes seconds.
SMALL_GRID = """
[grid]
points_inflation = 40
points_reheating = 20
points_radiation_matter = 60
points_late = 30

[propagator]
method = "none"
"""

SMALL = (
    """
[inflation]
model = "profile"
efolds = 20.0

[cosmology]
omega_lambda = 0.3
"""
    + SMALL_GRID
)

SMALL_HIGH_SCALE = (
    """
[inflation]
model = "profile"
efolds = 20.0
hubble_GeV = 6e13

[cosmology]
omega_lambda = 0.3
"""
    + SMALL_GRID
)


def write(path: Path, text: str) -> Path:
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def lines(text: str) -> list[str]:
    return [line for line in text.splitlines() if line.strip()]


def h5_files(root: Path) -> list[Path]:
    return sorted(root.rglob("*.h5"))


def assert_one_error_line(text: str) -> str:
    got = lines(text)
    assert len(got) == 1, text
    assert got[0].startswith("error: "), text
    assert "Traceback" not in text
    return got[0]


@pytest.fixture
def workdir(tmp_path, monkeypatch):
    """Run in tmp_path, so default output paths (runs/...) land there."""
    monkeypatch.chdir(tmp_path)
    return tmp_path


@pytest.fixture
def solve_calls(monkeypatch):
    """Replace the solver by a recorder; a test asserts that it was (not) called."""
    calls = []

    def fake(cfg, progress=None):
        calls.append(cfg)
        raise AssertionError("the solver must not be called")

    monkeypatch.setattr(backreact.run, "run_scenario", fake)
    return calls


def fake_solver(monkeypatch, exc: BaseException):
    def fake(cfg, progress=None):
        raise exc

    monkeypatch.setattr(backreact.run, "run_scenario", fake)


# --------------------------------------------------------------------------------------
# bad input to `run`: exit 2, one error line, nothing written, nothing computed
# --------------------------------------------------------------------------------------

BAD_CONFIGS = {
    "unknown_key": ("[inflation]\nhubble_gev = 1e13\n", "did you mean 'inflation.hubble_GeV'"),
    "negative_omega_b": ("[inflation]\n[cosmology]\nomega_b = -0.02\n", "cosmology.omega_b"),
    "hubble_above_planck": ("[inflation]\nhubble_GeV = 3e18\n", "inflation.hubble_GeV"),
    "nan": ("[inflation]\nefolds = nan\n", "finite number"),
    "wrong_type": ('[inflation]\nefolds = "sixty"\n', "got a string"),
    "missing_inflation": ("[cosmology]\nomega_b = 0.022\n", "missing section [inflation]"),
    "syntax_error": ("[inflation\nefolds = 30.0\n", "TOML syntax error"),
    "bad_reheating_temperature": (
        '[inflation]\n[reheating]\nkind = "perturbative"\ntemperature_GeV = 1e-5\n',
        "reheating.temperature_GeV",
    ),
    "missing_reheating_temperature": ('[inflation]\n[reheating]\nkind = "perturbative"\n', "missing"),
    "unknown_section": ("[inflaton]\nefolds = 30.0\n", "did you mean [inflation]"),
    "float_for_int": ("[inflation]\n[grid]\npoints_late = 30.0\n", "write 30"),
    "eps_end_below_start": (
        '[inflation]\nmodel = "profile"\neps_start = 0.2\neps_end = 0.1\n',
        "inflation.eps_end",
    ),
    "output_file_not_h5": ('[inflation]\n[output]\nfile = "result.txt"\n', "output.file"),
    "empty": ("", "missing section [inflation]"),
}


@pytest.mark.parametrize("case", sorted(BAD_CONFIGS))
def test_run_bad_config(case, workdir, capsys, solve_calls):
    text, expected = BAD_CONFIGS[case]
    path = write(workdir / "bad.toml", text)
    code = cli.main(["run", str(path)])
    out, err = capsys.readouterr()
    assert code == 2
    line = assert_one_error_line(err)
    assert expected in line
    assert str(path) in line
    assert out == ""
    assert h5_files(workdir) == []
    assert not (workdir / "runs").exists()
    assert solve_calls == []


def test_run_missing_config_file(workdir, capsys, solve_calls):
    code = cli.main(["run", str(workdir / "nowhere.toml")])
    out, err = capsys.readouterr()
    assert code == 2
    assert "cannot read file" in assert_one_error_line(err)
    assert out == ""
    assert h5_files(workdir) == [] and solve_calls == []


def test_run_config_not_utf8(workdir, capsys, solve_calls):
    path = workdir / "latin1.toml"
    path.write_bytes('[scenario]\ndescription = "caf\xe9"\n[inflation]\n'.encode("latin-1"))
    assert cli.main(["run", str(path)]) == 2
    assert "not UTF-8" in assert_one_error_line(capsys.readouterr().err)
    assert h5_files(workdir) == [] and solve_calls == []


@pytest.mark.parametrize("name", ["out.txt", "out", "out.h5.bak", "out.hdf5"])
def test_run_output_not_h5(name, workdir, capsys, solve_calls):
    config = write(workdir / "small.toml", SMALL)
    code = cli.main(["run", str(config), "-o", str(workdir / name)])
    out, err = capsys.readouterr()
    assert code == 2
    assert "must end in .h5" in assert_one_error_line(err)
    assert out == ""
    assert list(workdir.iterdir()) == [config]
    assert solve_calls == []


def test_run_unwritable_output(workdir, capsys, solve_calls):
    config = write(workdir / "small.toml", SMALL)
    blocker = workdir / "blocker"
    blocker.write_text("a regular file, not a folder\n")
    code = cli.main(["run", str(config), "--output", str(blocker / "out.h5")])
    out, err = capsys.readouterr()
    assert code == 2
    line = assert_one_error_line(err)
    assert "cannot create output folder" in line and "blocker" in line
    assert out == ""
    assert h5_files(workdir) == []
    assert solve_calls == []


def test_run_output_is_directory(workdir, capsys, solve_calls):
    config = write(workdir / "small.toml", SMALL)
    (workdir / "taken.h5").mkdir()
    assert cli.main(["run", str(config), "-o", str(workdir / "taken.h5")]) == 2
    assert "directory" in assert_one_error_line(capsys.readouterr().err)
    assert solve_calls == []


def test_config_warnings_come_after_the_output_check(workdir, capsys, solve_calls):
    """A doomed run reports only the error, not the warnings of its config."""
    config = write(workdir / "high.toml", SMALL_HIGH_SCALE)
    (workdir / "blocker").write_text("x")
    assert cli.main(["run", str(config), "-o", str(workdir / "blocker" / "out.h5")]) == 2
    assert_one_error_line(capsys.readouterr().err)
    assert solve_calls == []


# --------------------------------------------------------------------------------------
# failures of the computation
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("quiet", [[], ["--quiet"]])
def test_run_numerical_failure(quiet, workdir, capsys, monkeypatch):
    fake_solver(monkeypatch, FloatingPointError("background: ln_hubble is not finite at N = -3.0"))
    config = write(workdir / "small.toml", SMALL)
    code = cli.main(["run", str(config), *quiet])
    out, err = capsys.readouterr()
    assert code == 1
    assert assert_one_error_line(err) == "error: background: ln_hubble is not finite at N = -3.0"
    assert out == ""
    assert h5_files(workdir) == []


def test_run_runtime_error_multiline_is_one_line(workdir, capsys, monkeypatch):
    fake_solver(monkeypatch, RuntimeError("the integrator gave up\n  after 4096 steps"))
    config = write(workdir / "small.toml", SMALL)
    assert cli.main(["run", str(config), "-q"]) == 1
    line = assert_one_error_line(capsys.readouterr().err)
    assert line == "error: the integrator gave up after 4096 steps"
    assert h5_files(workdir) == []


def test_run_interrupted(workdir, capsys, monkeypatch):
    fake_solver(monkeypatch, KeyboardInterrupt())
    config = write(workdir / "small.toml", SMALL)
    code = cli.main(["run", str(config), "-o", str(workdir / "out.h5")])
    out, err = capsys.readouterr()
    assert code == 130
    assert lines(err) == ["interrupted: nothing written"]
    assert out == ""
    assert h5_files(workdir) == []
    assert [p.name for p in workdir.iterdir()] == ["small.toml"]  # no partial or probe file


def test_run_unexpected_error_has_no_traceback(workdir, capsys, monkeypatch):
    fake_solver(monkeypatch, ValueError("a bug somewhere"))
    monkeypatch.delenv("BACKREACT_TRACEBACK", raising=False)
    config = write(workdir / "small.toml", SMALL)
    assert cli.main(["run", str(config)]) == 1
    line = assert_one_error_line(capsys.readouterr().err)
    assert "internal error (ValueError): a bug somewhere" in line
    assert h5_files(workdir) == []


def test_run_default_config_is_the_packaged_scenario(workdir, capsys, monkeypatch):
    """Without CONFIG, the packaged scenario is validated and handed to the solver."""
    seen = []

    def fake(cfg, progress=None):
        seen.append(cfg)
        raise FloatingPointError("stop here")

    monkeypatch.setattr(backreact.run, "run_scenario", fake)
    assert cli.main(["run", "-q"]) == 1
    assert lines(capsys.readouterr().err)[-1] == "error: stop here"
    assert len(seen) == 1
    assert Path(seen[0].source) == cli.default_config_path()
    assert h5_files(workdir) == []


# --------------------------------------------------------------------------------------
# real runs (small grid; the first one pays the JAX compile)
# --------------------------------------------------------------------------------------


def test_run_and_show(workdir, capsys):
    config = write(workdir / "small.toml", SMALL)
    code = cli.main(["run", str(config)])
    out, err = capsys.readouterr()
    assert code == 0, err
    written = workdir / "runs" / "demo.h5"  # output.directory / <scenario.name>.h5
    assert written.is_file()
    assert "H0" in out and "km/s/Mpc" in out and "Omega_lambda" in out
    assert lines(out)[-1] == f"wrote {Path('runs') / 'demo.h5'}"
    assert "Traceback" not in err
    assert all(line.startswith("warning: ") for line in lines(err)), err

    code = cli.main(["show", str(written)])
    out, err = capsys.readouterr()
    assert code == 0, err
    assert err == ""
    sha = hashlib.sha256(config.read_text(encoding="utf-8").encode("utf-8")).hexdigest()
    assert read_run(written).attrs["config_sha256"] == sha
    assert "H0" in out
    assert sha[:16] in out and sha[:17] not in out
    for label in ("package version", "schema version", "created", "converged", "iterations", "numpy"):
        assert label in out
    # the warnings of the run are stored in the file and shown
    assert "warning" in out


def test_run_warning_quiet(workdir, capsys):
    config = write(workdir / "high.toml", SMALL_HIGH_SCALE)
    target = workdir / "sub" / "high.h5"
    code = cli.main(["run", str(config), "-o", str(target), "--quiet"])
    out, err = capsys.readouterr()
    assert code == 0, err
    assert target.is_file()
    assert lines(out) == [f"wrote {target}"]  # --quiet: only the path line on stdout
    warnings = lines(err)
    assert warnings and all(line.startswith("warning: ") for line in warnings), err
    assert any("inflation.hubble_GeV" in line and "observational bound" in line for line in warnings)
    assert len(warnings) == len(set(warnings))  # config warnings are not repeated
    assert read_run(target).warnings  # and they are stored in the file


def test_run_not_converged_keeps_the_marked_file_and_exits_1(workdir, capsys, monkeypatch):
    """A fixed point that fails: the file is written, marked not converged, and the command
    ends with one error line and exit status 1 (DESIGN 2.6)."""
    real = backreact.run.run_scenario

    def not_converged(cfg, progress=None):
        res = real(cfg)
        res.converged = False
        res.diagnostics["solver_status"] = "did not converge within solver.max_passes passes"
        return res

    monkeypatch.setattr(backreact.run, "run_scenario", not_converged)
    config = write(workdir / "small.toml", SMALL)
    target = workdir / "nc.h5"
    code = cli.main(["run", str(config), "-o", str(target), "-q"])
    out, err = capsys.readouterr()
    assert code == 1
    assert lines(err)[-1].startswith("error: not converged") and "max_passes" in lines(err)[-1]
    assert target.is_file() and not read_run(target).converged


# --------------------------------------------------------------------------------------
# show
# --------------------------------------------------------------------------------------


def test_show_text_file(tmp_path, capsys):
    path = tmp_path / "notes.h5"
    path.write_text("not a run\n")
    assert cli.main(["show", str(path)]) == 2
    out, err = capsys.readouterr()
    assert "not an HDF5 file" in assert_one_error_line(err)
    assert out == ""


def test_show_missing_file(tmp_path, capsys):
    assert cli.main(["show", str(tmp_path / "absent.h5")]) == 2
    out, err = capsys.readouterr()
    assert "not found" in assert_one_error_line(err)
    assert out == ""


def test_show_foreign_hdf5(tmp_path, capsys):
    path = tmp_path / "foreign.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("x", data=np.arange(3.0))
        f.attrs["format"] = "something-else"
    assert cli.main(["show", str(path)]) == 2
    out, err = capsys.readouterr()
    assert "not a backreact run file" in assert_one_error_line(err)
    assert out == ""


def test_show_directory(tmp_path, capsys):
    assert cli.main(["show", str(tmp_path)]) == 2
    assert_one_error_line(capsys.readouterr().err)


# --------------------------------------------------------------------------------------
# keys
# --------------------------------------------------------------------------------------


def test_keys_lists_every_key(capsys, monkeypatch):
    monkeypatch.setenv("COLUMNS", "80")
    assert cli.main(["keys"]) == 0
    out, err = capsys.readouterr()
    assert err == ""
    assert "inflation.hubble_GeV" in out
    for key in all_keys():
        assert key in out, key
    assert "GeV" in out and "required" in out


def test_keys_one_section(capsys):
    assert cli.main(["keys", "grid"]) == 0
    out = capsys.readouterr().out
    assert "grid.points_late" in out
    assert "inflation.hubble_GeV" not in out


def test_keys_unknown_section(capsys):
    assert cli.main(["keys", "inflaton"]) == 2
    assert "unknown section" in assert_one_error_line(capsys.readouterr().err)


def test_keys_markdown(capsys):
    assert cli.main(["keys", "--markdown"]) == 0
    assert capsys.readouterr().out == config_reference_markdown()


def test_keys_through_cli_runner():
    result = CliRunner().invoke(cli.app, ["keys", "inflation"])
    assert result.exit_code == 0
    assert "inflation.hubble_GeV" in result.stdout


# --------------------------------------------------------------------------------------
# usage errors
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "argv",
    [["run", "--bogus"], ["show"], ["frobnicate"], ["run", "a.toml", "b.toml"], ["run", "-o"]],
)
def test_usage_errors_exit_2(argv, capsys, workdir, solve_calls):
    assert cli.main(argv) == 2
    out, err = capsys.readouterr()
    assert_one_error_line(err)
    assert out == ""
    assert solve_calls == []


def test_no_arguments_shows_usage(capsys):
    assert cli.main([]) == 2
    out, err = capsys.readouterr()
    assert "Usage" in out and "run" in out and "show" in out and "keys" in out
    assert "Traceback" not in err


@pytest.mark.parametrize(
    "argv",
    [["--help"], *([verb, "--help"] for verb in ("run", "show", "compare", "lcdm-table", "plot", "keys"))],
)
def test_help(argv, capsys):
    assert cli.main(argv) == 0
    assert "Usage" in capsys.readouterr().out


# --------------------------------------------------------------------------------------
# the summary table
# --------------------------------------------------------------------------------------


def render(table) -> str:
    console = Console(file=io.StringIO(), width=140, color_system=None)
    console.print(table)
    return console.file.getvalue()


def test_summary_table_rows():
    today = {
        "H0_km_s_Mpc": 67.6612345,
        "age_Gyr": 13.7971,
        "fraction_matter": 0.31,
        "fraction_lambda": 0.69,
        "hubble_at_pivot_exit_GeV": math.nan,
        "tensor_to_scalar_ratio": 0.2,
        "reheating_temperature_GeV": 1e10,
    }
    text = render(cli.summary_table(today, {"slow_roll_n_s": 0.9612345, "slow_roll_r": 0.004, "x": "y"}))
    assert "67.661" in text and "km/s/Mpc" in text
    assert "13.797" in text and "Gyr" in text
    assert "Omega_matter" in text and "Omega_lambda" in text
    assert "Omega_radiation" not in text and "Omega_spectator" not in text  # absent: skipped
    assert "e-folds of inflation" not in text
    assert "n/a" in text  # NaN
    assert f"above bound r < {constants.R_UPPER_BOUND:g}" in text
    assert text.count("above bound") == 1  # slow-roll r = 0.004 is allowed
    assert "0.96123" in text
    assert "reheating temperature" in text and "1.0000e+10" in text


def test_summary_table_empty():
    text = render(cli.summary_table({}, {}))
    assert "H0" not in text and "n/a" not in text


@pytest.mark.parametrize(
    "value, text",
    [
        (math.nan, "n/a"),
        (0.0, "0"),
        (67.66, "67.66"),
        (20.0, "20"),
        (1e13, "1.0000e+13"),
        (9.4673084e-5, "9.4673e-5"),
        (-65.7736103, "-65.774"),
        (math.inf, "inf"),
    ],
)
def test_number_format(value, text):
    assert cli._fmt(value) == text


# --------------------------------------------------------------------------------------
# one process-level smoke test: exit status, and no JAX before validation
# --------------------------------------------------------------------------------------


def test_entry_point_rejects_bad_config_without_importing_jax(tmp_path):
    config = write(tmp_path / "bad.toml", "[inflation]\nefolds = -1.0\n")
    script = (
        "import sys\n"
        "from backreact.cli import main\n"
        f"code = main(['run', {str(config)!r}, '-o', {str(tmp_path / 'x.h5')!r}])\n"
        "print('jax imported' if 'jax' in sys.modules else 'jax not imported')\n"
        "sys.exit(code)\n"
    )
    proc = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, cwd=tmp_path, timeout=120
    )
    assert proc.returncode == 2, proc.stderr
    assert proc.stdout.strip() == "jax not imported"
    assert assert_one_error_line(proc.stderr).startswith("error: config error in")
    assert h5_files(tmp_path) == []
