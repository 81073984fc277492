"""Measured light: the gain–offset–gamma fit, light profiles, [light] protocols, screening with a profile.

Outside references named beside the checks: the gain–offset–gamma model
(Berns, Motta & Gorzynski 1993, Color Research & Application 18; Berns 1996,
Displays 16 — from memory), scipy's ``curve_fit`` as an independent
least-squares fit, IEC 61966-2-1 for the sRGB curve and WCAG 2.x SC 2.3.1
for the flash thresholds.
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest
from scipy import optimize, stats

from fitting.display_model import (
    GAIN_RANGE,
    GAMMA_RANGE,
    GainOffsetGamma,
    ReadingsRefused,
    fit_channel,
    make_readings,
    read_readings,
)
from fitting.errors import InputError
from runner import safety
from runner.cli import main
from runner.light import SRGB_LIGHT, light_for as safety_light, light_plan
from runner.light_profile import load_profile
from runner.protocol import load_protocol

ROOT = Path(__file__).resolve().parent.parent
EXAMPLE_READINGS = ROOT / "protocols" / "light" / "example_readings.csv"

#: A display of known parameters: black 0.4 cd/m2, 100 cd/m2 at full level,
#: gamma 2.3 and a small negative offset (levels below 0.05/1.05 are black).
TRUE = GainOffsetGamma(black_cd_m2=0.4, amplitude_cd_m2=99.6, gain=1.05, gamma=2.3)


def simulate_readings(model: GainOffsetGamma, seed: int, n_levels: int = 9, repeats: int = 3,
                      relative_sd: float = 0.01, absolute_sd: float = 0.01):
    """Readings with photometer noise: 1 % of the reading plus 0.01 cd/m2 (SD)."""
    rng = np.random.default_rng(seed)
    level = np.repeat(np.round(np.linspace(0, 255, n_levels)) / 255, repeats)
    true = model.luminance(level)
    noisy = true * (1 + relative_sd * rng.standard_normal(level.size)) + absolute_sd * rng.standard_normal(level.size)
    return make_readings(level, np.maximum(noisy, 0.0))


# ---------------------------------------------------------------------------------------------
# The model and its fit


def test_fit_recovers_gain_offset_gamma_within_stated_tolerances():
    # 9 levels x 3 repeats, 1 % noise.  Over 200 simulated displays the
    # estimates scatter with SDs of 0.012 (gamma), 0.002 (gain), 0.007 cd/m2
    # (black) and 0.37 % (maximum); the tolerances are about 4 SDs, met in
    # every one of 20 displays here.
    for seed in range(20):
        fit = fit_channel(simulate_readings(TRUE, seed))
        m = fit.model
        assert m.gamma == pytest.approx(TRUE.gamma, abs=0.05), seed
        assert m.gain == pytest.approx(TRUE.gain, abs=0.01), seed
        assert m.offset == pytest.approx(TRUE.offset, abs=0.01), seed
        assert m.black_cd_m2 == pytest.approx(TRUE.black_cd_m2, abs=0.03), seed
        assert m.max_cd_m2 == pytest.approx(TRUE.max_cd_m2, rel=0.015), seed


def test_intervals_cover_the_true_parameters_about_95_percent():
    # 95 % intervals over 60 simulated displays: binomial(60, 0.95) puts 51 or
    # more covered with probability 0.997, so fewer means the intervals are
    # too narrow.
    covered = {"gamma": 0, "gain": 0, "black_cd_m2": 0}
    n = 60
    for seed in range(100, 100 + n):
        fit = fit_channel(simulate_readings(TRUE, seed))
        for name in covered:
            lo, hi = fit.ci[name]
            covered[name] += lo <= getattr(TRUE, name) <= hi
    assert all(count >= 51 for count in covered.values()), covered


def test_fit_agrees_with_scipy_curve_fit():
    # scipy.optimize.curve_fit with the same weights is an independent
    # least-squares reference: same estimates, same standard errors.
    readings = simulate_readings(TRUE, 7)
    fit = fit_channel(readings)
    sigma = np.maximum(readings.cd_m2, 0.01 * readings.cd_m2.max())

    def model(v, b, a, g, c):
        return b + a * np.maximum(g * v + 1 - g, 0) ** c

    popt, pcov = optimize.curve_fit(model, readings.level, readings.cd_m2, p0=[0.5, 90, 1.0, 2.0], sigma=sigma,
                                    absolute_sigma=False, maxfev=20000)
    ours = [fit.model.black_cd_m2, fit.model.amplitude_cd_m2, fit.model.gain, fit.model.gamma]
    assert ours == pytest.approx(list(popt), rel=1e-4)
    for i, name in enumerate(("black_cd_m2", "amplitude_cd_m2", "gain", "gamma")):
        half = stats.t.ppf(0.975, readings.level.size - 4) * math.sqrt(pcov[i, i])
        assert fit.ci[name][1] - ours[i] == pytest.approx(half, rel=1e-3), name


@pytest.mark.parametrize("model", [
    TRUE,
    GainOffsetGamma(0.05, 250.0, 1.0, 2.2),     # pure power law on a dark display
    GainOffsetGamma(2.0, 60.0, 0.9, 1.8),       # positive offset: level 0 is above black
    GainOffsetGamma(0.3, 80.0, 1.2, 2.6),       # the lowest sixth of the levels is black
])
def test_inverse_round_trips_within_half_a_percent(model):
    # luminance -> level -> luminance over the whole range (issue 15: 0.5 %).
    target = np.linspace(model.min_cd_m2, model.max_cd_m2, 2001)
    back = model.luminance(model.level(target))
    assert np.max(np.abs(back / target - 1)) < 0.005
    # and level -> luminance -> level where the curve rises
    v = np.linspace(max(0.0, -model.offset / model.gain) + 1e-3, 1.0, 500)
    assert model.level(model.luminance(v)) == pytest.approx(v, abs=1e-9)
    assert np.isnan(model.level(model.max_cd_m2 * 1.01))
    assert np.isnan(model.level(model.min_cd_m2 * 0.5 - 0.01))


def test_srgb_curve_at_published_points():
    # IEC 61966-2-1 decoding at points recalled from memory: 8-bit code 128
    # gives 0.2158605 and code 64 gives 0.0512695 in linear light; code 10
    # (0.0392) lies on the linear segment below 0.04045: 0.0392157 / 12.92.
    assert float(SRGB_LIGHT.linear([128 / 255] * 3)[0]) == pytest.approx(0.2158605, abs=2e-7)
    assert float(SRGB_LIGHT.linear([64 / 255] * 3)[0]) == pytest.approx(0.0512695, abs=2e-7)
    assert float(SRGB_LIGHT.linear([10 / 255] * 3)[0]) == pytest.approx(10 / 255 / 12.92, rel=1e-12)
    # relative luminance of white is 1 and of black 0 (WCAG 2.x definition)
    assert float(SRGB_LIGHT.relative_luminance(SRGB_LIGHT.linear([1, 1, 1]))) == pytest.approx(1.0, abs=1e-12)
    assert float(SRGB_LIGHT.relative_luminance(SRGB_LIGHT.linear([0, 0, 0]))) == 0.0


# ---------------------------------------------------------------------------------------------
# Problem readings are reported with their rows, never fitted silently


def test_non_monotonic_readings_are_refused_with_their_rows():
    level = np.linspace(0, 1, 9)
    y = TRUE.luminance(level)
    y[6] = y[5] * 0.8  # level 0.75 reads less than level 0.625
    with pytest.raises(ReadingsRefused) as err:
        fit_channel(make_readings(level, y))
    assert err.value.problems[0].kind == "not monotonic"
    assert err.value.problems[0].rows == (6, 7)
    fitted = fit_channel(make_readings(level, y), fit_anyway=True)
    assert fitted.problems and fitted.problems[0].rows == (6, 7)


def test_disagreeing_repeats_and_typing_slips_are_refused():
    level = np.repeat(np.linspace(0, 1, 9), 2)
    y = TRUE.luminance(level)
    y[9] *= 1.2  # one repeat 20 % off
    with pytest.raises(ReadingsRefused) as err:
        fit_channel(make_readings(level, y))
    assert err.value.problems[0].kind == "repeats disagree"
    assert err.value.problems[0].rows == (9, 10)
    single = np.linspace(0, 1, 9)
    z = TRUE.luminance(single)
    z[4] = z[4] * 1.12  # 13.9 typed for 12.4: still monotonic, far from the curve
    with pytest.raises(ReadingsRefused) as err:
        fit_channel(make_readings(single, z))
    assert err.value.problems[0].kind == "far from the curve"
    assert 5 in err.value.problems[0].rows


def test_bad_readings_files_name_line_and_column(tmp_path):
    f = tmp_path / "r.csv"
    f.write_text("level,luminance_cd_m2\n0,0.3\n0.5,abc\n", encoding="utf-8")
    with pytest.raises(InputError, match="row 3: luminance_cd_m2"):
        read_readings(f)
    f.write_text("level,luminance_cd_m2,gun\n1.5,3,grey\n", encoding="utf-8")
    with pytest.raises(InputError, match="row 2: level"):
        read_readings(f)
    f.write_text("level,cd\n0,1\n", encoding="utf-8")
    with pytest.raises(InputError, match="luminance_cd_m2: missing column"):
        read_readings(f)
    f.write_text("level,luminance_cd_m2,gun\n0.5,3,purple\n", encoding="utf-8")
    with pytest.raises(InputError, match="gun"):
        read_readings(f)
    # a header alone was "level: missing column"
    f.write_text("level,luminance_cd_m2,gun\n", encoding="utf-8")
    with pytest.raises(InputError, match="file: holds a header but no readings"):
        read_readings(f)


def test_a_readings_file_saved_with_a_byte_order_mark_reads_as_without(tmp_path):
    # a spreadsheet's "CSV UTF-8" starts with U+FEFF, which was read into the first column's name: "level:
    # missing column"
    text = EXAMPLE_READINGS.read_text(encoding="utf-8")
    marked = tmp_path / "marked.csv"
    marked.write_bytes(b"\xef\xbb\xbf" + text.encode("utf-8"))
    plain, read = read_readings(EXAMPLE_READINGS), read_readings(marked)
    assert np.array_equal(plain.level, read.level) and np.array_equal(plain.cd_m2, read.cd_m2)


def test_measure_light_refuses_an_out_that_would_destroy_a_file(tmp_path, capsys):
    # before: --out naming the readings file replaced the readings by the profile, a protocol by the profile,
    # and a .png was written as the profile and then overwritten by the figure; all with exit 0
    readings = tmp_path / "r.csv"
    readings.write_bytes(EXAMPLE_READINGS.read_bytes())
    protocol = tmp_path / "lab.toml"
    protocol.write_bytes((ROOT / "protocols" / "pilot_short.toml").read_bytes())
    cases = {readings: "expected a file name ending in .toml", tmp_path / "p.png": "expected a file name ending in",
             protocol: "exists and is not a light profile"}
    for out, words in cases.items():
        assert main(["measure-light", "--readings", str(readings), "--out", str(out)]) == 2
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and f"{out}: --out: {words}" in err, err
    marked = tmp_path / "m.toml"        # readings in a file of that name, given as the profile too
    marked.write_bytes(EXAMPLE_READINGS.read_bytes())
    assert main(["measure-light", "--readings", str(marked), "--out", str(marked)]) == 2
    assert "--out: is the readings file this command reads" in capsys.readouterr().err
    assert readings.read_bytes() == marked.read_bytes() == EXAMPLE_READINGS.read_bytes()
    assert protocol.read_bytes() == (ROOT / "protocols" / "pilot_short.toml").read_bytes()
    assert not (tmp_path / "p.png").exists()
    # an earlier profile is replaced: a new measurement of the same display
    out = tmp_path / "display.toml"
    for _ in range(2):
        assert main(["measure-light", "--readings", str(readings), "--out", str(out)]) == 0
    assert load_profile(out).grey is not None


# ---------------------------------------------------------------------------------------------
# measure-light from a CSV file, and the profile it writes


_STOP_DRIVER = """
import os, signal, sys
import runner.measure_light as m
from runner.cli import console
how, real = sys.argv[1], m.os.replace
def replace(src, dst):
    real(src, dst)
    if how == "moving" and "/.light-profile-" in str(src) and "/.light-profile-" not in str(dst):
        os.kill(os.getpid(), signal.SIGTERM)     # after the figure's first file is in place
