"""Tests for the HDF5 sweep-file layer (backreact.sweep_io)."""

from __future__ import annotations

import hashlib
import os
import signal
import subprocess
import sys
import time
import warnings
from datetime import datetime
from pathlib import Path

import h5py
import numpy as np
import pytest

from backreact.io import RunRecord, write_run
from backreact.sweep_io import (
    FORMAT_NAME,
    SCHEMA_VERSION,
    SUMMARY_COLUMNS,
    SweepFileError,
    SweepWriter,
    is_sweep_file,
    read_sweep,
)

REPO = Path(__file__).resolve().parents[1]
SWEEP = '[sweep]\nbase = "lcdm_like"\n\n[sweep.grid]\n"inflation.hubble_GeV" = [1e12, 1e13]\n'
PARAMS = ["inflation.hubble_GeV", "spectator.mass_GeV"]
SHAPE = (2, 3)
N = 6
REDSHIFT = np.linspace(0.0, 3.0, 7)


def make_grid() -> dict[str, np.ndarray]:
    # C-order product of hubble (2 values) x mass (3 values)
    hubble, mass = np.meshgrid([1e12, 1e13], [1e-33, 2e-33, 4e-33], indexing="ij")
    return {PARAMS[0]: hubble.ravel(), PARAMS[1]: mass.ravel()}


def writer(path: Path, sweep: str = SWEEP, grid=None, **kwargs) -> SweepWriter:
    return SweepWriter(path, sweep, PARAMS, make_grid() if grid is None else grid, SHAPE, **kwargs)


def hist_writer(path: Path) -> SweepWriter:
    return writer(path, history_names=["hubble", "w_spectator"], redshift=REDSHIFT)


def row_for(i: int) -> dict:
    return {
        "status": 0 if i % 2 == 0 else 1,
        "reason": "" if i % 2 == 0 else f"no convergence at point {i}",
        "H0_km_s_Mpc": 60.0 + i,
        "iterations": 10 + i,
        "validity_verdict": "valid",
        "wall_seconds": 0.5 * i,
    }


def leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.endswith(".partial"))


def _one_line(excinfo) -> None:
    assert "\n" not in str(excinfo.value)


# --- writing and reading ------------------------------------------------------------------


def test_new_file_exists_at_once_with_nothing_finished(tmp_path):
    # A sweep file must exist (and be readable) before the first point finishes, so that
    # progress can be watched and an early interruption still leaves a valid file.
    path = tmp_path / "sweep.h5"
    w = writer(path)
    assert w.done == set()
    rec = read_sweep(path)
    assert rec.sweep_toml == SWEEP
    assert rec.parameters == PARAMS and rec.shape == SHAPE
    for key, values in make_grid().items():
        np.testing.assert_array_equal(rec.grid[key], values)
        assert rec.grid[key].dtype == np.float64
    assert rec.finished.dtype == bool and not rec.finished.any()
    assert list(rec.summary) == list(SUMMARY_COLUMNS)
    for name, (kind, _, _) in SUMMARY_COLUMNS.items():
        col = rec.summary[name]
        assert col.shape == (N,)
        if kind == "float":
            assert col.dtype == np.float64 and np.isnan(col).all()
        elif kind == "int":
            assert col.dtype == np.int64 and (col == -1).all()
        else:
            assert list(col) == [""] * N
    assert rec.histories is None
    assert rec.attrs["points"] == N and rec.attrs["finished_count"] == 0
    assert rec.attrs["complete"] is False
    assert rec.attrs["sweep_sha256"] == hashlib.sha256(SWEEP.encode()).hexdigest()
    assert rec.attrs["format"] == FORMAT_NAME and rec.attrs["schema_version"] == SCHEMA_VERSION
    assert datetime.fromisoformat(rec.attrs["created_utc"]).utcoffset().total_seconds() == 0
    assert "h5py" in rec.attrs["dependency_versions"]
    w.close()
    assert leftovers(tmp_path) == []


