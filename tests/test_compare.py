"""Comparing runs (backreact/compare.py) with tables and with their matching LambdaCDM,
the comparison group of the run file, xarray access and the compare / lcdm-table verbs."""

from __future__ import annotations

import hashlib

import h5py
import numpy as np
import pytest
from helpers import make_config

from backreact import cli
from backreact import constants as C
from backreact.compare import RunHubble, compare_run, matching_lcdm
from backreact.io import read_run, update_comparison, write_run
from backreact.reference import FlatLCDM
from backreact.run import run_scenario
from backreact.tables import parse_hubble_table, read_hubble_table, shipped_table, write_hubble_table

# A LambdaCDM history without a spectator (no propagator: this file tests the comparison,
# not the physics), on the small test grid of helpers.py so that it solves in seconds.
LCDM_SMALL = """
[inflation]
model = "profile"
efolds = 20.0
[cosmology]
omega_lambda = 0.3
[propagator]
method = "none"
"""


@pytest.fixture(scope="module")
def run_file(tmp_path_factory):
    res = run_scenario(make_config(LCDM_SMALL))
    return write_run(tmp_path_factory.mktemp("runs") / "lcdm.h5", res.record())


@pytest.fixture
def fresh_run(run_file, tmp_path):
    """A private copy of the run file (tests that store a comparison modify it)."""
    path = tmp_path / "run.h5"
    path.write_bytes(run_file.read_bytes())
    return path


