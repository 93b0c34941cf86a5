"""Tests of backreact.config: schema, validation messages, round trips."""

from __future__ import annotations

import ast
import dataclasses
import hashlib
import math
import os
import pickle
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from backreact import config as bc
from backreact import constants
from backreact.config import (
    SCHEMA,
    SECTIONS,
    Config,
    ConfigError,
    all_keys,
    config_reference_markdown,
    default_config,
    default_config_path,
    load_config,
    parse_config,
)

REPO = Path(__file__).resolve().parents[1]

PROFILE = """
[scenario]
name = "profile-test_1.0"
description = "a \\"quoted\\" description\\nwith a newline and \\u00e9"

[inflation]
model = "profile"
hubble_GeV = 2e13
hubble_at = "start"
efolds = 70
eps_start = 0.01
eps_end = 0.9
rise_efolds = 3.5
junction_efolds = 0.5

[prehistory]
kind = "variance"
variance_Mp2 = 12.5

[reheating]
kind = "perturbative"
temperature_GeV = 1e9

[cosmology]
omega_lambda = 0.31

[grid]
points_inflation = 50
rtol = 1e-9

[output]
directory = "out/dir"
file = "custom.h5"
"""


# --------------------------------------------------------------------------------------
# defaults and structure
# --------------------------------------------------------------------------------------


def test_minimal_config_takes_defaults():
    cfg = parse_config("[inflation]\n")
    assert isinstance(cfg, Config)
    assert cfg.scenario.name == "demo"
    assert cfg.inflation.model == "plateau"
    assert cfg.inflation.hubble_GeV == 1.0e13
    assert cfg.inflation.hubble_at == "end"
    assert cfg.inflation.efolds == 65.0
    assert cfg.inflation.plateau_alpha == 1.0
    assert cfg.inflation.junction_efolds == 0.3
    # keys of other models do not apply
    assert cfg.inflation.eps_start is None and cfg.inflation.rise_efolds is None
    assert cfg.prehistory.kind == "none" and cfg.prehistory.variance_Mp2 is None
    assert cfg.reheating.kind == "instant" and cfg.reheating.temperature_GeV is None
    assert cfg.cosmology.omega_b == constants.PLANCK18_OMEGA_B
    assert cfg.cosmology.omega_c == constants.PLANCK18_OMEGA_C
    assert cfg.cosmology.omega_lambda == 0.0
    assert cfg.cosmology.cmb_temperature_K == 2.7255
    assert cfg.cosmology.n_eff == 3.044
    assert cfg.cosmology.final_redshift == -0.5
    assert (cfg.grid.points_inflation, cfg.grid.points_reheating) == (400, 120)
    assert (cfg.grid.points_radiation_matter, cfg.grid.points_late) == (400, 200)
    assert cfg.grid.late_start_redshift == 30.0
    assert (cfg.grid.rtol, cfg.grid.atol) == (1e-11, 1e-13)
    assert (cfg.output.directory, cfg.output.file) == ("runs", "")
    assert cfg.warnings == ()
    assert cfg.source == "<string>"
    assert cfg.text == "[inflation]\n"


def test_default_config_equals_minimal():
    assert default_config() == parse_config("[inflation]\n")
    assert parse_config(default_config().text) == default_config()


def test_profile_config_values():
    cfg = parse_config(PROFILE, source="profile.toml")
    assert cfg.inflation.model == "profile"
    assert cfg.inflation.efolds == 70.0 and isinstance(cfg.inflation.efolds, float)
    assert cfg.inflation.eps_start == 0.01 and cfg.inflation.eps_end == 0.9
    assert cfg.inflation.plateau_alpha is None
    assert cfg.prehistory.variance_Mp2 == 12.5
    assert cfg.reheating.temperature_GeV == 1e9
    assert cfg.scenario.description == 'a "quoted" description\nwith a newline and \u00e9'
    assert cfg.output_path() == Path("out/dir/custom.h5")
    assert parse_config("[inflation]\n").output_path() == Path("runs/demo.h5")


