"""Continuous-stream blocks: protocol, balanced sequence, loop, resume, check, screening."""

from __future__ import annotations

import math
from collections import Counter

import numpy as np
import pytest

from runner import safety
from runner.cli import main
from runner.headless import HeadlessPresenter
from runner.launch import derive_seed, screen_texts, simulate
from runner.observers import ObserverModel
from runner.protocol import load_protocol, parse_protocol, read_protocol_text
from runner.stream import StreamObserver, StreamRun, build_stream, describe_stream, screening_sequences
from runner.trial_log import TrialLog, read_rows

from conftest import PROTOCOLS

BUNDLED = PROTOCOLS / "stream_nback.toml"
SMALL = """
[stream]
direction_step_deg = 45
period_frames = 12
nback_periods = 2
answer = "{answer}"
[timing]
answer_window_s = 0.2
pause_after_answer_s = 0.1
[design]
tracks_per_condition = 2
trials_per_track = 24
practice_trials = 0
break_every = {break_every}
"""


def small(answer="pause", break_every=0):
    return parse_protocol(SMALL.format(answer=answer, break_every=break_every), "small.toml")


class RecordingPresenter(HeadlessPresenter):
    """The headless presenter, keeping every period it was asked to play (and blanks)."""

    def __init__(self, refresh_hz, quit_after=None):
        super().__init__(refresh_hz)
        self.shown = []
        self.quit_after = quit_after
        self.plays = 0

    def play(self, trial):
        self.shown += list(trial.periods)
        self.plays += 1
        return super().play(trial)

    def blank(self, frames):
        self.shown.append(("blank", frames))
        return super().blank(frames)

    def requests(self):
        return {"quit"} if self.quit_after is not None and self.plays >= self.quit_after else set()


def run_stream(protocol, tmp_path, name="obs", presenter=None, resume=False):
    seed = derive_seed(0, 0)
    run = StreamRun(protocol, seed, name, "s1")
    log = TrialLog.reopen(tmp_path, name, "s1") if resume else TrialLog.create(tmp_path, name, "s1")
    presenter = presenter or RecordingPresenter(protocol.display.refresh_hz)
    answers = StreamObserver(ObserverModel(), (seed, 5), protocol.display.refresh_hz)
    try:
        result = run.run(presenter, answers, log.append, log.rows, screen_texts(protocol, ""))
    finally:
        log.close()
    if not log.sidecar_path.exists():
        log.write_sidecar({"session_seed": seed})
    return result, presenter, read_rows(log.path)


# -- protocol -------------------------------------------------------------------------------


def test_direction_set_is_equally_spaced_and_symmetric():
    offsets = small().stream.offsets_deg
    assert offsets == (-135.0, -90.0, -45.0, 0.0, 45.0, 90.0, 135.0, 180.0)
    assert np.allclose(np.diff(offsets), 45.0)


@pytest.mark.parametrize(
    "text, field",
    [
        ("[stream]\ndirection_step_deg = 7\n[design]\npractice_trials = 0\n", "stream.direction_step_deg"),
        ("[stream]\n[design]\ntrials_per_track = 24\n", "design.practice_trials"),
        ("[stream]\n[design]\npractice_trials = 0\ntrials_per_track = 25\n", "design.trials_per_track"),
        ("[stream]\n[design]\npractice_trials = 0\ntrials_per_track = 24\n[timing]\ngap_s = 0.1\n", "timing.gap_s"),
        ("[stream]\nanswer = 'continue'\nperiod_frames = 12\n[design]\npractice_trials = 0\ntrials_per_track = 24\n",
         "timing.answer_window_s"),
        ("[stream]\nnback = 3\n", "stream.nback"),
    ],
)
def test_bad_stream_settings_are_refused_in_one_line_naming_the_field(tmp_path, capsys, text, field):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and str(path) in err and field in err


# -- balance ----------------------------------------------------------------------------------


