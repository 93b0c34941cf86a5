"""BAO distances (backreact/bao.py): the shipped DESI DR2 data, r_d, chi^2, and compare --bao."""

from __future__ import annotations

import csv
from importlib import resources

import numpy as np
import pytest
from helpers import make_config
from scipy.optimize import minimize_scalar

from backreact import cli
from backreact.bao import (
    EARLY_FRACTION_LIMIT,
    SoundHorizonError,
    bao_chi_square,
    load_desi_dr2,
    model_distances_Mpc,
    parse_bao_table,
    sound_horizon_Mpc,
)
from backreact.compare import RunHubble, compare_run
from backreact.constants import SPEED_OF_LIGHT_KM_S
from backreact.io import read_run, write_run
from backreact.reference import FlatLCDM
from backreact.run import run_scenario

PLANCK = FlatLCDM.planck2018()


def _rows():
    text = resources.files("backreact").joinpath("data", "desi_dr2_bao.csv").read_text()
    lines = [line for line in text.splitlines() if line and not line.startswith("#")]
    return list(csv.DictReader(lines))


def test_the_covariance_has_the_published_sigmas_and_correlations():
    # DESI DR2 (arXiv:2503.14738), as shipped: per tracer (D_M, D_H) with correlation r, BGS D_V.
    d = load_desi_dr2()
    assert len(d) == 13 and d.kind.count("DV") == 1
    cov = d.covariance
    assert np.array_equal(cov, cov.T)
    assert np.all(np.linalg.eigvalsh(cov) > 0)  # positive definite
    np.testing.assert_array_equal(np.sqrt(np.diag(cov)), d.sigma)
    i = 1  # entries after BGS come in (DM, DH) pairs in file order
    for row in _rows():
        if row["tracer"] == "BGS":
            assert d.value[0] == float(row["DV_over_rd"]) and d.sigma[0] == float(row["sigma_DV"])
            continue
        assert (d.kind[i], d.kind[i + 1]) == ("DM", "DH") and d.tracer[i] == row["tracer"]
        corr = cov[i, i + 1] / np.sqrt(cov[i, i] * cov[i + 1, i + 1])
        assert corr == pytest.approx(float(row["corr_DM_DH"]), rel=1e-14)  # round-off of the product
        # different tracers are independent
        assert np.count_nonzero(cov[i, :]) == 2 and np.count_nonzero(cov[i + 1, :]) == 2
        i += 2


def test_sound_horizon_for_planck_2018_parameters():
    # Planck 2018 VI (A&A 641, A6, Table 2, TT,TE,EE+lowE+lensing+BAO): r_drag = 147.21 +- 0.23 Mpc.
    # Tolerance 0.1% (0.15 Mpc, below Planck's own error): the fit's quoted accuracy is ~0.02%
    # (Aubourg et al. 2015, from memory), Planck's chain has one 0.06 eV neutrino where we have
    # massless ones (0.01% in the fit), and the parameters are rounded to 4 digits.
    rd = sound_horizon_Mpc(0.02242, 0.11933)
    assert abs(rd - 147.21) < 0.15


def test_sound_horizon_scales_like_the_fit_says():
    # d ln r_d / d ln omega_b = -0.12807 at fixed omega_cb (the fit's exponent): a self-check
    # that omega_b and omega_c enter as documented.
    h = 1e-6
    r0 = sound_horizon_Mpc(0.02242, 0.11933)
    r1 = sound_horizon_Mpc(0.02242 * (1 + h), 0.11933 - 0.02242 * h)
    assert np.log(r1 / r0) / np.log1p(h) == pytest.approx(-0.12807, rel=1e-5)


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"n_eff": 4.0}, "N_eff = 3.046"),
        ({"cmb_temperature_K": 2.8}, "T_CMB = 2.7255 K"),
        (
            {"redshift": np.array([1e9, 1100.0, 10.0]), "spectator_fraction": np.array([0.0, 0.01, 0.7])},
            "spectator carries 0.01 of the energy at z = 1100",
        ),
    ],
)
def test_sound_horizon_refuses_a_non_standard_early_universe(kwargs, message):
    with pytest.raises(SoundHorizonError, match=message):
        sound_horizon_Mpc(0.02242, 0.11933, **kwargs)


def test_a_late_or_inflationary_spectator_does_not_block_r_d():
    # dark energy at z < 1000 and whatever happens during inflation (z > 1e8) leave r_d alone
    z = np.array([1e30, 1e5, 1000.0, 1.0, 0.0])
    f = np.array([0.5, EARLY_FRACTION_LIMIT / 2, EARLY_FRACTION_LIMIT / 2, 0.6, 0.7])
    assert sound_horizon_Mpc(0.02242, 0.11933, redshift=z, spectator_fraction=f) > 0


def test_analytic_minimum_over_r_d_equals_a_brute_force_one():
    d = load_desi_dr2()
    x = model_distances_Mpc(d, PLANCK.hubble_km_s_Mpc, PLANCK.comoving_distance_Mpc)
    fit = bao_chi_square(d, x)
    inv = np.linalg.inv(d.covariance)

    def chi2(rd):
        r = d.value - x / rd
        return float(r @ inv @ r)

    brute = minimize_scalar(chi2, bounds=(100.0, 200.0), method="bounded", options={"xatol": 1e-12})
    # chi^2 is flat at its minimum, so its value agrees to round-off (1e-10) even though the
    # brute-force r_d is good only to ~sqrt(eps) relative.
    assert fit.chi2_free == pytest.approx(brute.fun, rel=1e-10)
    assert fit.best_rd_Mpc == pytest.approx(brute.x, rel=1e-6)
    # with r_d given: the same quadratic form evaluated directly
    fixed = bao_chi_square(d, x, rd_Mpc=147.0)
    assert fixed.chi2_rd == pytest.approx(chi2(147.0), rel=1e-12)
    assert fixed.chi2_rd >= fit.chi2_free


