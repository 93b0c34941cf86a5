"""Tests for the HDF5 run-file layer (backreact.io)."""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
import warnings
from datetime import datetime
from pathlib import Path

import h5py
import numpy as np
import pytest

from backreact import io
from backreact.io import (
    HISTORY_DATASETS,
    SCHEMA_VERSION,
    TODAY_ATTRIBUTES,
    RunFileError,
    RunRecord,
    check_writable,
    read_run,
    update_comparison,
    write_run,
)

REPO = Path(__file__).resolve().parents[1]
CONFIG = '[run]\nname = "test"\nefolds_start = -70.0\n\n[spectator]\nmass_GeV = 1e-33\n'
N_POINTS = 64


def full_record() -> RunRecord:
    rng = np.random.default_rng(1234)
    efolds = np.linspace(-70.0, 0.0, N_POINTS)
    history = {}
    for name in HISTORY_DATASETS:
        history[name] = rng.standard_normal(N_POINTS) * 10.0 ** rng.integers(-40, 10)
    history["efolds"] = efolds
    history["scale_factor"] = np.exp(efolds)
    temperature = np.abs(history["temperature"])
    temperature[:10] = np.nan  # inflation
    history["temperature"] = temperature
    history["kernel_valid"] = (rng.random(N_POINTS) > 0.2).astype(np.float64)
    today = {name: float(rng.standard_normal()) for name in TODAY_ATTRIBUTES}
    today["H0_km_s_Mpc"] = 67.4
    return RunRecord(
        config_toml=CONFIG,
        history=history,
        today=today,
        converged=False,
        iterations=7,
        residuals=np.array([1e-1, 3e-3, 2e-5, 4e-8, 1e-10, 3e-12, 9e-14]),
        warnings=["closure left its validity range at N = -3.2", "second warning"],
        comparison={
            "chi2_bao": 12.5,
            "n_points": 13,
            "dataset": "desi_dr2_bao",
            "z": np.array([0.3, 0.5, 0.7]),
            "residual": np.array([0.1, -0.2, 0.05]),
            "tracer": np.array(["BGS", "LRG1", "LRG2"]),
        },
        diagnostics={"second_friedmann_max_residual": 2.5e-9, "solver": "tsit5", "steps": 4096},
    )


def minimal_record() -> RunRecord:
    efolds = np.linspace(-5.0, 0.0, 11)
    return RunRecord(
        config_toml="",
        history={"efolds": efolds, "hubble": np.exp(-2 * efolds) * 1e-42},
        today={"H0_km_s_Mpc": 70.0},
    )


def same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()


def leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.endswith(".partial"))


# --- round trip ---------------------------------------------------------------------------


def test_round_trip_full(tmp_path):
    rec = full_record()
    path = write_run(tmp_path / "run.h5", rec)
    assert path == tmp_path / "run.h5"
    back = read_run(path)

    assert list(back.history) == list(HISTORY_DATASETS)
    for name, arr in rec.history.items():
        assert same_bits(back.history[name], np.asarray(arr, dtype=np.float64)), name
    assert back.today == rec.today
    assert back.config_toml == CONFIG
    assert back.attrs["config_sha256"] == hashlib.sha256(CONFIG.encode()).hexdigest()
    assert back.converged is False
    assert back.iterations == 7
    assert same_bits(back.residuals, rec.residuals)
    assert back.warnings == rec.warnings
    assert back.diagnostics == rec.diagnostics

    comp = back.comparison
    assert comp is not None
    assert set(comp) == set(rec.comparison)
    assert comp["chi2_bao"] == 12.5 and comp["n_points"] == 13 and comp["dataset"] == "desi_dr2_bao"
    assert same_bits(comp["z"], rec.comparison["z"])
    assert same_bits(comp["residual"], rec.comparison["residual"])
    assert list(comp["tracer"]) == ["BGS", "LRG1", "LRG2"]