@pytest.mark.parametrize("seed", [0, 1, 7, 12345])
def test_every_direction_precedes_every_n_equally_often_in_every_round(seed):
    protocol = small()
    seq = build_stream(protocol, seed)
    d, k = len(seq.offsets_deg), protocol.stream.nback_periods
    assert len(seq.tests) == 48 and seq.nback == k
    for n in range(k):
        for start in range(0, len(seq.tests), d):
            round_ = [t.preceding_offsets_deg[n] for t in seq.tests[start:start + d]]
            assert sorted(round_) == sorted(seq.offsets_deg)
    counted = {n: Counter(t.preceding_offsets_deg[n - 1] for t in seq.tests) for n in range(1, k + 1)}
    assert seq.balance() == {n: {o: counted[n][o] for o in seq.offsets_deg} for n in counted}
    assert all(set(c.values()) == {48 // d} for c in counted.values())
    assert Counter(t.track for t in seq.tests) == {0: 24, 1: 24}


def test_bundled_protocol_is_balanced_for_several_seeds():
    protocol = load_protocol(BUNDLED)
    for seed in (0, 3, 99):
        for counts in build_stream(protocol, seed).balance().values():
            assert set(counts.values()) == {600 // 12}


def test_different_seeds_give_different_streams_and_the_same_seed_the_same():
    p = small()
    assert build_stream(p, 1) == build_stream(p, 1)
    assert build_stream(p, 1) != build_stream(p, 2)


# -- the loop -------------------------------------------------------------------------------


def _played_tests(shown):
    """For each test period shown, the offsets of the motion periods shown just before it (1-back first)."""
    out, since = [], []
    for item in shown:
        if isinstance(item, tuple):
            since = [] if item[1] else since
            continue
        if item.role == "test":
            out.append((item, tuple(reversed(since))))
            since = []
        else:
            since.append(item.offset_deg)
    return out


@pytest.mark.parametrize("answer", ["pause", "continue"])
def test_each_logged_test_was_shown_right_after_its_logged_preceding_periods(tmp_path, answer):
    protocol = small(answer, break_every=16)
    _, presenter, rows = run_stream(protocol, tmp_path, presenter=RecordingPresenter(120.0))
    played = _played_tests(presenter.shown)
    assert len(rows) == len(played) == 48
    k = protocol.stream.nback_periods
    for row, (test, before) in zip(rows, played):
        logged = tuple(float(v) for v in row["preceding_offsets_deg"].split(";"))
        assert before[:k] == logged
        assert test.frames == 12 and math.isclose(test.offset_deg, float(row["test_offset_deg"]))
        assert row["block"] == "stream" and row["condition"] == "stream"
        assert row["adapter_offset_deg"] == "" and row["lag"] == ""
    blanks = [item for item in presenter.shown if isinstance(item, tuple)]
    # pause: a blank pause after every test; continue: only before each break and at the end
    assert len(blanks) == (48 if answer == "pause" else 3)


def test_continue_mode_answers_arrive_before_the_next_test(tmp_path):
    _, _, rows = run_stream(small("continue"), tmp_path)
    deadline = (12 + 24) / 120.0  # test plus a 0.2 s answer window
    rts = [float(r["rt_s"]) for r in rows if r["rt_s"]]
    assert rts and max(rts) <= deadline


def test_a_stream_killed_and_resumed_writes_the_rows_of_an_uninterrupted_one(tmp_path):
    protocol = small("continue", break_every=16)
    _, _, whole = run_stream(protocol, tmp_path / "whole")
    result, _, part = run_stream(protocol, tmp_path / "cut", presenter=RecordingPresenter(120.0, quit_after=19))
    assert result.ended_by == "quit" and 0 < len(part) < len(whole)
    _, _, resumed = run_stream(protocol, tmp_path / "cut", resume=True)
    assert (tmp_path / "whole" / "obs-s1.trials.csv").read_bytes() == (tmp_path / "cut" / "obs-s1.trials.csv").read_bytes()
    assert resumed == whole


def test_a_break_in_a_stream_says_there_is_no_quick_fit(tmp_path):
    # before, every break printed "quick fit not possible yet: empty, but condition 'stream' is not the
    # baseline", a validation message of the discrete tables that read as if the log were damaged
    from runner.cli import _quick_fit_text

    _, _, rows = run_stream(small("continue"), tmp_path)
    assert _quick_fit_text(rows[:16]) == ("no quick fit for a stream block: fit its log after the session "
                                          "(aftershift fit LOG)")


def test_simulate_runs_stream_protocols_through_the_stream_loop(tmp_path):
    protocol, text = load_protocol(BUNDLED), read_protocol_text(BUNDLED)
    (path,) = simulate(protocol, str(BUNDLED), text, tmp_path, ObserverModel(), 1, 4, progress=False)
    rows = read_rows(path)
    assert len(rows) == 600 and {r["block"] for r in rows} == {"stream"}
    counts = Counter((n, r["preceding_offsets_deg"].split(";")[n]) for r in rows for n in range(3))
    assert set(counts.values()) == {50}


def test_the_simulated_observer_sums_decaying_dog_shifts_of_the_preceding_periods():
    m = ObserverModel(amplitude_deg=2.5, peak_offset_deg=40.0, decay_periods=1.5)
    deltas = (30.0, -60.0, 120.0)
    # the formula written out independently: sum_n A (d/w) exp(1/2 - (d/w)^2/2) exp(-(n-1)/tau)
    by_hand = sum(2.5 * (d / 40) * math.exp(0.5 - 0.5 * (d / 40) ** 2) * math.exp(-(n - 1) / 1.5)
                  for n, d in enumerate(deltas, start=1))
    assert math.isclose(m.nback_shift_deg(deltas), by_hand, rel_tol=1e-12)
    # n = 1 alone is the discrete formula at lag 0
    assert m.nback_shift_deg((30.0,)) == m.shift_deg(30.0, 0)


# -- check and screening --------------------------------------------------------------------


def test_describe_stream_reports_balance_and_frames():
    lines = describe_stream(load_protocol(BUNDLED))
    text = "\n".join(lines)
    assert "frames at 120 Hz" in text and "duration" in text and "stream period" in text
    table = [l.split() for l in lines if l.strip()[:2] in ("1 ", "2 ", "3 ")]
    assert len(table) == 3 and all(set(row[1:]) == {"50"} for row in table)


def test_bundled_stream_passes_the_photosensitivity_screening():
    result = safety.screen_protocol(load_protocol(BUNDLED))
    assert result.passed and "stream" in result.worst_case


def test_screening_sequences_follow_the_answer_mode():
    label, dots, patch = screening_sequences(small("pause"))[0]
    assert "pausing" in label and not dots[:120].any() and dots.sum() > 0
    label, dots, _ = screening_sequences(small("continue"))[0]
    # after the lead-in second: 12 test + 24 context frames on, then the presenter's 2-frame seam
    assert "during the stream" in label and dots[120:156].all() and not dots[156:158].any()


@pytest.mark.parametrize("answer", ["pause", "continue"])
def test_a_fast_bright_stream_with_blanks_is_refused(answer):
    # WCAG 2.x SC 2.3.1: more than three general flashes in one second over a quarter of a 10 deg field.
    # Bright 0.5 deg dots cover ~39 % of the aperture; with 50 ms periods the answer blank (pause) or the
    # presenter's two fixation frames between plays (continue) switch the field off several times a second.
    p = parse_protocol(
        "[dots]\ndot_size_deg = 0.5\ndensity_per_deg2 = 2.0\nlevel = 1.0\n"
        f"[stream]\nperiod_frames = 6\nnback_periods = 1\nanswer = '{answer}'\n"
        "[timing]\nanswer_window_s = 0.05\npause_after_answer_s = 0.0\n"
        "[design]\npractice_trials = 0\ntrials_per_track = 24\n", "fast.toml")
    result = safety.screen_protocol(p)
    assert not result.passed
    assert result.worst_field.general.per_second > safety.FLASHES_ALLOWED_PER_S