def test_schema_tables_are_consistent():
    keys = all_keys()
    assert len(keys) == len(set(keys)) == len(SCHEMA)
    assert all_keys("grid") == tuple(k for k in keys if k.startswith("grid."))
    assert {f.section for f in SCHEMA} == {s.name for s in SECTIONS}
    for f in SCHEMA:
        assert f.description and "\n" not in f.description
        if f.default is bc.REQUIRED:
            continue
        # every default passes its own range and choices
        if f.range is not None:
            assert f.range.violation(f.default) is None, f.dotted
        if f.choices:
            assert f.default in f.choices, f.dotted
    for section in SECTIONS:
        cls = bc.SECTION_CLASSES[section.name]
        assert dataclasses.is_dataclass(cls)
        assert [x.name for x in dataclasses.fields(cls)] == [k.split(".")[1] for k in all_keys(section.name)]


def test_config_is_frozen_hashable_and_picklable():
    cfg = parse_config(PROFILE)
    with pytest.raises(dataclasses.FrozenInstanceError):
        cfg.inflation.hubble_GeV = 1.0
    with pytest.raises(dataclasses.FrozenInstanceError):
        cfg.text = ""
    assert hash(cfg) == hash(parse_config(cfg.to_toml()))
    again = pickle.loads(pickle.dumps(cfg))
    assert again == cfg and again.sha256 == cfg.sha256


def test_observational_bound_and_reheating_maximum():
    h_max = math.pi * constants.REDUCED_PLANCK_MASS_GEV * math.sqrt(constants.PLANCK_AS * 0.036 / 2)
    assert bc.HUBBLE_OBSERVATIONAL_BOUND_GEV == pytest.approx(h_max, rel=1e-14)
    assert 4.6e13 < bc.HUBBLE_OBSERVATIONAL_BOUND_GEV < 4.8e13
    # rho = 3 H^2 M_p^2 = (pi^2 / 30) g* T^4 at T = T_max
    h = 1e13
    t = bc.max_reheating_temperature_gev(h)
    rho = math.pi**2 / 30 * 106.75 * t**4
    assert rho == pytest.approx(3 * h**2 * constants.REDUCED_PLANCK_MASS_GEV**2, rel=1e-12)


# --------------------------------------------------------------------------------------
# round trips, overrides, hashes
# --------------------------------------------------------------------------------------

VARIANTS = [
    "[inflation]\n",
    PROFILE,
    '[inflation]\nmodel = "quadratic"\nhubble_GeV = 3e12\n[prehistory]\nkind = "de_sitter_efolds"\n'
    "de_sitter_efolds = 1e6\n",
    "[inflation]\nplateau_alpha = 7\n[cosmology]\nfinal_redshift = -0.25\nn_eff = 3\n[grid]\natol = 1e-15\n",
]


@pytest.mark.parametrize("text", VARIANTS)
def test_round_trip(text):
    cfg = parse_config(text)
    canonical = cfg.to_toml()
    again = parse_config(canonical, source="canonical")
    assert again == cfg
    for section in SECTIONS:
        assert getattr(again, section.name) == getattr(cfg, section.name)
    assert again.to_toml() == canonical  # canonical form is a fixed point
    # every applicable key is written, and only those
    data = tomllib.loads(canonical)
    assert list(data) == [s.name for s in SECTIONS]
    flat = cfg.values()
    for f in SCHEMA:
        assert (f.key in data[f.section]) == (flat[f.dotted] is not None), f.dotted


def test_canonical_floats_stay_floats():
    cfg = parse_config("[inflation]\nefolds = 60\nhubble_GeV = 10000000000000\n")
    data = tomllib.loads(cfg.to_toml())
    assert isinstance(data["inflation"]["efolds"], float)
    assert isinstance(data["inflation"]["hubble_GeV"], float)
    assert "hubble_GeV = 1e+13" in cfg.to_toml()


def test_with_overrides():
    cfg = parse_config("[inflation]\n")
    new = cfg.with_overrides({"inflation.hubble_GeV": 2e12, "grid.points_late": 300})
    assert new.inflation.hubble_GeV == 2e12
    assert new.grid.points_late == 300
    assert new.cosmology == cfg.cosmology
    assert new != cfg
    assert new.text == new.to_toml()
    assert parse_config(new.text) == new
    assert new.sha256 != cfg.sha256
    # None restores the default
    assert new.with_overrides({"grid.points_late": None}).grid.points_late == 200
    # original untouched
    assert cfg.inflation.hubble_GeV == 1e13


