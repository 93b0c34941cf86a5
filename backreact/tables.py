"""H(z) tables: read, write and score tables of the expansion rate (numpy only, no JAX).

A table is a CSV text file of the expansion rate at given redshifts::

    # any number of comment lines starting with '#'
    z,H,sigma,reference
    0.07,69.0,19.6,Zhang et al. 2014 RAA 14 1221
    ...

* ``z`` (redshift, >= 0, distinct) and ``H`` (km/s/Mpc, > 0) are required; ``sigma`` (the
  1-sigma error of H in km/s/Mpc, > 0) is optional; any other column is kept as text
  (e.g. ``reference``).  Column names are matched case-insensitively.
* Without a header row the columns are read as ``z, H[, sigma]``.
* Rows are sorted by z on reading; at least two rows are required.

Every malformed row is reported as one line naming the file, the line number and what is
allowed (:class:`TableError`).  Tables shipped with the package (measured data with their
references) are listed in :data:`SHIPPED_TABLES` and opened by name with
:func:`shipped_table`.

The chi-square of a model H(z) against a table with errors is the diagonal Gaussian one,

    chi^2 = sum_i ((H_model(z_i) - H_i) / sigma_i)^2,

appropriate for the shipped cosmic-chronometer compilation, whose errors are published
without covariance.
"""

from __future__ import annotations

import csv
import io
import math
import os
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

import numpy as np

__all__ = [
    "HubbleTable",
    "TableError",
    "SHIPPED_TABLES",
    "read_hubble_table",
    "parse_hubble_table",
    "write_hubble_table",
    "shipped_table",
    "resolve_table",
    "chi_square",
]

#: Measured H(z) data sets shipped as package data: name -> (file, one-line description).
SHIPPED_TABLES: dict[str, tuple[str, str]] = {
    "cosmic_chronometers": (
        "cosmic_chronometers.csv",
        "32 cosmic-chronometer H(z) points (differential-age method), 0.07 <= z <= 1.965, "
        "each with its reference",
    ),
}

_REQUIRED = ("z", "h")


class TableError(ValueError):
    """An H(z) table is malformed; the message is one line naming the file and line."""


@dataclass(frozen=True)
class HubbleTable:
    """An H(z) table, sorted by redshift.

    ``z`` (dimensionless), ``H`` and ``sigma`` (km/s/Mpc; ``sigma`` is None when the
    table has no errors), ``columns``: any extra text columns (name -> list of str, in
    the sorted order), ``comments``: the header comment lines without their '#',
    ``name``: a short label (the file stem or the shipped name), ``source``: where it
    was read from.
    """

    z: np.ndarray
    H: np.ndarray
    sigma: np.ndarray | None = None
    columns: dict[str, list[str]] = field(default_factory=dict)
    comments: list[str] = field(default_factory=list)
    name: str = "table"
    source: str = ""

    def __len__(self) -> int:
        return int(self.z.shape[0])