def test_round_trip_minimal_and_metadata(tmp_path):
    path = write_run(tmp_path / "run.h5", minimal_record())
    back = read_run(path)
    assert set(back.history) == {"efolds", "hubble"}  # absent quantities stay absent
    assert back.today == {"H0_km_s_Mpc": 70.0}
    assert back.warnings == []
    assert back.residuals.shape == (0,) and back.residuals.dtype == np.float64
    assert back.comparison is None
    assert back.diagnostics == {}
    assert back.converged is True and back.iterations == 0
    assert back.attrs["config_sha256"] == hashlib.sha256(b"").hexdigest()
    assert back.attrs["format"] == "backreact-run"
    assert back.attrs["schema_version"] == SCHEMA_VERSION
    assert isinstance(back.attrs["package_version"], str) and back.attrs["package_version"]
    created = datetime.fromisoformat(back.attrs["created_utc"])
    assert created.utcoffset().total_seconds() == 0
    deps = back.attrs["dependency_versions"]
    assert set(deps) == {"python", "numpy", "scipy", "jax", "jaxlib", "diffrax", "equinox", "h5py"}
    assert deps["h5py"] == h5py.__version__

    with h5py.File(path, "r") as f:
        assert f.attrs["format"] == "backreact-run"
        assert isinstance(f.attrs["schema_version"], np.integer)
        assert isinstance(f.attrs["iterations"], np.integer)
        assert isinstance(f.attrs["converged"], np.bool_)
        assert f.attrs["warnings"].shape == (0,)
        assert isinstance(json.loads(f.attrs["dependency_versions"]), dict)
        assert "comparison" not in f and "diagnostics" not in f
        assert f["convergence/residual"].shape == (0,)
        assert f["convergence/residual"].attrs["units"] == "1"
        assert json.loads(f["today"].attrs["units"]) == {"H0_km_s_Mpc": "km/s/Mpc"}
        assert len(f["today"]) == 0  # attributes only


def test_history_attributes_and_today_units(tmp_path):
    path = write_run(tmp_path / "run.h5", full_record())
    with h5py.File(path, "r") as f:
        hist = f["history"]
        assert set(hist) == set(HISTORY_DATASETS)
        for name, ds in hist.items():
            assert ds.dtype == np.float64 and ds.ndim == 1
            units, description = HISTORY_DATASETS[name]
            assert ds.attrs["units"] == units
            assert ds.attrs["description"] == description
            assert description and "\n" not in description
        units = json.loads(f["today"].attrs["units"])
        assert units == {name: u for name, (u, _) in TODAY_ATTRIBUTES.items()}


def test_dimension_scale_attached(tmp_path):
    rec = minimal_record()
    rec.history["propagator"] = np.ones(11)
    path = write_run(tmp_path / "run.h5", rec)
    with h5py.File(path, "r") as f:
        hist = f["history"]
        assert hist["efolds"].is_scale
        for name in ("hubble", "propagator"):
            dim = hist[name].dims[0]
            assert len(dim) == 1
            assert dim[0].name == "/history/efolds"
            assert not hist[name].is_scale


def test_xarray_opens_history_with_efolds_dimension(tmp_path):
    xr = pytest.importorskip("xarray")
    pytest.importorskip("h5netcdf")
    rec = full_record()
    path = write_run(tmp_path / "run.h5", rec)
    with warnings.catch_warnings():
        # Third-party readers may emit deprecation/future notices unrelated to the file.
        warnings.simplefilter("ignore", DeprecationWarning)
        warnings.simplefilter("ignore", FutureWarning)
        with xr.open_dataset(path, group="history", engine="h5netcdf", phony_dims="sort") as ds:
            assert "efolds" in ds.dims and ds.sizes["efolds"] == N_POINTS
            assert "efolds" in ds.indexes
            np.testing.assert_array_equal(ds["efolds"].values, rec.history["efolds"])
            for name in HISTORY_DATASETS:
                if name == "efolds":
                    continue
                assert ds[name].dims == ("efolds",), name
                assert ds[name].attrs["units"] == HISTORY_DATASETS[name][0]
            np.testing.assert_array_equal(ds["hubble"].values, rec.history["hubble"])


def test_history_not_on_grid_is_not_attached(tmp_path):
    rec = minimal_record()
    rec.history["propagator"] = np.ones(3)  # not on the efold grid: no scale attached
    path = write_run(tmp_path / "run.h5", rec)
    with h5py.File(path, "r") as f:
        assert len(f["history/propagator"].dims[0]) == 0
        assert len(f["history/hubble"].dims[0]) == 1


# --- validation ---------------------------------------------------------------------------


def test_unknown_history_key_raises(tmp_path):
    rec = minimal_record()
    rec.history["hubble_squared"] = np.ones(11)
    with pytest.raises(ValueError, match="hubble_squared"):
        write_run(tmp_path / "run.h5", rec)
    assert list(tmp_path.iterdir()) == []


def test_unknown_today_key_raises(tmp_path):
    rec = minimal_record()
    rec.today["H1"] = 3.0
    with pytest.raises(ValueError, match="H1"):
        write_run(tmp_path / "run.h5", rec)
    assert list(tmp_path.iterdir()) == []


def test_bad_history_arrays_raise(tmp_path):
    rec = minimal_record()
    rec.history["hubble"] = np.ones((11, 2))
    with pytest.raises(ValueError, match="1-D"):
        write_run(tmp_path / "run.h5", rec)
    rec = minimal_record()
    del rec.history["efolds"]
    with pytest.raises(ValueError, match="efolds"):
        write_run(tmp_path / "run.h5", rec)
    assert list(tmp_path.iterdir()) == []