def test_with_overrides_switching_model_drops_stale_keys():
    cfg = parse_config(PROFILE)
    plateau = cfg.with_overrides({"inflation.model": "plateau", "reheating.kind": "instant"})
    assert plateau.inflation.eps_start is None
    assert plateau.inflation.plateau_alpha == 1.0
    assert plateau.reheating.temperature_GeV is None
    back = plateau.with_overrides({"inflation.model": "profile", "inflation.eps_start": 0.02})
    assert back.inflation.eps_start == 0.02 and back.inflation.eps_end == 1.0


@pytest.mark.parametrize(
    "overrides, match",
    [
        ({"inflation.hubbel_GeV": 1e12}, r"did you mean 'inflation\.hubble_GeV'\?"),
        ({"inflaton.model": "plateau"}, r"unknown section \[inflaton\]; did you mean \[inflation\]\?"),
        ({"hubble_GeV": 1e12}, r"override key 'hubble_GeV' must have the form 'section\.key'"),
        ({"grid.points_late": 1.5}, r"grid\.points_late = 1\.5: must be an integer"),
        ({"inflation.eps_start": 0.1}, r"applies only to model = 'profile' \(model is 'plateau'\)"),
        ({"reheating.kind": "perturbative"}, r"reheating\.temperature_GeV is missing"),
    ],
)
def test_with_overrides_is_validated(overrides, match):
    cfg = parse_config("[inflation]\n", source="base.toml")
    with pytest.raises(ConfigError, match=match) as info:
        cfg.with_overrides(overrides)
    assert "\n" not in str(info.value)
    assert str(info.value).startswith("config error in base.toml (with overrides): ")


def test_sha256_follows_the_text():
    a = parse_config("[inflation]\n")
    b = parse_config("[inflation]\n# a comment\n")
    assert a == b  # same content ...
    assert a.sha256 != b.sha256  # ... different text
    assert len(a.sha256) == 64 and int(a.sha256, 16) >= 0
    assert b.sha256 == hashlib.sha256(b.text.encode("utf-8")).hexdigest()


# --------------------------------------------------------------------------------------
# malformed configurations
# --------------------------------------------------------------------------------------

PERT = '[reheating]\nkind = "perturbative"\n'