def test_rows_are_stored_by_point_index_not_arrival_order(tmp_path):
    # Parallel workers finish points in any order; row i must always describe point i.
    path = tmp_path / "sweep.h5"
    order = [4, 0, 5, 2]
    with writer(path) as w:
        for k, i in enumerate(order):
            w.record(i, row_for(i))
            rec = read_sweep(path)  # the file is complete after every point
            assert rec.attrs["finished_count"] == k + 1
            assert set(np.flatnonzero(rec.finished)) == set(order[: k + 1])
        assert w.done == set(order)
    rec = read_sweep(path)
    for i in range(N):
        if i in order:
            expected = row_for(i)
            assert rec.summary["H0_km_s_Mpc"][i] == expected["H0_km_s_Mpc"]
            assert rec.summary["status"][i] == expected["status"]
            assert rec.summary["reason"][i] == expected["reason"]
            assert rec.summary["iterations"][i] == expected["iterations"]
            assert np.isnan(rec.summary["chi2_bao"][i])  # not given -> NaN
        else:
            assert not rec.finished[i]
            assert np.isnan(rec.summary["H0_km_s_Mpc"][i]) and rec.summary["status"][i] == -1
    assert rec.attrs["complete"] is False


def test_missing_values_use_column_markers(tmp_path):
    # Columns left out of a row (or given as None) read back as the "unknown" marker of
    # their kind, not as zero.
    path = tmp_path / "sweep.h5"
    with writer(path) as w:
        w.record(1, {"status": 2, "reason": "solver raised", "age_Gyr": None})
    rec = read_sweep(path)
    assert rec.finished[1] and rec.summary["status"][1] == 2
    assert np.isnan(rec.summary["age_Gyr"][1]) and rec.summary["iterations"][1] == -1
    assert rec.summary["validity_verdict"][1] == ""


def test_close_marks_complete_sweep(tmp_path):
    # `complete` tells a reader that the sweep needs no resuming.
    path = tmp_path / "sweep.h5"
    with writer(path) as w:
        for i in range(N):
            w.record(i, row_for(i))
    rec = read_sweep(path)
    assert rec.attrs["complete"] is True and rec.finished.all()
    with pytest.raises(ValueError, match="closed"):
        w.record(0, {})


def test_file_layout(tmp_path):
    # The group/dataset/attribute names are a contract for other tools (and xarray).
    path = tmp_path / "sweep.h5"
    with hist_writer(path) as w:
        w.record(3, row_for(3))
    with h5py.File(path, "r") as f:
        for name in ("format", "schema_version", "package_version", "created_utc", "updated_utc"):
            assert name in f.attrs
        assert isinstance(f.attrs["points"], np.integer) and f.attrs["points"] == N
        assert isinstance(f.attrs["complete"], np.bool_)
        grid = f["grid"]
        assert list(grid.attrs["parameters"]) == PARAMS
        assert list(grid.attrs["shape"]) == list(SHAPE)
        assert grid["inflation__hubble_GeV"].attrs["key"] == "inflation.hubble_GeV"
        assert grid["spectator__mass_GeV"].dtype == np.float64
        summary = f["summary"]
        assert summary["point"].is_scale
        np.testing.assert_array_equal(summary["point"][()], np.arange(N))
        for name, (_, units, description) in SUMMARY_COLUMNS.items():
            ds = summary[name]
            assert ds.attrs["units"] == units and ds.attrs["description"] == description
            assert description and "\n" not in description
            assert ds.dims[0][0].name == "/summary/point"
        assert summary["finished"].dims[0][0].name == "/summary/point"
        assert list(summary["finished"][()]) == [0, 0, 0, 1, 0, 0]
        hist = f["histories"]
        assert hist["redshift"].is_scale
        assert hist["hubble"].shape == (N, REDSHIFT.size)
        assert hist["hubble"].dims[1][0].name == "/histories/redshift"


def test_summary_columns_registry():
    # The columns promised to users, each with units and a one-line description.
    required = {
        "status", "reason", "H0_km_s_Mpc", "fraction_spectator", "w0", "wa", "age_Gyr",
        "chi2_chronometers", "chi2_bao", "lcdm_max_deviation", "iterations", "validity_verdict",
        "validity_max", "calibrated_value", "wall_seconds",
    }  # fmt: skip
    assert required <= set(SUMMARY_COLUMNS)
    for name, (kind, units, description) in SUMMARY_COLUMNS.items():
        assert kind in ("float", "int", "str"), name
        assert isinstance(units, str) and description and "\n" not in description
    assert SUMMARY_COLUMNS["status"][0] == "int" and SUMMARY_COLUMNS["reason"][0] == "str"