m.os.replace = replace
if how == "fitting":
    fit = m.fit_readings
    m.fit_readings = lambda *a, **k: (os.kill(os.getpid(), signal.SIGTERM), fit(*a, **k))[1]
sys.argv = ["aftershift", "measure-light", "--readings", sys.argv[2], "--out", sys.argv[3]]
sys.exit(console())
"""


def test_a_profile_name_stored_in_another_unicode_form_is_pointed_out(tmp_path):
    # "café.toml" written with a combining accent (as some systems store names) beside a protocol that
    # names it with "é": the two look the same, and the error said only "does not exist"
    import unicodedata

    stored = tmp_path / unicodedata.normalize("NFD", "café.toml")
    stored.write_bytes(EXAMPLE_PROFILE.read_bytes())
    with pytest.raises(InputError, match="does not exist \\(a file of this name stored in another Unicode form"):
        load_profile(tmp_path / unicodedata.normalize("NFC", "café.toml"))
    with pytest.raises(InputError, match="does not exist$"):
        load_profile(tmp_path / "cafe.toml")
    assert load_profile(stored).models


@pytest.mark.slow    # fits and draws
def test_a_tab_in_the_profile_name_draws_no_missing_glyph(tmp_path):
    # the name is the figure's title: a tab in it added two "Glyph 9 missing" warnings to a command that worked
    import warnings

    out = tmp_path / "lab\tdisplay.toml"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        assert main(["measure-light", "--readings", str(EXAMPLE_READINGS), "--out", str(out)]) == 0
    assert not [w for w in caught if "Glyph" in str(w.message)] and load_profile(out).models
    assert (tmp_path / "lab\tdisplay.png").exists()


@pytest.mark.slow    # two commands in their own processes
def test_a_stopped_measure_light_says_what_became_of_the_profile(tmp_path, capsys):
    # the stop line said only "stopped by SIGTERM", and a SIGTERM between the figure's and the profile's renames
    # left the earlier profile beside the new figure; now the renames finish first and the line says which it was
    import subprocess
    import sys

    out = tmp_path / "lab.toml"
    assert main(["measure-light", "--readings", str(EXAMPLE_READINGS), "--out", str(out), "--label", "LAB-BEFORE"]) == 0
    earlier = {p.name: p.read_bytes() for p in tmp_path.iterdir()}
    for when, line in (("fitting", f"stopped by SIGTERM; nothing was half-written (a light profile already at {out} "
                                   "is unchanged)"),
                       ("moving", f"stopped by SIGTERM after the light profile and its figure were written in full "
                                  f"to {out}")):
        done = subprocess.run([sys.executable, "-c", _STOP_DRIVER, when, str(EXAMPLE_READINGS), str(out)], cwd=ROOT,
                              capture_output=True, text=True, timeout=120)
        assert done.returncode == 130 and done.stderr == f"aftershift measure-light: {line}\n", done.stderr
        now = {p.name: p.read_bytes() for p in tmp_path.iterdir()}      # no staging folder left either
        assert sorted(now) == ["lab.pdf", "lab.png", "lab.toml"]
        if when == "fitting":
            assert now == earlier
    assert load_profile(out).models and "LAB-BEFORE" in earlier["lab.toml"].decode() and "LAB-BEFORE" not in out.read_text()


def test_measure_light_from_csv_writes_a_profile_that_round_trips(tmp_path, capsys):
    out = tmp_path / "display.toml"
    assert main(["measure-light", "--readings", str(EXAMPLE_READINGS), "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "gamma" in printed and "95% CI" in printed and "holds only for this display" in printed
    # typed-in readings: no surround is known (it was recorded as the protocol's background, 0)
    assert "surround_level =" not in out.read_text() and "# surround_level: not known" in out.read_text()
    assert (tmp_path / "display.png").exists()
    profile = load_profile(out)
    assert set(profile.models) == {"grey", "red", "green", "blue"}
    again = fit_channel(read_readings(EXAMPLE_READINGS).only("grey")).model
    for name in ("black_cd_m2", "amplitude_cd_m2", "gain", "gamma"):
        assert getattr(profile.grey, name) == pytest.approx(getattr(again, name), rel=1e-9)
    assert profile.black_cd_m2 == pytest.approx(again.min_cd_m2, rel=1e-9)
    assert profile.age_days() < 1


def test_flat_readings_are_refused_where_the_profile_is_made(tmp_path, capsys):
    # every reading 50 cd/m2 (photometer aimed at the wall): this was fitted with exit 0 into a profile
    # (black = max = 50, intervals nan) under which a refused protocol passed the flash screening
    f = tmp_path / "flat.csv"
    f.write_text("level,luminance_cd_m2\n" + "".join(f"{v},50\n" for v in (0, 0.25, 0.5, 0.75, 1)), encoding="utf-8")
    for extra in ([], ["--fit-anyway"]):
        assert main(["measure-light", "--readings", str(f), "--out", str(tmp_path / "p.toml"), *extra]) == 2
        err = capsys.readouterr().err.strip()
        assert err.startswith(f"aftershift: {f}: grey: luminance_cd_m2: the maximum, 50 cd/m2, is only 1 times"), err
        assert len(err.splitlines()) == 1
        assert not (tmp_path / "p.toml").exists()
    # a real display's contrast passes: 0.4 to 100 cd/m2 (TRUE)
    lines = [f"{v:.4f},{TRUE.luminance(v):.6f}" for v in np.linspace(0, 1, 7)]
    f.write_text("level,luminance_cd_m2\n" + "\n".join(lines) + "\n", encoding="utf-8")
    assert main(["measure-light", "--readings", str(f), "--out", str(tmp_path / "p.toml")]) == 0


def test_readings_errors_print_plain_numbers_and_words():
    # numpy's reprs leaked into the one line: "got np.float64(nan)", "got np.str_('purple')"
    with pytest.raises(InputError) as caught:
        make_readings([0.0, 0.5], [float("nan"), 3.0], source="r.csv")
    assert caught.value.line() == "r.csv: row 1: luminance_cd_m2: expected a reading in cd/m2 from 0 to 1e6, got nan"
    with pytest.raises(InputError) as caught:
        make_readings([0.5], [3.0], ["purple"], source="r.csv")
    assert caught.value.line().endswith("got 'purple'")
    with pytest.raises(InputError) as caught:
        make_readings([1.5], [3.0], source="r.csv")
    assert caught.value.line().endswith("got 1.5")


def test_measure_light_refuses_problem_readings_with_exit_2(tmp_path, capsys):
    f = tmp_path / "bad.csv"
    lines = ["level,luminance_cd_m2"] + [f"{v:.4f},{TRUE.luminance(v):.4f}" for v in np.linspace(0, 1, 7)]
    lines[5] = "0.6667,5.0"  # far below its neighbours: not monotonic
    f.write_text("\n".join(lines) + "\n", encoding="utf-8")
    assert main(["measure-light", "--readings", str(f), "--out", str(tmp_path / "p.toml")]) == 2
    captured = capsys.readouterr()
    assert "not monotonic" in captured.out and "rows 5, 6" in captured.out
    assert "bad.csv: rows 5, 6" in captured.err
    assert not (tmp_path / "p.toml").exists()
    assert main(["measure-light", "--readings", str(f), "--out", str(tmp_path / "p.toml"), "--fit-anyway"]) == 0
    assert "fitted_anyway = true" in (tmp_path / "p.toml").read_text(encoding="utf-8")


# ---------------------------------------------------------------------------------------------
# Protocols in cd/m2


def write_profile(folder: Path, black: float, amplitude: float, gain: float = 1.0, gamma: float = 2.2,
                  days_ago: float = 1.0, name: str = "profile.toml") -> Path:
    """A hand-written light profile with a grey model only."""
    when = (datetime.now(timezone.utc) - timedelta(days=days_ago)).replace(microsecond=0).isoformat()
    path = folder / name
    path.write_text(
        f'kind = "aftershift light profile"\nversion = 1\nmeasured_utc = "{when}"\n'
        "screen_cm = [53.0, 30.0]\nscreen_px = [1920, 1080]\n\n[model.grey]\n"
        f"black_cd_m2 = {black}\namplitude_cd_m2 = {amplitude}\ngain = {gain}\ngamma = {gamma}\n",
        encoding="utf-8",
    )
    return path


def write_protocol(folder: Path, light: str, extra: str = "", name: str = "p.toml") -> Path:
    path = folder / name
    path.write_text(f'title = "light test"\n{extra}\n[light]\n{light}\n', encoding="utf-8")
    return path


def test_luminances_become_grey_levels(tmp_path, capsys):
    write_profile(tmp_path, black=0.5, amplitude=99.5, gamma=2.0)
    p = write_protocol(tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 10.0\nmichelson_contrast = 0.6')
    protocol = load_protocol(p)
    # Hand calculation: L = 0.5 + 99.5 v^2.  Background 10 -> v = sqrt(9.5/99.5);
    # Michelson 0.6 -> L_dots = 10 * 1.6 / 0.4 = 40 -> v = sqrt(39.5/99.5).
    assert protocol.display.background == pytest.approx(math.sqrt(9.5 / 99.5), rel=1e-12)
    assert protocol.dots.level == pytest.approx(math.sqrt(39.5 / 99.5), rel=1e-12)
    plan = light_plan(protocol)
    assert plan.dots_cd_m2 == pytest.approx(40.0)
    assert plan.weber == pytest.approx(3.0) and plan.michelson == pytest.approx(0.6)
    assert main(["check", str(p)]) == 0
    out = capsys.readouterr().out
    assert "10 cd/m2 requested -> grey level 0.3090" in out
    assert "Weber 3, Michelson 0.6" in out
    assert "relative luminance from: measured display" in out


def test_weber_contrast_and_dots_in_cd_m2(tmp_path):
    write_profile(tmp_path, black=0.5, amplitude=99.5, gamma=2.0)
    p = write_protocol(tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 5.0\nweber_contrast = 4.0')
    assert light_plan(load_protocol(p)).dots_cd_m2 == pytest.approx(25.0)  # 5 * (1 + 4)
    p = write_protocol(tmp_path, 'profile = "profile.toml"\ndots_cd_m2 = 60.0')
    protocol = load_protocol(p)
    assert protocol.dots.level == pytest.approx(math.sqrt(59.5 / 99.5))
    assert protocol.display.background == 0.0  # the written level, as without [light]


@pytest.mark.parametrize("light, field", [
    ('background_cd_m2 = 0.2', "light.background_cd_m2"),           # below the black level 0.5
    ('dots_cd_m2 = 120.0', "light.dots_cd_m2"),                      # above the maximum 100
    ('background_cd_m2 = 50.0\nweber_contrast = 2.0', "light.weber_contrast"),   # 150 cd/m2
    ('background_cd_m2 = 50.0\nmichelson_contrast = 0.5', "light.michelson_contrast"),
    ('weber_contrast = 2.0', "light"),                                # a contrast needs a background
    ('dots_cd_m2 = 5.0\nweber_contrast = 2.0', "light"),              # two ways to give the dots
    ('background_cd_m2 = 5.0\ndots_cd_m2 = 5.0', "light.dots_cd_m2"),  # dots at the background: invisible
    ('background_cd_m2 = 5.0\nweber_contrast = 0.0', "light.weber_contrast"),
    # under one 8-bit step (1/255) from the background: both in grey level 0 (0.5 cd/m2 is this profile's black)
    ('background_cd_m2 = 0.5\ndots_cd_m2 = 0.5001', "light.dots_cd_m2"),
    ('background_cd_m2 = 10.0\nweber_contrast = 0.001', "light.weber_contrast"),
])
def test_out_of_range_or_conflicting_luminance_exits_2_naming_the_field(tmp_path, capsys, light, field):
    write_profile(tmp_path, black=0.5, amplitude=99.5)
    p = write_protocol(tmp_path, 'profile = "profile.toml"\n' + light)
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith(f"aftershift: {p}: {field}:"), err
    assert len(err.splitlines()) == 1


def test_level_given_twice_and_missing_profile_exit_2(tmp_path, capsys):
    write_profile(tmp_path, black=0.5, amplitude=99.5)
    p = write_protocol(tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 5.0', "[display]\nbackground = 0.1")
    assert main(["check", str(p)]) == 2
    assert "display.background: give the background" in capsys.readouterr().err
    p = write_protocol(tmp_path, 'profile = "nowhere.toml"')
    assert main(["check", str(p)]) == 2
    assert f"{p}: light.profile: light profile" in capsys.readouterr().err
    p = write_protocol(tmp_path, 'profile = "profile.toml"\ndots_cd_m2 = 5.0', "[dots]\ncolor_rgb = [1.0, 0.0, 0.0]")
    assert main(["check", str(p)]) == 2
    assert "dots.color_rgb: dots in cd/m2 with a colour" in capsys.readouterr().err


def test_old_profile_warns_and_sidecar_records_hash_and_age(tmp_path, capsys):
    profile = write_profile(tmp_path, black=0.5, amplitude=99.5, days_ago=45)
    p = write_protocol(
        tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 2.0\nmax_age_days = 31',
        "[design]\nadapter_offsets_deg = [30.0]\nlags = [0]\ntrials_per_track = 2\npractice_trials = 0",
    )
    assert main(["check", str(p)]) == 0
    err = capsys.readouterr().err
    assert "measured 45 days ago, more than light.max_age_days = 31" in err
    assert "common practice (no source)" in err
    out = tmp_path / "out"
    assert main(["simulate", str(p), "--out", str(out)]) == 0
    sidecar = json.loads(next(out.glob("*.json")).read_text(encoding="utf-8"))
    import hashlib

    assert sidecar["light"]["profile_sha256"] == hashlib.sha256(profile.read_bytes()).hexdigest()
    assert sidecar["light"]["profile_age_days"] == pytest.approx(45, abs=0.01)
    assert sidecar["light"]["background_cd_m2"] == pytest.approx(2.0)
    assert sidecar["display_profile"]["background"] == pytest.approx((1.5 / 99.5) ** (1 / 2.2), rel=1e-9)
    assert "measured display" in sidecar["safety"]["relative_luminance_from"]


EXAMPLE_PROFILE = Path(__file__).resolve().parents[1] / "protocols" / "light" / "example_profile.toml"


@pytest.mark.parametrize("pattern, replacement, field", [
    # model parameters no display has; they printed wrong luminances with exit 0 (gamma 1e308 gave grey level 1,
    # 110 cd/m2, for a 0.5 cd/m2 background) or failed later blaming the protocol (gain 0)
    (r"^gamma = .*", "gamma = 1e308", "model.grey.gamma"),
    (r"^gamma = .*", "gamma = 0.1", "model.grey.gamma"),
    (r"^amplitude_cd_m2 = .*", "amplitude_cd_m2 = 1e30", "model.grey.amplitude_cd_m2"),
    (r"^amplitude_cd_m2 = .*", "amplitude_cd_m2 = 0", "model.grey.amplitude_cd_m2"),
    (r"^gain = .*", "gain = 0", "model.grey.gain"),
    (r"^gain = .*", "gain = -1", "model.grey.gain"),
    (r"^black_cd_m2 = .*", "black_cd_m2 = -0.1", "black_cd_m2"),
    (r"^offset = .*", "offset = 0.5", "model.grey.offset"),
    # types, versions, unknown keys, numbers that are not finite, summaries that disagree with the model
    (r"^fitted_anyway = .*", 'fitted_anyway = "no"', "fitted_anyway"),
    (r"^fitted_anyway = .*", "fitted_anyway = false\ncolour_space = 3", "colour_space"),
    (r"^version = .*", "version = 2", "version"),
    (r"^version = .*", 'version = "1"', "version"),
    (r"^black_cd_m2 = .*", "black_cd_m2 = nan", "black_cd_m2"),
    (r"^max_cd_m2 = .*", "max_cd_m2 = inf", "max_cd_m2"),
    (r"^max_cd_m2 = .*", "max_cd_m2 = 200.0", "max_cd_m2"),
    (r"^level = \[", "level = [0.5, ", "readings"),
    (r"^level = \[", 'level = ["0.5", ', "readings.level"),
    (r"^gun = \[", 'gun = ["pink", ', "readings"),
    (r"^measured_utc = .*", "measured_utc = 2026", "measured_utc"),
])
def test_a_profile_with_impossible_or_malformed_values_is_one_line_naming_the_profile(
        tmp_path, capsys, pattern, replacement, field):
    err = _check_with_edited_profile(tmp_path, capsys, pattern, replacement)
    assert err.startswith(f"aftershift: {tmp_path / 'profile.toml'}: {field}:"), err
    assert len(err.splitlines()) == 1, err


def _check_with_edited_profile(tmp_path, capsys, pattern: str, replacement: str) -> str:
    """``check`` of a protocol whose light profile is the example with one line edited; its stderr (exit 2)."""
    import re

    text, n = re.subn(pattern, replacement, EXAMPLE_PROFILE.read_text(encoding="utf-8"), count=1, flags=re.M)
    assert n == 1
    (tmp_path / "profile.toml").write_text(text, encoding="utf-8")
    p = write_protocol(tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 0.5\ndots_cd_m2 = 40.0')
    assert main(["check", str(p)]) == 2
    return capsys.readouterr().err.strip()


@pytest.mark.parametrize("pattern, replacement, expected", [
    (r"^amplitude_cd_m2 = .*", "amplitude_cd_m2 = 1e30", "1e+30 found; input should be less than or equal to "
     "100000 cd/m2"),
    (r"^black_cd_m2 = .*", "black_cd_m2 = -0.1", "-0.1 found; input should be greater than or equal to 0 cd/m2"),
    (r"^# refresh_hz: .*", "refresh_hz = 0.0", "0.0 found; input should be greater than 0 Hz"),
])
def test_a_value_out_of_range_is_named_with_its_unit(tmp_path, capsys, pattern, replacement, expected):
    # before, pydantic's words alone: "Input should be less than or equal to 100000", no unit, no value found
    err = _check_with_edited_profile(tmp_path, capsys, pattern, replacement)
    assert err.endswith(expected), err


def test_profile_limits_are_where_the_fit_looks_and_a_fitted_profile_loads(tmp_path):
    # a profile the fit writes must always load again: the loader's ranges are the fit's bounds
    write_profile(tmp_path, black=0.4, amplitude=99.6, gain=GAIN_RANGE[1], gamma=GAMMA_RANGE[0])
    assert load_profile(tmp_path / "profile.toml").grey.gamma == GAMMA_RANGE[0]
    write_profile(tmp_path, black=0.4, amplitude=99.6, gain=GAIN_RANGE[0] - 0.01)
    with pytest.raises(InputError, match="model.grey.gain: 0.19 is outside 0.2..5"):
        load_profile(tmp_path / "profile.toml")
    # sRGB's reference display has gamma 2.2 (IEC 61966-2-1); it must lie well inside the range
    assert GAMMA_RANGE[0] < 2.2 / 2 and GAMMA_RANGE[1] > 2.2 * 2


@pytest.mark.parametrize("black, amplitude, refused", [(50.0, 1e-6, True), (82.0, 18.0, True), (10.0, 89.0, True),
                                                     (10.0, 90.0, False)])
def test_a_flat_profile_is_refused_where_it_is_loaded(tmp_path, capsys, black, amplitude, refused):
    # A maximum not clearly above black (at least MIN_CONTRAST_RATIO = 10 times; common practice, no source).
    # With black at 0.8 of the maximum WCAG 2.x SC 2.3.1 counts no general flash at all (its darker state
    # must be below 0.80): such a profile let a protocol refused under sRGB pass with 0 flashes.
    write_profile(tmp_path, black=black, amplitude=amplitude)
    p = write_protocol(tmp_path, 'profile = "profile.toml"', FAST)
    if not refused:
        assert load_profile(tmp_path / "profile.toml").max_cd_m2 == pytest.approx(10 * black)
        return
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith(f"aftershift: {tmp_path / 'profile.toml'}: model.grey.amplitude_cd_m2: the maximum"), err
    assert len(err.splitlines()) == 1


def test_a_profile_with_undetermined_parameters_is_refused_where_it_is_loaded(tmp_path, capsys):
    # measure-light wrote nan intervals for parameters its readings left undetermined
    err = _check_with_edited_profile(tmp_path, capsys, r"^gamma_ci = .*", "gamma_ci = [nan, nan]")
    assert err == (f"aftershift: {tmp_path / 'profile.toml'}: model.grey.gamma_ci: expected a finite number "
                   "(not nan or inf)"), err


def test_a_profile_dated_in_the_future_says_so(tmp_path, capsys):
    write_profile(tmp_path, black=0.5, amplitude=99.5, days_ago=-400)
    p = write_protocol(tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 2.0')
    assert main(["check", str(p)]) == 0
    out, err = capsys.readouterr()
    assert "(400 days in the future: check the computer's clock" in out, out
    assert "days ago" not in out
    assert "dated 400 days in the future" in err


def test_protocols_without_light_are_unchanged(tmp_path):
    p = tmp_path / "plain.toml"
    p.write_text('title = "plain"\n[display]\nbackground = 0.1\n[design]\nadapter_offsets_deg = [30.0]\nlags = [0]\n'
                 'trials_per_track = 2\npractice_trials = 0\n', encoding="utf-8")
    protocol = load_protocol(p)
    assert protocol.light is None and light_plan(protocol) is None
    assert protocol.display.background == 0.1
    assert safety.screen_protocol(protocol).light_source.startswith("sRGB")
    out = tmp_path / "out"
    assert main(["simulate", str(p), "--out", str(out), "--seed", "1"]) == 0
    sidecar = json.loads(next(out.glob("*.json")).read_text(encoding="utf-8"))
    assert "light" not in sidecar and sidecar["display_profile"]["background"] == 0.1


# ---------------------------------------------------------------------------------------------
# Flash screening with measured light (WCAG 2.x SC 2.3.1), against a hand calculation

#: One-frame adapter and test at 120 Hz, no pause: with the assumed 0.2-s
#: answer a trial lasts 26 frames, 4.6 trials per second; a 6-deg photodiode
#: patch (46 % of a 10-deg field, over the 25 % that counts) turns white at
#: every test, so it flashes 4.6 times a second if its step counts as a flash.
FAST = """
[timing]
adapter_s = 0.008333333333333333
test_s = 0.008333333333333333
pause_after_answer_s = 0.0
[design]
lags = [0]
[safety]
photodiode_patch_deg = 6.0
"""


def hand_flash(background_rel: float) -> bool:
    """WCAG 2.x general flash for a step from the background to white (1.0):
    a change of at least 0.1 whose darker state is below 0.80."""
    return (1.0 - background_rel) >= 0.1 and background_rel < 0.8


def check_patch_step(protocol, result, background_rel: float) -> None:
    """The patch's step in the screening's light equals the hand calculation."""
    light = safety_light(protocol)
    step = light.relative_luminance(light.linear([1.0] * 3)) - light.relative_luminance(
        light.linear([protocol.display.background] * 3))
    assert float(step) == pytest.approx(1.0 - background_rel, rel=1e-9)
    if not result.passed:  # the worst field is then the patch's, and its largest step is this one
        assert "photodiode patch" in result.worst_field.name
        assert result.worst_field.largest_change == pytest.approx(1.0 - background_rel, rel=1e-6)


@pytest.mark.parametrize("black, amplitude", [(0.3, 44.7), (0.3, 119.7)])
def test_cd_m2_protocol_passes_or_fails_by_the_profile_maximum(tmp_path, black, amplitude):
    write_profile(tmp_path, black=black, amplitude=amplitude)
    p = write_protocol(tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 40.0\ndots_cd_m2 = 44.0', FAST)
    result = safety.screen_protocol(load_protocol(p))
    background_rel = 40.0 / (black + amplitude)  # L / L_max of this display
    # max 45: 0.889 -> step 0.111 but the darker state is not below 0.8: no flash.
    # max 120: 0.333 -> step 0.667: a flash at every test, 4.6 per second.
    assert result.passed is (not hand_flash(background_rel))
    check_patch_step(load_protocol(p), result, background_rel)
    assert "measured display" in result.light_source
    assert "relative luminance from: measured display" in "\n".join(result.summary_lines())


@pytest.mark.parametrize("black, amplitude", [(0.5, 99.5), (9.0, 91.0)])
def test_black_level_of_the_profile_decides_a_flash(tmp_path, black, amplitude):
    # Levels as written (background 0 = black): relative luminance of black is
    # black / L_max, 0.005 or 0.09.  (A black at 0.8 of the maximum or more, where no step could
    # flash, is a profile refused on loading: test_a_flat_profile_is_refused_where_it_is_loaded.)
    write_profile(tmp_path, black=black, amplitude=amplitude)
    p = write_protocol(tmp_path, 'profile = "profile.toml"', FAST)
    protocol = load_protocol(p)
    measured = safety.screen_protocol(protocol)
    background_rel = black / (black + amplitude)
    assert measured.passed is (not hand_flash(background_rel))
    check_patch_step(protocol, measured, background_rel)
    assumed = safety.screen_protocol(protocol, light=SRGB_LIGHT)
    assert not assumed.passed and assumed.light_source.startswith("sRGB")


def test_readings_file_resumes_and_remeasures_deleted_rows(tmp_path):
    from runner.measure_light import ReadingsLog, measurement_steps

    steps = measurement_steps(5, 2, False, seed=3)
    assert sorted((s.gun, round(s.level * 255)) for s in steps) == [("grey", c) for c in (0, 0, 64, 64, 128, 128,
                                                                                         191, 191, 255, 255)]
    path = tmp_path / "d.readings.csv"
    log = ReadingsLog(path, 3, resume=False)
    for s in steps[:6]:
        log.append(s, float(TRUE.luminance(s.level)))
    log.close()
    with pytest.raises(InputError, match="exists; pass --resume"):
        ReadingsLog(path, 3, resume=False)
    # a noisy reading deleted by hand is measured again, with the rest not yet measured
    lines = path.read_text(encoding="utf-8").splitlines()
    path.write_text("\n".join(lines[:3] + lines[4:]) + "\n", encoding="utf-8")
    log = ReadingsLog(path, 3, resume=True)
    assert [s.order for s in log.remaining(steps)] == [3, 7, 8, 9, 10]
    log.close()
    with pytest.raises(InputError, match="does not match this session's plan"):
        ReadingsLog(path, 3, resume=True).remaining(measurement_steps(5, 2, True, seed=3))
    # without --seed the file's own seed is used; another one is refused (before, it was silently replaced)
    log = ReadingsLog(path, None, resume=True)
    assert log.seed == 3
    log.close()
    with pytest.raises(InputError, match=r"--seed: 5 is not the seed its readings were taken in \(3\); leave --seed out"):
        ReadingsLog(path, 5, resume=True)


def test_resume_refuses_a_remeasured_profile(tmp_path, capsys):
    write_profile(tmp_path, black=0.5, amplitude=99.5)
    p = write_protocol(tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 2.0',
                       "[design]\nadapter_offsets_deg = [30.0]\nlags = [0]\ntrials_per_track = 2\npractice_trials = 0")
    out = tmp_path / "out"
    assert main(["simulate", str(p), "--out", str(out)]) == 0
    log = next(out.glob("*.trials.csv"))
    kept = log.read_bytes()
    assert main(["simulate", str(p), "--out", str(out), "--resume"]) == 0  # same profile: nothing to add
    write_profile(tmp_path, black=0.6, amplitude=99.4)  # measured again
    assert main(["simulate", str(p), "--out", str(out), "--resume"]) == 2
    assert "light.profile_sha256: the light profile differs" in capsys.readouterr().err
    assert log.read_bytes() == kept


def test_one_measurement_at_a_time(tmp_path):
    from runner.measure_light import ReadingsLog

    path = tmp_path / "d.readings.csv"
    first = ReadingsLog(path, 0, resume=False)
    try:
        with pytest.raises(InputError, match="being written by another measure-light"):
            ReadingsLog(path, 0, resume=True)
    finally:
        first.close()
    ReadingsLog(path, 0, resume=True).close()  # free again once the first has closed it


def test_a_luminance_just_beyond_the_profile_shows_the_digits_that_put_it_beyond(tmp_path):
    # before: "dots of 0.3547 cd/m2 is outside what the display gives by its light profile, 0.3547 to 100 cd/m2"
    write_profile(tmp_path, black=0.354704, amplitude=99.645296)
    p = write_protocol(tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 10.0\ndots_cd_m2 = 0.3547')
    with pytest.raises(InputError, match=r"light.dots_cd_m2: 0\.3547 cd/m2 for dots lies below the black level the "
                                         r"display gives by its light profile \(0\.354704 to 100 cd/m2\)"):
        load_protocol(p)
    p = write_protocol(tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 100.0001')
    with pytest.raises(InputError, match=r"100\.0001 cd/m2 for a background lies above the maximum .* "
                                         r"\(0\.354704 to 100 cd/m2\)"):
        load_protocol(p)


@pytest.mark.parametrize("keys, reading", [
    (["1", "2", "period", "5"], 12.5),
    (["num_3", "comma", "num_2"], 3.2),
    (["1", "e", "3"], 1000.0),                          # what it says: 1e3 cd/m2
    (["minus", "5"], None),                             # before: the minus was dropped and 5 cd/m2 saved
    (["1", "e", "3", "0", "8"], None),                  # before: 1308 cd/m2 saved
    (["a", "b", "c"], None),                            # before: reported as '' (nothing typed)
    (["lshift", "7"], 7.0),                             # keys that type nothing stay out of the reading
    (["num_1", "num_separator", "num_5"], 1.5),         # the keypad's separator: a decimal comma (was dropped: 15)
    (["1", "semicolon", "5"], None),                    # before: 15 cd/m2
    (["1", "bracketleft", "5"], None),                  # a key of any other name: before, dropped
])
def test_a_typed_reading_is_what_its_keys_typed(keys, reading):
    # the measurement screen (runner/display/light_meter.py) builds the reading from the key names psychopy
    # reports; a key it does not accept must make the reading refused, not vanish from it
    from runner.measure_light import parse_reading, typed_character

    assert parse_reading("".join(typed_character(key) for key in keys)) == reading


# ---------------------------------------------------------------------------------------------
# Readings files edited, cut short or re-saved (a hostile-user sweep of the twenty-ninth session)


def _screen_readings(tmp_path: Path, n: int = 6) -> tuple[Path, list]:
    """A readings file of the screen routine holding its first ``n`` readings, and the session's steps."""
    from runner.measure_light import ReadingsLog, measurement_steps

    steps = measurement_steps(5, 2, False, seed=3)
    path = tmp_path / "lab.readings.csv"
    log = ReadingsLog(path, 3, resume=False)
    for s in steps[:n]:
        log.append(s, float(TRUE.luminance(s.level)))
    log.close()
    return path, steps


