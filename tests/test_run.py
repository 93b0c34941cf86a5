"""One scenario end to end (backreact/run.py): the propagator reaches the run file."""

from __future__ import annotations

import numpy as np
from helpers import make_config

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
