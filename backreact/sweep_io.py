"""HDF5 sweep files: one file per parameter sweep, rewritten atomically after every point.

A sweep evaluates a grid of points; each point is one scenario with some config keys
overridden.  Points may finish in any order (parallel workers).  :class:`SweepWriter`
keeps the whole sweep in memory and, after each recorded point, writes the complete file
to ``.<name>.<pid>.partial`` in the same folder, fsyncs it and renames it onto the
target (then fsyncs the folder).  Whenever the process stops (Ctrl-C, SIGKILL, power
loss after the rename) the target is the previous complete file or the new one, never a
mixture.  Opening a writer on an existing file of the same sweep resumes it.

Layout (the names are a contract read by other tools):

``/`` (root attributes)
    ``format`` = ``"backreact-sweep"``, ``schema_version`` (int), ``package_version``,
    ``created_utc`` (ISO 8601, kept across rewrites and resumes), ``updated_utc``,
    ``sweep_toml`` (full sweep text), ``sweep_sha256``, ``points`` (int),
    ``finished_count`` (int), ``complete`` (bool: every point finished),
    ``dependency_versions`` (JSON string, as in :mod:`backreact.io`).
``/grid``
    One float64 dataset per swept parameter, named by its dotted config key with ``.``
    replaced by ``__`` and carrying the dotted key in its ``key`` attribute.  Group
    attributes ``parameters`` (dotted keys in grid order) and ``shape`` (the product-grid
    shape; its product is the number of points).
``/summary``
    One dataset of length ``points`` per entry of :data:`SUMMARY_COLUMNS` (float64 NaN,
    int64 -1 or an empty UTF-8 string where the point is unfinished), each with ``units``
    and ``description``; ``finished`` (int8, 1 for finished points); ``point`` (int64
    0..points-1), an HDF5 dimension scale attached to all of them, so that xarray
    (engine h5netcdf) opens the group with ``point`` as its dimension.
``/histories`` (only when the writer was given ``history_names``)
    ``redshift`` (1-D dimension scale), ``point`` (dimension scale as in ``/summary``)
    and one float64 dataset of shape (points, n_z) per history name; rows of unfinished
    points are NaN.

This module uses numpy and h5py only; it never imports JAX.
"""

from __future__ import annotations

import json
import math
import numbers
import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from backreact.io import FORMAT_NAME as RUN_FORMAT_NAME
from backreact.io import (
    HISTORY_DATASETS,
    _fsync_dir,
    _fsync_file,
    config_sha256,
    dependency_versions,
    package_version,
)

__all__ = [
    "FORMAT_NAME",
    "SCHEMA_VERSION",
    "SUMMARY_COLUMNS",
    "SweepFileError",
    "SweepRecord",
    "SweepWriter",
    "read_sweep",
    "is_sweep_file",
]

#: Value of the root ``format`` attribute that identifies a backreact sweep file.
FORMAT_NAME = "backreact-sweep"
#: Layout version written by this code; files with a larger value are refused.
SCHEMA_VERSION = 1

#: One entry per summary column: name -> (kind, units, one-line description).  ``kind``
#: is ``"float"`` (unfinished: NaN), ``"int"`` (unfinished: -1) or ``"str"`` (unfinished: "").
SUMMARY_COLUMNS: dict[str, tuple[str, str, str]] = {
    "status": ("int", "", "-1 not run yet, 0 converged, 1 not converged, 2 failed with an error"),
    "reason": ("str", "", "empty when the point converged, otherwise why it did not converge or failed"),
    "H0_km_s_Mpc": ("float", "km/s/Mpc", "Hubble rate today"),
    "fraction_spectator": ("float", "1", "density fraction of the spectator field today, Omega_q0"),
    "w0": ("float", "1", "dark-energy equation of state today, from the fit w(a) = w0 + wa (1 - a)"),
    "wa": ("float", "1", "dark-energy equation of state slope, from the fit w(a) = w0 + wa (1 - a)"),
    "age_Gyr": ("float", "Gyr", "age of the universe today"),
    "chi2_chronometers": ("float", "1", "chi^2 of H(z) against the shipped cosmic-chronometer table"),
    "chi2_bao": ("float", "1", "chi^2 against the DESI DR2 BAO distances, minimized over r_d"),
    "lcdm_max_deviation": ("float", "1", "largest |H/H_LCDM - 1| over 0 < z < 3"),
    "iterations": ("int", "1", "self-consistency iterations the point used"),
    "validity_verdict": ("str", "", "verdict of the closure validity check"),
    "validity_max": ("float", "1", "largest closure validity ratio over the history"),
    "calibrated_value": ("float", "config units", "value of the calibrated parameter, in its config units"),
    "wall_seconds": ("float", "s", "wall-clock time spent on the point"),
}