def test_histories_round_trip(tmp_path):
    # Histories of finished points come back on their rows; unfinished rows are NaN.
    path = tmp_path / "sweep.h5"
    rng = np.random.default_rng(7)
    hubble = {i: rng.random(REDSHIFT.size) for i in (2, 5)}
    with hist_writer(path) as w:
        for i, values in hubble.items():
            w.record(i, row_for(i), {"hubble": values, "w_spectator": -values})
        w.record(0, row_for(0), {"hubble": np.arange(REDSHIFT.size)})  # w_spectator absent -> NaN
    rec = read_sweep(path)
    assert set(rec.histories) == {"redshift", "hubble", "w_spectator"}
    np.testing.assert_array_equal(rec.histories["redshift"], REDSHIFT)
    for name in ("hubble", "w_spectator"):
        assert rec.histories[name].shape == (N, REDSHIFT.size)
        assert rec.histories[name].dtype == np.float64
    for i, values in hubble.items():
        np.testing.assert_array_equal(rec.histories["hubble"][i], values)
        np.testing.assert_array_equal(rec.histories["w_spectator"][i], -values)
    np.testing.assert_array_equal(rec.histories["hubble"][0], np.arange(REDSHIFT.size))
    assert np.isnan(rec.histories["w_spectator"][0]).all()
    for i in (1, 3, 4):
        assert np.isnan(rec.histories["hubble"][i]).all()


# --- resuming -----------------------------------------------------------------------------


def test_resume_keeps_finished_points_and_created_utc(tmp_path):
    # Re-running an interrupted sweep continues where it stopped instead of starting over,
    # and the file keeps the time the sweep was first started.
    path = tmp_path / "sweep.h5"
    with hist_writer(path) as w:
        w.record(1, row_for(1), {"hubble": np.ones(REDSHIFT.size)})
        w.record(4, row_for(4))
    with h5py.File(path, "r+") as f:  # make the original start time unmistakable
        f.attrs["created_utc"] = "2000-01-01T00:00:00+00:00"

    w = hist_writer(path)
    assert w.done == {1, 4}
    w.record(0, row_for(0))
    w.close()
    rec = read_sweep(path)
    assert rec.attrs["created_utc"] == "2000-01-01T00:00:00+00:00"
    assert rec.attrs["updated_utc"] != rec.attrs["created_utc"]
    assert set(np.flatnonzero(rec.finished)) == {0, 1, 4}
    assert rec.summary["reason"][1] == row_for(1)["reason"]
    assert rec.summary["H0_km_s_Mpc"][4] == row_for(4)["H0_km_s_Mpc"]
    np.testing.assert_array_equal(rec.histories["hubble"][1], np.ones(REDSHIFT.size))
    with pytest.raises(ValueError, match="already finished"):
        hist_writer(path).record(4, row_for(4))


@pytest.mark.parametrize(
    ("change", "match"),
    [
        ({"sweep": SWEEP + "# edited\n"}, "config changed"),
        ({"grid": {key: values * 2 for key, values in make_grid().items()}}, "grid changed"),
        ({"history_names": ["hubble"], "redshift": REDSHIFT}, "histories"),
    ],
)
def test_resume_refuses_a_different_sweep(tmp_path, change, match):
    # Mixing points of two different sweeps in one file would silently corrupt results.
    path = tmp_path / "sweep.h5"
    with writer(path) as w:
        w.record(0, row_for(0))
    before = path.read_bytes()
    with pytest.raises(SweepFileError, match=f"holds a different sweep .*{match}") as excinfo:
        writer(path, **change)
    _one_line(excinfo)
    assert path.read_bytes() == before


def test_writer_refuses_to_overwrite_other_files(tmp_path):
    # A typo in the output name must not destroy a run file or any other file.
    path = tmp_path / "run.h5"
    write_run(path, RunRecord(config_toml="", history={"efolds": np.zeros(2)}, today={}))
    before = path.read_bytes()
    with pytest.raises(SweepFileError, match="run file, not a sweep file"):
        writer(path)
    assert path.read_bytes() == before