def test_chi2_minimum_depends_only_on_H0_times_r_d():
    # All distances scale as 1/H0 at fixed Omega's: the best r_d moves, H0 r_d and chi^2 do not.
    d = load_desi_dr2()
    # every Omega unchanged: physical densities x 1.21 = 1.1^2, radiation through T^4
    other = FlatLCDM(
        PLANCK.H0_km_s_Mpc * 1.1,
        PLANCK.omega_b * 1.21,
        PLANCK.omega_c * 1.21,
        PLANCK.cmb_temperature_K * 1.1**0.5,
    )
    fits = [
        bao_chi_square(d, model_distances_Mpc(d, m.hubble_km_s_Mpc, m.comoving_distance_Mpc))
        for m in (PLANCK, other)
    ]
    assert fits[0].chi2_free == pytest.approx(fits[1].chi2_free, rel=1e-6)  # Omega_r shifts by 1e-5 relative
    assert fits[0].best_rd_Mpc * PLANCK.H0_km_s_Mpc == pytest.approx(
        fits[1].best_rd_Mpc * other.H0_km_s_Mpc, rel=1e-6
    )


def _lcdm_history(model: FlatLCDM, step: float):
    n = np.arange(-8.0, 0.5 + step / 2, step)
    a = np.exp(n)
    e2 = model.Omega_r * a**-4 + model.Omega_m * a**-3 + model.Omega_lambda
    eps = (4 * model.Omega_r * a**-4 + 3 * model.Omega_m * a**-3) / (2 * e2)
    return {"efolds": n, "hubble_km_s_Mpc": model.H0_km_s_Mpc * np.sqrt(e2), "epsilon": eps}


def test_run_distances_against_astropy():
    # astropy FlatLambdaCDM with massless neutrinos and the same radiation (DESIGN 2.8): D_M, D_H
    # and D_V from a history sampled at the default late-time step 0.02, to 1e-6 (DESIGN 3 item 8).
    astropy_cosmology = pytest.importorskip("astropy.cosmology")
    import astropy.units as u

    ref = astropy_cosmology.FlatLambdaCDM(
        H0=PLANCK.H0_km_s_Mpc, Om0=PLANCK.Omega_m, Tcmb0=2.7255, Neff=3.044, m_nu=0 * u.eV
    )
    rh = RunHubble.from_history(_lcdm_history(PLANCK, 0.02))
    d = load_desi_dr2()
    got = model_distances_Mpc(d, rh, rh.comoving_distance_Mpc)
    dm = ref.comoving_transverse_distance(d.z).to_value(u.Mpc)
    dh = SPEED_OF_LIGHT_KM_S / ref.H(d.z).to_value(u.km / u.s / u.Mpc)
    dv = (d.z * dm**2 * dh) ** (1 / 3)
    kind = np.asarray(d.kind)
    want = np.where(kind == "DM", dm, np.where(kind == "DH", dh, dv))
    np.testing.assert_allclose(got, want, rtol=1e-6)


def test_bao_table_rows_are_checked():
    head = "tracer,z_eff,DM_over_rd,sigma_DM,DH_over_rd,sigma_DH,corr_DM_DH,DV_over_rd,sigma_DV\n"
    with pytest.raises(ValueError, match="line 2: a row needs DM_over_rd and DH_over_rd, or DV_over_rd"):
        parse_bao_table(head + "X,0.5,,,,,,,\n", source="b.csv")
    with pytest.raises(ValueError, match=r"line 2: needs sigma_DM > 0.*-1 < corr_DM_DH < 1"):
        parse_bao_table(head + "X,0.5,10,0.1,20,0.2,1.5,,\n", source="b.csv")
    with pytest.raises(ValueError, match="line 2: DV_over_rd is not a number"):
        parse_bao_table(head + "X,0.5,,,,,,abc,0.1\n", source="b.csv")


# --- through a run file -----------------------------------------------------------------------

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


def test_a_lcdm_run_and_its_matching_lcdm_have_the_same_bao_chi2(run_file):
    rec = read_run(run_file)
    c = compare_run(rec.history, rec.config_toml, rec.today["H0_km_s_Mpc"], with_lcdm=False, with_bao=True)
    # same expansion to 1e-6 (test_compare), so the same distances to ~1e-6 and chi^2 to
    # ~1e-6 x 2 x (data/sigma ~ 100) x sqrt(13): 1e-3 absolute
    assert c.bao.run.chi2_free == pytest.approx(c.bao.lcdm.chi2_free, abs=1e-3)
    assert c.bao.run.rd_Mpc == c.bao.lcdm.rd_Mpc == sound_horizon_Mpc(0.02242, 0.11933, n_eff=3.044)
    assert c.bao.rd_note == ""


def test_cli_compare_bao_prints_pulls_and_stores(run_file, tmp_path, capsys):
    path = tmp_path / "r.h5"
    path.write_bytes(run_file.read_bytes())
    assert cli.main(["compare", str(path), "--bao"]) == 0
    out = capsys.readouterr().out
    assert "chi^2 minimized over r_d" in out and "LRG3+ELG1" in out and "DH/r_d" in out
    group = read_run(path).comparison["bao"]
    assert group["points"] == 13 and list(group["kind"][:3]) == ["DV", "DM", "DH"]
    assert group["run_chi2_free"] <= group["run_chi2_rd"]
    np.testing.assert_allclose(
        group["pull_run"], (group["value"] - group["distance_run_Mpc"] / group["run_rd_Mpc"]) / group["sigma"]
    )
