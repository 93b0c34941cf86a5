"""H(z) tables (backreact/tables.py): reading, writing, the shipped data and chi^2."""

from __future__ import annotations

import math

import numpy as np
import pytest

from backreact import constants as C
from backreact.reference import FlatLCDM
from backreact.tables import (
    SHIPPED_TABLES,
    TableError,
    chi_square,
    parse_hubble_table,
    read_hubble_table,
    resolve_table,
    shipped_table,
    write_hubble_table,
)

GOOD = "# a comment\nz,H,sigma\n0.1,70.0,5.0\n0.5,90.0,6.0\n1.0,120.0,10.0\n"


def test_shipped_chronometers_load_offline_with_a_reference_per_point():
    # ../shared/data/cosmic_chronometers.csv: 32 points (Moresco et al. 2016 Table 4 plus two
    # later points), each with its published reference in the 'reference' column.
    t = shipped_table("cosmic_chronometers")
    assert len(t) == 32
    assert np.all(np.diff(t.z) > 0) and t.z[0] == 0.07 and t.z[-1] == 1.965
    assert t.sigma is not None and np.all(t.sigma > 0)
    assert all(ref.strip() for ref in t.columns["reference"])
    assert any("Moresco" in line for line in t.comments)


def _chi2_by_hand(H0, omega_b, omega_c, T, n_eff, z, H, sigma):
    # Independent of backreact.reference: E(z)^2 = Omega_r (1+z)^4 + Omega_m (1+z)^3 + Omega_L
    # with Omega_gamma h^2 = 2.4730e-5 (T/2.7255 K)^4 and (7/8)(4/11)^(4/3) = 0.2271073 per
    # massless species (DESIGN 3, reference numbers). The 4th digit of these constants is
    # recomputed from CODATA in backreact.constants; use those exact values here.
    h2 = (H0 / 100.0) ** 2
    og = C.OMEGA_GAMMA_H2_FIDUCIAL * (T / C.T_CMB_K) ** 4
    omega_r = og * (1.0 + C.NEUTRINO_PER_SPECIES * n_eff)
    Om = (omega_b + omega_c) / h2
    Or = omega_r / h2
    OL = 1.0 - Om - Or
    zp = 1.0 + z
    model = H0 * np.sqrt(Or * zp**4 + Om * zp**3 + OL)
    return float(np.sum(((model - H) / sigma) ** 2))


def test_chi2_of_the_lcdm_reference_against_chronometers_matches_a_hand_computation():
    t = shipped_table("cosmic_chronometers")
    ref = FlatLCDM.planck2018()
    chi2 = chi_square(ref.hubble_km_s_Mpc(t.z), t)
    by_hand = _chi2_by_hand(67.66, 0.02242, 0.11933, C.T_CMB_K, C.N_EFF, t.z, t.H, t.sigma)
    # Same formula summed in another order: agreement to round-off (1e-12 relative).
    assert chi2 == pytest.approx(by_hand, rel=1e-12)
    # From memory: flat LambdaCDM with Planck-like parameters gives chi^2 ~ 14-16 for the
    # ~31-32-point compilation (chi^2 per point ~ 0.5: the published errors include
    # conservative systematics). A broad band, so that it checks the data, not the digits.
    assert 10.0 < chi2 < 20.0
    assert 0.3 < chi2 / len(t) < 0.65


def test_chi2_is_zero_for_the_table_itself_and_needs_sigma():
    t = parse_hubble_table(GOOD)
    assert chi_square(t.H, t) == 0.0
    # one point off by one sigma adds exactly 1
    assert chi_square(t.H + np.array([0.0, 6.0, 0.0]), t) == pytest.approx(1.0, rel=1e-15)
    no_sigma = parse_hubble_table("z,H\n0,70\n1,120\n")
    with pytest.raises(ValueError, match="no sigma column"):
        chi_square(no_sigma.H, no_sigma)


def test_rows_are_sorted_and_text_columns_follow_them():
    t = parse_hubble_table("Z,h,Sigma,note\n1.0,120,10,c\n0.1,70,5,a\n0.5,90,6,b\n")
    assert list(t.z) == [0.1, 0.5, 1.0] and list(t.H) == [70.0, 90.0, 120.0]
    assert t.columns["note"] == ["a", "b", "c"]