def test_creates_parent_directory(tmp_path):
    path = write_run(tmp_path / "a" / "b" / "run.h5", minimal_record())
    assert path.is_file()
    assert read_run(path).today == {"H0_km_s_Mpc": 70.0}


# --- atomicity ----------------------------------------------------------------------------


def _fail_after_first_dataset(monkeypatch, exc_type=RuntimeError):
    original = h5py.Group.create_dataset
    calls = {"n": 0}

    def flaky(self, *args, **kwargs):
        calls["n"] += 1
        if calls["n"] > 1:
            raise exc_type("injected failure while writing")
        return original(self, *args, **kwargs)

    monkeypatch.setattr(h5py.Group, "create_dataset", flaky)
    return calls


@pytest.mark.parametrize("exc_type", [RuntimeError, KeyboardInterrupt])
def test_failed_write_leaves_nothing(tmp_path, monkeypatch, exc_type):
    calls = _fail_after_first_dataset(monkeypatch, exc_type)
    final = tmp_path / "run.h5"
    with pytest.raises(exc_type, match="injected"):
        write_run(final, full_record())
    assert calls["n"] == 2  # the failure happened in the middle of the write
    assert not final.exists()
    assert list(tmp_path.iterdir()) == []


def test_failed_overwrite_keeps_old_file(tmp_path, monkeypatch):
    final = write_run(tmp_path / "run.h5", minimal_record())
    before = final.read_bytes()
    _fail_after_first_dataset(monkeypatch)
    with pytest.raises(RuntimeError, match="injected"):
        write_run(final, full_record())
    monkeypatch.undo()
    assert final.read_bytes() == before
    assert leftovers(tmp_path) == []
    assert set(read_run(final).history) == {"efolds", "hubble"}