BAD = [
    # (id, text, regex the message must match, text the message must contain)
    (
        "str_for_float",
        '[inflation]\nhubble_GeV = "1e13"',
        r"must be a finite number, got a string",
        "inflation.hubble_GeV",
    ),
    (
        "bool_for_float",
        "[inflation]\nefolds = true",
        r"efolds = true: must be a finite number",
        "inflation.efolds",
    ),
    (
        "bool_for_int",
        "[inflation]\n[grid]\npoints_inflation = true",
        r"must be an integer, got a boolean",
        "grid.points_inflation",
    ),
    (
        "float_for_int",
        "[inflation]\n[grid]\npoints_late = 200.0",
        r"must be an integer, got a float \(write 200",
        "grid.points_late",
    ),
    (
        "int_out_of_range",
        "[inflation]\n[grid]\npoints_late = 5",
        r"must be >= 10; allowed: \[10, 100000\]",
        "grid.points_late",
    ),
    (
        "negative_omega_b",
        "[inflation]\n[cosmology]\nomega_b = -0.02",
        r"omega_b = -0\.02: must be > 0; allowed: \(0, 1\)",
        "cosmology.omega_b",
    ),
    (
        "zero_omega_c",
        "[inflation]\n[cosmology]\nomega_c = 0",
        r"omega_c = 0: must be > 0",
        "cosmology.omega_c",
    ),
    (
        "final_redshift_today",
        "[inflation]\n[cosmology]\nfinal_redshift = 0.0",
        r"must be < 0",
        "cosmology.final_redshift",
    ),
    (
        "unknown_key",
        "[inflation]\nhubbel_GeV = 1e13",
        r"unknown key 'inflation\.hubbel_GeV'; did you mean 'inflation\.hubble_GeV'\?",
        "inflation.hubbel_GeV",
    ),
    (
        "key_in_wrong_section",
        "[inflation]\n[cosmology]\nhubble_GeV = 1e13",
        r"unknown key 'cosmology\.hubble_GeV'; did you mean 'inflation\.hubble_GeV'\?",
        "cosmology.hubble_GeV",
    ),
    (
        "unknown_key_no_guess",
        "[inflation]\nzzz = 1",
        r"unknown key 'inflation\.zzz'; the keys of \[inflation\] are: model, ",
        "inflation.zzz",
    ),
    (
        "unknown_section",
        "[inflation]\n[cosmolgy]\nomega_b = 0.02",
        r"unknown section \[cosmolgy\]; did you mean \[cosmology\]\?",
        "cosmolgy",
    ),
    (
        "top_level_key",
        'model = "plateau"\n[inflation]',
        r"unknown top-level key 'model'.*did you mean 'inflation\.model'",
        "model",
    ),
    ("section_not_table", "inflation = 3", r"\[inflation\] must be a table", "inflation"),
    (
        "hubble_above_planck",
        "[inflation]\nhubble_GeV = 3e18",
        r"hubble_GeV = 3e\+18: must be < 2\.43532e\+18",
        "inflation.hubble_GeV",
    ),
    ("hubble_negative", "[inflation]\nhubble_GeV = -1e13", r"must be > 0", "inflation.hubble_GeV"),
    (
        "hubble_nan",
        "[inflation]\nhubble_GeV = nan",
        r"hubble_GeV = nan: must be a finite number",
        "inflation.hubble_GeV",
    ),
    (
        "hubble_inf",
        "[inflation]\nhubble_GeV = inf",
        r"hubble_GeV = inf: must be a finite number",
        "inflation.hubble_GeV",
    ),
    (
        "hubble_minus_inf",
        "[inflation]\nhubble_GeV = -inf",
        r"must be a finite number",
        "inflation.hubble_GeV",
    ),
    (
        "huge_int_for_float",
        "[inflation]\nefolds = 100000000000000000000",
        r"must be <= 500",
        "inflation.efolds",
    ),
    ("missing_inflation", "[cosmology]\nomega_b = 0.02", r"missing section \[inflation\]", "inflation"),
    ("empty_text", "", r"missing section \[inflation\]", "inflation"),
    (
        "perturbative_without_temperature",
        "[inflation]\n" + PERT,
        r"reheating\.temperature_GeV is missing: it is required when reheating\.kind = 'perturbative'",
        "reheating.temperature_GeV",
    ),
    (
        "temperature_below_bbn",
        "[inflation]\n" + PERT + "temperature_GeV = 1e-3",
        r"temperature_GeV = 0\.001: is below the nucleosynthesis bound \(at least 0\.004 GeV = 4 MeV",
        "reheating.temperature_GeV",
    ),
    (
        "temperature_above_tmax",
        "[inflation]\n" + PERT + "temperature_GeV = 1e17",
        r"temperature_GeV = 1e\+17: is above the end-of-inflation scale "
        r"\(at most 2\.7e\+15 GeV for inflation\.hubble_GeV = 1e\+13\)",
        "reheating.temperature_GeV",
    ),
    (
        "temperature_with_instant",
        "[inflation]\n[reheating]\ntemperature_GeV = 1e9",
        r"applies only to kind = 'perturbative' \(kind is 'instant'\)",
        "reheating.temperature_GeV",
    ),
    (
        "eps_end_below_eps_start",
        '[inflation]\nmodel = "profile"\neps_start = 0.5\neps_end = 0.1',
        r"eps_end = 0\.1: must be >= inflation\.eps_start \(= 0\.5\)",
        "inflation.eps_end",
    ),
    (
        "eps_start_is_one",
        '[inflation]\nmodel = "profile"\neps_start = 1.0',
        r"must be < 1; allowed: \[0, 1\)",
        "inflation.eps_start",
    ),
    (
        "profile_key_with_plateau",
        "[inflation]\neps_start = 0.01",
        r"inflation\.eps_start = 0\.01: applies only to model = 'profile' \(model is 'plateau'\)",
        "inflation.eps_start",
    ),
    (
        "plateau_key_with_quadratic",
        '[inflation]\nmodel = "quadratic"\nplateau_alpha = 2',
        r"applies only to model = 'plateau' \(model is 'quadratic'\)",
        "inflation.plateau_alpha",
    ),
    (
        "variance_with_kind_none",
        "[inflation]\n[prehistory]\nvariance_Mp2 = 1.0",
        r"applies only to kind = 'variance' \(kind is 'none'\)",
        "prehistory.variance_Mp2",
    ),
    (
        "bad_model_name",
        '[inflation]\nmodel = "platau"',
        r"model = \"platau\": not a known model \(did you mean 'plateau'\?\); "
        r"allowed: 'profile', 'plateau', 'quadratic'",
        "inflation.model",
    ),
    ("model_wrong_case", '[inflation]\nmodel = "Plateau"', r"did you mean 'plateau'\?", "inflation.model"),
    ("model_not_string", "[inflation]\nmodel = 3", r"must be a string, got an integer", "inflation.model"),
    (
        "bad_hubble_at",
        '[inflation]\nhubble_at = "middle"',
        r"not a known hubble_at; allowed: 'start', 'end'",
        "inflation.hubble_at",
    ),
    (
        "junction_at_open_bound",
        "[inflation]\njunction_efolds = 0.01",
        r"must be > 0\.01; allowed: \(0\.01, 3\]",
        "inflation.junction_efolds",
    ),
    ("toml_syntax_error", "[inflation\nhubble_GeV = 1e13", r"TOML syntax error: .*line 1", "line 1"),
    (
        "toml_duplicate_key",
        "[inflation]\nefolds = 60\nefolds = 61",
        r"TOML syntax error: Cannot overwrite a value",
        "TOML",
    ),
    (
        "file_not_h5",
        '[inflation]\n[output]\nfile = "result.txt"',
        r"output\.file = \"result\.txt\": must end with '\.h5'",
        "output.file",
    ),
    (
        "name_with_slash",
        '[scenario]\nname = "a/b"\n[inflation]',
        r"scenario\.name = \"a/b\": contains '/'",
        "scenario.name",
    ),
    ("name_empty", '[scenario]\nname = ""\n[inflation]', r"must not be empty", "scenario.name"),
    (
        "name_too_long",
        f'[scenario]\nname = "{"x" * 65}"\n[inflation]',
        r"at most 64 allowed",
        "scenario.name",
    ),
    (
        "description_not_string",
        "[scenario]\ndescription = 5\n[inflation]",
        r"must be a string",
        "scenario.description",
    ),
    (
        "array_for_float",
        "[inflation]\nefolds = [60, 61]",
        r"efolds = \[60, 61\]: must be a finite number, got an array",
        "inflation.efolds",
    ),
    (
        "nested_table",
        "[inflation]\n[inflation.extra]\nx = 1",
        r"unknown key 'inflation\.extra'",
        "inflation.extra",
    ),
]


