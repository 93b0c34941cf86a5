"""Figures of stored run files (backreact/plot.py): files, sizes, curves and bad input."""

from __future__ import annotations

import struct

import numpy as np
import pytest
from helpers import make_config
from test_run import DEMO_SMALL

from backreact import cli, plot
from backreact.bao import bao_chi_square, load_desi_dr2, model_distances_Mpc
from backreact.compare import RunHubble, matching_lcdm
from backreact.io import read_run, write_run
from backreact.run import run_scenario
from backreact.tables import shipped_table

FIGURES, FIGSIZE, PNG_DPI = plot.FIGURES, plot.FIGSIZE, plot.PNG_DPI


@pytest.fixture(scope="module")
def run_files(tmp_path_factory):
    """(demo, shifted): one real small demo run and a cheap copy whose H(z) is 0.1 % higher."""
    folder = tmp_path_factory.mktemp("plot_runs")
    res = run_scenario(make_config(DEMO_SMALL))
    demo = write_run(folder / "demo.h5", res.record())
    rec = read_run(demo)
    rec.history["hubble_km_s_Mpc"] = rec.history["hubble_km_s_Mpc"] * 1.001
    shifted = write_run(folder / "shifted.h5", rec)
    return demo, shifted


def _png_size(path):
    """(width, height) in pixels from the IHDR chunk, which follows the 8-byte signature."""
    head = path.read_bytes()[:24]
    assert head[:8] == b"\x89PNG\r\n\x1a\n" and head[12:16] == b"IHDR"
    return struct.unpack(">II", head[16:24])


def test_one_run_writes_every_figure_in_every_format(run_files, tmp_path):
    # 5 figures x (png, pdf), named after the run file, in figure-then-format order; each a
    # real image: a PNG of exactly figsize * dpi pixels (no bbox cropping) and a PDF.
    demo, _ = run_files
    out = tmp_path / "new" / "figures"  # created by plot_runs
    written = plot.plot_runs([demo], out)
    assert written == [out / f"demo_{name}.{ext}" for name in FIGURES for ext in ("png", "pdf")]
    expected = (round(FIGSIZE[0] * PNG_DPI), round(FIGSIZE[1] * PNG_DPI))
    for path in written:
        data = path.read_bytes()
        if path.suffix == ".png":
            assert len(data) > 10_000, path.name
            assert _png_size(path) == expected, path.name
        else:
            assert data.startswith(b"%PDF") and len(data) > 5_000, path.name
    assert not list(out.glob(".*partial"))  # temporary files renamed or removed


def test_overlay_writes_overlay_files_and_one_hubble_curve_per_run(run_files, tmp_path):
    # Several runs share one set of figures named "overlay_*"; the hubble_ratio panel has one
    # curve per run (the table markers and the zero line are not run curves).
    demo, shifted = run_files
    written = plot.plot_runs([demo, shifted], tmp_path, formats=("svg",), tables=())
    assert [p.name for p in written] == [f"overlay_{name}.svg" for name in FIGURES]
    tables = [shipped_table("cosmic_chronometers")]
    fig = plot._figures([read_run(demo), read_run(shifted)], ["demo", "shifted"], tables)["hubble_ratio"]
    lines = fig.axes[0].get_lines()
    runs = [line for line in lines if (line.get_gid() or "").startswith("run-")]
    assert [line.get_label() for line in runs] == ["demo", "shifted"] and len(lines) > len(runs)