def test_a_readings_file_that_cannot_be_read_is_refused_and_kept(tmp_path, capsys, monkeypatch):
    # a file re-saved by a spreadsheet with ';' was read as holding no reading, and the run then deleted it
    # (without a display: exit 2 and the file gone; on screen at Escape: "nothing written" and the file gone)
    path, _ = _screen_readings(tmp_path)
    saved = path.read_text(encoding="utf-8").replace(",", ";")
    path.write_text(saved, encoding="utf-8")
    monkeypatch.delenv("DISPLAY", raising=False)
    assert main(["measure-light", "--out", str(tmp_path / "lab.toml"), "--resume"]) == 2
    line = capsys.readouterr().err.strip()
    assert line.startswith(f"aftershift: {path}: header: expected the columns order,gun,level,luminance_cd_m2")
    assert len(line.splitlines()) == 1 and path.read_text(encoding="utf-8") == saved


@pytest.mark.parametrize("line, column, cell, where", [
    (7, 3, "11,9576", "line 7: has 7 cells, the header 6"),
    (3, 4, "x", "line 3: seed: expected a number"),
    (5, 3, "abc", "line 5: luminance_cd_m2: expected a number"),
], ids=["cell too many", "seed", "reading"])
def test_a_damaged_readings_row_is_one_line_naming_line_and_column(tmp_path, line, column, cell, where):
    # before: tracebacks (ValueError, AttributeError), exit 1
    from runner.measure_light import ReadingsLog

    path, _ = _screen_readings(tmp_path)
    lines = path.read_text(encoding="utf-8").splitlines()
    cells = lines[line - 1].split(",")
    cells[column] = cell
    lines[line - 1] = ",".join(cells)
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    kept = path.read_bytes()
    with pytest.raises(InputError) as refused:
        ReadingsLog(path, None, resume=True)
    assert where in refused.value.line() and path.read_bytes() == kept


