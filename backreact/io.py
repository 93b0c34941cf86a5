"""HDF5 run files: one file per run, written atomically.

Layout (the names are a contract read by other tools; see docs and the registries below):

``/`` (root attributes)
    ``format`` = ``"backreact-run"``, ``schema_version`` (int), ``package_version``,
    ``created_utc`` (ISO 8601), ``config_toml`` (full config text), ``config_sha256``,
    ``converged`` (bool), ``iterations`` (int), ``warnings`` (array of str, possibly
    empty), ``dependency_versions`` (JSON string: distribution name -> version or null).
``/history``
    One 1-D float64 dataset per quantity on the e-fold grid, each with ``units`` and
    ``description`` attributes.  ``efolds`` is an HDF5 dimension scale attached to
    dimension 0 of every other dataset of the same length, so netCDF-aware readers
    (h5netcdf, xarray) see ``efolds`` as the dimension coordinate.  Quantities a run does
    not compute are absent, never zero-filled.
``/today``
    Attributes only, one float per entry of :data:`TODAY_ATTRIBUTES`, plus ``units``: a
    JSON string mapping each stored name to its units.
``/convergence``
    Dataset ``residual``: max |delta ln H| per iteration (may have length 0).
``/comparison`` (only when given)
    Scalar attributes, optional 1-D datasets and subgroups of the same kind (one per
    compared table, see :mod:`backreact.compare`).
``/diagnostics`` (only when non-empty)
    Scalar attributes (numbers, bools, strings).

This module uses numpy and h5py only; it never imports JAX (package versions are looked
up through :mod:`importlib.metadata`).
"""

from __future__ import annotations

import hashlib
import json
import numbers
import os
import platform
import shutil
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path
from typing import Any

import h5py
import numpy as np

__all__ = [
    "FORMAT_NAME",
    "SCHEMA_VERSION",
    "HISTORY_DATASETS",
    "TODAY_ATTRIBUTES",
    "DEPENDENCIES",
    "RunFileError",
    "RunRecord",
    "write_run",
    "read_run",
    "check_writable",
    "update_comparison",
    "dependency_versions",
    "package_version",
]

#: Value of the root ``format`` attribute that identifies a backreact run file.
FORMAT_NAME = "backreact-run"
#: Layout version written by this code; files with a larger value are refused.
SCHEMA_VERSION = 1

#: Every dataset that may appear in ``/history``: name -> (units, one-line description).
HISTORY_DATASETS: dict[str, tuple[str, str]] = {
    "efolds": ("1", "number of e-folds N = ln a (a = 1 today); the grid of every history"),
    "scale_factor": ("1", "scale factor a = exp(N), normalised to 1 today"),
    "redshift": ("1", "redshift z = 1/a - 1"),
    "cosmic_time": ("GeV^-1", "cosmic time elapsed since the first point of the history"),
    "hubble": ("GeV", "Hubble rate H"),
    "epsilon": ("1", "first slow-roll parameter epsilon = -d ln H / dN"),
    "w_effective": ("1", "effective equation of state of the total fluid, -1 + 2 epsilon / 3"),
    "density_radiation": ("GeV^4", "energy density of radiation"),
    "density_matter": ("GeV^4", "energy density of pressureless matter"),
    "density_inflaton": ("GeV^4", "energy density of the inflaton"),
    "density_lambda": ("GeV^4", "energy density of the cosmological constant"),
    "density_spectator": ("GeV^4", "energy density of the spectator field from its coincident propagator"),
    "fraction_radiation": ("1", "density fraction of radiation, rho_r / (3 M_p^2 H^2)"),
    "fraction_matter": ("1", "density fraction of matter, rho_m / (3 M_p^2 H^2)"),
    "fraction_inflaton": ("1", "density fraction of the inflaton, rho_phi / (3 M_p^2 H^2)"),
    "fraction_lambda": ("1", "density fraction of the cosmological constant"),
    "fraction_spectator": ("1", "density fraction of the spectator field"),
    "temperature": ("GeV", "photon temperature; NaN during inflation"),
    "hubble_km_s_Mpc": ("km/s/Mpc", "Hubble rate H in km/s/Mpc"),
    "hubble_normalized": ("1", "expansion rate relative to today, E = H / H0"),
    "deceleration": ("1", "deceleration parameter q = -a a_tt / a_t^2 = epsilon - 1"),
    "propagator": ("GeV^2", "coincident propagator A of the spectator field"),
    "propagator_dN": ("GeV^2", "first derivative dA/dN of the coincident propagator"),
    "propagator_dNdN": ("GeV^2", "second derivative d^2A/dN^2 of the coincident propagator"),
    "box_propagator": ("GeV^4", "d'Alembertian of the coincident propagator"),
    "kinetic_sum": ("GeV^4", "coincident kinetic term of the spectator field"),
    "gradient_sum": ("GeV^4", "coincident gradient term of the spectator field"),
    "kinetic_invariant": (
        "GeV^4",
        "renormalized <g^{mu nu} d_mu sigma d_nu sigma>, summed on its own (Box A = 2 (it + L))",
    ),
    "pressure_spectator": ("GeV^4", "pressure of the spectator field"),
    "w_spectator": ("1", "equation of state of the spectator field, p / rho"),
    "closure_validity": ("1", "validity measure of the closure used for the spectator source"),
    "kernel_valid": ("1", "1 where the memory kernel is within its domain of validity, else 0"),
    "comoving_distance_Mpc": ("Mpc", "line-of-sight comoving distance to today's observer"),
    "luminosity_distance_Mpc": ("Mpc", "luminosity distance (1 + z) D_C"),
    "angular_diameter_distance_Mpc": ("Mpc", "angular diameter distance D_C / (1 + z)"),
}