_MISSING = {"float": np.nan, "int": -1, "str": ""}
_GROUP_GRID = "grid"
_GROUP_SUMMARY = "summary"
_GROUP_HISTORIES = "histories"
_POINT = "point"
_REDSHIFT = "redshift"
_FINISHED = "finished"
_RESERVED_HISTORY_NAMES = {_POINT, _REDSHIFT}


class SweepFileError(Exception):
    """A sweep file cannot be read, resumed or written; the message is one line."""


def _one_line(text: object) -> str:
    lines = [line.strip() for line in str(text).splitlines() if line.strip()]
    return " ".join(lines) if lines else type(text).__name__


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


@dataclass
class SweepRecord:
    """Everything one sweep file holds (returned by :func:`read_sweep`).

    ``grid`` maps each dotted key of ``parameters`` to its value at every point;
    ``summary`` maps column names to per-point arrays (NaN / -1 / "" where unfinished);
    ``finished`` is a bool array per point; ``histories`` (``None`` when the file has
    none) maps ``"redshift"`` to the 1-D redshift grid and every history name to an
    array of shape (points, n_z) with NaN rows for unfinished points.
    """

    sweep_toml: str
    parameters: list[str]
    grid: dict[str, np.ndarray]
    shape: tuple[int, ...]
    summary: dict[str, np.ndarray]
    finished: np.ndarray
    histories: dict[str, np.ndarray] | None = None
    attrs: dict[str, Any] = field(default_factory=dict)

    @property
    def n_points(self) -> int:
        return int(self.finished.shape[0])


# --- helpers ------------------------------------------------------------------------------


def _dataset_name(key: str) -> str:
    return key.replace(".", "__")


def _py(value: Any) -> Any:
    if isinstance(value, bytes):
        return value.decode("utf-8")
    if isinstance(value, np.generic):
        return value.item()
    return value


def _str_list(value: Any) -> list[str]:
    arr = np.atleast_1d(np.asarray(value, dtype=object))
    return [v.decode("utf-8") if isinstance(v, bytes) else str(v) for v in arr]


def _empty_column(kind: str, n: int) -> np.ndarray:
    if kind == "float":
        return np.full(n, np.nan, dtype=np.float64)
    if kind == "int":
        return np.full(n, -1, dtype=np.int64)
    return np.full(n, "", dtype=object)


def _cell(name: str, kind: str, value: Any) -> Any:
    """Validate one summary value; ``None`` becomes the column's missing marker."""
    if value is None:
        return _MISSING[kind]
    if kind == "str":
        if not isinstance(value, str):
            raise ValueError(f"summary column {name!r} takes a str, got {value!r}")
        return str(value)
    if isinstance(value, bool | np.bool_):
        raise ValueError(f"summary column {name!r} takes a number, got the bool {value!r}")
    if kind == "int":
        if not isinstance(value, numbers.Integral):
            raise ValueError(f"summary column {name!r} takes an int, got {value!r}")
        return int(value)
    if not isinstance(value, numbers.Real):
        raise ValueError(f"summary column {name!r} takes a real number, got {value!r}")
    return float(value)