def test_stale_partials_are_removed_on_open(tmp_path):
    # Temporary files of a killed writer are garbage; those of other targets are not ours.
    path = tmp_path / "sweep.h5"
    stale = tmp_path / ".sweep.h5.99999999.partial"
    stale.write_bytes(b"half a file")
    other = tmp_path / ".other.h5.99999999.partial"
    other.write_bytes(b"not ours")
    writer(path).close()
    assert leftovers(tmp_path) == [other.name]


# --- invalid input ------------------------------------------------------------------------


def test_record_rejects_bad_points_and_columns(tmp_path):
    # Each mistake is reported by name and leaves the file and the writer unchanged.
    path = tmp_path / "sweep.h5"
    w = writer(path)
    w.record(2, row_for(2))
    before = path.read_bytes()
    with pytest.raises(ValueError, match="point 2 is already finished"):
        w.record(2, row_for(2))
    with pytest.raises(ValueError, match="out of range"):
        w.record(N, row_for(0))
    with pytest.raises(ValueError, match="out of range"):
        w.record(-1, row_for(0))
    with pytest.raises(ValueError, match="unknown summary column.*'H0'"):
        w.record(0, {"H0": 67.0})
    with pytest.raises(ValueError, match="'status' takes an int"):
        w.record(0, {"status": "ok"})
    with pytest.raises(ValueError, match="'H0_km_s_Mpc' takes a number"):
        w.record(0, {"H0_km_s_Mpc": True})
    with pytest.raises(ValueError, match="'reason' takes a str"):
        w.record(0, {"reason": 3})
    with pytest.raises(ValueError, match="stores no histories"):
        w.record(0, {}, {"hubble": np.ones(3)})
    assert path.read_bytes() == before
    assert w.done == {2}
    w.close()


def test_record_rejects_bad_histories(tmp_path):
    # Histories must be on the sweep's redshift grid and among the declared names.
    w = hist_writer(tmp_path / "sweep.h5")
    with pytest.raises(ValueError, match="unknown history name.*'density_matter'"):
        w.record(0, {}, {"density_matter": np.ones(REDSHIFT.size)})
    with pytest.raises(ValueError, match="'hubble' must be 7 real numbers"):
        w.record(0, {}, {"hubble": np.ones(3)})
    assert w.done == set()
    w.close()


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"shape": (2, 2)}, "must have shape \\(4,\\)"),
        ({"grid": {PARAMS[0]: np.ones(N)}}, "no values for parameter.*spectator.mass_GeV"),
        ({"grid": {**make_grid(), "extra.key": np.ones(N)}}, "'extra.key' are not among"),
        ({"shape": (0, 3)}, ">= 1"),
        ({"history_names": ["hubble"]}, "needs the redshift grid"),
        ({"history_names": ["redshift"], "redshift": REDSHIFT}, "not allowed"),
    ],
)
def test_writer_rejects_inconsistent_setup(tmp_path, kwargs, match):
    # Errors in the sweep definition surface before any file is written.
    args = {"path": tmp_path / "sweep.h5", "sweep_toml": SWEEP, "parameters": PARAMS}
    args |= {"grid": make_grid(), "shape": SHAPE} | kwargs
    with pytest.raises(ValueError, match=match):
        SweepWriter(**args)
    assert list(tmp_path.iterdir()) == []


# --- interruptions ------------------------------------------------------------------------