def _sha(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# --- the run's H(z) ----------------------------------------------------------------------------


def _lcdm_history(model: FlatLCDM, step: float):
    """ln H and epsilon of a FlatLCDM on a uniform e-fold grid, analytically."""
    n = np.arange(-3.0, 0.5 + step / 2, step)
    a = np.exp(n)
    e2 = model.Omega_r * a**-4 + model.Omega_m * a**-3 + model.Omega_lambda
    eps = (4 * model.Omega_r * a**-4 + 3 * model.Omega_m * a**-3) / (2 * e2)
    return {"efolds": n, "hubble_km_s_Mpc": model.H0_km_s_Mpc * np.sqrt(e2), "epsilon": eps}


def test_run_hubble_is_fourth_order_in_the_grid_step():
    # Cubic Hermite interpolation with exact slopes: error ~ h^4 (a standard result of
    # interpolation theory, common practice), so halving h divides it by ~16.
    model = FlatLCDM.planck2018()
    z = np.linspace(0.0, 2.5, 997)
    exact = model.hubble_km_s_Mpc(z)
    errors = [
        np.max(np.abs(RunHubble.from_history(_lcdm_history(model, h))(z) / exact - 1)) for h in (0.08, 0.04)
    ]
    assert 12.0 < errors[0] / errors[1] < 20.0  # 16 up to the pre-asymptotic term
    assert errors[1] < 1e-7


def test_run_hubble_is_exact_at_the_nodes_and_refuses_redshifts_outside():
    hist = _lcdm_history(FlatLCDM.planck2018(), 0.05)
    rh = RunHubble.from_history(hist)
    z_nodes = np.expm1(-hist["efolds"][5:60])
    # at a node the Hermite curve is the stored value (round-off of exp/log: 1e-14)
    np.testing.assert_allclose(rh(z_nodes), hist["hubble_km_s_Mpc"][5:60], rtol=1e-14)
    with pytest.raises(ValueError, match="redshift -0.9 lies outside the run's history"):
        rh(np.array([0.5, -0.9]))


def test_a_lcdm_run_matches_its_matching_lcdm(run_file):
    rec = read_run(run_file)
    model = matching_lcdm(rec.config_toml, rec.today["H0_km_s_Mpc"])
    # the run's own densities: same Omega_lambda (background solver accuracy, 1e-8)
    assert model.Omega_lambda == pytest.approx(rec.today["fraction_lambda"], rel=1e-8)
    assert (model.omega_b, model.omega_c) == (C.PLANCK18_OMEGA_B, C.PLANCK18_OMEGA_C)
    c = compare_run(rec.history, rec.config_toml, rec.today["H0_km_s_Mpc"], with_lcdm=True)
    # DESIGN 3 item 7: the analytic LambdaCDM reference to 1e-6. On this coarse test grid
    # (late step 0.07) the interpolation contributes ~3e-7 of it.
    assert c.lcdm.statistics()["max_abs_deviation"] < 1e-6


def test_a_run_compared_with_its_own_table_gives_ratio_one_and_chi2_zero(run_file, tmp_path):
    rec = read_run(run_file)
    z = np.array([0.0, 0.3, 0.7, 1.5, 2.4])
    rh = RunHubble.from_history(rec.history)
    table = read_hubble_table(write_hubble_table(tmp_path / "self.csv", z, rh(z), sigma=np.full(5, 3.0)))
    c = compare_run(rec.history, rec.config_toml, rec.today["H0_km_s_Mpc"], [table], with_lcdm=False)
    stats = c.tables[0].run
    # the same interpolant at the same redshifts, written and read back exactly
    assert stats["ratio_min"] == stats["ratio_max"] == 1.0
    assert stats["chi2"] == 0.0 and stats["max_abs_deviation"] == 0.0
    assert c.tables[0].lcdm["chi2"] < 1e-6  # the LambdaCDM side: within 1e-6 of the run


def test_the_z_range_selects_the_points_of_max_deviation(run_file):
    rec = read_run(run_file)
    t = parse_hubble_table("z,H,sigma\n0.1,50,5\n0.5,200,5\n2.0,300,5\n")
    c = compare_run(rec.history, rec.config_toml, rec.today["H0_km_s_Mpc"], [t], z_range=(0.0, 0.3))
    rh = RunHubble.from_history(rec.history)
    assert c.tables[0].points_in_range == 1
    assert c.tables[0].run["max_abs_deviation"] == pytest.approx(abs(rh(0.1) / 50 - 1), rel=1e-15)


@pytest.mark.parametrize("z_range", [(-0.1, 1.0), (1.0, 1.0), (0.0, float("nan"))])
def test_a_bad_redshift_range_is_refused(run_file, z_range):
    rec = read_run(run_file)
    with pytest.raises(ValueError, match="0 <= z_min < z_max"):
        compare_run(rec.history, rec.config_toml, 70.0, z_range=z_range)


def test_no_flat_lcdm_matches_an_H0_below_matter_alone(run_file):
    rec = read_run(run_file)
    with pytest.raises(ValueError, match="H0 = 30 km/s/Mpc is below the value of its matter"):
        matching_lcdm(rec.config_toml, 30.0)


# --- the comparison group --------------------------------------------------------------------


def test_the_comparison_group_records_tables_and_the_lcdm_used(fresh_run):
    rec = read_run(fresh_run)
    c = compare_run(
        rec.history, rec.config_toml, rec.today["H0_km_s_Mpc"], [shipped_table("cosmic_chronometers")]
    )
    update_comparison(fresh_run, c.as_group())
    back = read_run(fresh_run)
    group = back.comparison
    assert group["lcdm_H0_km_s_Mpc"] == rec.today["H0_km_s_Mpc"]
    assert group["lcdm_omega_c"] == C.PLANCK18_OMEGA_C and group["tables"] == "cosmic_chronometers"
    sub = group["table_cosmic_chronometers"]
    assert sub["points"] == 32 and sub["run_chi2"] == c.tables[0].run["chi2"]
    np.testing.assert_array_equal(sub["hubble_run"], c.tables[0].hubble_run)
    assert group["lcdm"]["max_abs_deviation"] < 1e-6
    # the rest of the file is untouched
    for name, arr in rec.history.items():
        np.testing.assert_array_equal(back.history[name], arr)
    assert back.attrs["created_utc"] == rec.attrs["created_utc"]


def test_an_interrupted_store_leaves_the_file_as_it_was(fresh_run, monkeypatch):
    before = _sha(fresh_run)
    import backreact.io as io

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(io, "_write_comparison", interrupted)
    with pytest.raises(KeyboardInterrupt):
        update_comparison(fresh_run, {"z_min": 0.0, "sub": {"x": np.ones(3)}})
    assert _sha(fresh_run) == before
    assert not list(fresh_run.parent.glob(".*partial"))


def test_history_opens_with_xarray_on_the_efolds_dimension(run_file):
    # DESIGN 4: HDF5 dimension scales, so that xarray (h5netcdf engine) opens `history`.
    xr = pytest.importorskip("xarray")
    with xr.open_dataset(run_file, group="history", engine="h5netcdf") as ds:
        assert ds["hubble"].dims == ("efolds",)
        assert "efolds" in ds.coords
        np.testing.assert_array_equal(
            ds["hubble_km_s_Mpc"].values, read_run(run_file).history["hubble_km_s_Mpc"]
        )
        assert ds["hubble"].attrs["units"] == "GeV"
        late = ds.sel(efolds=slice(-1.0, 0.0))
        # label-based selection on the coordinate: z = e^-N - 1 on the selected points
        assert late.sizes["efolds"] > 0 and float(late["efolds"].min()) >= -1.0
        np.testing.assert_allclose(late["redshift"].values, np.expm1(-late["efolds"].values), rtol=1e-12)


# --- the command line --------------------------------------------------------------------------


def test_cli_compare_prints_both_sides_and_stores(fresh_run, capsys):
    assert cli.main(["compare", str(fresh_run), "--lcdm", "--table", "cosmic_chronometers"]) == 0
    out = capsys.readouterr().out
    assert "chi^2 per point" in out and "matching LambdaCDM" in out and "stored in" in out
    group = read_run(fresh_run).comparison
    assert "table_cosmic_chronometers" in group and "lcdm" in group


def test_cli_compare_no_store_leaves_the_file(fresh_run, capsys):
    before = _sha(fresh_run)
    assert cli.main(["compare", str(fresh_run), "--lcdm", "--no-store"]) == 0
    assert _sha(fresh_run) == before


@pytest.mark.parametrize(
    "args, message",
    [
        ([], "nothing to compare"),
        (["--table", "nope.csv"], "table file not found: nope.csv"),
        (["--lcdm", "--z-min", "2", "--z-max", "1"], "0 <= z_min < z_max"),
    ],
)
def test_cli_compare_bad_input_exits_2_with_one_line(fresh_run, capsys, args, message):
    before = _sha(fresh_run)
    assert cli.main(["compare", str(fresh_run), *args]) == cli.EXIT_INPUT
    err = capsys.readouterr().err.strip()
    assert err.startswith("error: ") and message in err and "\n" not in err
    assert _sha(fresh_run) == before


def test_cli_compare_missing_run_file(tmp_path, capsys):
    assert cli.main(["compare", str(tmp_path / "x.h5"), "--lcdm"]) == cli.EXIT_INPUT
    assert "run file not found" in capsys.readouterr().err


def test_cli_lcdm_table_defaults_to_planck_2018(tmp_path, capsys):
    out = tmp_path / "ref.csv"
    assert cli.main(["lcdm-table", str(out), "--z-max", "2", "--points", "21"]) == 0
    t = read_hubble_table(out)
    assert len(t) == 21 and t.z[-1] == 2.0 and t.sigma is None
    # written as shortest round-trip decimals: equal to the reference bit for bit
    np.testing.assert_array_equal(t.H, FlatLCDM.planck2018().hubble_km_s_Mpc(t.z))
    assert any("H0 = 67.66" in line for line in t.comments)


def test_cli_lcdm_table_of_a_runs_matching_lcdm_at_measured_redshifts(run_file, tmp_path, capsys):
    out = tmp_path / "m.csv"
    assert cli.main(["lcdm-table", str(out), "--matching", str(run_file), "--at", "cosmic_chronometers"]) == 0
    t = read_hubble_table(out)
    rec = read_run(run_file)
    np.testing.assert_array_equal(t.z, shipped_table("cosmic_chronometers").z)
    model = matching_lcdm(rec.config_toml, rec.today["H0_km_s_Mpc"])
    np.testing.assert_array_equal(t.H, model.hubble_km_s_Mpc(t.z))


@pytest.mark.parametrize(
    "args, message",
    [
        (["t.txt"], "must end in .csv"),
        (["t.csv", "--points", "1"], "--points must be >= 2"),
        (["t.csv", "--z-max", "0"], "--z-max must be a finite number > 0"),
        (["t.csv", "--H0", "20"], "Omega_lambda = 1 - Omega_m - Omega_r must be >= 0"),
    ],
)
def test_cli_lcdm_table_bad_input(tmp_path, monkeypatch, capsys, args, message):
    monkeypatch.chdir(tmp_path)
    assert cli.main(["lcdm-table", *args]) == cli.EXIT_INPUT
    err = capsys.readouterr().err.strip()
    assert message in err and "\n" not in err
    assert not list(tmp_path.iterdir())


def test_cli_compare_reads_tables_written_by_lcdm_table(fresh_run, tmp_path, capsys):
    table = tmp_path / "matching.csv"
    assert cli.main(["lcdm-table", str(table), "--matching", str(fresh_run)]) == 0
    assert cli.main(["compare", str(fresh_run), "--table", str(table)]) == 0
    stats = read_run(fresh_run).comparison["table_matching"]
    # the run against its own matching LambdaCDM: within the 1e-6 of the LambdaCDM run test
    assert stats["run_max_abs_deviation"] < 1e-6 and stats["lcdm_max_abs_deviation"] == 0.0
    with h5py.File(fresh_run) as f:
        assert f["comparison/table_matching/redshift"].shape == (26,)