def _stale_partials(path: Path) -> list[Path]:
    """Temporary files ``.<name>.<pid>.partial`` left next to ``path`` by earlier writers."""
    pattern = re.compile(rf"^\.{re.escape(path.name)}\.\d+\.partial$")
    try:
        return [p for p in path.parent.iterdir() if pattern.match(p.name)]
    except OSError:
        return []


# --- reading ------------------------------------------------------------------------------


def _open_checked(path: Path) -> h5py.File:
    if not path.exists():
        raise SweepFileError(f"sweep file not found: {path}")
    if not path.is_file():
        raise SweepFileError(f"not a file: {path}")
    try:
        is_hdf5 = h5py.is_hdf5(path)
    except OSError as exc:
        raise SweepFileError(f"cannot read {path}: {_one_line(exc)}") from exc
    if not is_hdf5:
        raise SweepFileError(f"{path} is not an HDF5 file")
    try:
        f = h5py.File(path, "r")
    except OSError as exc:
        raise SweepFileError(f"{path} is corrupt or truncated (HDF5 says: {_one_line(exc)})") from exc
    try:
        fmt = _py(f.attrs.get("format"))
        if fmt == RUN_FORMAT_NAME:
            raise SweepFileError(
                f"{path} is a backreact run file, not a sweep file (read it with backreact.io.read_run)"
            )
        if fmt != FORMAT_NAME:
            raise SweepFileError(f"{path} is an HDF5 file but not a backreact sweep file")
        version = _py(f.attrs.get("schema_version"))
        if isinstance(version, bool) or not isinstance(version, int):
            raise SweepFileError(f"{path} has no valid schema_version attribute")
        if version > SCHEMA_VERSION:
            raise SweepFileError(
                f"{path} has schema_version {version}, newer than this backreact understands "
                f"({SCHEMA_VERSION}); upgrade backreact to read it"
            )
        for name in (_GROUP_GRID, _GROUP_SUMMARY):
            if not isinstance(f.get(name), h5py.Group):
                raise SweepFileError(f"{path} is a sweep file without a {name!r} group (corrupt)")
    except BaseException:
        f.close()
        raise
    return f


def _read_column(ds: h5py.Dataset) -> np.ndarray:
    if h5py.check_string_dtype(ds.dtype) is not None:
        return np.array(ds.asstr()[()], dtype=str)
    return np.asarray(ds[()])


def _read_open(path: Path, f: h5py.File) -> SweepRecord:
    root = f.attrs
    grid_group = f[_GROUP_GRID]
    parameters = _str_list(grid_group.attrs["parameters"]) if "parameters" in grid_group.attrs else []
    shape = tuple(int(s) for s in np.atleast_1d(grid_group.attrs["shape"]))
    n = math.prod(shape)
    points = _py(root.get("points", n))
    if points != n:
        raise ValueError(f"'points' attribute {points} is not the product {n} of the grid shape {shape}")

    def checked(name: str, arr: np.ndarray, expect: tuple[int, ...]) -> np.ndarray:
        if arr.shape != expect:
            raise ValueError(f"{name} has shape {arr.shape}, expected {expect}")
        return arr

    grid = {
        key: checked(f"grid {key!r}", np.asarray(grid_group[_dataset_name(key)][()], np.float64), (n,))
        for key in parameters
    }

    summary_group = f[_GROUP_SUMMARY]
    finished = checked("finished", np.asarray(summary_group[_FINISHED][()]), (n,)).astype(bool)
    names = [c for c in SUMMARY_COLUMNS if c in summary_group]
    names += sorted(c for c in summary_group if c not in SUMMARY_COLUMNS and c not in (_POINT, _FINISHED))
    summary = {c: checked(f"summary {c!r}", _read_column(summary_group[c]), (n,)) for c in names}

    histories: dict[str, np.ndarray] | None = None
    if _GROUP_HISTORIES in f:
        hist_group = f[_GROUP_HISTORIES]
        redshift = np.asarray(hist_group[_REDSHIFT][()], dtype=np.float64)
        if redshift.ndim != 1:
            raise ValueError(f"histories 'redshift' must be 1-D, has shape {redshift.shape}")
        histories = {_REDSHIFT: redshift}
        history_names = (
            _str_list(hist_group.attrs["names"])
            if "names" in hist_group.attrs
            else sorted(k for k in hist_group if k not in _RESERVED_HISTORY_NAMES)
        )
        for name in history_names:
            arr = np.asarray(hist_group[name][()], dtype=np.float64)
            histories[name] = checked(f"history {name!r}", arr, (n, redshift.shape[0]))

    try:
        deps = json.loads(_py(root.get("dependency_versions", "{}")))
    except (TypeError, ValueError):
        deps = {}
    attrs = {
        "format": _py(root["format"]),
        "schema_version": _py(root["schema_version"]),
        "package_version": _py(root.get("package_version", "0+unknown")),
        "created_utc": _py(root.get("created_utc", "")),
        "updated_utc": _py(root.get("updated_utc", "")),
        "sweep_sha256": _py(root.get("sweep_sha256", "")),
        "points": n,
        "finished_count": int(finished.sum()),
        "complete": bool(finished.all()),
        "dependency_versions": deps,
    }
    return SweepRecord(
        sweep_toml=_py(root.get("sweep_toml", "")),
        parameters=parameters,
        grid=grid,
        shape=shape,
        summary=summary,
        finished=finished,
        histories=histories,
        attrs=attrs,
    )