def test_interrupted_rewrite_keeps_previous_file(tmp_path, monkeypatch):
    # Ctrl-C in the middle of a rewrite must leave the last complete file untouched, no
    # temporary file behind, and the point unrecorded so that it can be recorded again.
    path = tmp_path / "sweep.h5"
    w = hist_writer(path)
    w.record(0, row_for(0), {"hubble": np.ones(REDSHIFT.size)})
    before = path.read_bytes()

    original = h5py.Group.create_dataset
    calls = {"n": 0}

    def interrupted(self, *args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 5:
            raise KeyboardInterrupt("injected interruption while writing")
        return original(self, *args, **kwargs)

    monkeypatch.setattr(h5py.Group, "create_dataset", interrupted)
    with pytest.raises(KeyboardInterrupt, match="injected"):
        w.record(3, row_for(3), {"hubble": np.zeros(REDSHIFT.size)})
    monkeypatch.undo()
    assert calls["n"] == 5  # the failure happened in the middle of the rewrite
    assert path.read_bytes() == before
    assert leftovers(tmp_path) == []
    assert w.done == {0}

    w.record(3, row_for(3))  # the interrupted point can be recorded afterwards
    w.close()
    rec = read_sweep(path)
    assert set(np.flatnonzero(rec.finished)) == {0, 3}
    assert np.isnan(rec.histories["hubble"][3]).all()  # the interrupted history was rolled back


KILL_POINTS = 100
KILL_CHILD = """
import sys, time
import numpy as np
from backreact.sweep_io import SweepWriter

path, sweep, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
grid = {"inflation.hubble_GeV": np.arange(n, dtype=float) * 1e12}
z = np.linspace(0.0, 3.0, 50)
w = SweepWriter(path, sweep, ["inflation.hubble_GeV"], grid, (n,), history_names=["hubble"], redshift=z)
for i in np.random.default_rng(3).permutation(n):
    i = int(i)
    w.record(i, {"status": 0, "reason": "child", "H0_km_s_Mpc": 60.0 + i}, {"hubble": np.full(50, float(i))})
    time.sleep(0.05)
w.close()
"""


def test_sigkill_leaves_a_valid_resumable_file(tmp_path):
    # SIGKILL cannot be caught: only the write-then-rename scheme protects the file.  A
    # killed sweep must leave a readable file that a new writer completes, each point once.
    path = tmp_path / "sweep.h5"
    n = KILL_POINTS
    proc = subprocess.Popen(
        [sys.executable, "-c", KILL_CHILD, str(path), SWEEP, str(n)],
        cwd=REPO,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )
    try:
        deadline = time.monotonic() + 60.0
        while True:
            if path.exists():
                seen = read_sweep(path)  # every intermediate file must be readable
                if seen.attrs["finished_count"] >= 2:
                    break
            if proc.poll() is not None:
                pytest.fail(f"sweep child exited early: {proc.stderr.read().decode()}")
            if time.monotonic() > deadline:
                pytest.fail("sweep child recorded fewer than 2 points within 60 s")
            time.sleep(0.01)
        os.kill(proc.pid, signal.SIGKILL)
        assert proc.wait(timeout=30) == -signal.SIGKILL
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stderr.close()

    rec = read_sweep(path)
    killed_done = set(int(i) for i in np.flatnonzero(rec.finished))
    assert 2 <= len(killed_done) < n
    for i in killed_done:
        assert rec.summary["reason"][i] == "child" and rec.summary["H0_km_s_Mpc"][i] == 60.0 + i
        np.testing.assert_array_equal(rec.histories["hubble"][i], np.full(50, float(i)))

    grid = {"inflation.hubble_GeV": np.arange(n, dtype=float) * 1e12}
    z = np.linspace(0.0, 3.0, 50)
    resumed = 0
    with SweepWriter(
        path, SWEEP, ["inflation.hubble_GeV"], grid, (n,), history_names=["hubble"], redshift=z
    ) as w:
        assert w.done == killed_done
        for i in range(n):
            if i not in w.done:
                w.record(i, {"status": 0, "reason": "parent", "H0_km_s_Mpc": 60.0 + i})
                resumed += 1
    assert leftovers(tmp_path) == []  # a partial file of the killed child is cleaned up

    final = read_sweep(path)
    assert final.attrs["complete"] is True and final.attrs["finished_count"] == n
    assert resumed == n - len(killed_done)
    reasons = final.summary["reason"]
    assert {i for i in range(n) if reasons[i] == "child"} == killed_done
    assert {i for i in range(n) if reasons[i] == "parent"} == set(range(n)) - killed_done
    np.testing.assert_array_equal(final.summary["H0_km_s_Mpc"], 60.0 + np.arange(n))


# --- read errors --------------------------------------------------------------------------


def _run_file(path: Path) -> Path:
    return write_run(path, RunRecord(config_toml="", history={"efolds": np.zeros(3)}, today={}))


def _text_file(path: Path) -> Path:
    path.write_text("point,H0\n0,67.4\n" * 20)
    return path


def _plain_hdf5(path: Path) -> Path:
    with h5py.File(path, "w") as f:
        f.create_dataset("x", data=np.arange(3))
    return path


def _newer_schema(path: Path) -> Path:
    writer(path).close()
    with h5py.File(path, "r+") as f:
        f.attrs["schema_version"] = np.int64(SCHEMA_VERSION + 1)
    return path


def _truncated(path: Path) -> Path:
    good = path.with_name("good.h5")
    with hist_writer(good) as w:
        w.record(0, row_for(0), {"hubble": np.ones(REDSHIFT.size)})
    data = good.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    return path


def _missing_group(path: Path) -> Path:
    writer(path).close()
    with h5py.File(path, "r+") as f:
        del f["summary"]
    return path


@pytest.mark.parametrize(
    ("make", "match"),
    [
        (None, "sweep file not found"),
        (_text_file, "is not an HDF5 file"),
        (_run_file, "is a backreact run file, not a sweep file"),
        (_plain_hdf5, "is an HDF5 file but not a backreact sweep file"),
        (_newer_schema, f"schema_version {SCHEMA_VERSION + 1}, newer"),
        (_truncated, "corrupt|truncated"),
        (_missing_group, "without a 'summary' group"),
    ],
)
def test_read_errors_are_one_line_sweep_file_errors(tmp_path, make, match):
    # Users pass the wrong file by mistake; they get one readable line, not a traceback of h5py.
    path = tmp_path / "file.h5"
    if make is not None:
        make(path)
    with pytest.raises(SweepFileError, match=match) as excinfo:
        read_sweep(path)
    _one_line(excinfo)
    assert is_sweep_file(path) is (make in (_newer_schema, _missing_group))


def test_is_sweep_file(tmp_path):
    # A cheap, never-raising check that tools (plot, compare) use to tell file kinds apart.
    sweep = tmp_path / "sweep.h5"
    writer(sweep).close()
    assert is_sweep_file(sweep) is True
    assert is_sweep_file(str(sweep)) is True
    assert is_sweep_file(_run_file(tmp_path / "run.h5")) is False
    assert is_sweep_file(_text_file(tmp_path / "notes.txt")) is False
    assert is_sweep_file(tmp_path / "missing.h5") is False
    assert is_sweep_file(tmp_path) is False


# --- interoperability ---------------------------------------------------------------------


def test_xarray_opens_summary_with_point_dimension(tmp_path):
    # Sweep results are meant to be analysed with xarray/pandas without custom readers.
    xr = pytest.importorskip("xarray")
    pytest.importorskip("h5netcdf")
    path = tmp_path / "sweep.h5"
    with writer(path) as w:
        for i in (4, 1):
            w.record(i, row_for(i))
    with warnings.catch_warnings():
        # Third-party readers may emit deprecation/future notices unrelated to the file.
        warnings.simplefilter("ignore", DeprecationWarning)
        warnings.simplefilter("ignore", FutureWarning)
        with xr.open_dataset(path, group="summary", engine="h5netcdf") as ds:
            assert dict(ds.sizes) == {"point": N}
            assert "point" in ds.indexes
            np.testing.assert_array_equal(ds["point"].values, np.arange(N))
            for name in SUMMARY_COLUMNS:
                assert ds[name].dims == ("point",), name
                assert ds[name].attrs["units"] == SUMMARY_COLUMNS[name][1]
            assert ds["wall_seconds"].dtype == np.float64  # "s" is not decoded as a timedelta
            np.testing.assert_array_equal(ds["status"].values, [-1, 1, -1, -1, 0, -1])
            assert ds["H0_km_s_Mpc"].sel(point=4).item() == 64.0
            assert str(ds["reason"].values[1]) == row_for(1)["reason"]
            np.testing.assert_array_equal(ds["finished"].values, [0, 1, 0, 0, 1, 0])


def test_sweep_io_does_not_import_jax(tmp_path):
    # Reading and writing sweep files must stay cheap (no JAX start-up in readers or in
    # the process that collects results from workers).
    code = (
        "import sys, numpy as np; from backreact.sweep_io import SweepWriter, read_sweep; "
        "w = SweepWriter(sys.argv[1], '', ['a.b'], {'a.b': np.arange(2.0)}, (2,)); "
        "w.record(1, {'status': 0}); w.close(); read_sweep(sys.argv[1]); "
        "bad = [k for k in sys.modules if k == 'jax' or k.startswith('jax.')]; "
        "assert not bad, bad"
    )
    subprocess.run([sys.executable, "-c", code, str(tmp_path / "s.h5")], cwd=REPO, check=True)
