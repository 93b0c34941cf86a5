"""One scenario end to end (backreact/run.py): the propagator reaches the run file."""

from __future__ import annotations

import functools

import numpy as np
import pytest
from helpers import make_config

from backreact import constants as C
from backreact.io import HISTORY_DATASETS, read_run, write_run
from backreact.run import run_scenario

SMALL = "[inflation]\nmodel = 'profile'\nefolds = 20.0\n[cosmology]\nomega_lambda = 0.3\n"


def test_run_writes_the_propagator_with_units(tmp_path):
    res = run_scenario(make_config(SMALL))
    path = write_run(tmp_path / "r.h5", res.record())
    rec = read_run(path)
    for name in ("propagator", "propagator_dN", "propagator_dNdN", "box_propagator"):
        assert name in rec.history and np.all(np.isfinite(rec.history[name]))
        assert HISTORY_DATASETS[name][0] in ("GeV^2", "GeV^4")
    assert "kernel_valid" not in rec.history  # exact method: no kernel flag (DESIGN 4)
    i0 = int(np.argmin(np.abs(rec.history["efolds"])))
    assert rec.today["propagator_GeV2"] == rec.history["propagator"][i0]


def test_memory_kernel_in_a_lambda_era_warns_with_the_redshift_range():
    # DESIGN 2.3.3: the run must warn, naming the redshift range, wherever the kernel is used
    # outside its validity range (every history with late acceleration).
    res = run_scenario(make_config(SMALL, propagator__method="memory_kernel"))
    text = " ".join(res.warnings)
    assert "memory_kernel" in text and "z = " in text
    assert "kernel_valid" in res.datasets and res.datasets["kernel_valid"].min() == 0.0


# --- the main job end to end: a calibrated frozen spectator through the fixed point -----------
# The demo scenario's physics (configs/demo.toml: no cosmological constant, a quadratic frozen
# Gaussian spectator whose mass is calibrated to H0 = 67.66 km/s/Mpc, a prior variance of
# 200 M_p^2) on the small CI grid, with the memory kernel (the exact method goes through the
# same fixed point in tests/test_solve.py's structure and in the demo itself; it compiles for
# minutes).
DEMO_SMALL = """
[inflation]
model = 'profile'
efolds = 65.0
[prehistory]
kind = 'variance'
variance_Mp2 = 200.0
[cosmology]
omega_lambda = 0.0
[propagator]
method = 'memory_kernel'
[spectator]
closure = 'gaussian'
potential = 'quadratic'
mass_eV = 2.0e-34
[calibration]
target = 'H0'
H0_km_s_Mpc = 67.66
"""


@functools.cache
def _demo_small(tmp: str, prehistory: bool = True):
    text = DEMO_SMALL if prehistory else DEMO_SMALL.replace("kind = 'variance'\nvariance_Mp2 = 200.0", "")
    res = run_scenario(make_config(text))
    path = write_run(f"{tmp}/demo_{prehistory}.h5", res.record())
    return res, read_run(path)


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    return _demo_small(str(tmp_path_factory.mktemp("demo")))


def test_calibrated_run_converges_and_hits_its_target(demo):
    res, rec = demo
    assert rec.converged and 1 <= rec.iterations <= 15  # DESIGN 5: <= 15 passes
    assert res.diagnostics["final_residual"] < 1e-10  # the default tolerance in max |delta ln H|
    # calibration target 67.66 km/s/Mpc to 1e-8 relative (the bar)
    assert rec.today["H0_km_s_Mpc"] == pytest.approx(67.66, rel=1e-8)