def read_sweep(path: str | os.PathLike) -> SweepRecord:
    """Read a sweep file written by :class:`SweepWriter`.

    Raises SweepFileError (one-line message) if the file is missing, not HDF5, corrupt
    or truncated, not a sweep file (e.g. a run file of :mod:`backreact.io`), or written
    with a newer schema.
    """
    path = Path(path)
    f = _open_checked(path)
    try:
        with f:
            return _read_open(path, f)
    except SweepFileError:
        raise
    except (OSError, KeyError, ValueError, TypeError, AttributeError) as exc:
        raise SweepFileError(f"{path} is corrupt or unreadable: {_one_line(exc)}") from exc


def is_sweep_file(path: str | os.PathLike) -> bool:
    """True when ``path`` is an HDF5 file whose root ``format`` is :data:`FORMAT_NAME`.

    Never raises: missing files, folders, text files and unreadable files give False.
    """
    try:
        path = Path(path)
        if not path.is_file() or not h5py.is_hdf5(path):
            return False
        with h5py.File(path, "r") as f:
            return _py(f.attrs.get("format")) == FORMAT_NAME
    except Exception:
        return False


# --- writing ------------------------------------------------------------------------------


def _grid_arrays(
    parameters: Sequence[str], grid: Mapping[str, Any], shape: Sequence[int]
) -> tuple[list[str], dict[str, np.ndarray], tuple[int, ...]]:
    try:
        shape_t = tuple(int(s) for s in shape)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"shape must be a tuple of ints, got {shape!r}") from exc
    if any(s < 1 for s in shape_t):
        raise ValueError(f"every entry of shape must be >= 1, got {shape_t}")
    n = math.prod(shape_t)
    params = [str(p) for p in parameters]
    if len(set(params)) != len(params):
        raise ValueError(f"parameters contain duplicates: {params}")
    stored = [_dataset_name(p) for p in params]
    if len(set(stored)) != len(stored):
        raise ValueError(f"parameters {params} collide once '.' is replaced by '__'")
    for p in params:
        if not p or "/" in p:
            raise ValueError(f"parameter name {p!r} must be a non-empty dotted key without '/'")
    missing = [p for p in params if p not in grid]
    if missing:
        raise ValueError(f"grid has no values for parameter(s) {', '.join(map(repr, missing))}")
    extra = [k for k in grid if k not in params]
    if extra:
        raise ValueError(f"grid key(s) {', '.join(map(repr, extra))} are not among the parameters")
    arrays: dict[str, np.ndarray] = {}
    for p in params:
        arr = np.asarray(grid[p])
        if arr.dtype.kind not in "iuf":
            raise ValueError(f"grid values of {p!r} must be real numbers, got dtype {arr.dtype}")
        if arr.shape != (n,):
            raise ValueError(
                f"grid values of {p!r} must have shape ({n},) for the grid {shape_t}, got {arr.shape}"
            )
        arrays[p] = arr.astype(np.float64)
    return params, arrays, shape_t