@pytest.mark.parametrize(
    "text, columns",
    [("0.1,70\n0.5,90\n", ("z", "H")), ("0.1,70,5\n0.5,90,6\n", ("z", "H", "sigma"))],
)
def test_tables_without_header_are_z_H_sigma(text, columns):
    t = parse_hubble_table(text)
    assert list(t.z) == [0.1, 0.5] and list(t.H) == [70.0, 90.0]
    assert (t.sigma is not None) == ("sigma" in columns)


MALFORMED = {
    "text in a number field": (
        "z,H,sigma\n0.1,70,5\n0.5,ninety,6\n",
        r"line 3: H is not a number \('ninety'\)",
    ),
    "negative z": ("z,H\n-0.1,70\n0.5,90\n", r"line 2: z must be >= 0"),
    "duplicated z": ("z,H\n0.1,70\n0.5,90\n0.1,71\n", r"line 4: z = 0.1 is duplicated \(first on line 2\)"),
    "one row": ("# only one\nz,H\n0.1,70\n", r"at least 2 rows .* found 1"),
    "no rows": ("z,H\n", r"at least 2 rows .* found 0"),
    "NaN": ("z,H,sigma\n0.1,70,5\n0.5,nan,6\n", r"line 3: H must be a finite number"),
    "infinite sigma": ("z,H,sigma\n0.1,70,inf\n0.5,90,6\n", r"line 2: sigma must be a finite number"),
    "zero H": ("z,H\n0.1,0\n0.5,90\n", r"line 2: H must be > 0"),
    "negative sigma": ("z,H,sigma\n0.1,70,-5\n0.5,90,6\n", r"line 2: sigma must be > 0"),
    "missing cell": ("z,H,sigma\n0.1,70,5\n0.5,90\n", r"line 3: expected 3 cells"),
    "header without H": ("z,Hubble\n0.1,70\n0.5,90\n", r"line 1: the header must name the columns z and H"),
    "four columns, no header": ("0.1,70,5,1\n0.5,90,6,1\n", r"z,H or z,H,sigma; line 1 has 4 cells"),
}


@pytest.mark.parametrize("case", sorted(MALFORMED))
def test_malformed_tables_are_rejected_with_the_line(case):
    text, message = MALFORMED[case]
    with pytest.raises(TableError, match=message) as info:
        parse_hubble_table(text, source="T.csv")
    assert str(info.value).startswith("T.csv") and "\n" not in str(info.value)


def test_write_then_read_is_exact(tmp_path):
    rng = np.random.default_rng(1)
    z = np.sort(rng.uniform(0, 3, 20))
    H = 70.0 * np.sqrt(0.3 * (1 + z) ** 3 + 0.7)
    sigma = rng.uniform(1, 10, 20)
    path = write_hubble_table(tmp_path / "t.csv", z, H, sigma, comments=["made up", "two lines"])
    t = read_hubble_table(path)
    # shortest round-trip decimal: bitwise equal
    assert np.array_equal(t.z, z) and np.array_equal(t.H, H) and np.array_equal(t.sigma, sigma)
    assert t.comments == ["made up", "two lines"] and t.name == "t"
    assert not list(tmp_path.glob(".*partial"))


def test_write_refuses_a_table_it_could_not_read_back(tmp_path):
    with pytest.raises(TableError, match="duplicated"):
        write_hubble_table(tmp_path / "t.csv", [0.1, 0.1], [70.0, 71.0])
    assert not (tmp_path / "t.csv").exists()


def test_resolve_table_prefers_files_then_shipped_names(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert resolve_table("cosmic_chronometers").name == "cosmic_chronometers"
    (tmp_path / "cosmic_chronometers").write_text(GOOD)
    assert len(resolve_table("cosmic_chronometers")) == 3  # an existing file wins
    with pytest.raises(TableError, match="not found: nope .*shipped: cosmic_chronometers"):
        resolve_table("nope")


def test_read_errors_are_one_line(tmp_path):
    with pytest.raises(TableError, match="table file not found"):
        read_hubble_table(tmp_path / "missing.csv")
    with pytest.raises(TableError, match="is a directory"):
        read_hubble_table(tmp_path)
    (tmp_path / "bin.csv").write_bytes(b"\xff\xfe\x00z")
    with pytest.raises(TableError, match="not a UTF-8 text file"):
        read_hubble_table(tmp_path / "bin.csv")
    with pytest.raises(TableError, match="no shipped table named 'x'"):
        shipped_table("x")


def test_every_shipped_table_is_packaged_and_readable():
    for name in SHIPPED_TABLES:
        t = shipped_table(name)
        assert len(t) >= 2 and math.isfinite(float(t.H.sum()))