#: Every attribute that may appear on ``/today``: name -> (units, one-line description).
TODAY_ATTRIBUTES: dict[str, tuple[str, str]] = {
    "H0_km_s_Mpc": ("km/s/Mpc", "Hubble rate today"),
    "age_Gyr": ("Gyr", "age of the universe today"),
    "fraction_radiation": ("1", "density fraction of radiation today"),
    "fraction_matter": ("1", "density fraction of matter today"),
    "fraction_lambda": ("1", "density fraction of the cosmological constant today"),
    "fraction_spectator": ("1", "density fraction of the spectator field today"),
    "w0": ("1", "dark-energy equation of state today, w(a) = w0 + wa (1 - a)"),
    "wa": ("1", "dark-energy equation of state slope, w(a) = w0 + wa (1 - a)"),
    "cpl_residual": ("1", "rms residual of the CPL fit of w_spectator over 0 <= z <= 2"),
    "efolds_inflation": ("1", "number of e-folds of inflation in the history"),
    "efolds_end_of_inflation_to_today": ("1", "e-folds from the end of inflation to today"),
    "propagator_GeV2": ("GeV^2", "coincident propagator of the spectator field today"),
    "hubble_at_pivot_exit_GeV": ("GeV", "Hubble rate when the pivot scale left the horizon"),
    "tensor_to_scalar_ratio": ("1", "tensor-to-scalar ratio at the pivot scale"),
    "hubble_end_of_inflation_GeV": ("GeV", "Hubble rate at the end of inflation"),
    "reheating_temperature_GeV": ("GeV", "temperature at the end of reheating"),
    "efolds_history_start": ("1", "e-fold value N of the first point of the history"),
    "efolds_end_of_inflation": ("1", "e-fold value N at the end of inflation"),
}

#: Distributions whose versions go into the ``dependency_versions`` attribute ("python"
#: is the interpreter).
DEPENDENCIES = ("python", "numpy", "scipy", "jax", "jaxlib", "diffrax", "equinox", "h5py")

_PARTIAL_SUFFIX = ".partial"


class RunFileError(Exception):
    """A run file cannot be read or written; the message is one line."""


def _one_line(text: object) -> str:
    lines = [line.strip() for line in str(text).splitlines() if line.strip()]
    return " ".join(lines) if lines else type(text).__name__