def _history_setup(
    history_names: Sequence[str] | None, redshift: Any
) -> tuple[list[str] | None, np.ndarray | None]:
    if history_names is None:
        if redshift is not None:
            raise ValueError("redshift is only used together with history_names")
        return None, None
    names = [str(name) for name in history_names]
    if len(set(names)) != len(names):
        raise ValueError(f"history_names contain duplicates: {names}")
    for name in names:
        if not name or "/" in name or name in _RESERVED_HISTORY_NAMES:
            raise ValueError(f"history name {name!r} is not allowed")
    if redshift is None:
        raise ValueError("history_names needs the redshift grid the histories are sampled on")
    z = np.asarray(redshift)
    if z.dtype.kind not in "iuf" or z.ndim != 1 or z.shape[0] == 0:
        raise ValueError(f"redshift must be a non-empty 1-D array of real numbers, got shape {z.shape}")
    return names, z.astype(np.float64)


class SweepWriter:
    """Record the points of one sweep into ``path``, rewriting the file after each point.

    ``grid`` maps each dotted key of ``parameters`` to its value at every point (arrays
    of length prod(shape)).  When ``history_names`` is given, :meth:`record` also takes
    per-point histories sampled on ``redshift``.

    If ``path`` already holds a sweep file of the same ``sweep_toml`` (by SHA-256), grid
    and histories, the writer resumes it: its finished points are loaded and listed in
    :attr:`done`.  A file of another sweep raises SweepFileError; so does any other file
    (it is never overwritten).  Otherwise the empty sweep (no point finished) is written
    at once.  Stale ``.<name>.<pid>.partial`` files of the same target are removed.

    Use as a context manager, or call :meth:`close` at the end.
    """

    def __init__(
        self,
        path: str | os.PathLike,
        sweep_toml: str,
        parameters: list[str],
        grid: dict[str, np.ndarray],
        shape: tuple[int, ...],
        *,
        history_names: list[str] | None = None,
        redshift: np.ndarray | None = None,
    ) -> None:
        if not isinstance(sweep_toml, str):
            raise TypeError("sweep_toml must be a str")
        self.path = Path(path)
        self.sweep_toml = sweep_toml
        self.sweep_sha256 = config_sha256(sweep_toml)
        self.parameters, self.grid, self.shape = _grid_arrays(parameters, grid, shape)
        self.n_points = math.prod(self.shape)
        self.history_names, self.redshift = _history_setup(history_names, redshift)
        self._closed = False

        n = self.n_points
        self._summary = {name: _empty_column(kind, n) for name, (kind, _, _) in SUMMARY_COLUMNS.items()}
        self._finished = np.zeros(n, dtype=bool)
        self._histories: dict[str, np.ndarray] = {}
        if self.history_names is not None:
            n_z = self.redshift.shape[0]
            self._histories = {name: np.full((n, n_z), np.nan) for name in self.history_names}

        self.path.parent.mkdir(parents=True, exist_ok=True)
        for stale in _stale_partials(self.path):
            try:
                stale.unlink()
            except FileNotFoundError:
                pass

        if self.path.exists():
            self.created_utc = self._resume(read_sweep(self.path))
        else:
            self.created_utc = _now()
        self._rewrite()

    # --- resume ---

    def _different(self, what: str) -> SweepFileError:
        return SweepFileError(
            f"{self.path} holds a different sweep ({what}); choose another output file or delete it"
        )

    def _resume(self, old: SweepRecord) -> str:
        if old.attrs.get("sweep_sha256") != self.sweep_sha256:
            raise self._different("config changed")
        same_grid = (
            old.parameters == self.parameters
            and old.shape == self.shape
            and all(np.array_equal(old.grid[p], self.grid[p], equal_nan=True) for p in self.parameters)
        )
        if not same_grid:
            raise self._different("grid changed")
        if self.history_names is None:
            if old.histories is not None:
                raise self._different("the file stores histories, this sweep does not")
        else:
            if old.histories is None:
                raise self._different("the file stores no histories, this sweep does")
            old_names = [k for k in old.histories if k != _REDSHIFT]
            if sorted(old_names) != sorted(self.history_names):
                raise self._different("history names changed")
            old_z = old.histories[_REDSHIFT]
            if old_z.shape != self.redshift.shape or not np.array_equal(old_z, self.redshift, equal_nan=True):
                raise self._different("redshift grid of the histories changed")

        done = old.finished
        self._finished[:] = done
        for name, (kind, _, _) in SUMMARY_COLUMNS.items():
            if name not in old.summary:
                continue
            values = old.summary[name]
            if kind == "str":
                values = values.astype(object)
            self._summary[name][done] = values[done]
        for name in self._histories:
            self._histories[name][done] = old.histories[name][done]
        return old.attrs.get("created_utc") or _now()

    # --- public API ---

    @property
    def done(self) -> set[int]:
        """Indices of the finished points (as on disk)."""
        return {int(i) for i in np.flatnonzero(self._finished)}

    @property
    def complete(self) -> bool:
        return bool(self._finished.all())

    def record(self, index: int, row: dict, histories: dict[str, np.ndarray] | None = None) -> None:
        """Store the results of point ``index`` and rewrite the file atomically.

        ``row`` maps columns of :data:`SUMMARY_COLUMNS` to values (absent or ``None``:
        NaN / -1 / ""); ``histories`` maps history names to 1-D arrays on the redshift
        grid (absent names stay NaN).  Invalid input raises ValueError before anything
        changes.  If the rewrite fails (including KeyboardInterrupt) the point is not
        recorded, in memory or on disk, and the exception propagates.
        """
        if self._closed:
            raise ValueError(f"sweep writer for {self.path} is closed")
        if isinstance(index, bool | np.bool_) or not isinstance(index, numbers.Integral):
            raise ValueError(f"point index must be an int, got {index!r}")
        index = int(index)
        if not 0 <= index < self.n_points:
            raise ValueError(f"point index {index} out of range 0..{self.n_points - 1}")
        if self._finished[index]:
            raise ValueError(f"point {index} is already finished in {self.path}")
        unknown = [name for name in row if name not in SUMMARY_COLUMNS]
        if unknown:
            raise ValueError(
                f"unknown summary column(s) {', '.join(map(repr, unknown))}; "
                "see backreact.sweep_io.SUMMARY_COLUMNS"
            )
        cells = {name: _cell(name, kind, row.get(name)) for name, (kind, _, _) in SUMMARY_COLUMNS.items()}
        rows = self._history_rows(histories)

        saved = {name: self._summary[name][index] for name in cells}
        saved_hist = {name: self._histories[name][index].copy() for name in rows}
        for name, value in cells.items():
            self._summary[name][index] = value
        for name, arr in rows.items():
            self._histories[name][index] = arr
        self._finished[index] = True
        try:
            self._rewrite()
        except BaseException:
            self._finished[index] = False
            for name, value in saved.items():
                self._summary[name][index] = value
            for name, arr in saved_hist.items():
                self._histories[name][index] = arr
            raise

    def _history_rows(self, histories: Mapping[str, Any] | None) -> dict[str, np.ndarray]:
        if histories is None:
            return {}
        if self.history_names is None:
            raise ValueError("this sweep stores no histories (the writer was created without history_names)")
        unknown = [name for name in histories if name not in self._histories]
        if unknown:
            raise ValueError(
                f"unknown history name(s) {', '.join(map(repr, unknown))}; the sweep has {self.history_names}"
            )
        n_z = self.redshift.shape[0]
        rows: dict[str, np.ndarray] = {}
        for name, values in histories.items():
            arr = np.asarray(values)
            if arr.dtype.kind not in "iuf" or arr.shape != (n_z,):
                raise ValueError(
                    f"history {name!r} must be {n_z} real numbers on the redshift grid, "
                    f"got dtype {arr.dtype} and shape {arr.shape}"
                )
            rows[name] = arr.astype(np.float64)
        return rows

    def close(self) -> None:
        """Write the file a last time (``complete`` says whether every point finished)."""
        if self._closed:
            return
        self._closed = True
        self._rewrite()

    def __enter__(self) -> SweepWriter:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    # --- the file ---

    def _fill(self, tmp: Path) -> None:
        n = self.n_points
        with h5py.File(tmp, "w") as f:
            root = {
                "format": FORMAT_NAME,
                "schema_version": np.int64(SCHEMA_VERSION),
                "package_version": package_version(),
                "created_utc": self.created_utc,
                "updated_utc": _now(),
                "sweep_toml": self.sweep_toml,
                "sweep_sha256": self.sweep_sha256,
                "points": np.int64(n),
                "finished_count": np.int64(self._finished.sum()),
                "complete": np.bool_(self._finished.all()),
                "dependency_versions": json.dumps(dependency_versions(), sort_keys=True),
            }
            for name, value in root.items():
                f.attrs[name] = value

            grid = f.create_group(_GROUP_GRID)
            grid.attrs.create("parameters", np.array(self.parameters, dtype=h5py.string_dtype()))
            grid.attrs["shape"] = np.array(self.shape, dtype=np.int64)
            for key in self.parameters:
                ds = grid.create_dataset(_dataset_name(key), data=self.grid[key])
                ds.attrs["key"] = key

            summary = f.create_group(_GROUP_SUMMARY)
            point = summary.create_dataset(_POINT, data=np.arange(n, dtype=np.int64))
            point.attrs["units"] = ""
            point.attrs["description"] = "index of the point in the flattened (C-order) grid"
            point.make_scale(_POINT)
            for name, (kind, units, description) in SUMMARY_COLUMNS.items():
                values = self._summary[name]
                if kind == "str":
                    ds = summary.create_dataset(name, data=values, dtype=h5py.string_dtype())
                else:
                    ds = summary.create_dataset(name, data=values)
                ds.attrs["units"] = units
                ds.attrs["description"] = description
                ds.dims[0].attach_scale(point)
            ds = summary.create_dataset(_FINISHED, data=self._finished.astype(np.int8))
            ds.attrs["units"] = ""
            ds.attrs["description"] = "1 when the point has finished (any status), 0 when not run yet"
            ds.dims[0].attach_scale(point)

            if self.history_names is not None:
                hist = f.create_group(_GROUP_HISTORIES)
                hist.attrs.create("names", np.array(self.history_names, dtype=h5py.string_dtype()))
                hpoint = hist.create_dataset(_POINT, data=np.arange(n, dtype=np.int64))
                hpoint.attrs["units"] = ""
                hpoint.attrs["description"] = "index of the point in the flattened (C-order) grid"
                hpoint.make_scale(_POINT)
                z = hist.create_dataset(_REDSHIFT, data=self.redshift)
                z.attrs["units"] = "1"
                z.attrs["description"] = "redshift grid every history is sampled on"
                z.make_scale(_REDSHIFT)
                for name in self.history_names:
                    ds = hist.create_dataset(name, data=self._histories[name])
                    units, description = HISTORY_DATASETS.get(name, ("", ""))
                    ds.attrs["units"] = units
                    ds.attrs["description"] = description
                    ds.dims[0].attach_scale(hpoint)
                    ds.dims[1].attach_scale(z)
            f.flush()

    def _rewrite(self) -> None:
        """Write the whole sweep to a temporary file and rename it onto the target."""
        tmp = self.path.with_name(f".{self.path.name}.{os.getpid()}.partial")
        try:
            self._fill(tmp)
            _fsync_file(tmp)
            os.replace(tmp, self.path)
        except BaseException:
            try:
                tmp.unlink()
            except FileNotFoundError:
                pass
            raise
        _fsync_dir(self.path.parent)