@pytest.mark.parametrize("text, match, names", [b[1:] for b in BAD], ids=[b[0] for b in BAD])
def test_malformed_config(text, match, names):
    with pytest.raises(ConfigError, match=match) as info:
        parse_config(text, source="bad.toml")
    message = str(info.value)
    assert "\n" not in message and "\r" not in message
    assert message.startswith("config error in bad.toml: ")
    assert names in message
    assert isinstance(info.value, ValueError)
    assert info.value.source == "bad.toml"


def test_malformed_table_is_large_enough():
    assert len(BAD) >= 18


def test_field_errors_carry_the_key_and_allowed_values():
    with pytest.raises(ConfigError) as info:
        parse_config("[inflation]\n[grid]\nrtol = 0.1")
    assert info.value.key == "grid.rtol"
    assert str(info.value) == (
        "config error in <string>: grid.rtol = 0.1: must be <= 0.0001; allowed: [1e-14, 0.0001]"
    )


def test_exact_unknown_key_message():
    with pytest.raises(ConfigError) as info:
        parse_config("[inflation]\nhubbel_GeV = 1e13")
    assert str(info.value) == (
        "config error in <string>: unknown key 'inflation.hubbel_GeV'; did you mean 'inflation.hubble_GeV'?"
    )


def test_temperature_bound_scales_with_hubble():
    ok = parse_config("[inflation]\nhubble_GeV = 1e13\n" + PERT + "temperature_GeV = 2e15")
    assert ok.reheating.temperature_GeV == 2e15
    with pytest.raises(ConfigError, match=r"at most 8\.4e\+14 GeV for inflation\.hubble_GeV = 1e\+12"):
        parse_config("[inflation]\nhubble_GeV = 1e12\n" + PERT + "temperature_GeV = 2e15")
    assert parse_config("[inflation]\n" + PERT + "temperature_GeV = 0.004").reheating.temperature_GeV == 0.004


def test_int_accepted_for_float():
    cfg = parse_config("[inflation]\nhubble_GeV = 10000000000000\nefolds = 60\n[cosmology]\nn_eff = 3")
    assert isinstance(cfg.inflation.hubble_GeV, float) and cfg.inflation.hubble_GeV == 1e13
    assert isinstance(cfg.cosmology.n_eff, float)


# --------------------------------------------------------------------------------------
# warnings
# --------------------------------------------------------------------------------------