def test_hubble_ratio_curve_is_what_compare_computes(run_files):
    # The plotted y-data must be RunHubble(z) / H_LCDM(z) - 1 of backreact.compare with the
    # first run's matching LambdaCDM, evaluated at the plotted z: the same arrays, 1e-12.
    # The second run's curve is against the FIRST run's LambdaCDM, so it sits near 1e-3.
    demo, shifted = run_files
    recs = [read_run(demo), read_run(shifted)]
    fig = plot._figures(recs, ["demo", "shifted"], tables=())["hubble_ratio"]
    lines = {line.get_gid(): line for line in fig.axes[0].get_lines()}
    lcdm = matching_lcdm(recs[0].config_toml, recs[0].today["H0_km_s_Mpc"])
    for i, rec in enumerate(recs):
        z = np.asarray(lines[f"run-{i}"].get_xdata(), dtype=np.float64)
        y = np.asarray(lines[f"run-{i}"].get_ydata(), dtype=np.float64)
        assert z[0] == 0.0 and z[-1] == 2.5
        expected = RunHubble.from_history(rec.history)(z) / lcdm.hubble_km_s_Mpc(z) - 1.0
        np.testing.assert_allclose(y, expected, rtol=0, atol=1e-12)
    assert np.all(np.abs(y - 1e-3) < 1e-5)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"paths": []}, "paths is empty"),
        ({"formats": ("png", "jpg")}, "unknown figure format 'jpg'"),
        ({"z_max": 0.0}, "z_max must be"),
        ({"z_max": -1.0}, "z_max must be"),
    ],
)
def test_bad_input_raises_a_value_error_naming_it(run_files, tmp_path, kwargs, match):
    # Each bad input is refused with a one-line ValueError that names it, before any file
    # or folder is created.
    args = {"paths": [run_files[0]], **kwargs}
    out = tmp_path / "figs"
    with pytest.raises(ValueError, match=match):
        plot.plot_runs(args.pop("paths"), out, **args)
    assert not out.exists()


def test_run_without_validity_and_w_still_plots(run_files, tmp_path):
    # Datasets a run did not compute are absent from its file; the figures must still be
    # written, with a note where the panel has nothing to show.
    rec = read_run(run_files[0])
    del rec.history["closure_validity"], rec.history["w_spectator"]
    partial = write_run(tmp_path / "partial.h5", rec)
    written = plot.plot_runs([partial], tmp_path / "figs", formats=("png",))
    assert [p.name for p in written] == [f"partial_{name}.png" for name in FIGURES]
    figs = plot._figures([rec], ["partial"])
    notes = [t.get_text() for t in figs["w_spectator"].axes[0].texts]
    assert any("no spectator equation of state" in t for t in notes)


def test_bao_figure_draws_each_run_at_its_best_fit_sound_horizon(run_files):
    # The D_M curve of the top panel is D_C/(r_d z^(2/3)) with the r_d-free best fit of
    # backreact.bao for that run: same arrays, 1e-12 relative.
    demo, _ = run_files
    rec = read_run(demo)
    fig = plot._figures([rec], ["demo"], tables=())["bao"]
    top = fig.axes[0]
    curve = next(line for line in top.get_lines() if line.get_label().endswith("$D_M$"))
    z = np.asarray(curve.get_xdata(), dtype=np.float64)
    rh = RunHubble.from_history(rec.history)
    data = load_desi_dr2()
    rd = bao_chi_square(data, model_distances_Mpc(data, rh, rh.comoving_distance_Mpc)).best_rd_Mpc
    np.testing.assert_allclose(
        curve.get_ydata(), rh.comoving_distance_Mpc(z) / (rd * z ** (2 / 3)), rtol=1e-12
    )
    assert f"{rd:.2f} Mpc" in curve.get_label()


def test_cli_plot_writes_the_figures_of_an_overlay(run_files, tmp_path, capsys):
    demo, shifted = run_files
    out = tmp_path / "figs"
    assert cli.main(["plot", str(demo), str(shifted), "-o", str(out), "-f", "png"]) == 0
    assert sorted(p.name for p in out.iterdir()) == sorted(f"overlay_{name}.png" for name in FIGURES)
    assert capsys.readouterr().out.count("wrote ") == len(FIGURES)


@pytest.mark.parametrize(
    "args, message",
    [
        (["missing.h5"], "run file not found"),
        (["{demo}", "--format", "jpg"], "unknown figure format 'jpg'"),
        (["{demo}", "--no-data", "--table", "cosmic_chronometers"], "exclude each other"),
        (["{demo}", "--table", "nope.csv"], "table file not found"),
    ],
)
def test_cli_plot_bad_input_exits_2_and_writes_nothing(
    run_files, tmp_path, monkeypatch, capsys, args, message
):
    monkeypatch.chdir(tmp_path)
    demo, _ = run_files
    argv = ["plot", *(a.format(demo=demo) for a in args), "-o", str(tmp_path / "figs")]
    assert cli.main(argv) == cli.EXIT_INPUT
    err = capsys.readouterr().err.strip()
    assert err.startswith("error: ") and message in err and "\n" not in err
    assert not (tmp_path / "figs").exists()
