"""Parameter sweeps: a grid of scenarios through the same solver, on one machine or on Dask.

A sweep file is a scenario plus a ``[sweep]`` table::

    [sweep]
    name = "inflation-scale"
    scenario = "demo.toml"       # the base scenario, relative to this file; or give its
                                 # sections ([inflation], ...) in this file instead
    keep = "summary"             # or "histories": also H, w and Omega_q on a common z grid

    [[sweep.parameters]]
    key = "inflation.hubble_GeV" # any config key, "section.key"
    spacing = "log"              # "linear" or "log" from start to stop ...
    start = 1.0e8
    stop = 4.0e13
    points = 40
    # ... or an explicit list: values = [1e10, 1e11]

Several parameters form a product grid (the first varies slowest); point i of the
flattened grid is the scenario with those keys overridden.  Every point is validated before
anything runs (a bad value names the point).

Execution
---------
Every point goes through :func:`backreact.run.run_scenario` with one shared
:class:`backreact.run.SolveEngine` per process: the static sizes of the propagator are the
largest any point of the grid needs (computed from the points' plain histories before the
first solve), so the fixed point compiles once and every later point reuses the compiled
code (the parameters are traced arguments).  The points are not stacked into one vmap: a
history of the exact method needs up to ~3 GB of mode data, so lanes would multiply the
memory for no gain on a CPU whose cores the single solve already uses; compiled-code reuse
is what removes the per-point cost a loop of separate runs pays (start-up and compilation).
With Dask (a local cluster of N single-threaded worker processes, or an existing scheduler)
every worker process keeps its own engine and points stream back as they finish.  Failed
points (an exception, no convergence) are recorded with their reason; they do not stop
the sweep.  Results go to one file (:mod:`backreact.sweep_io`), rewritten atomically after
every point, so an interrupted sweep resumes where it stopped.
"""

from __future__ import annotations

import functools
import math
import os
import time
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .config import Config, ConfigError, config_from_mapping, load_config

__all__ = [
    "SweepError",
    "SweepParameter",
    "SweepSpec",
    "load_sweep",
    "parse_sweep",
    "summary_row",
    "run_sweep",
    "HISTORY_REDSHIFT",
    "HISTORY_NAMES",
]

#: Common redshift grid of the stored histories (keep = "histories").
HISTORY_REDSHIFT = np.linspace(0.0, 3.0, 121)
#: Quantities stored per point on that grid.
HISTORY_NAMES = ["hubble_km_s_Mpc", "w_spectator", "fraction_spectator", "fraction_matter"]
_MAX_POINTS = 100_000
#: XLA CPU flags of a single-threaded worker (JAX documentation, common practice).
_ONE_THREAD_XLA = "--xla_cpu_multi_thread_eigen=false intra_op_parallelism_threads=1"
_SWEEP_KEYS = {"name", "description", "scenario", "keep", "parameters"}
_PARAM_KEYS = {"key", "values", "spacing", "start", "stop", "points"}


class SweepError(ValueError):
    """A sweep file is malformed; the message is one line naming the file and the entry."""


@dataclass(frozen=True)
class SweepParameter:
    """One swept config key and its values."""

    key: str
    values: np.ndarray


@dataclass(frozen=True)
class SweepSpec:
    """A validated sweep: the base scenario, the grid, what to keep, the file's text."""

    name: str
    text: str
    source: str
    base: Config
    parameters: list[SweepParameter]
    keep_histories: bool = False
    configs: list[Config] = field(default_factory=list, repr=False)

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(len(p.values) for p in self.parameters)

    @property
    def points(self) -> int:
        return int(np.prod(self.shape))

    @property
    def keys(self) -> list[str]:
        return [p.key for p in self.parameters]

    def grid(self) -> dict[str, np.ndarray]:
        """Parameter values per point of the flattened product grid (C order)."""
        mesh = np.meshgrid(*(p.values for p in self.parameters), indexing="ij")
        return {p.key: m.ravel().astype(np.float64) for p, m in zip(self.parameters, mesh, strict=True)}

    def overrides(self, index: int) -> dict[str, float]:
        return {k: float(v[index]) for k, v in self.grid().items()}