def test_a_reading_cut_short_is_removed_and_measured_again(tmp_path, capsys):
    # a power cut while a row was written left "11,grey,0.5" without its end: a traceback on --resume
    from runner.measure_light import ReadingsLog

    path, steps = _screen_readings(tmp_path)
    whole = path.read_bytes()
    path.write_bytes(whole + b"7,grey,0.2509")
    log = ReadingsLog(path, None, resume=True)
    try:
        assert [s.order for s in log.remaining(steps)] == [7, 8, 9, 10]
        log.append(steps[6], 1.0)
    finally:
        log.close()
    assert "its last line was cut short" in capsys.readouterr().err
    assert path.read_bytes().startswith(whole) and path.read_bytes().count(b"\n") == whole.count(b"\n") + 1


def test_a_readings_file_with_a_byte_order_mark_resumes(tmp_path):
    # a spreadsheet's "CSV UTF-8" put U+FEFF before "order": "order None: does not match this session's plan"
    from runner.measure_light import ReadingsLog

    path, steps = _screen_readings(tmp_path)
    path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())
    log = ReadingsLog(path, None, resume=True)
    try:
        assert [s.order for s in log.remaining(steps)] == [7, 8, 9, 10]
    finally:
        log.close()


@pytest.mark.parametrize("text, refused", [
    ("level,luminance_cd_m2\n0,0.3\n0.5,11,9576\n1,100\n", r"row 3: has 3 cells, the header 2: a decimal comma"),
    ("level,luminance_cd_m2\n0,0.3\n0.5,1_0\n", "row 3: luminance_cd_m2: expected a number, got '1_0'"),
    ("level,luminance_cd_m2,level\n0,0.3,0\n", "level: the column appears twice"),
], ids=["decimal comma", "digit separator", "column twice"])
def test_a_decimal_comma_or_digit_separator_in_readings_is_refused(tmp_path, text, refused):
    # "11,9576" was read as 11 cd/m2 and the row's last cell ignored; "1_0" was read as 10
    f = tmp_path / "r.csv"
    f.write_text(text, encoding="utf-8")
    with pytest.raises(InputError, match=refused):
        read_readings(f)


