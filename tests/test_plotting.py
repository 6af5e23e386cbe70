"""Fit plots (fitter.plotting): one figure reused for every plot of a process, and many
plots spread over processes, give the same pictures as a fresh figure per plot.

Pixels are compared as decoded by PIL (Pillow, the PNG writer matplotlib uses).  Units
are invented with the ``synth`` fixture (Koren's 12AX7 / 12AU7 sets, from memory).
"""

from __future__ import annotations

import numpy as np
import pytest
from PIL import Image

import fitter.plotting as P
from fitter.fit import fit_curves


@pytest.fixture(scope="module")
def fits(tube_types):
    from conftest import synthesize

    units = [synthesize(tube_types["12AX7"], seed=1, tube="V1", section="A", outliers=0.03),
             synthesize(tube_types["12AU7"], seed=3, tube="V2"),
             synthesize(tube_types["12AX7"], seed=5, tube="V3", section="B"),
             synthesize(tube_types["12AU7"], seed=7, tube="V4", outliers=0.03)]
    out = [fit_curves(u.curveset(), "koren") for u in units]
    assert all(r.converged for r in out) and out[0].n_outliers > 0 and out[1].n_outliers == 0
    return out


def pixels(path):
    with Image.open(path) as im:
        return np.asarray(im.convert("RGBA"))


def fresh(result, path, monkeypatch):
    """The plot made on a new figure (no earlier plot drawn on it)."""
    monkeypatch.setattr(P, "_sheet", None)
    return P.save_fit_plot(result, path)


def test_reused_figure_keeps_nothing_of_the_previous_unit(fits, tmp_path, monkeypatch):
    # the outlier legend, outlier marks, curve labels and limits of the first unit must be gone
    first, second = fits[0], fits[1]
    want = pixels(fresh(second, tmp_path / "alone.png", monkeypatch))
    fresh(first, tmp_path / "first.png", monkeypatch)
    got = pixels(P.save_fit_plot(second, tmp_path / "after.png"))
    np.testing.assert_array_equal(got, want)
    assert not np.array_equal(pixels(tmp_path / "first.png"), want)


def test_plots_over_processes_equal_plots_in_turn(fits, tmp_path, monkeypatch):
    monkeypatch.setattr(P, "_sheet", None)
    seq = [tmp_path / f"seq{i}.png" for i in range(len(fits))]
    par = [tmp_path / f"par{i}.png" for i in range(len(fits))]
    calls = []
    P.save_fit_plots(fits, seq, processes=1, progress=calls.append)
    assert calls == [1] * len(fits)
    calls.clear()
    P.save_fit_plots(fits, par, processes=2, progress=calls.append)
    assert calls == [1] * len(fits)
    for a, b in zip(seq, par):
        np.testing.assert_array_equal(pixels(a), pixels(b))


def test_plot_fit_on_given_axes_draws_the_unit(fits):
    # the public function still draws on axes a caller gives it
    ax, axr = P._new_axes()
    out = P.plot_fit(fits[0], axes=(ax, axr))
    assert out == (ax, axr)
    assert "V1:A" in ax.get_title()
    assert ax.get_ylabel() == "plate current Ia [mA]" and axr.get_xlabel() == "plate voltage Va [V]"
    assert any("outliers" in str(t.get_text()) for t in ax.get_legend().get_texts())
    assert any(P.CAUTION == t.get_text() for t in ax.figure.texts)


def test_limits_cover_the_data(fits):
    ax, axr = P.plot_fit(fits[1])
    u = fits[1].unit
    lo, hi = ax.get_xlim()
    assert lo == 0 and hi > u.va.max()
    assert ax.get_ylim() == (0.0, pytest.approx(1e3 * u.ia.max() * 1.12))
    r = 1e3 * fits[1].residuals
    assert axr.get_ylim()[0] < r.min() and axr.get_ylim()[1] > r.max()


def test_failed_fit_is_plotted_as_failed(fits, tmp_path, monkeypatch):
    import dataclasses

    failed = dataclasses.replace(fits[1], converged=False, failure="did not converge (test)")
    path = fresh(failed, tmp_path / "failed.png", monkeypatch)
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (the PNG spec)
    assert "FIT FAILED: did not converge (test)" in P._the_sheet().ax.get_title()


def test_paths_and_results_must_pair(fits, tmp_path):
    with pytest.raises(ValueError, match="2 results but 1 paths"):
        P.save_fit_plots(fits[:2], [tmp_path / "a.png"])


def test_cli_shows_plot_progress_on_a_terminal_and_writes_every_plot(tube_types, write_long, tmp_path):
    from conftest import synthesize
    from test_cli_fit import run_on_terminal

    units = [synthesize(tube_types["12AU7"], seed=s, tube=f"P{s}") for s in (11, 12, 13, 14, 15)]
    path = write_long(tmp_path / "five.csv", units)
    code, out = run_on_terminal(["fit", path.name, "--plot", "plots", "--jobs", "2"], cwd=tmp_path)
    assert code == 0, out
    assert "plotting" in out and "5/5" in out  # click's progress bar with its count
    assert sorted(p.name for p in (tmp_path / "plots").glob("*.png")) == [f"P{s}.koren.png" for s in range(11, 16)]


def test_cli_plot_progress_stays_off_when_not_on_a_terminal(tube_types, write_long, tmp_path):
    from click.testing import CliRunner

    from conftest import synthesize
    from fitter.cli import main

    units = [synthesize(tube_types["12AU7"], seed=s, tube=f"Q{s}") for s in (21, 22)]
    path = write_long(tmp_path / "two.csv", units)
    r = CliRunner().invoke(main, ["fit", str(path), "--plot", str(tmp_path / "plots")], catch_exceptions=False)
    assert r.exit_code == 0 and "plotting" not in r.stderr
    assert len(list((tmp_path / "plots").glob("*.png"))) == 2


def test_a_plot_that_failed_half_way_leaves_nothing_behind(fits, tmp_path, monkeypatch):
    import dataclasses

    want = pixels(fresh(fits[1], tmp_path / "alone.png", monkeypatch))
    broken = dataclasses.replace(fits[0], params={})  # the model cannot be evaluated
    with pytest.raises(TypeError):
        P.save_fit_plot(broken, tmp_path / "broken.png")
    got = pixels(P.save_fit_plot(fits[1], tmp_path / "after.png"))
    np.testing.assert_array_equal(got, want)
