"""Protocol files: bundled ones pass `check`, malformed ones fail in one line."""

from __future__ import annotations

import pytest

from fitting.errors import InputError
from runner.cli import main
from runner.protocol import Protocol, frame_plan, load_protocol, parse_protocol

from conftest import PROTOCOLS

BUNDLED = sorted(PROTOCOLS.glob("*.toml"))


def test_there_are_at_least_three_bundled_protocols_and_the_default():
    names = {p.name for p in BUNDLED}
    assert "offset_by_lag.toml" in names and len(names) >= 3


@pytest.mark.parametrize("path", BUNDLED, ids=lambda p: p.name)
def test_check_accepts_every_bundled_protocol(path, cli):
    done = cli("check", path)
    assert done.returncode == 0, done.stderr
    assert "frames at" in done.stdout and "duration" in done.stdout
    assert "photosensitivity" in done.stdout.lower()


def test_check_names_procedure_settings_the_method_does_not_read(tmp_path, capsys):
    # steps_deg and k_down with the Bayesian method were accepted without a word, while start_offset_deg is
    # refused (it must mean something for every method, issue 14); the others are named so nobody relies on them
    from runner.protocol import METHOD_FIELDS, ProcedureSettings, ignored_settings

    text = (PROTOCOLS / "pilot_short.toml").read_text()
    path = tmp_path / "p.toml"
    path.write_text(text.split("[procedure]")[0] + '[procedure]\nmethod = "bayesian"\nsteps_deg = [4, 2]\nk_down = 2\n')
    assert main(["check", str(path)]) == 0
    assert 'note       procedure.k_down, procedure.steps_deg: not used by method = "bayesian"' in capsys.readouterr().out
    for name in PROTOCOLS.glob("*.toml"):    # the bundled protocols set nothing their method ignores
        assert ignored_settings(load_protocol(name).procedure) == [], name
    # every field of [procedure] is read by some method, or by all (method, bounds_deg)
    read = {"method", "bounds_deg"}.union(*METHOD_FIELDS.values())
    assert read == set(ProcedureSettings.model_fields)


def test_a_byte_order_mark_is_read_past(tmp_path):
    # some editors start UTF-8 files with a byte-order mark; TOML parsers refuse it ("Invalid statement")
    marked = tmp_path / "marked.toml"
    marked.write_bytes(b"\xef\xbb\xbf" + (PROTOCOLS / "pilot_short.toml").read_bytes())
    assert load_protocol(marked) == load_protocol(PROTOCOLS / "pilot_short.toml")
    from runner.observers import load_model

    model = tmp_path / "model.toml"
    model.write_bytes(b"\xef\xbb\xbfspread_deg = 2.5\n")
    assert load_model(model).spread_deg == 2.5


@pytest.mark.parametrize("content, field, words", [
    (b"", "(top level)", "the file has no settings"),                 # it meant the default observer silently
    (b"# only a comment\n", "(top level)", "the file has no settings"),
    (b"lapse = 2\n", "lapse", "out of range; expected a number from 0, below 1"),
    (b"spread_deg = nan\n", "spread_deg", "expected a number above 0, at most 90"),
])
def test_bad_observer_models_name_the_field_and_the_range(tmp_path, content, field, words):
    from runner.observers import load_model

    model = tmp_path / "model.toml"
    model.write_bytes(content)
    with pytest.raises(InputError) as err:
        load_model(model)
    assert err.value.field == field and words in err.value.message
    with pytest.raises(InputError, match="is a folder"):
        load_model(tmp_path)


def test_default_protocol_matches_the_design_defaults():
    p = load_protocol(PROTOCOLS / "offset_by_lag.toml")
    assert sorted(p.design.adapter_offsets_deg) == [-90, -60, -30, -15, 15, 30, 60, 90]
    assert p.design.lags == [0, 1, 2, 3]
    # at 120 Hz, 0.5 s is 60 frames exactly
    assert frame_plan(p)["adapter_s"].frames == 60


def test_single_frame_periods_are_allowed_at_120hz():
    p = load_protocol(PROTOCOLS / "brief_periods_120hz.toml")
    assert frame_plan(p)["period_s"].frames == 1


def _check(tmp_path, capsys, content: bytes | None, name="bad.toml"):
    path = tmp_path / name
    if content is not None:
        path.write_bytes(content)
    code = main(["check", str(path)])
    err = capsys.readouterr().err
    return code, err, path