def test_partial_file_name(tmp_path, monkeypatch):
    seen = []
    original = io._fsync_file

    def spy(path):
        seen.append(Path(path))
        return original(path)

    monkeypatch.setattr(io, "_fsync_file", spy)
    write_run(tmp_path / "run.h5", minimal_record())
    assert seen == [tmp_path / f".run.h5.{os.getpid()}.partial"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run.h5"]


# --- read errors --------------------------------------------------------------------------


def _one_line(excinfo) -> None:
    assert "\n" not in str(excinfo.value)


def test_read_missing_file(tmp_path):
    with pytest.raises(RunFileError, match="not found") as excinfo:
        read_run(tmp_path / "nope.h5")
    _one_line(excinfo)


def test_read_directory(tmp_path):
    with pytest.raises(RunFileError, match="not a file"):
        read_run(tmp_path)


def test_read_text_file(tmp_path):
    path = tmp_path / "run.h5"
    path.write_text("this is not HDF5\n" * 20)
    with pytest.raises(RunFileError, match="not an HDF5 file") as excinfo:
        read_run(path)
    _one_line(excinfo)


def test_read_truncated_file(tmp_path):
    good = write_run(tmp_path / "good.h5", full_record())
    data = good.read_bytes()
    cut = tmp_path / "cut.h5"
    cut.write_bytes(data[: len(data) // 2])
    with pytest.raises(RunFileError, match="corrupt|truncated") as excinfo:
        read_run(cut)
    _one_line(excinfo)


def test_read_hdf5_without_format(tmp_path):
    path = tmp_path / "other.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("x", data=np.arange(3))
    with pytest.raises(RunFileError, match="is an HDF5 file but not a backreact run file") as excinfo:
        read_run(path)
    _one_line(excinfo)


def test_read_newer_schema(tmp_path):
    path = write_run(tmp_path / "run.h5", minimal_record())
    with h5py.File(path, "r+") as f:
        f.attrs["schema_version"] = np.int64(999)
    with pytest.raises(RunFileError, match="schema_version 999") as excinfo:
        read_run(path)
    _one_line(excinfo)


def test_read_missing_history(tmp_path):
    path = write_run(tmp_path / "run.h5", minimal_record())
    with h5py.File(path, "r+") as f:
        del f["history"]
    with pytest.raises(RunFileError, match="history"):
        read_run(path)


# --- check_writable -----------------------------------------------------------------------


def test_check_writable_ok(tmp_path):
    target = tmp_path / "new" / "dir" / "run.h5"
    assert check_writable(target) == target
    assert target.parent.is_dir()
    assert list(target.parent.iterdir()) == []  # probe removed, nothing written


def test_check_writable_read_only_dir(tmp_path):
    folder = tmp_path / "ro"
    folder.mkdir()
    os.chmod(folder, 0o500)
    try:
        probe = folder / "probe"
        try:
            probe.write_bytes(b"")
        except OSError:
            pass
        else:
            probe.unlink()
            pytest.skip("read-only directories are writable for this user (root?)")
        with pytest.raises(RunFileError, match="cannot write") as excinfo:
            check_writable(folder / "run.h5")
        _one_line(excinfo)
        with pytest.raises(RunFileError, match="cannot create"):
            check_writable(folder / "sub" / "run.h5")
    finally:
        os.chmod(folder, 0o700)


def test_check_writable_probe_refused(tmp_path, monkeypatch):
    # Same failure as a read-only folder, simulated so that it is also covered as root.
    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(io, "open", refuse, raising=False)
    with pytest.raises(RunFileError, match="cannot write to output folder .*Permission denied") as excinfo:
        check_writable(tmp_path / "run.h5")
    _one_line(excinfo)


def test_check_writable_parent_is_file(tmp_path):
    blocker = tmp_path / "file.txt"
    blocker.write_text("x")
    with pytest.raises(RunFileError, match="cannot create output folder") as excinfo:
        check_writable(blocker / "run.h5")
    _one_line(excinfo)
    with pytest.raises(RunFileError, match="cannot create output folder"):
        check_writable(blocker / "deeper" / "run.h5")


def test_check_writable_path_is_directory(tmp_path):
    with pytest.raises(RunFileError, match="is a directory"):
        check_writable(tmp_path)


# --- update_comparison --------------------------------------------------------------------


def test_update_comparison_replaces_group(tmp_path):
    rec = full_record()
    path = write_run(tmp_path / "run.h5", rec)
    before = read_run(path)
    update_comparison(path, {"chi2_cc": 20.1, "source": "cosmic_chronometers"}, {"z": np.array([0.1, 0.2])})
    after = read_run(path)
    assert set(after.comparison) == {"chi2_cc", "source", "z"}
    assert after.comparison["chi2_cc"] == 20.1
    assert same_bits(after.comparison["z"], np.array([0.1, 0.2]))
    assert after.attrs == before.attrs  # created_utc etc. preserved
    assert after.today == before.today and after.warnings == before.warnings
    for name in before.history:
        assert same_bits(after.history[name], before.history[name])
    with h5py.File(path, "r") as f:
        assert len(f["history/hubble"].dims[0]) == 1
    assert leftovers(tmp_path) == []

    update_comparison(path, None)
    assert read_run(path).comparison is None


def test_update_comparison_on_plain_file_adds_group(tmp_path):
    path = write_run(tmp_path / "run.h5", minimal_record())
    update_comparison(path, {"chi2": 1.0})
    assert read_run(path).comparison == {"chi2": 1.0}


def test_update_comparison_failure_keeps_file(tmp_path, monkeypatch):
    path = write_run(tmp_path / "run.h5", full_record())
    before = path.read_bytes()
    _fail_after_first_dataset(monkeypatch)
    with pytest.raises(RuntimeError, match="injected"):
        update_comparison(path, {"chi2": 1.0}, {"a": np.ones(2), "b": np.ones(2)})
    monkeypatch.undo()
    assert path.read_bytes() == before
    assert leftovers(tmp_path) == []


def test_update_comparison_stores_nested_groups(tmp_path):
    # mappings become subgroups (one per compared table), read back as nested dicts
    path = write_run(tmp_path / "run.h5", minimal_record())
    update_comparison(path, {"z_max": 2.5, "table_a": {"chi2": 3.0, "z": np.arange(3.0), "deep": {"n": 1}}})
    got = read_run(path).comparison
    assert got["z_max"] == 2.5 and got["table_a"]["chi2"] == 3.0 and got["table_a"]["deep"] == {"n": 1}
    np.testing.assert_array_equal(got["table_a"]["z"], np.arange(3.0))


def test_update_comparison_rejects_bad_input(tmp_path):
    path = write_run(tmp_path / "run.h5", minimal_record())
    before = path.read_bytes()
    with pytest.raises(TypeError, match="chi2"):
        update_comparison(path, {"chi2": {1, 2}})
    with pytest.raises(TypeError, match="comparison/table_x attribute 'chi2'"):
        update_comparison(path, {"table_x": {"chi2": None}})
    with pytest.raises(ValueError, match="both"):
        update_comparison(path, {"z": 1.0}, {"z": np.ones(2)})
    assert path.read_bytes() == before
    with pytest.raises(RunFileError, match="not found"):
        update_comparison(tmp_path / "missing.h5", {"chi2": 1.0})


# --- isolation ----------------------------------------------------------------------------


def test_io_does_not_import_jax():
    code = (
        "import sys, backreact.io as m; m.dependency_versions(); m.package_version(); "
        "bad = [k for k in sys.modules if k == 'jax' or k.startswith('jax.')]; "
        "assert not bad, bad"
    )
    subprocess.run([sys.executable, "-c", code], cwd=REPO, check=True)