@dataclass
class RunRecord:
    """Everything one run file holds.

    ``history`` maps names from :data:`HISTORY_DATASETS` to 1-D arrays; ``today`` maps
    names from :data:`TODAY_ATTRIBUTES` to floats (a ``None`` value is not stored).
    ``comparison`` maps names to scalars (stored as attributes), 1-D arrays (stored as
    datasets) or mappings of the same kind (stored as subgroups); ``None`` means no
    comparison group.  ``attrs`` is filled by
    :func:`read_run` (package_version, created_utc, config_sha256, schema_version,
    dependency_versions as a dict, format) and ignored by :func:`write_run`.
    """

    config_toml: str
    history: dict[str, np.ndarray]
    today: dict[str, float]
    converged: bool = True
    iterations: int = 0
    residuals: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.float64))
    warnings: list[str] = field(default_factory=list)
    comparison: dict[str, Any] | None = None
    diagnostics: dict[str, Any] = field(default_factory=dict)
    attrs: dict[str, Any] = field(default_factory=dict)


# --- versions -----------------------------------------------------------------------


def package_version() -> str:
    """Installed version of backreact, or ``"0+unknown"`` when it is not installed."""
    try:
        return metadata.version("backreact")
    except metadata.PackageNotFoundError:
        return "0+unknown"


def dependency_versions() -> dict[str, str | None]:
    """Versions of the interpreter and key libraries (``None`` if not installed).

    Uses package metadata only, so nothing (in particular not JAX) is imported.
    """
    out: dict[str, str | None] = {}
    for name in DEPENDENCIES:
        if name == "python":
            out[name] = platform.python_version()
            continue
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out


def config_sha256(config_toml: str) -> str:
    """Hex SHA-256 of the UTF-8 encoded config text."""
    return hashlib.sha256(config_toml.encode("utf-8")).hexdigest()


# --- validation (done before any file is touched) ----------------------------------------


def _history_arrays(history: Mapping[str, Any]) -> dict[str, np.ndarray]:
    unknown = [name for name in history if name not in HISTORY_DATASETS]
    if unknown:
        raise ValueError(
            f"unknown history dataset(s) {', '.join(map(repr, unknown))}; "
            "add them to backreact.io.HISTORY_DATASETS first"
        )
    arrays: dict[str, np.ndarray] = {}
    # Registry order, so files list quantities in a stable order.
    for name in HISTORY_DATASETS:
        if name not in history:
            continue
        arr = np.asarray(history[name])
        if arr.dtype.kind not in "biuf":
            raise ValueError(f"history dataset {name!r} must be real numbers, got dtype {arr.dtype}")
        if arr.ndim != 1:
            raise ValueError(f"history dataset {name!r} must be 1-D, got shape {arr.shape}")
        arrays[name] = arr.astype(np.float64, copy=False)
    if arrays and "efolds" not in arrays:
        raise ValueError("history must contain 'efolds' (the grid of every other dataset)")
    return arrays


def _today_values(today: Mapping[str, Any]) -> dict[str, float]:
    unknown = [name for name in today if name not in TODAY_ATTRIBUTES]
    if unknown:
        raise ValueError(
            f"unknown today attribute(s) {', '.join(map(repr, unknown))}; "
            "add them to backreact.io.TODAY_ATTRIBUTES first"
        )
    values: dict[str, float] = {}
    for name in TODAY_ATTRIBUTES:
        value = today.get(name)
        if value is None:
            continue
        if isinstance(value, bool | np.bool_) or not isinstance(value, numbers.Real):
            raise ValueError(f"today attribute {name!r} must be a real number, got {value!r}")
        values[name] = float(value)
    return values


def _scalar_attr(group: str, name: str, value: Any) -> Any:
    """Check that ``value`` is a scalar HDF5 can hold as an attribute; return it normalised."""
    if isinstance(value, str):
        return value
    if isinstance(value, bool | np.bool_):
        return np.bool_(value)
    if isinstance(value, numbers.Integral):
        return np.int64(value)
    if isinstance(value, numbers.Real):
        return np.float64(value)
    raise TypeError(
        f"{group} attribute {name!r} must be a str, int, float or bool, got {type(value).__name__}"
    )


def _dataset_array(group: str, name: str, value: Any) -> np.ndarray:
    arr = np.asarray(value)
    if arr.ndim != 1:
        raise ValueError(f"{group} dataset {name!r} must be 1-D, got shape {arr.shape}")
    if arr.dtype.kind not in "biufU":
        raise ValueError(f"{group} dataset {name!r} has unsupported dtype {arr.dtype}")
    return arr