MALFORMED = {
    "empty": (b"", "(top level)"),
    "binary": (bytes(range(256)) * 4, "file"),
    "latin1": ("title = 'caf\u00e9'".encode("latin-1"), "byte"),
    "invalid_toml": (b"[display\nrefresh_hz = 120", "TOML"),
    "nan": (b"[dots]\nspeed_deg_s = nan", "dots.speed_deg_s"),
    "inf": (b"[display]\ndistance_cm = inf", "display.distance_cm"),
    "string_for_number": (b"[display]\nrefresh_hz = '120'", "display.refresh_hz"),
    "bool_for_number": (b"[dots]\ncoherence = true", "dots.coherence"),
    "unknown_field": (b"[dots]\nspeed = 5", "dots.speed"),
    "deep_nesting": (b"x = " + b"[" * 3000 + b"]" * 3000, "TOML"),
    # Python refuses to convert an integer of more than 4,300 digits: a ValueError, not the parser's own error
    "integer_of_5001_digits": (b"[design]\ntrials_per_track = " + b"9" * 5001, "TOML"),
    "deep_tables": (b"[a.b.c.d.e.f.g.h]\nx = 1", "a"),
    "fractional_lag": (b"[design]\nlags = [0, 1.5]", "design.lags"),
    "negative_lag": (b"[design]\nlags = [-1, 2]", "design.lags"),
    "offset_out_of_range": (b"[design]\nadapter_offsets_deg = [200]", "design.adapter_offsets_deg"),
    "one_direction_twice": (b"[design]\nadapter_offsets_deg = [-180, 180]", "design.adapter_offsets_deg"),
    "still_dots": (b"[dots]\nspeed_deg_s = 0", "dots.speed_deg_s"),
    "escapes_in_title": (b'title = "Pilot\\r\\u001b[31mRED"', "title"),
    "line_separator_in_title": (b'title = "Pilot\\u2028two"', "title"),
    "invisible_dots": (b"[display]\nbackground = 0.3\n[dots]\nlevel = 0.3", "dots.level"),
    # below one 8-bit step (1/255) of the background: drawn in the background's own code (0 here)
    "dots_under_one_grey_step": (b"[dots]\nlevel = 0.001", "dots.level"),
    "grey_dots_under_one_grey_step": (b"[display]\nbackground = 0.5\n[dots]\nlevel = 0.503", "dots.level"),
    # near-zero nonsense that only an exact 0 used to refuse
    "dots_slower_than_a_pixel_a_second": (b"[dots]\nspeed_deg_s = 1e-300", "dots.speed_deg_s"),
    "no_coherent_dot": (b"[dots]\ncoherence = 0", "dots.coherence"),
    "coherence_below_one_dot": (b"[dots]\ncoherence = 1e-300", "dots.coherence"),
    "practice_tilt_below_the_steps": (b"[design]\npractice_offset_deg = 1e-300", "design.practice_offset_deg"),
    "practice_tilt_below_the_bayesian_grid": (b"[design]\npractice_offset_deg = 0.4\n[procedure]\n"
                                              b"method = 'bayesian'", "design.practice_offset_deg"),
    "practice_tilt_below_the_constant_levels": (b"[design]\npractice_offset_deg = 1\n[procedure]\n"
                                                b"method = 'constant'\nlevels_deg = [-4, -2, 2, 4]",
                                                "design.practice_offset_deg"),
    "black_dots_on_black": (b"[dots]\ncolor_rgb = [0, 0, 0]", "dots.level"),
    "constant_levels_out_of_bounds": (b"[procedure]\nmethod = 'constant'\nbounds_deg = [-20, 20]\n"
                                      b"levels_deg = [-100, -10, 10, 100]", "procedure.levels_deg"),
    "zero_trials": (b"[design]\ntrials_per_track = 0", "design.trials_per_track"),
    "same_keys": (b"[keys]\ncw = 'left'\nccw = 'left'", "keys"),
    "unknown_key_name": (b"[keys]\ncw = 'rightarrow'", "keys.cw"),
    "aperture_too_big": (b"[dots]\naperture_radius_deg = 20", "dots.aperture_radius_deg"),
    "dots_below_a_pixel": (b"[dots]\ndot_size_deg = 0.01", "dots.dot_size_deg"),
    "too_dense": (b"[dots]\ndensity_per_deg2 = 40\ndot_size_deg = 0.2", "dots.density_per_deg2"),
    "lifetime_zero": (b"[dots]\nlifetime_frames = 0", "dots.lifetime_frames"),
    "asymmetric_intervening": (b"[design]\nintervening_offsets_deg = [45, 90]", "design.intervening_offsets_deg"),
    "first_adaptation_many_offsets": (b"[timing]\nfirst_adaptation_s = 20", "timing.first_adaptation_s"),
    "constant_not_divisible": (
        b"[procedure]\nmethod = 'constant'\nlevels_deg = [-4, 0, 4]\n[design]\ntrials_per_track = 10",
        "design.trials_per_track",
    ),
    "screen_one_number": (b"[display]\nscreen_cm = [53]", "display.screen_cm"),
    "start_offset_with_bayesian": (b"[procedure]\nmethod = 'bayesian'\nstart_offset_deg = 5",
                                   "procedure.start_offset_deg"),
    "start_offset_with_constant": (b"[procedure]\nmethod = 'constant'\nstart_offset_deg = 5",
                                   "procedure.start_offset_deg"),
    "unknown_bayes_placement": (b"[procedure]\nmethod = 'bayesian'\nbayes_placement = 'mode'",
                                "procedure.bayes_placement"),
    "spread_target_with_mean_placement": (b"[procedure]\nmethod = 'bayesian'\nbayes_placement = 'pse_mean'\nbayes_target = 'pse_spread'",
                                          "procedure.bayes_target"),
    "spread_target_with_straddle": (b"[procedure]\nmethod = 'bayesian'\nbayes_placement = 'straddle'\nbayes_target = 'pse_spread'",
                                    "procedure.bayes_target"),
    "pse_prior_narrower_than_the_grid": (b"[procedure]\nmethod = 'bayesian'\nbayes_pse_prior_sd_deg = 0.01",
                                         "procedure.bayes_pse_prior_sd_deg"),
    "negative_pse_prior": (b"[procedure]\nmethod = 'bayesian'\nbayes_pse_prior_sd_deg = -3",
                           "procedure.bayes_pse_prior_sd_deg"),
}