def test_empty_cells_at_the_ends_of_rows_are_not_a_decimal_comma(tmp_path):
    f = tmp_path / "r.csv"
    f.write_text("level,luminance_cd_m2\n0,0.3,,\n1,100,\n", encoding="utf-8")
    assert list(read_readings(f).cd_m2) == [0.3, 100.0]


def test_readings_rows_are_numbered_by_the_line_they_are_on(tmp_path):
    # blank lines were skipped by the reader and not counted: a bad cell on line 6 was called row 4
    f = tmp_path / "r.csv"
    f.write_text("level,luminance_cd_m2\n0,0.3\n\n\n0.5,20\n1,abc\n", encoding="utf-8")
    with pytest.raises(InputError, match="row 6: luminance_cd_m2"):
        read_readings(f)


@pytest.mark.slow    # simulate and fit
def test_fit_does_not_look_for_the_light_profile_beside_the_logs(tmp_path, capsys):
    # a relative light.profile was resolved from the sidecar's folder: every fit of the bundled cd/m2 protocol
    # noted "does not exist" and kept the presented levels fixed, its intervals about 15 % narrower than with
    # the tracks re-run (the grey levels are not needed to re-run the tracks)
    protocol = ROOT / "protocols" / "calibrated_luminance.toml"
    assert main(["simulate", str(protocol), "--out", str(tmp_path / "logs"), "--seed", "3"]) == 0
    assert main(["fit", str(tmp_path / "logs"), "--out", str(tmp_path / "fit"), "--bootstrap", "60",
                 "--no-figures"]) == 0
    err = capsys.readouterr().err
    assert "does not exist" not in err and "keeps the presented levels fixed" not in err
    assert "re-ran the adaptive tracks" in (tmp_path / "fit" / "summary.txt").read_text()