def _split_comparison(
    comparison: Mapping[str, Any], datasets: Mapping[str, Any] | None = None, group: str = "comparison"
) -> tuple[dict[str, Any], dict[str, np.ndarray], dict[str, tuple]]:
    """Separate scalars (attributes), 1-D arrays (datasets) and mappings (subgroups,
    split the same way, recursively) and validate them all."""
    attrs: dict[str, Any] = {}
    arrays: dict[str, np.ndarray] = {}
    groups: dict[str, tuple] = {}
    for name, value in comparison.items():
        if isinstance(value, Mapping):
            groups[name] = _split_comparison(value, None, f"{group}/{name}")
        elif isinstance(value, np.ndarray | list | tuple):
            arrays[name] = _dataset_array(group, name, value)
        else:
            attrs[name] = _scalar_attr(group, name, value)
    for name, value in (datasets or {}).items():
        if name in comparison:
            raise ValueError(f"{group} name {name!r} given both as attribute and as dataset")
        arrays[name] = _dataset_array(group, name, value)
    return attrs, arrays, groups


def _residuals(residuals: Any) -> np.ndarray:
    arr = np.asarray(residuals if residuals is not None else [], dtype=np.float64)
    if arr.ndim != 1:
        raise ValueError(f"residuals must be 1-D, got shape {arr.shape}")
    return arr


# --- writing --------------------------------------------------------------------------


def _partial_path(path: Path) -> Path:
    return path.with_name(f".{path.name}.{os.getpid()}{_PARTIAL_SUFFIX}")


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_dir(directory: Path) -> None:
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass  # some filesystems do not support fsync on directories
    finally:
        os.close(fd)


def _atomic(path: Path, fill) -> Path:
    """Produce ``path`` via ``fill(tmp_path)`` and an atomic rename; clean up on failure."""
    tmp = _partial_path(path)
    try:
        fill(tmp)
        _fsync_file(tmp)
        os.replace(tmp, path)
    except BaseException:
        try:
            tmp.unlink()
        except FileNotFoundError:
            pass
        raise
    _fsync_dir(path.parent)
    return path


def _write_string_array_attr(obj: h5py.HLObject, name: str, values: list[str]) -> None:
    obj.attrs.create(name, np.array([str(v) for v in values], dtype=h5py.string_dtype()))


def _write_comparison(
    parent: h5py.Group,
    attrs: dict[str, Any],
    arrays: dict[str, np.ndarray],
    groups: dict[str, tuple],
    name: str = "comparison",
) -> None:
    group = parent.create_group(name)
    for key, value in attrs.items():
        group.attrs[key] = value
    for key, arr in arrays.items():
        if arr.dtype.kind == "U":
            group.create_dataset(key, data=arr.astype(object), dtype=h5py.string_dtype())
        else:
            group.create_dataset(key, data=arr)
    for key, parts in groups.items():
        _write_comparison(group, *parts, name=key)


def write_run(path: str | os.PathLike, record: RunRecord) -> Path:
    """Write ``record`` to ``path`` atomically and return the path.

    The record is validated first (unknown history/today names raise ValueError).  The
    file is written to ``.<name>.<pid>.partial`` in the same directory, flushed, closed
    and renamed onto ``path``; on any error the temporary file is removed and ``path`` is
    left as it was.  The parent directory is created when missing.
    """
    path = Path(path)
    if not isinstance(record.config_toml, str):
        raise TypeError("config_toml must be a str")
    history = _history_arrays(record.history)
    today = _today_values(record.today)
    residuals = _residuals(record.residuals)
    warnings_list = [str(w) for w in record.warnings]
    comparison = _split_comparison(record.comparison) if record.comparison is not None else None
    diagnostics = {name: _scalar_attr("diagnostics", name, v) for name, v in record.diagnostics.items()}
    root_attrs = {
        "format": FORMAT_NAME,
        "schema_version": np.int64(SCHEMA_VERSION),
        "package_version": package_version(),
        "created_utc": datetime.now(UTC).isoformat(timespec="seconds"),
        "config_toml": record.config_toml,
        "config_sha256": config_sha256(record.config_toml),
        "converged": np.bool_(bool(record.converged)),
        "iterations": np.int64(int(record.iterations)),
        "dependency_versions": json.dumps(dependency_versions(), sort_keys=True),
    }

    def fill(tmp: Path) -> None:
        with h5py.File(tmp, "w") as f:
            for name, value in root_attrs.items():
                f.attrs[name] = value
            _write_string_array_attr(f, "warnings", warnings_list)

            hist = f.create_group("history")
            for name, arr in history.items():
                ds = hist.create_dataset(name, data=arr)
                units, description = HISTORY_DATASETS[name]
                ds.attrs["units"] = units
                ds.attrs["description"] = description
            if "efolds" in history:
                scale = hist["efolds"]
                scale.make_scale("efolds")
                n = scale.shape[0]
                for name in history:
                    if name != "efolds" and hist[name].shape[0] == n:
                        hist[name].dims[0].attach_scale(scale)

            tod = f.create_group("today")
            for name, value in today.items():
                tod.attrs[name] = np.float64(value)
            tod.attrs["units"] = json.dumps({name: TODAY_ATTRIBUTES[name][0] for name in today})

            conv = f.create_group("convergence")
            res = conv.create_dataset("residual", data=residuals)
            res.attrs["units"] = "1"
            res.attrs["description"] = "max |delta ln H| over the grid, per iteration"

            if comparison is not None:
                _write_comparison(f, *comparison)
            if diagnostics:
                diag = f.create_group("diagnostics")
                for name, value in diagnostics.items():
                    diag.attrs[name] = value
            f.flush()

    path.parent.mkdir(parents=True, exist_ok=True)
    return _atomic(path, fill)