@pytest.mark.parametrize("text", [
    "[dots]\nlevel = 0.00392157",                                   # exactly one 8-bit step above black
    "[display]\nbackground = 0.5\n[dots]\nlevel = 0.49607843",     # one step below a mid-grey background
    "[dots]\nspeed_deg_s = 0.0278",                                 # just over a pixel a second (36 px/deg)
    "[dots]\ncoherence = 0.00848",                                  # one of the 118 default dots
    "[design]\npractice_offset_deg = 0.5",                          # the least of the default steps_deg
    "[design]\npractice_offset_deg = 0.1\npractice_trials = 0",     # no practice: the tilt is not used
])
def test_the_least_meaningful_values_are_accepted(text, tmp_path):
    path = tmp_path / "p.toml"
    path.write_text(text + "\n", encoding="utf-8")
    load_protocol(path)


@pytest.mark.parametrize("case", sorted(MALFORMED))
def test_malformed_protocol_gives_one_line_naming_file_and_field(case, tmp_path, capsys):
    content, field = MALFORMED[case]
    code, err, path = _check(tmp_path, capsys, content)
    assert code == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert "Traceback" not in err
    assert str(path) in lines[0] and field in lines[0], lines[0]


def test_missing_file_and_folder_are_input_errors(tmp_path, capsys):
    code, err, path = _check(tmp_path, capsys, None, name="nothing.toml")
    assert code == 2 and "does not exist" in err and str(path) in err
    code = main(["check", str(tmp_path)])
    err = capsys.readouterr().err
    assert code == 2 and "folder" in err and len(err.strip().splitlines()) == 1
    (tmp_path / "a.toml").symlink_to(tmp_path / "b.toml")      # a loop of links was "does not exist"
    (tmp_path / "b.toml").symlink_to(tmp_path / "a.toml")
    assert main(["check", str(tmp_path / "a.toml")]) == 2
    assert capsys.readouterr().err == f"aftershift: {tmp_path / 'a.toml'}: file: cannot be used (Too many levels " \
                                      "of symbolic links)\n"
    code = main(["check", ""])            # an empty name was read as the current folder, "."
    assert code == 2 and capsys.readouterr().err.strip() == "aftershift: argument: protocol: is empty; name a " \
                                                            "protocol file (.toml)"


def test_duration_not_whole_frames_is_refused_with_nearest_values(tmp_path, capsys):
    # 0.503 s at 120 Hz is 60.36 frames; the nearest valid values are 60 and 61 frames
    code, err, path = _check(tmp_path, capsys, b"[timing]\ntest_s = 0.503")
    assert code == 3
    assert "timing.test_s" in err and "0.5 " in err and "0.508333" in err
    assert len(err.strip().splitlines()) == 1