def test_a_profile_is_hashed_as_its_bytes_are_stored(tmp_path):
    # the text was hashed after Python turned CRLF into LF: two different files got one SHA-256, and
    # `sha256sum` of the file (FIPS 180-4 SHA-256 of its bytes, hashlib here) disagreed with the sidecar
    import hashlib

    lf = write_profile(tmp_path, black=0.5, amplitude=99.5)
    crlf = tmp_path / "crlf.toml"
    crlf.write_bytes(lf.read_bytes().replace(b"\n", b"\r\n"))
    for path in (lf, crlf):
        assert load_profile(path).sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert load_profile(lf).sha256 != load_profile(crlf).sha256


@pytest.mark.parametrize("edit, said", [
    (("screen_cm = [53.0, 30.0]", "screen_cm = [30.0, 17.0]"), "measured on a display of 30 x 17 cm, the protocol says 53 x 30"),
    (("screen_px = [1920, 1080]", "screen_px = [1920, 1080]\nrefresh_hz = 144.0"), "measured at 144 Hz, the protocol runs at 60 Hz"),
], ids=["size", "refresh"])
def test_a_profile_of_another_screen_size_or_refresh_rate_warns(tmp_path, capsys, edit, said):
    # only another pixel size warned before
    profile = write_profile(tmp_path, black=0.5, amplitude=99.5)
    profile.write_text(profile.read_text().replace(*edit))
    p = write_protocol(tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 10.0',
                       "[display]\nrefresh_hz = 60\nscreen_cm = [53.0, 30.0]\nscreen_px = [1920, 1080]")
    assert main(["check", str(p)]) == 0
    assert said in capsys.readouterr().err