def check_writable(path: str | os.PathLike) -> Path:
    """Fail early (RunFileError) if a run file could not be written to ``path``.

    Creates the parent folder if missing and creates and deletes a probe file in it.
    Call this before an expensive computation.
    """
    path = Path(path)
    folder = path.parent
    if path.is_dir():
        raise RunFileError(f"cannot write run file {path}: it is a directory")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RunFileError(f"cannot create output folder {folder}: {_one_line(exc.strerror or exc)}") from exc
    probe = folder / f".{path.name}.{os.getpid()}.probe"
    try:
        with open(probe, "wb") as fh:
            fh.write(b"probe")
    except OSError as exc:
        raise RunFileError(
            f"cannot write to output folder {folder}: {_one_line(exc.strerror or exc)}"
        ) from exc
    try:
        probe.unlink()
    except OSError as exc:
        raise RunFileError(
            f"cannot delete files in output folder {folder}: {_one_line(exc.strerror or exc)}"
        ) from exc
    return path


# --- reading --------------------------------------------------------------------------


def _py(value: Any) -> Any:
    """HDF5 attribute value -> plain Python value."""
    if isinstance(value, bytes):
        return value.decode("utf-8")
    if isinstance(value, np.generic):
        return value.item()
    return value


def _str_list(value: Any) -> list[str]:
    arr = np.atleast_1d(np.asarray(value, dtype=object))
    return [v.decode("utf-8") if isinstance(v, bytes) else str(v) for v in arr]


def _read_dataset(ds: h5py.Dataset) -> np.ndarray:
    if h5py.check_string_dtype(ds.dtype) is not None:
        return np.array(ds.asstr()[()], dtype=str)
    return np.asarray(ds[()])


def _read_group(group: h5py.Group) -> dict[str, Any]:
    """Attributes, datasets and (recursively) subgroups of ``group`` as one mapping."""
    out: dict[str, Any] = {name: _py(v) for name, v in group.attrs.items()}
    for name, obj in group.items():
        out[name] = _read_group(obj) if isinstance(obj, h5py.Group) else _read_dataset(obj)
    return out


def _open_checked(path: Path) -> h5py.File:
    """Open ``path`` read-only after checking it is a backreact run file we understand."""
    if not path.exists():
        raise RunFileError(f"run file not found: {path}")
    if not path.is_file():
        raise RunFileError(f"not a file: {path}")
    try:
        is_hdf5 = h5py.is_hdf5(path)
    except OSError as exc:
        raise RunFileError(f"cannot read {path}: {_one_line(exc)}") from exc
    if not is_hdf5:
        raise RunFileError(f"{path} is not an HDF5 file")
    try:
        f = h5py.File(path, "r")
    except OSError as exc:
        raise RunFileError(f"{path} is corrupt or truncated (cannot open as HDF5: {_one_line(exc)})") from exc
    try:
        fmt = _py(f.attrs.get("format"))
        if fmt != FORMAT_NAME:
            raise RunFileError(f"{path} is an HDF5 file but not a backreact run file")
        version = _py(f.attrs.get("schema_version"))
        if isinstance(version, bool) or not isinstance(version, int):
            raise RunFileError(f"{path} has no valid schema_version attribute")
        if version > SCHEMA_VERSION:
            raise RunFileError(
                f"{path} has schema_version {version}, newer than this backreact understands "
                f"({SCHEMA_VERSION}); upgrade backreact to read it"
            )
        if "history" not in f or not isinstance(f["history"], h5py.Group):
            raise RunFileError(f"{path} is a backreact run file without a 'history' group")
    except BaseException:
        f.close()
        raise
    return f


