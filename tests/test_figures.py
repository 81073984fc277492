"""Figures that scale: wrapped grids, uncut titles, legends outside the data, print resolution."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

matplotlib = pytest.importorskip("matplotlib")
matplotlib.use("Agg")

from fitting import figures  # noqa: E402
from fitting.compare_figure import overlay_columns, overlay_figure  # noqa: E402
from fitting.report import fit_trials  # noqa: E402
from fitting.synthetic import ObserverModel, simulate_trials  # noqa: E402
from fitting.tables import prepare_trials  # noqa: E402

OFFSETS = tuple(float(v) for v in np.linspace(-100, 100, 12))     # 12 offsets: more than MAX_COLUMNS


@pytest.fixture(scope="module")
def wide_fit():
    """One observer with 12 adapter offsets x 2 lags + baseline (25 conditions)."""
    trials = simulate_trials(ObserverModel(), offsets=OFFSETS, lags=(0, 1), trials_per_track=10, seed=3,
                             observer="W1")
    return fit_trials(prepare_trials(trials), n_boot=40, seed=1, progress=False)


def _drawn_texts(fig) -> list:
    """The texts a figure draws: its own, and per axes the titles, labels, legend, free texts and the
    tick labels inside the view limits (matplotlib keeps labels of ticks beyond them undrawn)."""
    texts = list(fig.texts)
    for ax in fig.axes:
        texts += [ax.title, ax.xaxis.label, ax.yaxis.label, *ax.texts]
        if ax.get_legend() is not None:
            texts += ax.get_legend().get_texts()
        for axis, (lo, hi) in ((ax.xaxis, sorted(ax.get_xlim())), (ax.yaxis, sorted(ax.get_ylim()))):
            texts += [t.label1 for t in axis.get_major_ticks() if lo <= t.get_loc() <= hi]
    return [t for t in texts if t.get_visible() and t.get_text().strip()]


def _texts_inside(fig) -> None:
    """Every drawn text lies entirely inside the figure (common practice, no source)."""
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    box = fig.bbox
    texts = _drawn_texts(fig)
    assert texts
    for t in texts:
        ext = t.get_window_extent(renderer)
        assert ext.x0 >= box.x0 - 1 and ext.x1 <= box.x1 + 1, t.get_text()
        assert ext.y0 >= box.y0 - 1 and ext.y1 <= box.y1 + 1, t.get_text()


def test_many_offsets_wrap_into_rows(wide_fit):
    a = wide_fit.analyses[0]
    pos = figures.panel_positions(a.conditions)
    assert len(set(pos)) == len(pos) == 25                          # one panel each, none shared
    assert max(c for _, c in pos) + 1 == figures.WRAP_COLUMNS
    fig = figures.psychometric_figure(a)
    width, _ = fig.get_size_inches()
    assert width < 13                                               # 6 columns, not 12
    _texts_inside(fig)
    figures.pyplot().close(fig)


def test_structured_grid_keeps_lags_in_rows():
    conds = pd.DataFrame({"is_baseline": [True] + [False] * 4, "lag": [np.nan, 0, 0, 1, 1],
                          "adapter_offset_deg": [np.nan, -30, 30, -30, 30]})
    assert figures.panel_positions(conds) == [(0, 0), (1, 0), (1, 1), (2, 0), (2, 1)]


def test_titles_legends_and_resolution_of_single_plots(wide_fit, tmp_path):
    a = wide_fit.analyses[0]
    fig = figures.aftereffect_figure("an observer with a rather long identifier " * 2, a.aftereffect, a.tuning)
    _texts_inside(fig)
    ax = fig.axes[0]
    legend = ax.get_legend().get_window_extent()
    assert legend.x0 >= ax.get_window_extent().x1                 # legend right of the data
    paths = figures.save(fig, tmp_path / "ae", formats=("png",))
    image = matplotlib.image.imread(paths[0])
    width_in = fig.get_size_inches()[0]
    assert image.shape[1] == pytest.approx(width_in * figures.PNG_DPI, abs=2)


def test_group_caption_mentions_lines_only_when_drawn(wide_fit):
    a = wide_fit.analyses[0]
    with_lines = figures.aftereffect_figure("group", a.aftereffect, a.tuning)
    without = figures.aftereffect_figure("group", a.aftereffect, a.tuning.iloc[0:0])
    title = lambda fig: " ".join(t.get_text() for t in fig.texts)  # noqa: E731
    assert "fitted tuning curve" in title(with_lines)
    assert "fitted tuning curve" not in title(without)
    assert not [ln for ln in without.axes[0].get_lines() if len(ln.get_xdata()) > 50]
    figures.pyplot().close("all")


def test_decay_band_has_no_notch_after_lag_zero():
    # replicates whose tau sits on its lower bound drop to zero right after lag 0;
    # the band is taken at whole lags, where tests can happen, so the lower edge
    # may only fall from one lag to the next
    rng = np.random.default_rng(2)
    amp = rng.normal(3.0, 0.4, 1000)
    tau = np.where(rng.random(1000) < 0.05, 0.01, rng.lognormal(np.log(2.0), 0.3, 1000))
    reps = np.column_stack([amp, np.zeros(1000), tau])
    k, low, high = figures.decay_band(reps, [0, 1, 2, 3])
    assert np.array_equal(k, [0, 1, 2, 3])
    assert np.all(np.diff(low) <= 1e-12) and np.all(np.diff(high) <= 1e-12)
    assert np.all(low <= high)


def test_comparison_figure_wraps_twenty_observers(tmp_path):
    rows = []
    for o in range(20):
        for lag in (0, 1):
            for off in (-60, -30, 30, 60):
                y = np.sign(off) * (2 - lag)
                rows.append({"observer": f"obs{o:02d}", "lag": lag, "adapter_offset_deg": off, "pse_shift_deg": y,
                             "ci_low": y - 1, "ci_high": y + 1, "predicted_deg": y * 0.9})
    assert overlay_columns(21) == 4 and overlay_columns(3) == 3
    paths = overlay_figure(pd.DataFrame(rows), tmp_path / "comparison")
    image = matplotlib.image.imread(paths[0])
    height, width = image.shape[:2]
    assert width < 2.5 * height                                     # a grid, not one long row
    assert {p.suffix for p in paths} == {".png", ".pdf"}


def test_parallel_and_serial_drawing_write_the_same_files(wide_fit, tmp_path):
    serial = figures.make_figures(wide_fit.analyses, None, tmp_path / "one", jobs=1)
    assert serial and all(p.endswith(".png") for p in serial)      # PDF copies only on request
    parallel = figures.make_figures(wide_fit.analyses, None, tmp_path / "two", formats=("png",), jobs=2)
    assert [p.split("/")[-1] for p in serial] == [p.split("/")[-1] for p in parallel]
    for a, b in zip(serial, parallel):
        assert open(a, "rb").read() == open(b, "rb").read()


def test_band_is_joined_monotonically_between_lags():
    k = np.array([0.0, 1.0, 2.0])
    fine = np.linspace(0, 2, 41)
    for values in (np.array([3.0, 1.5, 0.75]), np.array([1.0, -0.5, -0.2])):
        joined = figures._between_lags(k, values, fine)
        assert np.allclose(joined[::20], values)                   # through the values at whole lags
        for j in range(2):                                          # and between them, no overshoot
            seg = joined[20 * j:20 * j + 21]
            assert seg.min() >= min(values[j], values[j + 1]) - 1e-12
            assert seg.max() <= max(values[j], values[j + 1]) + 1e-12


def test_an_unwritable_figure_folder_is_one_input_error(wide_fit, tmp_path):
    from fitting.errors import InputError

    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    with pytest.raises(InputError, match="--out"):
        figures.make_figures(wide_fit.analyses, None, blocker / "figures", formats=("png",), jobs=1)


@pytest.mark.slow    # five observers' figures
def test_observers_whose_names_differ_only_in_unsafe_characters_get_their_own_figures(tmp_path):
    # "a b" and "a_b" (or "Ö1" and "Ä1") were both written as *_a_b.png, one observer's figures over the other's
    names = ("a b", "a_b", "Ö1", "Ä1", "x_a_b")
    trials = pd.concat([simulate_trials(ObserverModel(), offsets=(-30.0, 30.0), lags=(0,), trials_per_track=8,
                                        seed=i, observer=name) for i, name in enumerate(names)])
    fit = fit_trials(prepare_trials(trials), n_boot=0, seed=1, progress=False)
    written = figures.make_figures(fit.analyses, None, tmp_path, formats=("png",), jobs=1)
    per_observer = [p for p in written if p.split("/")[-1].startswith("psychometric_")]
    assert len(per_observer) == len(set(per_observer)) == len(names)
    assert figures.safe_name("sim01") == "sim01" and figures.safe_name("a b") != figures.safe_name("a_b")
    # the report finds each observer's figures by exact name: a_b's section does not show x_a_b's
    from fitting.page import _figures_of

    shown = _figures_of(tmp_path, figures.safe_name("a_b"))
    assert shown and all(p.stem.endswith("_a_b") and not p.stem.endswith("x_a_b") for p in shown)


@pytest.fixture(scope="module")
def one_sided_fit():
    """One observer whose +30 deg condition got nothing but "clockwise" answers (a stuck key, say)."""
    trials = simulate_trials(ObserverModel(amplitude_deg=4.0), offsets=(-30, -15, 15, 30), lags=(0,),
                             trials_per_track=12, seed=4)
    trials.loc[trials["condition"] == "adapt+30_lag0", "response_cw"] = 1
    return trials, fit_trials(prepare_trials(trials), n_boot=40, seed=1, progress=False)


@pytest.mark.slow
def test_a_shift_with_no_estimate_is_drawn_hollow_and_shown_as_a_dash(one_sided_fit):
    # the after-effect figure drew such shifts as ordinary points under the "repulsion" caption, and the
    # summary's grid printed their numbers plainly
    import warnings

    import statsmodels.api as sm
    from statsmodels.tools.sm_exceptions import PerfectSeparationWarning

    trials, fit = one_sided_fit
    a = fit.analyses[0]
    stuck = trials[trials["condition"] == "adapt+30_lag0"]
    # statsmodels' probit GLM finds the condition's answers perfectly separated: its PSE has no finite
    # maximum-likelihood estimate (Albert & Anderson 1984, Biometrika 71, from memory)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        sm.GLM(stuck["response_cw"].astype(float), sm.add_constant(stuck["test_offset_deg"].astype(float)),
               family=sm.families.Binomial(sm.families.links.Probit())).fit()
    assert any(issubclass(w.category, PerfectSeparationWarning) for w in caught)
    shifts = a.aftereffect.set_index("adapter_offset_deg")
    assert "one-sided" in shifts.loc[30.0, "flags"] and np.isfinite(shifts.loc[30.0, "pse_shift_deg"])

    fig = figures.aftereffect_figure(a.observer, a.aftereffect, a.tuning)
    ax = fig.axes[0]
    points = [(x, y, ln.get_markerfacecolor()) for ln in ax.get_lines() if ln.get_marker() == "o"
              for x, y in zip(ln.get_xdata(), ln.get_ydata())]
    hollow = [(x, y) for x, y, face in points if face == "white"]
    filled = [(x, y) for x, y, face in points if face != "white"]
    assert [x for x, _ in hollow] == [30.0]
    ylim = ax.get_ylim()
    assert hollow[0][1] == pytest.approx(np.clip(shifts.loc[30.0, "pse_shift_deg"], *ylim))
    assert sorted(x for x, _ in filled) == [-30.0, -15.0, 15.0]
    for x, y in filled:
        assert y == pytest.approx(shifts.loc[x, "pse_shift_deg"])
    bars = [seg for coll in ax.collections for seg in coll.get_segments()]       # the error bars
    assert bars and all(abs(seg[0][0] - 30.0) > 1e-9 for seg in bars)            # none at the hollow point
    legend = " ".join(t.get_text() for t in ax.get_legend().get_texts())
    assert "not estimable" in legend and "one-sided" in legend
    _texts_inside(fig)
    figures.pyplot().close(fig)

    from fitting.report import _shift_grid

    head, cols, row, key = _shift_grid(a.aftereffect)
    cells = row.split()[1:]
    assert cells[3] == "\u2013" and "one-sided" in key and "not-estimable" in key
    for cell, x in zip(cells[:3], (-30.0, -15.0, 15.0)):
        assert float(cell) == pytest.approx(shifts.loc[x, "pse_shift_deg"], abs=0.005)
    assert "\u2013" in fit.summary()


@pytest.mark.slow
def test_a_figure_of_only_usable_shifts_has_no_hollow_point(one_sided_fit):
    _, fit = one_sided_fit
    a = fit.analyses[0]
    usable = a.aftereffect[~a.aftereffect["flags"].str.contains("one-sided")]
    fig = figures.aftereffect_figure(a.observer, usable, a.tuning)
    assert not [ln for ln in fig.axes[0].get_lines() if ln.get_marker() == "o" and ln.get_markerfacecolor() == "white"]
    assert "not estimable" not in " ".join(t.get_text() for t in fig.axes[0].get_legend().get_texts())
    figures.pyplot().close(fig)