@pytest.mark.slow    # two simulations
def test_simulate_resumed_with_a_new_profile_of_the_same_levels_says_so(tmp_path, capsys):
    # run said so; simulate said nothing
    write_profile(tmp_path, black=0.5, amplitude=99.5)
    p = write_protocol(tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 2.0',
                       "[design]\nadapter_offsets_deg = [30.0]\nlags = [0]\ntrials_per_track = 2\npractice_trials = 0")
    out = tmp_path / "out"
    assert main(["simulate", str(p), "--out", str(out), "--observers", "2"]) == 0
    for side in out.glob("*.session.json"):      # as if both had stopped before their last part ended
        content = json.loads(side.read_text())
        content["parts"][-1].update(ended=None, ended_by="running")
        side.write_text(json.dumps(content))
    (tmp_path / "profile.toml").write_text((tmp_path / "profile.toml").read_text() + "# checked again\n")
    capsys.readouterr()
    assert main(["simulate", str(p), "--out", str(out), "--resume"]) == 0
    notes = [line for line in capsys.readouterr().err.splitlines() if "light profile file differs" in line]
    assert len(notes) == 1 and "and 1 more sessions" in notes[0] and "same grey levels" in notes[0]


def test_readings_that_leave_black_or_maximum_to_extrapolation_are_refused():
    # levels 0.6-1 only gave black 0.027 cd/m2 for a true 0.3, and check then turned 0.5 cd/m2 into a level
    # that gives 0.60 on the display, shown as exact
    level = np.repeat(np.linspace(0.6, 1.0, 6), 2)
    bright = make_readings(level, TRUE.luminance(level))
    with pytest.raises(ReadingsRefused, match="range not measured: levels 0.6 to 1 only: the fit would "
                                              "extrapolate the black level"):
        fit_channel(bright)
    assert fit_channel(bright, fit_anyway=True).problems[0].kind == "range not measured"