def read_run(path: str | os.PathLike) -> RunRecord:
    """Read a run file written by :func:`write_run`.

    Raises RunFileError (one-line message) if the file is missing, not HDF5, corrupt or
    truncated, not a backreact run file, of a newer schema, or lacks ``history``.
    """
    path = Path(path)
    f = _open_checked(path)
    try:
        with f:
            root = f.attrs
            hist_group = f["history"]
            history: dict[str, np.ndarray] = {}
            names = [n for n in HISTORY_DATASETS if n in hist_group]
            names += sorted(n for n in hist_group if n not in HISTORY_DATASETS)
            for name in names:
                history[name] = np.asarray(hist_group[name][()], dtype=np.float64)

            today: dict[str, float] = {}
            if "today" in f:
                for name, value in f["today"].attrs.items():
                    if name != "units":
                        today[name] = float(_py(value))

            residuals = np.zeros(0, dtype=np.float64)
            if "convergence" in f and "residual" in f["convergence"]:
                residuals = np.asarray(f["convergence"]["residual"][()], dtype=np.float64)

            comparison: dict[str, Any] | None = None
            if "comparison" in f:
                comparison = _read_group(f["comparison"])

            diagnostics: dict[str, Any] = {}
            if "diagnostics" in f:
                diagnostics = {name: _py(v) for name, v in f["diagnostics"].attrs.items()}

            dep_text = _py(root.get("dependency_versions", "{}"))
            try:
                deps = json.loads(dep_text)
            except (TypeError, ValueError):
                deps = {}
            extras = {
                "format": _py(root["format"]),
                "schema_version": _py(root["schema_version"]),
                "package_version": _py(root.get("package_version", "0+unknown")),
                "created_utc": _py(root.get("created_utc", "")),
                "config_sha256": _py(root.get("config_sha256", "")),
                "dependency_versions": deps,
            }
            warnings_list = _str_list(root["warnings"]) if "warnings" in root else []
            iterations = _py(root.get("iterations", 0))
            return RunRecord(
                config_toml=_py(root.get("config_toml", "")),
                history=history,
                today=today,
                converged=bool(_py(root.get("converged", False))),
                iterations=int(iterations),
                residuals=residuals,
                warnings=warnings_list,
                comparison=comparison,
                diagnostics=diagnostics,
                attrs=extras,
            )
    except RunFileError:
        raise
    except (OSError, KeyError, ValueError, TypeError) as exc:
        raise RunFileError(f"{path} is corrupt or unreadable: {_one_line(exc)}") from exc


def update_comparison(
    path: str | os.PathLike,
    comparison: Mapping[str, Any] | None,
    datasets: Mapping[str, Any] | None = None,
) -> Path:
    """Replace the ``comparison`` group of an existing run file, atomically.

    Scalars in ``comparison`` become attributes, arrays (in ``comparison`` or in
    ``datasets``) become 1-D datasets; ``comparison=None`` with no datasets removes the
    group.  The file is copied to a temporary name, modified there and renamed onto the
    original, so an interruption leaves the old file intact; everything else in the file
    (including ``created_utc``) is preserved.
    """
    path = Path(path)
    if comparison is None and datasets is None:
        parts = None
    else:
        parts = _split_comparison(comparison or {}, datasets)
    _open_checked(path).close()

    def fill(tmp: Path) -> None:
        shutil.copyfile(path, tmp)
        shutil.copymode(path, tmp)
        with h5py.File(tmp, "r+") as f:
            if "comparison" in f:
                del f["comparison"]
            if parts is not None:
                _write_comparison(f, *parts)
            f.flush()

    return _atomic(path, fill)