def _number(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(float(value)):
        raise SweepError(f"{where} must be a finite number, got {value!r}")
    return float(value)


def _parameter(entry: Any, where: str) -> SweepParameter:
    if not isinstance(entry, Mapping):
        raise SweepError(f"{where} must be a table with key = ... and values or start/stop/points")
    unknown = sorted(set(entry) - _PARAM_KEYS)
    if unknown:
        raise SweepError(f"{where}: unknown entry {unknown[0]!r} (allowed: {', '.join(sorted(_PARAM_KEYS))})")
    key = entry.get("key")
    if not isinstance(key, str) or key.count(".") != 1:
        raise SweepError(f"{where}: key must name a config key as 'section.key', got {key!r}")
    where = f"{where} ({key})"
    if "values" in entry:
        if any(k in entry for k in ("spacing", "start", "stop", "points")):
            raise SweepError(f"{where}: give either values or spacing/start/stop/points, not both")
        vals = entry["values"]
        if not isinstance(vals, list) or not vals:
            raise SweepError(f"{where}: values must be a non-empty list of numbers")
        values = np.array([_number(v, f"{where} values") for v in vals])
    else:
        spacing = entry.get("spacing", "linear")
        if spacing not in ("linear", "log"):
            raise SweepError(f"{where}: spacing must be 'linear' or 'log', got {spacing!r}")
        missing = [k for k in ("start", "stop", "points") if k not in entry]
        if missing:
            raise SweepError(f"{where}: needs {', '.join(missing)} (or an explicit values list)")
        start = _number(entry["start"], f"{where} start")
        stop = _number(entry["stop"], f"{where} stop")
        points = entry["points"]
        if isinstance(points, bool) or not isinstance(points, int) or not 1 <= points <= _MAX_POINTS:
            raise SweepError(f"{where}: points must be an integer from 1 to {_MAX_POINTS}, got {points!r}")
        if spacing == "log":
            if start <= 0 or stop <= 0:
                raise SweepError(
                    f"{where}: a log spacing needs start > 0 and stop > 0, got {start:g}, {stop:g}"
                )
            values = np.geomspace(start, stop, points)
        else:
            values = np.linspace(start, stop, points)
    if len(set(values.tolist())) != len(values):
        raise SweepError(f"{where}: repeated values")
    return SweepParameter(key, values)


def parse_sweep(text: str, source: str = "<sweep>", base_dir: str | os.PathLike | None = None) -> SweepSpec:
    """Parse and validate a sweep file's text (module docstring); SweepError or ConfigError
    (one line) when anything is wrong, including any single point's config."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SweepError(f"sweep error in {source}: TOML syntax error: {exc}") from None
    sweep = data.pop("sweep", None)
    if not isinstance(sweep, Mapping):
        raise SweepError(
            f"sweep error in {source}: no [sweep] table (a plain scenario is run with 'backreact run')"
        )
    unknown = sorted(set(sweep) - _SWEEP_KEYS)
    if unknown:
        raise SweepError(
            f"sweep error in {source}: unknown entry [sweep] {unknown[0]!r} "
            f"(allowed: {', '.join(sorted(_SWEEP_KEYS))})"
        )
    keep = sweep.get("keep", "summary")
    if keep not in ("summary", "histories"):
        raise SweepError(
            f"sweep error in {source}: [sweep] keep must be 'summary' or 'histories', got {keep!r}"
        )
    scenario = sweep.get("scenario")
    if scenario is not None:
        if data:
            raise SweepError(
                f"sweep error in {source}: give the base scenario either as [sweep] scenario = FILE or as "
                f"sections in this file, not both (found [{next(iter(data))}])"
            )
        if not isinstance(scenario, str):
            raise SweepError(f"sweep error in {source}: [sweep] scenario must be a file name")
        base = load_config(Path(base_dir or ".") / scenario)
    else:
        base = config_from_mapping(data, source=source)
    entries = sweep.get("parameters")
    if not isinstance(entries, list) or not entries:
        raise SweepError(f"sweep error in {source}: [[sweep.parameters]] must list at least one parameter")
    params = [
        _parameter(e, f"sweep error in {source}: [[sweep.parameters]] #{i + 1}")
        for i, e in enumerate(entries)
    ]
    keys = [p.key for p in params]
    if len(set(keys)) != len(keys):
        raise SweepError(f"sweep error in {source}: a key is swept twice ({', '.join(keys)})")
    name = sweep.get("name", Path(source).stem)
    if not isinstance(name, str) or not name:
        raise SweepError(f"sweep error in {source}: [sweep] name must be a non-empty string")
    spec = SweepSpec(name, text, source, base, params, keep == "histories")
    if spec.points > _MAX_POINTS:
        raise SweepError(f"sweep error in {source}: {spec.points} points, more than {_MAX_POINTS}")
    configs = []
    for i in range(spec.points):
        over = spec.overrides(i)
        try:
            configs.append(base.with_overrides(over))
        except ConfigError as exc:
            values = ", ".join(f"{k} = {v:g}" for k, v in over.items())
            raise SweepError(f"sweep error in {source}: point {i} ({values}): {exc}") from None
    object.__setattr__(spec, "configs", configs)
    return spec


def load_sweep(path: str | os.PathLike) -> SweepSpec:
    """Read and validate a sweep file (UTF-8 TOML)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SweepError(f"sweep file not found: {path}") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SweepError(f"cannot read sweep file {path}: {getattr(exc, 'strerror', None) or exc}") from None
    return parse_sweep(text, source=str(path), base_dir=path.parent)


# --- one point -----------------------------------------------------------------------------


def summary_row(result) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """The sweep summary of a :class:`backreact.run.RunResult` and its histories on
    HISTORY_REDSHIFT (numpy): H0, Omega_q0, w0, wa, age, chi^2 against the shipped
    chronometers and DESI DR2 BAO (r_d-free), max |H/H_LCDM - 1|, passes, verdict."""
    from .bao import bao_chi_square, load_desi_dr2, model_distances_Mpc
    from .compare import RunHubble
    from .tables import chi_square, shipped_table

    d, t, diag = result.datasets, result.today, result.diagnostics
    row: dict[str, Any] = {
        "status": 0 if result.converged else 1,
        "reason": "" if result.converged else str(diag.get("solver_status", "not converged")),
        "iterations": int(result.iterations),
        "validity_verdict": str(diag.get("validity_verdict", "")),
    }
    for col, value in (
        ("H0_km_s_Mpc", t.get("H0_km_s_Mpc")),
        ("fraction_spectator", t.get("fraction_spectator")),
        ("w0", t.get("w0")),
        ("wa", t.get("wa")),
        ("age_Gyr", t.get("age_Gyr")),
        ("lcdm_max_deviation", diag.get("lcdm_max_deviation")),
        ("validity_max", diag.get("validity_max")),
        ("calibrated_value", diag.get("calibrated_value")),
    ):
        if isinstance(value, int | float) and not isinstance(value, bool):
            row[col] = float(value)
    histories: dict[str, np.ndarray] = {}
    try:
        rh = RunHubble.from_history(d)
    except ValueError:
        return row, histories
    table = shipped_table("cosmic_chronometers")
    row["chi2_chronometers"] = chi_square(rh(table.z), table)
    bao = load_desi_dr2()
    row["chi2_bao"] = bao_chi_square(bao, model_distances_Mpc(bao, rh, rh.comoving_distance_Mpc)).chi2_free
    n = -np.log1p(HISTORY_REDSHIFT)
    efolds = np.asarray(d["efolds"])
    for name in HISTORY_NAMES:
        if name == "hubble_km_s_Mpc":
            histories[name] = rh(HISTORY_REDSHIFT)
        elif name in d:
            histories[name] = np.interp(n, efolds, np.asarray(d[name]))
    return row, histories


def _failed_row(exc: BaseException) -> dict[str, Any]:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return {"status": 2, "reason": f"{type(exc).__name__}: {text}"}


@functools.cache
def _worker_engine(sizes_key):
    """One SolveEngine per process and static size (Dask workers keep theirs across tasks)."""
    from .run import SolveEngine

    return SolveEngine(_sizes_from_key(sizes_key))


def _sizes_key(sizes):
    if sizes is None:
        return None
    if hasattr(sizes, "n_k"):
        return ("plan", int(sizes.n_k), int(sizes.saves1), int(sizes.saves2))
    return ("nodes", int(sizes))


def _sizes_from_key(key):
    if key is None:
        return None
    if key[0] == "plan":
        from .propagator import ModePlan

        return ModePlan(*key[1:])
    return key[1]


def solve_point(config_text: str, sizes_key, keep_histories: bool) -> tuple[dict, dict, float]:
    """Solve one point from its canonical config text (runs in a worker process too):
    (summary row, histories, wall seconds). Never raises for a failing point."""
    from .config import parse_config
    from .run import run_scenario

    t0 = time.perf_counter()
    try:
        cfg = parse_config(config_text, source="sweep point")
        result = run_scenario(cfg, engine=_worker_engine(sizes_key))
        row, hist = summary_row(result)
    except Exception as exc:  # a failing point is recorded, never fatal to the sweep
        row, hist = _failed_row(exc), {}
    wall = time.perf_counter() - t0
    row["wall_seconds"] = wall
    return row, (hist if keep_histories else {}), wall


def common_sizes(configs: list[Config]):
    """The largest propagator sizes any of ``configs`` needs (so that one compilation serves
    all); None when the method is "none". Solves each point's plain history (one compiled
    background for all)."""
    from .background import model_from_config
    from .propagator import propagator_sizes
    from .run import _plain_solver

    sizes = None
    for cfg in configs:
        try:
            plain = _plain_solver()(model_from_config(cfg))
            sizes = propagator_sizes(cfg, plain, sizes)
        except Exception:  # noqa: S112 - such a point fails again, with its reason, when it is solved
            continue
    return sizes


# --- the whole sweep ----------------------------------------------------------------------------


def run_sweep(
    spec: SweepSpec,
    output: str | os.PathLike,
    *,
    workers: int | None = None,
    scheduler: str | None = None,
    progress: Callable[[int, int, int], None] | None = None,
):
    """Run every unfinished point of ``spec`` and record it in ``output`` (resuming a file
    of the same sweep); return the :class:`backreact.sweep_io.SweepRecord`.

    ``workers``: a local Dask cluster of that many single-threaded processes (None: run in
    this process); ``scheduler``: address of an existing Dask scheduler (same code path).
    ``progress(done, failed, total)`` is called after every point.
    """
    from .sweep_io import SweepWriter, read_sweep

    grid = spec.grid()
    writer = SweepWriter(
        output,
        spec.text,
        spec.keys,
        grid,
        spec.shape,
        history_names=HISTORY_NAMES if spec.keep_histories else None,
        redshift=HISTORY_REDSHIFT if spec.keep_histories else None,
    )
    with writer:
        todo = [i for i in range(spec.points) if i not in writer.done]
        failed = 0

        def record(i, row, hist):
            nonlocal failed
            writer.record(i, row, hist or None)
            failed += int(row.get("status", 2) != 0)
            if progress is not None:
                progress(len(writer.done), failed, spec.points)

        if progress is not None:
            progress(len(writer.done), 0, spec.points)
        if todo:
            sizes_key = _sizes_key(common_sizes([spec.configs[i] for i in todo]))
            texts = {i: spec.configs[i].text for i in todo}
            if workers is None and scheduler is None:
                for i in todo:
                    row, hist, _ = solve_point(texts[i], sizes_key, spec.keep_histories)
                    record(i, row, hist)
            else:
                _run_on_dask(texts, sizes_key, spec.keep_histories, workers, scheduler, record)
    return read_sweep(output)


def _run_on_dask(texts, sizes_key, keep, workers, scheduler, record) -> None:
    from dask.distributed import Client, LocalCluster, as_completed

    cluster = None
    if scheduler is None:
        # one thread per worker process, and XLA pinned to one thread inside each: the
        # workers' environment, set by their nannies before the worker starts
        flags = f"{os.environ.get('XLA_FLAGS', '')} {_ONE_THREAD_XLA}".strip()
        cluster = LocalCluster(
            n_workers=int(workers),
            threads_per_worker=1,
            processes=True,
            dashboard_address=None,
            env={"XLA_FLAGS": flags, "OMP_NUM_THREADS": "1"},
        )
        client = Client(cluster)
    else:
        client = Client(scheduler)
    try:
        futures = {
            client.submit(solve_point, text, sizes_key, keep, pure=False): i for i, text in texts.items()
        }
        for future in as_completed(futures):
            i = futures[future]
            try:
                row, hist, _ = future.result()
            except Exception as exc:  # a lost worker: the point is recorded as failed
                row, hist = _failed_row(exc), {}
            record(i, row, hist)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