def _number(text: str, column: str, where: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise TableError(f"{where}: {column} is not a number ({text.strip()!r})") from None
    if not math.isfinite(value):
        raise TableError(f"{where}: {column} must be a finite number, got {text.strip()!r}")
    return value


def _is_header(cells: list[str]) -> bool:
    try:
        float(cells[0])
    except ValueError:
        return True
    return False


def parse_hubble_table(text: str, source: str = "<table>", name: str | None = None) -> HubbleTable:
    """Parse the CSV text of an H(z) table (format in the module docstring).

    Raises :class:`TableError` naming ``source`` and the line for: text in a number field,
    NaN or infinity, z < 0, H <= 0, sigma <= 0, a duplicated z, a row with the wrong number
    of cells, a header without ``z`` and ``H``, or fewer than two rows.
    """
    comments: list[str] = []
    header: list[str] | None = None
    rows: list[tuple[int, list[str]]] = []
    for lineno, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith("#"):
            if header is None and not rows:
                comments.append(stripped[1:].strip())
            continue
        cells = [c.strip() for c in next(csv.reader([stripped]))]
        if header is None and not rows and _is_header(cells):
            header = [c.lower() for c in cells]
            missing = [c for c in _REQUIRED if c not in header]
            if missing:
                raise TableError(
                    f"{source} line {lineno}: the header must name the columns z and H "
                    f"(optional: sigma and text columns), got {', '.join(cells)}"
                )
            if len(set(header)) != len(header):
                raise TableError(f"{source} line {lineno}: repeated column name in {', '.join(cells)}")
            continue
        rows.append((lineno, cells))

    if header is None:
        width = len(rows[0][1]) if rows else 2
        if width not in (2, 3):
            raise TableError(
                f"{source}: without a header row a table has the columns z,H or z,H,sigma; "
                f"line {rows[0][0]} has {width} cells"
            )
        header = ["z", "h", "sigma"][:width]

    i_z, i_h = header.index("z"), header.index("h")
    i_s = header.index("sigma") if "sigma" in header else None
    extra = [(i, c) for i, c in enumerate(header) if c not in ("z", "h", "sigma")]

    zs, hs, ss = [], [], []
    texts: dict[str, list[str]] = {c: [] for _, c in extra}
    seen: dict[float, int] = {}
    for lineno, cells in rows:
        where = f"{source} line {lineno}"
        if len(cells) != len(header):
            raise TableError(f"{where}: expected {len(header)} cells ({','.join(header)}), got {len(cells)}")
        z = _number(cells[i_z], "z", where)
        h = _number(cells[i_h], "H", where)
        if z < 0:
            raise TableError(f"{where}: z must be >= 0, got {z:g}")
        if h <= 0:
            raise TableError(f"{where}: H must be > 0 km/s/Mpc, got {h:g}")
        if z in seen:
            raise TableError(f"{where}: z = {z:g} is duplicated (first on line {seen[z]})")
        seen[z] = lineno
        zs.append(z)
        hs.append(h)
        if i_s is not None:
            s = _number(cells[i_s], "sigma", where)
            if s <= 0:
                raise TableError(f"{where}: sigma must be > 0 km/s/Mpc, got {s:g}")
            ss.append(s)
        for i, c in extra:
            texts[c].append(cells[i])
    if len(zs) < 2:
        raise TableError(f"{source}: a table needs at least 2 rows of z,H; found {len(zs)}")

    order = np.argsort(np.asarray(zs), kind="stable")
    return HubbleTable(
        z=np.asarray(zs, dtype=np.float64)[order],
        H=np.asarray(hs, dtype=np.float64)[order],
        sigma=None if i_s is None else np.asarray(ss, dtype=np.float64)[order],
        columns={c: [v[i] for i in order] for c, v in texts.items()},
        comments=comments,
        name=name if name is not None else Path(source).stem,
        source=source,
    )


def read_hubble_table(path: str | os.PathLike) -> HubbleTable:
    """Read an H(z) table from a CSV file; :class:`TableError` (one line) when malformed."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise TableError(f"table file not found: {path}") from None
    except IsADirectoryError:
        raise TableError(f"table path is a directory: {path}") from None
    except UnicodeDecodeError:
        raise TableError(f"{path} is not a UTF-8 text file") from None
    except OSError as exc:
        raise TableError(f"cannot read table {path}: {exc.strerror or exc}") from None
    return parse_hubble_table(text, source=str(path), name=path.stem)


def shipped_table(name: str) -> HubbleTable:
    """Open a measured data set shipped with the package by its name (see SHIPPED_TABLES)."""
    if name not in SHIPPED_TABLES:
        raise TableError(f"no shipped table named {name!r}; shipped: {', '.join(SHIPPED_TABLES)}")
    filename = SHIPPED_TABLES[name][0]
    text = resources.files("backreact").joinpath("data", filename).read_text(encoding="utf-8")
    return parse_hubble_table(text, source=f"shipped:{filename}", name=name)


def resolve_table(spec: str | os.PathLike) -> HubbleTable:
    """A table from a file path or, when no such file exists, a shipped table name."""
    path = Path(spec)
    if path.exists():
        return read_hubble_table(path)
    if str(spec) in SHIPPED_TABLES:
        return shipped_table(str(spec))
    raise TableError(
        f"table file not found: {path} (nor is it a shipped table; shipped: {', '.join(SHIPPED_TABLES)})"
    )


def write_hubble_table(
    path: str | os.PathLike,
    z,
    H,
    sigma=None,
    comments: list[str] | tuple[str, ...] = (),
) -> Path:
    """Write an H(z) table that :func:`read_hubble_table` reads back exactly.

    Numbers are written as the shortest decimal that reads back to the same float64.  The file is
    written to a temporary name in the same folder and renamed, so an interruption never
    leaves a truncated table.
    """
    path = Path(path)
    z = np.asarray(z, dtype=np.float64)
    H = np.asarray(H, dtype=np.float64)
    if z.ndim != 1 or z.shape != H.shape:
        raise ValueError(f"z and H must be 1-D arrays of equal length, got shapes {z.shape} and {H.shape}")
    cols = [z, H]
    names = ["z", "H"]
    if sigma is not None:
        cols.append(np.broadcast_to(np.asarray(sigma, dtype=np.float64), z.shape))
        names.append("sigma")
    buf = io.StringIO()
    for line in comments:
        for part in str(line).splitlines() or [""]:
            buf.write(f"# {part}\n")
    buf.write(",".join(names) + "\n")
    for row in zip(*cols, strict=True):
        buf.write(",".join(repr(float(v)) for v in row) + "\n")
    text = buf.getvalue()
    # Validate before writing: a table we cannot read back is never written.
    parse_hubble_table(text, source=str(path))

    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.partial")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def chi_square(model_H, table: HubbleTable) -> float:
    """Diagonal chi^2 = sum ((model_H - H_i)/sigma_i)^2 of a model at the table's redshifts.

    ``model_H`` in km/s/Mpc, evaluated at ``table.z``.  Raises ValueError for a table
    without errors.
    """
    if table.sigma is None:
        raise ValueError(f"table {table.name!r} has no sigma column, so it has no chi^2")
    r = (np.asarray(model_H, dtype=np.float64) - table.H) / table.sigma
    return float(np.sum(r * r))