def test_hubble_above_observational_bound_warns():
    cfg = parse_config("[inflation]\nhubble_GeV = 6e13\n")
    assert cfg.inflation.hubble_GeV == 6e13
    assert len(cfg.warnings) == 1
    (warning,) = cfg.warnings
    assert "\n" not in warning
    assert warning.startswith("inflation.hubble_GeV = 6e+13 exceeds the observational bound 4.7e+13 GeV")
    assert "r < 0.036, BICEP/Keck 2021, with Planck 2018 A_s" in warning
    assert warning.endswith("the run goes on")
    # the warning survives the round trip and overrides
    assert parse_config(cfg.to_toml()).warnings == cfg.warnings
    assert cfg.with_overrides({"inflation.hubble_GeV": 1e13}).warnings == ()


def test_hubble_at_the_bound_does_not_warn():
    cfg = parse_config(f"[inflation]\nhubble_GeV = {bc.HUBBLE_OBSERVATIONAL_BOUND_GEV!r}\n")
    assert cfg.warnings == ()


# --------------------------------------------------------------------------------------
# files
# --------------------------------------------------------------------------------------


def test_load_config(tmp_path):
    path = tmp_path / "scenario.toml"
    path.write_text(PROFILE, encoding="utf-8")
    cfg = load_config(path)
    assert cfg == parse_config(PROFILE)
    assert cfg.source == str(path)
    assert cfg.text == PROFILE
    assert load_config(str(path)) == cfg


def test_load_config_errors_name_the_file(tmp_path):
    missing = tmp_path / "nope.toml"
    with pytest.raises(ConfigError, match=r"cannot read file: No such file or directory") as info:
        load_config(missing)
    assert str(missing) in str(info.value)
    with pytest.raises(ConfigError, match=r"cannot read file"):
        load_config(tmp_path)
    binary = tmp_path / "binary.toml"
    binary.write_bytes(b"[inflation]\nx = '\xff'\n")
    with pytest.raises(ConfigError, match=r"binary\.toml: not UTF-8 text"):
        load_config(binary)
    broken = tmp_path / "broken.toml"
    broken.write_text("[inflation]\nhubble_GeV = = 1\n", encoding="utf-8")
    with pytest.raises(ConfigError, match=r"broken\.toml: TOML syntax error: .*line 2") as info:
        load_config(broken)
    assert "\n" not in str(info.value)


def test_default_config_path():
    path = default_config_path()
    assert path == REPO / "backreact" / "data" / "scenarios" / "demo.toml"
    if not path.exists():
        pytest.skip("the packaged demo.toml is not written yet")
    cfg = load_config(path)
    assert cfg.scenario.name == "demo"


# --------------------------------------------------------------------------------------
# reference documentation
# --------------------------------------------------------------------------------------


def test_reference_markdown_lists_every_key():
    md = config_reference_markdown()
    for section in SECTIONS:
        assert f"## [{section.name}]" in md
    header = "| key | type | unit | default | allowed | meaning |"
    assert md.count(header) == len(SECTIONS)
    rows = [line for line in md.splitlines() if line.startswith("| `")]
    assert len(rows) == len(SCHEMA)
    for f in SCHEMA:
        assert f"| `{f.key}` |" in md
    # every table row has exactly six cells (pipes inside cells are escaped)
    for row in rows:
        assert row.replace("\\|", "").count("|") == 7
    assert "| `temperature_GeV` | float | GeV | required |" in md
    assert "*only for model = 'profile':*" in md


# --------------------------------------------------------------------------------------
# purity: config is checked before JAX is imported
# --------------------------------------------------------------------------------------


def test_import_does_not_load_jax():
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    code = "import backreact.config, sys; assert 'jax' not in sys.modules, 'jax was imported'"
    result = subprocess.run(
        [sys.executable, "-c", code], cwd=REPO, env=env, capture_output=True, text=True, timeout=60
    )
    assert result.returncode == 0, result.stderr


def test_config_module_imports_only_the_standard_library():
    tree = ast.parse((REPO / "backreact" / "config.py").read_text(encoding="utf-8"))
    imported = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            imported.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            module = node.module or ""
            if module == "backreact":
                imported.update(f"backreact.{alias.name}" for alias in node.names)
            else:
                imported.add(module)
    third_party = {name for name in imported if name.split(".")[0] not in sys.stdlib_module_names}
    assert third_party == {"backreact.constants"}