def test_a_slip_at_the_dark_end_is_refused_however_bright_the_maximum():
    # 1.3 typed for 0.3: 1 % of a 100 cd/m2 maximum let repeats of a black level differ four-fold
    readings = simulate_readings(TRUE, seed=3, relative_sd=0.0, absolute_sd=0.0)
    cd = readings.cd_m2.copy()
    cd[0] += 1.0          # the first repeat of level 0 (0.4 cd/m2 read as 1.4)
    with pytest.raises(ReadingsRefused, match="repeats disagree: level 0 read 1.4, 0.4, 0.4"):
        fit_channel(make_readings(readings.level, cd))
    cd[0] = 0.45          # ordinary photometer noise at the dark end passes
    fit_channel(make_readings(readings.level, cd))


def test_a_profile_whose_model_was_edited_is_refused_where_it_is_loaded(tmp_path):
    # an amplitude changed from 109.75 to 80 (with max_cd_m2 to match) was accepted: 40 cd/m2 dots became
    # grey level 0.7373 where the readings in the same file support 0.6433
    text = (ROOT / "protocols" / "light" / "example_profile.toml").read_text(encoding="utf-8")
    load_profile(ROOT / "protocols" / "light" / "example_profile.toml")
    edited = tmp_path / "edited.toml"
    edited.write_text(text.replace("amplitude_cd_m2 = 109.7534461338", "amplitude_cd_m2 = 80.0")
                      .replace("max_cd_m2 = 110.108150044", "max_cd_m2 = 80.3547039102"), encoding="utf-8")
    with pytest.raises(InputError, match=r"edited.toml: model.grey: does not give its own readings"):
        load_profile(edited)


def test_grey_dots_of_equal_guns_take_the_grey_model(tmp_path, capsys):
    # [0.5, 0.5, 0.5] was refused as "a colour other than white" without per-gun readings, though the grey
    # model measured exactly that; check showed the code of the level, not of level x 0.5 that is drawn
    write_profile(tmp_path, black=0.5, amplitude=99.5, gamma=2.0)
    p = write_protocol(tmp_path, 'profile = "profile.toml"\nbackground_cd_m2 = 2.0\ndots_cd_m2 = 20.0',
                       "[dots]\ncolor_rgb = [0.5, 0.5, 0.5]")
    protocol = load_protocol(p)
    # hand calculation: L = 0.5 + 99.5 v^2 at the drawn grey v = level x 0.5: 20 cd/m2 -> v = sqrt(19.5/99.5)
    v = math.sqrt(19.5 / 99.5)
    assert protocol.dots.level == pytest.approx(v / 0.5, rel=1e-9)
    assert main(["check", str(p)]) == 0
    code = round(v * 255)
    assert f"(nearest 8-bit code {code}: {0.5 + 99.5 * (code / 255) ** 2:.4g} cd/m2)" in capsys.readouterr().out
    # beyond what dots of that grey can give (0.5 + 99.5 x 0.5^2 = 25.375 cd/m2): the refusal names that range
    p.write_text(p.read_text().replace("dots_cd_m2 = 20.0", "dots_cd_m2 = 90.0"))
    assert main(["check", str(p)]) == 2
    assert "90 cd/m2 for dots of this colour lies above the maximum the display gives by its light profile " \
           "(0.5 to 25.38 cd/m2)" in capsys.readouterr().err


@pytest.mark.slow    # fits and draws a profile
def test_a_profile_name_near_the_file_systems_limit_is_written(tmp_path, capsys):
    # 245 bytes (the limit is 255) was refused as "File name too long": the hidden staging names were longer
    out = tmp_path / ("b" * 240 + ".toml")
    assert main(["measure-light", "--readings", str(EXAMPLE_READINGS), "--out", str(out)]) == 0
    assert load_profile(out).models["grey"] and out.with_suffix(".png").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(out.with_suffix(s).name for s in (".toml", ".png", ".pdf"))


def test_a_readings_file_larger_than_any_measurement_is_refused(tmp_path):
    # a million rows ran for a minute in silence and wrote a 47 MB profile that every later check read for 22 s
    from fitting.display_model import MAX_READINGS

    f = tmp_path / "r.csv"
    f.write_text("level,luminance_cd_m2\n" + "0.5,20\n" * (MAX_READINGS + 1), encoding="utf-8")
    with pytest.raises(InputError, match=f"file: holds more than {MAX_READINGS:,} readings"):
        read_readings(f)


def test_a_fit_on_the_bound_of_gamma_or_gain_is_refused_even_when_fitted_anyway():
    # --fit-anyway with one 10-fold slip gave gamma 0.3 (its bound) and a maximum of 8.5 cd/m2 where level 1
    # read 100: a profile accepted wherever it was read
    display = GainOffsetGamma(black_cd_m2=0.3, amplitude_cd_m2=100.0, gain=1.0, gamma=2.2)
    level = np.repeat(np.round(np.linspace(0, 255, 9)) / 255, 2)
    cd = display.luminance(level)
    cd[np.isclose(level, 191 / 255)] = 5.0          # 53.2 typed as 5, twice
    with pytest.raises(InputError, match=r"grey: gamma: the fit stopped on the bound"):
        fit_channel(make_readings(level, cd), fit_anyway=True)
