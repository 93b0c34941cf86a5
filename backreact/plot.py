"""Figures of stored run files (matplotlib object API, numpy only, no JAX).

:func:`plot_runs` reads one or several run files and writes five figures, each in every
requested format, named ``<prefix>_<figure>.<ext>``: the prefix is the run file's stem
for a single run and ``overlay`` for several.

``hubble_ratio``
    H(z)/H_LCDM(z) - 1 for 0 <= z <= z_max.  H_LCDM is the *matching* flat LambdaCDM of
    the FIRST run (its H0, omega_b, omega_c and radiation content, see
    :mod:`backreact.compare`), used for every run and every table, so an overlay shows
    the runs against one common reference.  A run's H(z) is the Hermite interpolant of
    :class:`backreact.compare.RunHubble`.  Each H(z) table is drawn as markers at
    H_i/H_LCDM(z_i) - 1 with error bars sigma_i/H_LCDM(z_i) (points with z_i > z_max are
    left out).  A thin line marks zero.
``w_spectator``
    The stored equation of state w_q = p_q/rho_q of the spectator against redshift for
    0 <= z <= z_max (the stored grid points, no interpolation), the CPL fit
    w0 + wa z/(1+z) of the same run dashed, and w = -1 dotted.
``fractions``
    The density fractions Omega_i = rho_i/(3 M_p^2 H^2) stored for radiation, matter,
    inflaton, cosmological constant and spectator against N = ln a (N = 0 today) over the
    whole history.  Light bands mark the epochs of the first run: inflation (to
    ``today["efolds_end_of_inflation"]``), reheating (until the inflaton fraction first
    drops below 1/2), radiation (until matter first exceeds radiation), matter (until the
    cosmological constant plus spectator first exceed matter) and dark energy (to the end of
    the history); a file without that attribute falls back on the first N where the stored
    epsilon reaches 1, and without either the bands are left out.  A vertical line marks
    today (N = 0).  Runs after the first are told apart by their line style.
``propagator``
    Top: |A|, the coincident propagator of the spectator in GeV^2, on a log scale against
    N (solid where A > 0, dashed where A < 0).  Bottom: the closure validity ratio on a
    log scale (its finite, positive part), with the default validity threshold 0.1 and,
    when a run used another one, that run's threshold.
``bao``
    Top: D_M/(r_d z^(2/3)) (and D_V/(r_d z^(2/3)), thinner) of each run; bottom: D_H/r_d,
    with the DESI DR2 points and their errors.  Every model is drawn at its own best-fit
    r_d (the r_d-free comparison of :mod:`backreact.bao`; its value and chi^2 are in the
    legend), the matching flat LambdaCDM of the first run dotted.  The z^(2/3) rescaling
    makes the curves nearly flat, so that percent-level differences show.

Quantities a run did not store are skipped; a panel left without any curve says so in
a short note.  Figures are 7 x 4.5 inches; PNGs are written at 150 dpi (1050 x 675
pixels).  Every file is written to a temporary name in the output folder and renamed,
so an interrupted call never leaves a truncated image.  No pyplot, no global matplotlib
state: each figure is a :class:`matplotlib.figure.Figure` with an Agg canvas.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.transforms import blended_transform_factory

from backreact.bao import bao_chi_square, load_desi_dr2, model_distances_Mpc
from backreact.compare import RunHubble, matching_lcdm
from backreact.constants import SPEED_OF_LIGHT_KM_S
from backreact.io import RunRecord, read_run
from backreact.tables import HubbleTable, shipped_table

__all__ = ["FIGURES", "FORMATS", "FIGSIZE", "PNG_DPI", "DEFAULT_VALIDITY_THRESHOLD", "plot_runs"]

#: Figure names, in the order their files are written.
FIGURES = ("hubble_ratio", "w_spectator", "fractions", "propagator", "bao")
#: Output formats understood by :func:`plot_runs`.
FORMATS = ("png", "pdf", "svg")
#: Size of every figure in inches (width, height).
FIGSIZE = (7.0, 4.5)
#: Resolution of the PNG files (dots per inch).
PNG_DPI = 150
#: Default of ``spectator.validity_threshold``, drawn in the propagator figure.
DEFAULT_VALIDITY_THRESHOLD = 0.1

#: Points of the redshift grid of the hubble_ratio curves.
_Z_POINTS = 501
#: Smallest half-height of the hubble_ratio and w axes, so round-off never fills a panel.
_MIN_HALF_SPAN_RATIO = 2e-4
_MIN_HALF_SPAN_W = 0.01

_RUN_COLOURS = ("#1f5fa8", "#c8462c", "#2e8b3e", "#7b4fa0", "#b8860b", "#178a8a", "#8c564b", "#555555")
_RUN_STYLES = ("-", "--", ":", "-.")
_TABLE_COLOURS = ("#222222", "#8a3b8f", "#a15c00", "#3b6e8f")
_COMPONENTS = (
    ("radiation", "radiation", "#e6750d"),
    ("matter", "matter", "#3170bd"),
    ("inflaton", "inflaton", "#7a5cb8"),
    ("lambda", r"cosmological constant $\Lambda$", "#6b6b6b"),
    ("spectator", r"spectator $\sigma$", "#2f9e48"),
)
_EPOCH_COLOURS = {
    "inflation": "#efe8f6",
    "reheating": "#fbeadb",
    "radiation": "#fdf5e2",
    "matter": "#e4eef9",
    "dark energy": "#e4f3e2",
}
_N_LABEL = r"e-folds $N = \ln a$ ($N = 0$ today)"
_LCDM = r"$\Lambda$CDM"


# --- small helpers -------------------------------------------------------------------


def _new_figure(nrows: int = 1) -> tuple[Figure, list]:
    fig = Figure(figsize=FIGSIZE, dpi=PNG_DPI, layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(nrows, 1, sharex=True, squeeze=False)[:, 0]
    return fig, list(axes)


def _note(ax, text: str, y: float = 0.5) -> None:
    """A short grey note in the middle of ``ax`` (axes coordinates)."""
    ax.text(
        0.5,
        y,
        text,
        transform=ax.transAxes,
        ha="center",
        va="center",
        fontsize=9,
        color="#555555",
        wrap=True,
        zorder=5,
        bbox={"boxstyle": "round,pad=0.3", "facecolor": "white", "edgecolor": "none", "alpha": 0.85},
    )


def _series(history: Mapping[str, np.ndarray], name: str) -> np.ndarray | None:
    """``history[name]`` as float64 when stored on the e-fold grid, else None."""
    if name not in history or "efolds" not in history:
        return None
    arr = np.asarray(history[name], dtype=np.float64)
    if arr.ndim != 1 or arr.shape != np.shape(history["efolds"]):
        return None
    return arr


def _colour(i: int) -> str:
    return _RUN_COLOURS[i % len(_RUN_COLOURS)]


def _style(i: int) -> str:
    return _RUN_STYLES[i % len(_RUN_STYLES)]


def _set_min_span(ax, values: list[np.ndarray], centre_floor: float, half_span: float) -> None:
    """Linear y-limits around ``values`` (and ``centre_floor``), at least 2 * half_span high."""
    finite = [v[np.isfinite(v)] for v in values]
    finite = [v for v in finite if v.size]
    lo = min([centre_floor] + [float(v.min()) for v in finite])
    hi = max([centre_floor] + [float(v.max()) for v in finite])
    pad = 0.06 * (hi - lo)
    if hi - lo + 2 * pad < 2 * half_span:
        mid = 0.5 * (lo + hi)
        ax.set_ylim(mid - half_span, mid + half_span)
    else:
        ax.set_ylim(lo - pad, hi + pad)
    ax.ticklabel_format(axis="y", style="sci", scilimits=(-3, 4), useOffset=False)


def _first_index(mask: np.ndarray) -> int | None:
    hits = np.flatnonzero(mask)
    return int(hits[0]) if hits.size else None


# --- figure 1: H(z) relative to the matching LambdaCDM ----------------------------------------


def _run_hubble(record: RunRecord) -> RunHubble | None:
    try:
        # a non-positive stored H gives NaN (refused by from_history), not a RuntimeWarning
        with np.errstate(invalid="ignore", divide="ignore"):
            return RunHubble.from_history(record.history)
    except ValueError:
        return None


def _reference_lcdm(record: RunRecord, run_h: RunHubble | None):
    """The matching flat LambdaCDM of ``record`` and None, or None and the reason."""
    h0 = record.today.get("H0_km_s_Mpc")
    if h0 is None and run_h is not None and run_h.z_min <= 0.0 <= run_h.z_max:
        h0 = float(run_h(0.0))
    if h0 is None or not math.isfinite(h0):
        return None, "no H0 stored"
    try:
        return matching_lcdm(record.config_toml, h0), None
    except ValueError as exc:  # includes ConfigError: an unreadable stored config
        return None, str(exc).splitlines()[0] if str(exc) else type(exc).__name__


def _figure_hubble_ratio(records, labels, tables, z_max) -> Figure:
    fig, (ax,) = _new_figure()
    first_h = _run_hubble(records[0])
    lcdm, reason = _reference_lcdm(records[0], first_h)
    ax.set_xlabel("redshift $z$")
    ax.set_ylabel(r"$H(z)\,/\,H_{\Lambda\mathrm{CDM}}(z) - 1$")
    ax.set_xlim(0.0, z_max)
    if lcdm is None:
        ax.set_title(f"Expansion rate relative to flat {_LCDM}", fontsize=11)
        _note(ax, f"no matching flat {_LCDM} for {labels[0]}: {reason}")
        return fig
    ax.set_title(
        f"Expansion rate relative to flat {_LCDM}\n"
        rf"reference: the flat {_LCDM} with {labels[0]}'s $H_0$ = {lcdm.H0_km_s_Mpc:.2f} km/s/Mpc, "
        rf"$\omega_b$ = {lcdm.omega_b:.5g}, $\omega_c$ = {lcdm.omega_c:.5g}",
        fontsize=9.5,
    )
    ax.axhline(0.0, color="#444444", linewidth=0.6, zorder=1)
    plotted: list[np.ndarray] = []
    missing: list[str] = []
    for i, (record, label) in enumerate(zip(records, labels, strict=True)):
        run_h = first_h if i == 0 else _run_hubble(record)
        if run_h is None:
            missing.append(label)
            continue
        lo, hi = max(0.0, run_h.z_min), min(z_max, run_h.z_max)
        if not lo < hi:
            missing.append(label)
            continue
        z = np.linspace(lo, hi, _Z_POINTS)
        ratio = run_h(z) / np.asarray(lcdm.hubble_km_s_Mpc(z), dtype=np.float64) - 1.0
        ax.plot(z, ratio, color=_colour(i), linestyle=_style(i), linewidth=1.6, label=label, gid=f"run-{i}")
        plotted.append(ratio)
    for j, table in enumerate(tables):
        inside = (table.z >= 0.0) & (table.z <= z_max)
        if not inside.any():
            continue
        zt = table.z[inside]
        h_ref = np.asarray(lcdm.hubble_km_s_Mpc(zt), dtype=np.float64)
        yerr = None if table.sigma is None else table.sigma[inside] / h_ref
        ax.errorbar(
            zt,
            table.H[inside] / h_ref - 1.0,
            yerr=yerr,
            fmt="o",
            linestyle="none",
            markersize=3.5,
            elinewidth=0.8,
            capsize=2.0,
            color=_TABLE_COLOURS[j % len(_TABLE_COLOURS)],
            label=f"{table.name} (measured, {int(inside.sum())} points)",
            zorder=3,
        )
        y = table.H[inside] / h_ref - 1.0
        plotted.extend([y] if yerr is None else [y - yerr, y + yerr])
    _set_min_span(ax, plotted, 0.0, _MIN_HALF_SPAN_RATIO)
    if missing:
        _note(ax, "no H(z) stored for " + ", ".join(missing), y=0.08)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=8, loc="best")
    return fig


# --- figure 2: equation of state of the spectator ----------------------------------------------


def _figure_w_spectator(records, labels, z_max) -> Figure:
    fig, (ax,) = _new_figure()
    ax.set_title("Equation of state of the spectator field", fontsize=11)
    ax.set_xlabel("redshift $z$")
    ax.set_ylabel(r"$w_q = p_q / \rho_q$")
    ax.set_xlim(0.0, z_max)
    ax.axhline(-1.0, color="#444444", linestyle=":", linewidth=1.0, label=r"$w = -1$ (cosmological constant)")
    plotted: list[np.ndarray] = []
    missing: list[str] = []
    z_fit = np.linspace(0.0, z_max, 201)
    for i, (record, label) in enumerate(zip(records, labels, strict=True)):
        w = _series(record.history, "w_spectator")
        z = _series(record.history, "redshift")
        if w is not None and z is not None:
            keep = np.isfinite(w) & np.isfinite(z) & (z >= 0.0) & (z <= z_max)
            if keep.any():
                order = np.argsort(z[keep], kind="stable")
                ax.plot(z[keep][order], w[keep][order], color=_colour(i), linewidth=1.6, label=label)
                plotted.append(w[keep])
            else:
                missing.append(label)
        else:
            missing.append(label)
        w0, wa = record.today.get("w0"), record.today.get("wa")
        if w0 is not None and wa is not None and math.isfinite(w0) and math.isfinite(wa):
            cpl = w0 + wa * z_fit / (1.0 + z_fit)
            ax.plot(
                z_fit,
                cpl,
                color=_colour(i),
                linestyle="--",
                linewidth=1.1,
                label=rf"{label}: CPL fit $w_0$ = {w0:.4g}, $w_a$ = {wa:.3g}",
            )
            plotted.append(cpl)
    _set_min_span(ax, plotted, -1.0, _MIN_HALF_SPAN_W)
    if missing:
        _note(ax, "no spectator equation of state stored for " + ", ".join(missing), y=0.08)
    ax.legend(fontsize=8, loc="best")
    return fig


# --- figure 3: density fractions and epochs -----------------------------------------------------


def _epochs(record: RunRecord) -> list[tuple[str, float, float]]:
    """(name, N_start, N_end) of the epochs of one run, in order, each of positive width."""
    h = record.history
    n = _series(h, "efolds")
    if n is None or n.size < 2:
        return []
    fr = {c: _series(h, f"fraction_{c}") for c, _, _ in _COMPONENTS}
    edges: list[tuple[str, float]] = [("inflation", float(n[0]))]
    n_end_inf = record.today.get("efolds_end_of_inflation")
    eps = _series(h, "epsilon")
    if (n_end_inf is None or not math.isfinite(n_end_inf)) and eps is not None:
        k = _first_index(eps >= 1.0)  # older or foreign files: inflation ends where epsilon = 1
        n_end_inf = None if k is None else float(n[k])
    if n_end_inf is None or not math.isfinite(n_end_inf) or not n[0] <= n_end_inf <= n[-1]:
        return []  # no end of inflation: no epochs to shade
    i = int(np.searchsorted(n, n_end_inf))  # index where the next search starts
    edges.append(("reheating", n_end_inf))
    if fr["inflaton"] is not None:
        k = _first_index((n >= n_end_inf) & (fr["inflaton"] < 0.5))
        if k is not None:
            i = k
            edges.append(("radiation", float(n[k])))
    if len(edges) == 2:
        edges.append(("radiation", n_end_inf))  # no reheating found: radiation follows at once
    if fr["matter"] is not None and fr["radiation"] is not None:
        k = _first_index((np.arange(n.size) >= i) & (fr["matter"] > fr["radiation"]))
        if k is not None:
            i = k
            edges.append(("matter", float(n[k])))
            dark = [fr[c] for c in ("lambda", "spectator") if fr[c] is not None]
            if dark:
                k = _first_index((np.arange(n.size) >= i) & (sum(dark) > fr["matter"]))
                if k is not None:
                    edges.append(("dark energy", float(n[k])))
    bounds = [b for _, b in edges[1:]] + [float(n[-1])]
    return [(name, a, b) for (name, a), b in zip(edges, bounds, strict=True) if b > a]


def _shade_epochs(ax, epochs, n_span: float) -> None:
    """Light bands with a label each: horizontal in wide bands, vertical at the left edge of
    narrow ones, and beside the band with a short leader line where it is thinner than the text."""
    trans = blended_transform_factory(ax.transData, ax.transAxes)
    style = {"fontsize": 8, "color": "#333333", "zorder": 4}
    for name, a, b in epochs:
        ax.axvspan(a, b, color=_EPOCH_COLOURS[name], zorder=0, linewidth=0)
        width = (b - a) / n_span
        if width >= 0.12:
            ax.text(0.5 * (a + b), 0.985, name, transform=trans, ha="center", va="top", **style)
        elif width >= 0.03:
            x = a + 0.004 * n_span  # at the band's left edge, clear of a thin band to its right
            ax.text(x, 0.985, name, transform=trans, rotation=90, ha="left", va="top", **style)
        else:
            ax.annotate(
                name,
                xy=(0.5 * (a + b), 0.95),
                xycoords=trans,
                xytext=(-6, 0),
                textcoords="offset points",
                rotation=90,
                ha="right",
                va="top",
                arrowprops={"arrowstyle": "-", "linewidth": 0.6, "color": "#333333"},
                **style,
            )


def _figure_fractions(records, labels) -> Figure:
    fig, (ax,) = _new_figure()
    ax.set_title("Density fractions along the history", fontsize=11)
    ax.set_xlabel(_N_LABEL)
    ax.set_ylabel(r"$\Omega_i = \rho_i / (3 M_p^2 H^2)$")
    n_all = [_series(r.history, "efolds") for r in records]
    spans = [n for n in n_all if n is not None and n.size]
    if not spans:
        _note(ax, "no e-fold grid stored")
        return fig
    lo = min(float(n[0]) for n in spans)
    hi = max(float(n[-1]) for n in spans)
    ax.set_xlim(lo, hi)
    ax.set_ylim(-0.03, 1.32)  # headroom above 1 for the epoch labels
    ax.set_yticks([0.0, 0.25, 0.5, 0.75, 1.0])
    _shade_epochs(ax, _epochs(records[0]), hi - lo)
    ax.axvline(0.0, color="#000000", linewidth=0.9, zorder=3)
    ax.text(
        0.0,
        0.03,
        "today ",
        transform=blended_transform_factory(ax.transData, ax.transAxes),
        rotation=90,
        ha="right",
        va="bottom",
        fontsize=8,
        zorder=4,
    )
    component_handles: dict[str, Line2D] = {}
    for i, record in enumerate(records):
        n = n_all[i]
        if n is None:
            continue
        for key, name, colour in _COMPONENTS:
            f = _series(record.history, f"fraction_{key}")
            if f is None:
                continue
            ax.plot(n, f, color=colour, linestyle=_style(i), linewidth=1.4, zorder=2)
            component_handles.setdefault(key, Line2D([], [], color=colour, linewidth=1.4, label=name))
    if not component_handles:
        _note(ax, "no density fractions stored")
        return fig
    handles = [component_handles[k] for k, _, _ in _COMPONENTS if k in component_handles]
    legend = ax.legend(handles=handles, fontsize=8, loc="center left", bbox_to_anchor=(0.01, 0.5))
    if len(records) > 1:
        ax.add_artist(legend)
        runs = [
            Line2D([], [], color="#333333", linestyle=_style(i), label=lab) for i, lab in enumerate(labels)
        ]
        ax.legend(
            handles=runs,
            fontsize=8,
            loc="lower left",
            bbox_to_anchor=(0.01, 0.12),
            title="epochs shaded for " + labels[0],
            title_fontsize=7,
        )
    return fig


# --- figure 4: propagator and closure validity --------------------------------------------------


def _set_log_limits(ax, values: list[np.ndarray], min_decades: float) -> None:
    """Log y-limits covering the positive finite ``values``, at least ``min_decades`` high."""
    pos = [v[np.isfinite(v) & (v > 0)] for v in values]
    pos = [v for v in pos if v.size]
    lo = min(float(v.min()) for v in pos)
    hi = max(float(v.max()) for v in pos)
    l_lo, l_hi = math.log10(lo), math.log10(hi)
    if l_hi - l_lo < min_decades:
        mid = 0.5 * (l_lo + l_hi)
        l_lo, l_hi = mid - 0.5 * min_decades, mid + 0.5 * min_decades
    else:
        pad = 0.04 * (l_hi - l_lo)
        l_lo, l_hi = l_lo - pad, l_hi + pad
    ax.set_ylim(10.0**l_lo, 10.0**l_hi)


def _figure_propagator(records, labels) -> Figure:
    fig, (top, bottom) = _new_figure(2)
    top.set_title("Coincident propagator of the spectator and closure validity", fontsize=11)
    top.set_ylabel(r"$|A| = |\langle\sigma^2\rangle|$ (GeV$^2$)")
    bottom.set_ylabel("closure validity ratio")
    bottom.set_xlabel(_N_LABEL)
    spans = [n for n in (_series(r.history, "efolds") for r in records) if n is not None and n.size]
    if spans:
        top.set_xlim(min(float(n[0]) for n in spans), max(float(n[-1]) for n in spans))

    drawn_a: list[np.ndarray] = []
    any_negative = False
    missing_a: list[str] = []
    for i, (record, label) in enumerate(zip(records, labels, strict=True)):
        n, a = _series(record.history, "efolds"), _series(record.history, "propagator")
        if n is None or a is None or not np.any(np.isfinite(a) & (a != 0)):
            missing_a.append(label)
            continue
        mag = np.abs(np.where(np.isfinite(a), a, np.nan))
        pos = np.where(a > 0, mag, np.nan)
        neg = np.where(a < 0, mag, np.nan)
        top.plot(n, pos, color=_colour(i), linewidth=1.5, label=label)
        if np.any(a < 0):
            any_negative = True
            top.plot(n, neg, color=_colour(i), linestyle="--", linewidth=1.5)
        drawn_a.append(mag)
    if drawn_a:
        top.set_yscale("log")
        _set_log_limits(top, drawn_a, 2.0)
        handles, names = top.get_legend_handles_labels()
        if any_negative:
            handles.append(Line2D([], [], color="#333333", linestyle="--", linewidth=1.5))
            names.append("where A < 0")
        top.legend(handles, names, fontsize=8, loc="best")
    else:
        top.set_yticks([])
    if missing_a:
        _note(top, "no propagator stored for " + ", ".join(missing_a), y=0.15 if drawn_a else 0.5)

    drawn_v: list[np.ndarray] = []
    missing_v: list[str] = []
    for i, (record, label) in enumerate(zip(records, labels, strict=True)):
        n, v = _series(record.history, "efolds"), _series(record.history, "closure_validity")
        keep = None if v is None else np.isfinite(v) & (v > 0)
        if n is None or keep is None or not keep.any():
            missing_v.append(label)
            continue
        bottom.plot(n, np.where(keep, v, np.nan), color=_colour(i), linewidth=1.3, label=label)
        drawn_v.append(v[keep])
    thresholds = [(DEFAULT_VALIDITY_THRESHOLD, "validity threshold (default)", ":")]
    for i, (record, label) in enumerate(zip(records, labels, strict=True)):
        thr = record.diagnostics.get("validity_threshold")
        if isinstance(thr, int | float) and not isinstance(thr, bool) and math.isfinite(thr) and thr > 0:
            if all(not math.isclose(thr, t, rel_tol=1e-12) for t, _, _ in thresholds):
                thresholds.append((float(thr), f"validity threshold of {label}", "-."))
    bottom.set_yscale("log")
    # Limits first: with no curve drawn, autoscaling on the threshold lines alone is singular.
    _set_log_limits(bottom, drawn_v + [np.array([t for t, _, _ in thresholds])], 2.0)
    for thr, name, style in thresholds:
        bottom.axhline(thr, color="#000000", linestyle=style, linewidth=1.1, label=name)
    bottom.legend(fontsize=7.5, loc="best")
    if missing_v:
        text = "no finite, positive closure validity stored for " + ", ".join(missing_v)
        _note(bottom, text, y=0.15 if drawn_v else 0.5)
    for ax in (top, bottom):
        ax.axvline(0.0, color="#000000", linewidth=0.6, alpha=0.6)
    return fig


# --- figure 5: BAO distances ------------------------------------------------------------------

_BAO_Z = (0.05, 2.6)


def _bao_curves(hubble, comoving, data, z):
    """Best-fit (r_d-free) r_d of a model against ``data`` and its rescaled curves on ``z``."""
    fit = bao_chi_square(data, model_distances_Mpc(data, hubble, comoving))
    rd = fit.best_rd_Mpc
    dm = np.asarray(comoving(z), dtype=np.float64)
    dh = SPEED_OF_LIGHT_KM_S / np.asarray(hubble(z), dtype=np.float64)
    dv = np.cbrt(z * dm**2 * dh)
    return fit, dm / (rd * z ** (2 / 3)), dv / (rd * z ** (2 / 3)), dh / rd


def _figure_bao(records, labels) -> Figure:
    fig, (top, bottom) = _new_figure(2)
    data = load_desi_dr2()
    z = np.linspace(*_BAO_Z, 400)
    fig.suptitle(r"BAO distances (DESI DR2), each model at its best-fit $r_d$", fontsize=11)
    top.set_ylabel(r"$D/(r_d\,z^{2/3})$")
    bottom.set_ylabel(r"$D_H/r_d$")
    bottom.set_xlabel("redshift $z$")
    bottom.set_xlim(0.0, _BAO_Z[1])
    drawn = False
    for i, (rec, label) in enumerate(zip(records, labels, strict=True)):
        rh = _run_hubble(rec)
        if rh is None or not (rh.z_min <= _BAO_Z[0] and rh.z_max >= _BAO_Z[1]):
            continue
        fit, dm, dv, dh = _bao_curves(rh, rh.comoving_distance_Mpc, data, z)
        tag = rf"{label} ($r_d$ = {fit.best_rd_Mpc:.2f} Mpc, $\chi^2$ = {fit.chi2_free:.1f})"
        top.plot(z, dm, color=_colour(i), linestyle=_style(i), label=f"{tag}: $D_M$")
        top.plot(
            z, dv, color=_colour(i), linestyle=_style(i), linewidth=0.9, alpha=0.6, label=f"{label}: $D_V$"
        )
        bottom.plot(z, dh, color=_colour(i), linestyle=_style(i), label=label)
        drawn = True
        if i == 0:
            lcdm, _ = _reference_lcdm(rec, rh)
            if lcdm is not None:
                fit_l, dm_l, _, dh_l = _bao_curves(lcdm.hubble_km_s_Mpc, lcdm.comoving_distance_Mpc, data, z)
                lab = rf"matching flat {_LCDM} of {label} ($r_d$ = {fit_l.best_rd_Mpc:.2f} Mpc)"
                top.plot(z, dm_l, color="#888888", linestyle=":", linewidth=1.2, label=lab)
                bottom.plot(z, dh_l, color="#888888", linestyle=":", linewidth=1.2)
    if not drawn:
        _note(top, "no run covers 0.05 <= z <= 2.6 with a usable H(z)")
    kind = np.asarray(data.kind)
    scale = data.z ** (2 / 3)
    for k, marker, ax, norm, name in (
        ("DM", "o", top, scale, "DESI DR2 $D_M/r_d$"),
        ("DV", "s", top, scale, "DESI DR2 $D_V/r_d$ (BGS)"),
        ("DH", "o", bottom, np.ones_like(scale), "DESI DR2 $D_H/r_d$"),
    ):
        m = kind == k
        ax.errorbar(
            data.z[m],
            data.value[m] / norm[m],
            yerr=data.sigma[m] / norm[m],
            fmt=marker,
            color="#222222",
            markersize=4,
            capsize=2,
            linewidth=1,
            label=name,
            zorder=4,
        )
    top.legend(fontsize=7, loc="lower right")
    bottom.legend(fontsize=7, loc="upper right")
    return fig


# --- assembly and output ------------------------------------------------------------------------


def _figures(
    records: Sequence[RunRecord],
    labels: Sequence[str],
    tables: Sequence[HubbleTable] = (),
    z_max: float = 2.5,
) -> dict[str, Figure]:
    """Every figure of ``records`` (same order as :data:`FIGURES`), built but not saved."""
    records, labels = list(records), list(labels)
    return {
        "hubble_ratio": _figure_hubble_ratio(records, labels, list(tables), float(z_max)),
        "w_spectator": _figure_w_spectator(records, labels, float(z_max)),
        "fractions": _figure_fractions(records, labels),
        "propagator": _figure_propagator(records, labels),
        "bao": _figure_bao(records, labels),
    }


def _check_formats(formats) -> list[str]:
    if isinstance(formats, str):
        formats = (formats,)
    out: list[str] = []
    for fmt in formats:
        if not isinstance(fmt, str) or fmt.lower().lstrip(".") not in FORMATS:
            raise ValueError(f"unknown figure format {fmt!r}; allowed: {', '.join(FORMATS)}")
        fmt = fmt.lower().lstrip(".")
        if fmt not in out:
            out.append(fmt)
    if not out:
        raise ValueError(f"no figure format given; allowed: {', '.join(FORMATS)}")
    return out


def _default_labels(paths: list[Path]) -> list[str]:
    stems = [p.stem for p in paths]
    if len(set(stems)) == len(stems):
        return stems
    return [f"{p.parent.name}/{p.stem}" if stems.count(p.stem) > 1 else p.stem for p in paths]


def _save(fig: Figure, path: Path, fmt: str) -> Path:
    """Save ``fig`` to ``path`` via a temporary file in the same folder and a rename."""
    metadata = {"pdf": {"CreationDate": None}, "svg": {"Date": None}}.get(fmt)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.partial")
    try:
        fig.savefig(tmp, format=fmt, dpi=PNG_DPI, metadata=metadata)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def plot_runs(
    paths,
    out_dir,
    *,
    tables=None,
    formats=("png", "pdf"),
    labels=None,
    z_max=2.5,
) -> list[Path]:
    """Write the five figures of one or several run files; return the files written.

    ``paths``: run files (HDF5 written by :func:`backreact.io.write_run`), one path or a
    sequence.  ``out_dir``: folder of the images, created when missing.  ``tables``:
    H(z) tables (:class:`backreact.tables.HubbleTable`; z dimensionless, H and sigma in
    km/s/Mpc) drawn in the hubble_ratio figure; None means the shipped cosmic-chronometer
    compilation, ``()`` none.  ``formats``: any of png, pdf, svg.  ``labels``: legend
    label per run (default: the file stems).  ``z_max``: largest redshift of the
    hubble_ratio and w_spectator figures (> 0, dimensionless).

    Files are ``<prefix>_<figure>.<ext>`` with prefix the run file's stem for one run and
    ``overlay`` for several, listed figure by figure (:data:`FIGURES`) and, within a
    figure, in the order of ``formats``.  Raises ValueError (one line naming the input)
    for an empty ``paths``, an unknown format, a non-positive ``z_max`` or a wrong number
    of labels, and :class:`backreact.io.RunFileError` for an unreadable run file; nothing
    is written in those cases.
    """
    if isinstance(paths, str | os.PathLike):
        paths = [paths]
    paths = [Path(p) for p in paths]
    if not paths:
        raise ValueError("paths is empty: give at least one run file to plot")
    fmts = _check_formats(formats)
    try:
        z_max = float(z_max)
    except (TypeError, ValueError):
        raise ValueError(f"z_max must be a number > 0, got {z_max!r}") from None
    if not (math.isfinite(z_max) and z_max > 0.0):
        raise ValueError(f"z_max must be a finite number > 0, got {z_max!r}")
    if labels is None:
        labels = _default_labels(paths)
    else:
        labels = [str(lab) for lab in labels]
        if len(labels) != len(paths):
            raise ValueError(f"labels has {len(labels)} entries for {len(paths)} run files")
    tables = [shipped_table("cosmic_chronometers")] if tables is None else list(tables)

    records = [read_run(p) for p in paths]
    figures = _figures(records, labels, tables, z_max)

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    prefix = paths[0].stem if len(paths) == 1 else "overlay"
    written: list[Path] = []
    for name in FIGURES:
        for fmt in fmts:
            written.append(_save(figures[name], out / f"{prefix}_{name}.{fmt}", fmt))
    return written