def test_bad_arguments_are_one_line_exit_2(capsys):
    assert main(["simulate"]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert main(["check", str(PROTOCOLS / "pilot_short.toml"), "--no-such-option"]) == 2


def test_defaults_are_a_valid_protocol():
    p = Protocol()
    assert p.dots.n_dots == round(1.5 * 3.141592653589793 * 25)
    assert frame_plan(p)["test_s"].frames == 60


@pytest.mark.parametrize("command", ["", "check", "simulate", "run", "fit", "compare", "demo", "plan", "display-test"])
def test_every_help_text_prints(command, capsys):
    args = [command, "--help"] if command else ["--help"]
    with pytest.raises(SystemExit) as done:
        main(args)
    assert done.value.code == 0
    assert "usage: aftershift" in capsys.readouterr().out


def test_sessions_resume_under_the_defaults_they_started_with():
    # A sidecar records the Bayesian settings whose defaults changed (runner/tracks.py); one written before a
    # change lacks its key, and the session's tracks ran the old default unless the protocol set the field.
    from runner.tracks import PRIOR_KEY, SHARING_KEY, as_started, tracks_record

    text = (PROTOCOLS / "pilot_short.toml").read_text()
    new = parse_protocol(text)
    record = tracks_record(new)
    assert record == {SHARING_KEY: True, PRIOR_KEY: 6.0}
    assert as_started(new, None) is new and as_started(new, record) is new
    proc = as_started(new, {SHARING_KEY: True}).procedure                   # before the PSE prior's default
    assert (proc.bayes_pse_prior_sd_deg, proc.bayes_share_spread) == (0.0, True)
    proc = as_started(new, {}).procedure                                    # before either
    assert (proc.bayes_pse_prior_sd_deg, proc.bayes_share_spread) == (0.0, False)
    stated = parse_protocol(text.replace('method = "bayesian"', 'method = "bayesian"\nbayes_pse_prior_sd_deg = 3.0'))
    assert as_started(stated, {SHARING_KEY: True}).procedure.bayes_pse_prior_sd_deg == 3.0   # the file said so
    updown = parse_protocol(text.replace('method = "bayesian"', 'method = "updown"'))
    assert as_started(updown, {}) is updown
    # the recorded value rules, so a later change of default needs no new key
    assert as_started(new, {SHARING_KEY: True, PRIOR_KEY: 4}).procedure.bayes_pse_prior_sd_deg == 4.0
    for bad in ({SHARING_KEY: 1}, {PRIOR_KEY: "6"}, {PRIOR_KEY: True}, {PRIOR_KEY: -1.0}):
        with pytest.raises(InputError, match=f"^s.session.json: {next(iter(bad))}: malformed sidecar"):
            as_started(new, bad, "s.session.json")


def test_every_toml_reader_refuses_what_the_parser_raises_in_one_line(tmp_path):
    # an integer of 5,001 digits (Python's ValueError) and arrays nested 3,000 deep (RecursionError) were
    # tracebacks in the observer model, the light profile and --vary; the protocol refused only the nesting
    from runner.light_profile import load_profile
    from runner.observers import load_model
    from runner.study import parse_vary

    for bad in (b"x = " + b"9" * 5001, b"x = " + b"[" * 3000 + b"]" * 3000):
        reason = "an integer of more than 4,300 digits" if b"9" in bad else "nested too deep"
        model, profile = tmp_path / "observer.toml", tmp_path / "light.toml"
        model.write_bytes(bad)
        profile.write_bytes(bad)
        for read, path in ((load_model, model), (load_profile, profile)):
            with pytest.raises(InputError, match=f"^{path}: TOML: not (a )?valid TOML.*\\({reason}\\)$"):
                read(path)
        with pytest.raises(InputError, match="^argument: --vary design.lags: values are not a TOML array"):
            parse_vary("design.lags=" + bad.decode()[4:])


def test_control_characters_in_a_path_reach_the_terminal_escaped(tmp_path, capsys):
    # a protocol's path to its caution text with an escape sequence cleared the screen and coloured the line
    code, err, path = _check(tmp_path, capsys, b'[safety]\ncaution_file = "x\\u001b[2J\\u001b[31mRED"\n')
    assert code == 2 and "\x1b" not in err and "x\\x1b[2J\\x1b[31mRED does not exist" in err, err
    assert err.startswith(f"aftershift: {path}: safety.caution_file: ") and err.count("\n") == 1
