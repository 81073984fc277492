"""Continuous-stream blocks: the balanced sequence and the stream loop.

A stream block (a protocol with ``[stream]``, see
:mod:`runner.stream_settings`) shows motion periods back to back.  Before
every test come ``K = stream.nback_periods`` periods whose directions are
drawn from the ``D`` equally spaced directions of the stream; the test itself
is a period near the reference, its offset chosen by the adaptive track it
belongs to, and the observer judges it clockwise or counter-clockwise.

Balanced construction
---------------------
The ``N = tracks_per_condition × trials_per_track`` tests (a multiple of
``D``, checked by the protocol) are cut into ``N / D`` rounds of ``D``
consecutive tests.  In every round and for every ``n = 1..K`` an independent
random permutation of the ``D`` directions gives the n-th preceding period of
the round's tests.  So at every n ≤ K each direction precedes exactly
``N / D`` tests, in every round once; the pairings of different n are
independent draws, which keeps the n-back regressors nearly uncorrelated.
Tests are assigned to tracks by a random permutation of
``trials_per_track`` copies of every track.  Everything comes from the
session seed.  Because the direction set is symmetric about the reference,
an odd after-effect (the DoG) averages to zero at every n and leaves the
mean PSE unbiased.

The loop
--------
:class:`StreamRun` has the face of :class:`runner.session.BlockRun`: it
talks to the same :class:`~runner.plan.Presenter` and
:class:`~runner.plan.AnswerSource` and writes one row per test through the
same ``append`` (``TrialLog.append``), so ``simulate`` and ``run`` work
unchanged.  Each test is played as one :class:`StreamTrialPlan`:

* ``answer = "pause"``: the K preceding periods and the test; then the
  answer window (fixation mark only) and the pause.
* ``answer = "continue"``: the test and the K periods that precede the
  *next* test, so the answer is collected while the stream runs on (an answer
  later than ``timing.answer_window_s`` after the test counts as missed).  The
  first test, the first after a break and the first of a resumed part get
  their own K periods in front; the last test and the last before a break
  end with the answer window.

Resume replays the logged rows through the tracks, as ``BlockRun`` does;
a resumed part starts with the K periods of its next test, so every test is
preceded by exactly the K periods the sequence holds.

Log rows
--------
``condition = stream``, ``block = stream``, ``adapter_offset_deg`` and
``lag`` empty (a stream test has no single adapter), ``track``,
``test_offset_deg`` and the answer as for discrete trials, ``period_s`` the
duration of one period, and ``preceding_offsets_deg`` the offsets of the
1st … Kth preceding periods (``;``-separated, 1-back first).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from fitting.errors import InputError
from runner.observers import SimulatedObserver
from runner.plan import Answer, AnswerSource, Period, Playback, Presenter, TrialPlan, motion
from runner.protocol import Protocol, frame_plan
from runner.schedule import Condition, Schedule
from runner.overview import BREAK_ESTIMATE_S, duration_line, header_lines
from runner.session import Console, SessionResult, Tally, parse_response, trial_row
from runner.trial_log import format_value
from runner.tracks import make_tracks

#: The condition label of stream tests in the log (also the track key prefix).
STREAM_CONDITION = "stream"


# ----------------------------------------------------------------------------------------------
# The balanced sequence


@dataclass(frozen=True)
class StreamTest:
    """One test of the stream and the periods that precede it.

    Attributes
    ----------
    track : int
        Adaptive track (0-based) that chooses the test offset.
    preceding_offsets_deg : tuple of float
        Offsets of the 1st, 2nd, ... Kth preceding periods (1-back first).
    """

    track: int
    preceding_offsets_deg: tuple[float, ...]

    @property
    def shown_offsets_deg(self) -> tuple[float, ...]:
        """The preceding periods in the order they are shown (K-back first)."""
        return tuple(reversed(self.preceding_offsets_deg))


@dataclass(frozen=True)
class StreamSequence:
    """The whole stream of a block.

    Attributes
    ----------
    offsets_deg : tuple of float
        The D directions, as offsets from the reference.
    tests : tuple of StreamTest
        In presentation order.
    """

    offsets_deg: tuple[float, ...]
    tests: tuple[StreamTest, ...]

    @property
    def nback(self) -> int:
        """K, the preceding periods of every test."""
        return len(self.tests[0].preceding_offsets_deg) if self.tests else 0

    def balance(self) -> dict[int, dict[float, int]]:
        """Count, for every n = 1..K, how many tests each direction precedes at n.

        Returns
        -------
        dict
            ``{n: {offset: count}}`` with every offset of the set present.
        """
        out = {}
        for n in range(1, self.nback + 1):
            counts = {o: 0 for o in self.offsets_deg}
            for test in self.tests:
                counts[test.preceding_offsets_deg[n - 1]] += 1
            out[n] = counts
        return out


def build_stream(protocol: Protocol, seed: int) -> StreamSequence:
    """The balanced stream of a protocol, reproducibly from a seed.

    Parameters
    ----------
    protocol : Protocol
        With a ``[stream]`` section.
    seed : int
        Session seed.

    Returns
    -------
    StreamSequence
        See the module docstring for the construction.
    """
    s, d = protocol.stream, protocol.design
    offsets = s.offsets_deg
    n_dir, k = len(offsets), s.nback_periods
    n_tests = d.tracks_per_condition * d.trials_per_track
    rng = np.random.default_rng([seed, 11])
    columns = np.empty((n_tests, k), dtype=int)
    for start in range(0, n_tests, n_dir):
        for n in range(k):
            columns[start:start + n_dir, n] = rng.permutation(n_dir)
    tracks = np.repeat(np.arange(d.tracks_per_condition), d.trials_per_track)[rng.permutation(n_tests)]
    tests = tuple(
        StreamTest(int(tracks[i]), tuple(offsets[j] for j in columns[i])) for i in range(n_tests)
    )
    return StreamSequence(offsets, tests)


# ----------------------------------------------------------------------------------------------
# What one test shows, and a simulated observer for it


@dataclass(frozen=True)
class StreamTrialPlan(TrialPlan):
    """A :class:`~runner.plan.TrialPlan` of a stream test.

    Attributes
    ----------
    preceding_offsets_deg : tuple of float
        Offsets of the 1st ... Kth preceding periods (1-back first).
    answer_deadline_s : float
        Latest answer, in seconds from test onset (test plus answer window).
    """

    preceding_offsets_deg: tuple[float, ...] = field(default=())
    answer_deadline_s: float = math.inf


class StreamObserver(SimulatedObserver):
    """A simulated observer for stream tests (an :class:`~runner.plan.AnswerSource`).

    Answers with ``P(cw | x) = λ/2 + (1 − λ) Φ((x − μ₀ − shift) / σ)`` where
    the shift is :meth:`runner.observers.ObserverModel.nback_shift_deg` of the
    test's preceding periods.  Draws are seeded by the seed words and the
    trial number, as for discrete trials, so a resumed stream draws the same
    answers.
    """

    def answer(self, trial: StreamTrialPlan, playback: Playback, window_frames: int) -> Answer:
        """Draw the answer to a stream test; reproducible from the trial number."""
        rng = np.random.default_rng([*self.seed_words, trial.index])
        u_answer, u_miss, z_rt = rng.random(), rng.random(), rng.standard_normal()
        if u_miss < self.model.miss_rate:
            return Answer(None, None)
        m = self.model
        mu = m.pse_deg + m.nback_shift_deg(trial.preceding_offsets_deg)
        p = m.lapse / 2 + (1 - m.lapse) * 0.5 * math.erfc(-(trial.test_offset_deg - mu) / (m.spread_deg * math.sqrt(2)))
        rt = min(m.median_rt_s * math.exp(0.3 * z_rt), 0.95 * trial.answer_deadline_s)
        return Answer(int(u_answer < p), round(rt, 4))


# ----------------------------------------------------------------------------------------------
# The stream loop


def _track_key(track: int) -> str:
    return f"{STREAM_CONDITION}/{track}"


class StreamRun:
    """One stream session of a protocol for one observer (the face of ``BlockRun``).

    Parameters
    ----------
    protocol : Protocol
        With a ``[stream]`` section.
    seed : int
        Session seed: sequence, track order, dot fields.
    observer, session : str
        Written into every row.
    """

    def __init__(self, protocol: Protocol, seed: int, observer: str, session: str):
        if protocol.stream is None:
            raise ValueError("StreamRun needs a protocol with a [stream] section")
        self.protocol = protocol
        self.seed = int(seed)
        self.observer = observer
        self.session = session
        self.sequence = build_stream(protocol, self.seed)
        one_condition = Schedule((Condition(STREAM_CONDITION, None, None),), ())
        self.tracks = make_tracks(protocol, one_condition, self.seed)
        frames = frame_plan(protocol)
        self.window_frames = frames["answer_window_s"].frames
        self.pause_frames = frames["pause_after_answer_s"].frames
        self.hz = protocol.display.refresh_hz

    # -- plans ------------------------------------------------------------------
    def _context(self, test: StreamTest) -> list[Period]:
        s = self.protocol.stream
        return [motion("intervening", s.period_frames, self.protocol.reference_deg, o) for o in test.shown_offsets_deg]

    def plan(self, i: int, index: int, lead_in: bool, run_on: bool) -> StreamTrialPlan:
        """The plan of test ``i`` (0-based) as trial number ``index``.

        Parameters
        ----------
        lead_in : bool
            Show the test's own K preceding periods first.
        run_on : bool
            Go on into the K periods of the next test after the test
            (``answer = "continue"``).
        """
        test = self.sequence.tests[i]
        s = self.protocol.stream
        level = float(self.tracks[_track_key(test.track)].next_level())
        periods = self._context(test) if lead_in else []
        periods.append(motion("test", s.period_frames, self.protocol.reference_deg, level))
        if run_on:
            periods += self._context(self.sequence.tests[i + 1])
        return StreamTrialPlan(
            index=index,
            condition=STREAM_CONDITION,
            adapter_offset_deg=None,
            lag=None,
            track=test.track,
            test_offset_deg=level,
            intervening_offsets_deg=(),
            practice=False,
            periods=tuple(periods),
            dots_seed=(self.seed, 3, index),
            preceding_offsets_deg=test.preceding_offsets_deg,
            answer_deadline_s=(s.period_frames + self.window_frames) / self.hz,
        )

    def expected_rows(self) -> int:
        """Rows a complete session writes (one per test)."""
        return len(self.sequence.tests)

    def seconds_per_trial(self) -> float:
        """Duration of one test with its preceding periods (for time-left estimates)."""
        s = self.protocol.stream
        seconds = (s.nback_periods + 1) * s.period_frames / self.hz
        if s.answer == "pause":
            seconds += 0.8 + self.pause_frames / self.hz
        return seconds

    def track_states(self) -> dict:
        """JSON-ready states of every track."""
        return {k: t.state() for k, t in self.tracks.items()}

    def _row(self, plan: StreamTrialPlan, answer: Answer, playback: Playback) -> dict:
        period_s = self.protocol.stream.period_frames / self.hz
        row = trial_row(self.protocol, self.observer, self.session, plan, answer, playback, period_s)
        return {**row, "block": STREAM_CONDITION, "preceding_offsets_deg": plan.preceding_offsets_deg}

    # -- replay -------------------------------------------------------------------
    def replay(self, rows: list[dict[str, str]], source: str) -> int:
        """Feed logged rows back into the tracks; return the next test index.

        Raises
        ------
        InputError
            If a row is not the test this protocol and seed produce next.
        """
        tests = self.sequence.tests
        if len(rows) > len(tests):
            raise InputError(f"{source}: line {len(tests) + 2}", "trial", "the log has more tests than the stream")
        for i, row in enumerate(rows):
            where = f"{source}: line {i + 2}"
            plan = self.plan(i, i + 1, lead_in=True, run_on=False)
            expected = (STREAM_CONDITION, str(plan.track), str(plan.index), format_value(plan.preceding_offsets_deg))
            found = (row["condition"], row["track"], row["trial"], row["preceding_offsets_deg"])
            if found != expected or not math.isclose(float(row["test_offset_deg"]), plan.test_offset_deg, abs_tol=1e-6):
                raise InputError(
                    where,
                    "condition/track/test_offset_deg/preceding_offsets_deg",
                    f"the log does not follow this protocol and seed (expected test {plan.index} on track "
                    f"{plan.track} at {plan.test_offset_deg:g} deg after {expected[3]}); "
                    "was the protocol changed since the session started, or an earlier answer edited?",
                )
            self.tracks[_track_key(plan.track)].update(plan.test_offset_deg, parse_response(row["response_cw"], where))
        return len(rows)

    # -- the loop -------------------------------------------------------------------
    def run(
        self,
        presenter: Presenter,
        answers: AnswerSource,
        append: Callable[[dict], None],
        rows: list[dict],
        texts: dict[str, str],
        console: Console | None = None,
        source: str = "trial log",
    ) -> SessionResult:
        """Run (or continue) the stream; the parameters are those of ``BlockRun.run``.

        Returns
        -------
        SessionResult
        """
        console = console or Console()
        start = self.replay(rows, source)
        total = len(self.sequence.tests)
        tally = Tally(rows, total, console)
        continuous = self.protocol.stream.answer == "continue"
        break_every = self.protocol.design.break_every

        def finish(how: str) -> SessionResult:
            return tally.finish(how, presenter, texts["end"], self.track_states())

        if start >= total:
            return finish("completed")
        if not presenter.show_text(texts["caution"]) or not presenter.show_text(texts["instructions"]):
            return finish("quit")
        lead_in = True
        for i in range(start, total):
            asked = presenter.requests()
            if "quit" in asked or ("pause" in asked and not presenter.show_text(texts["paused"])):
                return finish("quit")
            if "pause" in asked:
                lead_in = True
            done = i + 1
            break_due = bool(break_every) and done % break_every == 0 and done < total
            run_on = continuous and done < total and not break_due
            plan = self.plan(i, tally.next_index, lead_in or not continuous, run_on)
            playback = presenter.play(plan)
            if playback.aborted:
                return finish("quit")
            after_test = self.protocol.stream.nback_periods * self.protocol.stream.period_frames if run_on else 0
            answer = answers.answer(plan, playback, max(self.window_frames - after_test, 1))
            if answer.quit:
                return finish("quit")
            if answer.rt_s is not None and answer.rt_s > plan.answer_deadline_s:
                answer = Answer(None, None)
            row = self._row(plan, answer, playback)
            append(row)
            tally.add(row, playback.dropped_frames, self.seconds_per_trial())
            self.tracks[_track_key(plan.track)].update(plan.test_offset_deg, answer.response_cw)
            lead_in = not run_on
            if not run_on and not presenter.blank(self.pause_frames):
                return finish("quit")
            if break_due:
                console.block_done(tally.logged)
                if not presenter.show_text(texts["break"].format(done=done, total=total)):
                    return finish("quit")
        return finish("completed")


# ----------------------------------------------------------------------------------------------
# For `aftershift check` and the photosensitivity screening


def describe_stream(protocol: Protocol, seed: int = 0) -> list[str]:
    """Lines describing a stream block: directions, balance, frames, duration.

    Parameters
    ----------
    protocol : Protocol
        With a ``[stream]`` section.
    seed : int
        Seed of the example sequence whose balance is counted (every seed is
        balanced the same way).
    """
    p, s, d, disp = protocol, protocol.stream, protocol.design, protocol.display
    seq = build_stream(protocol, seed)
    n_tests = len(seq.tests)
    frames = frame_plan(protocol)
    period_ms = s.period_frames / disp.refresh_hz * 1000
    lines = header_lines(p) + [
        "",
        f"stream     {s.n_directions} directions every {s.direction_step_deg:g} deg, "
        f"{s.nback_periods} periods before each test, answer: {s.answer}",
        "           offsets (deg): " + ", ".join(f"{o:+g}" for o in seq.offsets_deg),
        f"tracks     {d.tracks_per_condition} x {d.trials_per_track} tests, method {p.procedure.method}",
        f"tests      {n_tests} in {n_tests // s.n_directions} balanced rounds of {s.n_directions}; "
        f"{n_tests * (s.nback_periods + 1)} periods",
        "",
        f"balance    tests preceded by each offset at n periods back (lag = n - 1), seed {seed}:",
        "           " + f"{'n':>3}" + "".join(f" {o:>6.4g}" for o in seq.offsets_deg),   # a space even before -51.4286
    ]
    for n, counts in seq.balance().items():
        lines.append("           " + f"{n:>3}" + "".join(f"{counts[o]:>7d}" for o in seq.offsets_deg))
    lines += ["", f"frames at {disp.refresh_hz:g} Hz:"]
    lines.append(f"  {'stream period':<22} {s.period_frames:>14d} frames = {period_ms:10.3f} ms")
    for name in ("answer_window_s", "pause_after_answer_s"):
        fc = frames[name]
        lines.append(f"  {name:<22} {fc.requested_s:>8g} s = {fc.frames:>5d} frames = {fc.seconds * 1000:10.3f} ms")
    seconds = n_tests * StreamRun(protocol, seed, "check", "check").seconds_per_trial()
    breaks = (n_tests - 1) // d.break_every if d.break_every else 0
    lines += ["", duration_line(seconds + BREAK_ESTIMATE_S * breaks, breaks)]
    return lines


#: Seconds of stream screened for photosensitivity.
SCREENED_S = 6.0


def screening_sequences(protocol: Protocol) -> list[tuple[str, np.ndarray, np.ndarray]]:
    """Frame-by-frame worst case of a stream for the photosensitivity screening.

    A second of fixation, then tests back to back as the session loop shows
    them: in ``pause`` mode K periods, the test, an answer after
    ``safety.FASTEST_ANSWER_S`` (fixation mark only) and the pause; in
    ``continue`` mode the test and the next K periods, with the presenter's
    two fixation-only frames between consecutive plans (its closing and
    lead-in flips).  Directions do not change the mean luminance, so they
    do not matter here.

    Returns
    -------
    list of (label, dots_on, patch_on)
        One worst case; ``dots_on`` and ``patch_on`` are boolean per frame,
        the patch on during test frames when the protocol has one.  The
        screening in :mod:`runner.safety` turns them into luminance.
    """
    from runner.safety import FASTEST_ANSWER_S

    s, hz = protocol.stream, protocol.display.refresh_hz
    frames = frame_plan(protocol)
    second = max(1, int(round(hz)))
    if s.answer == "pause":
        answer = max(1, min(int(round(FASTEST_ANSWER_S * hz)), frames["answer_window_s"].frames))
        blank = answer + frames["pause_after_answer_s"].frames
        unit = [(True, False, s.nback_periods * s.period_frames), (True, True, s.period_frames), (False, False, blank)]
        label = "stream tests in a row, pausing for each answer"
    else:
        unit = [(True, True, s.period_frames), (True, False, s.nback_periods * s.period_frames), (False, False, 2)]
        label = "stream tests in a row, answers during the stream"
    length = sum(f for _, _, f in unit)
    periods = [(False, False, second)] + unit * max(2, math.ceil(SCREENED_S * hz / length))
    dots_on = np.concatenate([np.full(f, on) for on, _, f in periods])
    patch_on = np.concatenate([np.full(f, test) for _, test, f in periods]) & (protocol.safety.photodiode_patch_deg > 0)
    return [(label, dots_on, patch_on)]