def test_stored_spectator_is_the_frozen_quadratic_of_the_stored_propagator(demo):
    # DESIGN 2.4: rho_q = m^2 A/2 and, by conservation, w_q = -1 - (1/3) d ln A/dN, both
    # checked on what the file holds (m from the calibration, in eV). 1e-10 relative: the
    # mass is stored to full precision; the datasets are float64 round-offs of one product.
    res, rec = demo
    h = rec.history
    m_gev = res.diagnostics["calibrated_value"] * 1e-9
    assert res.diagnostics["calibrated_parameter"] == "spectator.mass_eV"
    np.testing.assert_allclose(h["density_spectator"], 0.5 * m_gev**2 * h["propagator"], rtol=1e-10)
    w = -1.0 - h["propagator_dN"] / (3.0 * h["propagator"])
    np.testing.assert_allclose(h["w_spectator"], w, rtol=1e-10)


def test_stored_history_satisfies_the_first_friedmann_equation(demo):
    # 3 H^2 M_p^2 = sum of the stored densities on every node, to 1e-12 (the bar).
    _, rec = demo
    h = rec.history
    total = sum(h[k] for k in h if k.startswith("density_"))
    mp = C.REDUCED_PLANCK_MASS_GEV
    np.testing.assert_allclose(3.0 * h["hubble"] ** 2 * mp**2, total, rtol=1e-12)


def test_run_summary_reports_dark_energy_figures_and_a_valid_verdict(demo):
    res, rec = demo
    t = rec.today
    # A frozen spectator dominated by its prior variance has w_q = -1 to many digits
    # (DESIGN 2.4); it is then LambdaCDM with the same H0 (DESIGN 2.8) to the same order.
    assert t["fraction_spectator"] == pytest.approx(0.69, abs=0.01)
    assert abs(t["w0"] + 1.0) < 1e-6 and abs(t["wa"]) < 1e-6
    assert res.diagnostics["lcdm_max_deviation"] < 1e-6
    assert res.diagnostics["validity_verdict"] == "valid"
    assert 0.0 < res.diagnostics["validity_max"] < 0.1
    for key in ("dlnA_dlnmu", "dlnH0_dlnmu", "dlnA_dNstart", "dlnH0_dNstart", "second_friedmann_residual"):
        assert np.isfinite(res.diagnostics[key]), key
    # the memory kernel in the spectator-dominated late era: warned, with the redshifts
    assert any("memory_kernel" in w and "z = " in w for w in res.warnings)


def test_short_memory_ends_with_a_verdict_that_explains_why(tmp_path):
    # Without a prehistory a frozen field cannot carry Omega_q0 ~ 0.7 with m^2 << H^2 (the
    # calibrated mass is ~1e6 H0 here, and the fixed point of such a rolling field breaks
    # down): the verdict must say so with the numbers (required variance versus the
    # history's), never end silently or with a traceback.
    res, rec = _demo_small(str(tmp_path), prehistory=False)
    d = res.diagnostics
    assert d["validity_verdict"] in ("invalid", "not converged")
    text = d["validity_explanation"]
    assert "times too little" in text and "de Sitter e-folds" in text
    assert any(text in w for w in res.warnings)
    assert rec.converged == (d["validity_verdict"] == "invalid")
    for name in ("hubble", "propagator", "density_spectator"):
        assert np.all(np.isfinite(rec.history[name])), name  # the last finite pass is written


def test_impossible_calibration_is_reported_with_its_reason():
    # 20 e-folds of inflation: every mode of the history has re-entered the horizon by today
    # and A today is not positive, so no mass gives the target H0 (rho_q = m^2 A/2 > 0 needs
    # A > 0). The run ends not converged, with the reason and the figure, and a finite state.
    res = run_scenario(
        make_config(
            DEMO_SMALL.replace("efolds = 65.0", "efolds = 20.0").replace(
                "kind = 'variance'\nvariance_Mp2 = 200.0", ""
            )
        )
    )
    assert not res.converged
    assert res.diagnostics["solver_status"].startswith("calibration failed")
    assert "variance today is A = " in res.diagnostics["solver_status"]
    assert res.diagnostics["validity_verdict"] == "not converged"
    assert np.all(np.isfinite(res.datasets["hubble"]))
