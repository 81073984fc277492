"""The block loop: one session of adapt–test trials.

The loop talks to a :class:`~runner.plan.Presenter` (headless or on screen)
and an :class:`~runner.plan.AnswerSource` (a simulated observer or the
keyboard) and to nothing else, so the same code runs a simulation and a
person in a dark room.

Flow: caution screen → instructions → practice (with optional feedback) →
initial adaptation (if the protocol has one) → interleaved main trials with
breaks every ``design.break_every`` trials → end screen.  Every completed
trial is appended to the log before the next starts.  Escape (or a simulated
quit) ends the session cleanly; the trial in progress is not logged.

Resuming
--------
A resumed session rebuilds the schedule and the adaptive tracks from the
session seed and replays the logged rows through them, checking that each
row is the trial the schedule says comes next at the level the track would
have chosen.  Because every random draw (schedule, dots, simulated answers)
is seeded from the session seed and the trial number, a session killed at
any instant and resumed writes exactly the rows an uninterrupted one writes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

from fitting.errors import InputError
from runner.plan import AnswerSource, Period, Presenter, TrialPlan, motion, trial_periods
from runner.protocol import Protocol, frame_plan
from runner.schedule import Schedule, ScheduledTrial, build_schedule
from runner.tracks import make_tracks
from runner.trial_log import format_value


@dataclass(frozen=True)
class SessionResult:
    """How a session (or one resumed part of it) ended.

    Attributes
    ----------
    ended_by : {"completed", "quit", "complete already"}
        "complete already": a resume of a session that had ended complete (nothing was run).
    rows_total : int
        Rows in the log after this part.
    rows_added : int
        Rows this part wrote.
    track_states : dict
        Final state of every adaptive track, keyed ``condition/track``.
    timing : dict
        The presenter's timing summary.
    stop : KeyboardInterrupt or None
        A Ctrl-C or SIGTERM that came during the summary after the part had
        ended (the quick fit); it ends only the summary, and whoever records
        the part raises it once the part is recorded as it ended.
    """

    ended_by: str
    rows_total: int
    rows_added: int
    track_states: dict
    timing: dict
    stop: KeyboardInterrupt | None = None


class Console:
    """The experimenter's side: progress and summaries (never the observer's screen).

    The base class is silent; :mod:`runner.console` has the terminal ones.
    """

    def started(self, total: int, done: int) -> None:
        """The session (or a resumed part) starts; ``done`` rows exist."""

    def trial_done(self, done: int, total: int, dropped_so_far: int, seconds_left: float) -> None:
        """A trial was logged."""

    def block_done(self, rows: list[dict]) -> None:
        """A block (the trials up to a break, or the session) ended."""

    def note(self, text: str) -> None:
        """A one-line message for the experimenter."""


class Tally:
    """The rows of a session so far, and what the experimenter's console is told.

    Shared by the discrete and the stream loop.

    Parameters
    ----------
    rows : list of dict
        Rows already in the log (replayed).
    total : int
        Rows a complete session has.
    console : Console
    """

    def __init__(self, rows: list[dict], total: int, console: Console):
        self.logged = [dict(r) for r in rows]
        self.n_before = len(self.logged)
        self.total = total
        self.console = console
        self.dropped = sum(int(float(r["dropped_frames"] or 0)) for r in self.logged)    # "1.0" passes the cell rules
        console.started(total, self.n_before)

    @property
    def next_index(self) -> int:
        """Trial number of the next row."""
        return len(self.logged) + 1

    def add(self, row: dict, dropped_frames: int, seconds_per_trial: float) -> None:
        """Record a row that was just made durable."""
        self.logged.append({k: format_value(v) for k, v in row.items()})
        self.dropped += dropped_frames
        left = self.total - len(self.logged)
        self.console.trial_done(len(self.logged), self.total, self.dropped, left * seconds_per_trial)

    def finish(self, how: str, presenter: Presenter, end_text: str, track_states: dict) -> SessionResult:
        """Summarise on the console, show the end screen, report how it ended.

        The part has ended ``how`` before the summary: a stop signal during
        the summary skips the rest of it and the end screen, and is handed
        back in the result (:attr:`SessionResult.stop`).
        """
        stop = None
        try:
            if len(self.logged) > self.n_before:
                self.console.block_done(self.logged)
        except KeyboardInterrupt as exc:
            stop = exc
        if stop is None:
            presenter.show_text(end_text, wait=False)
        return SessionResult(how, len(self.logged), len(self.logged) - self.n_before, track_states,
                             presenter.timing_summary(), stop)


def _key(slot: ScheduledTrial) -> str:
    return f"{slot.condition.name}/{slot.track}"


def trial_row(protocol: Protocol, observer: str, session: str, plan: TrialPlan, answer, playback,
              period_s: float) -> dict:
    """The log row of a completed trial (the columns of :data:`runner.trial_log.COLUMNS`).

    ``period_s`` is the duration of one motion period between adapter and
    test (with its gap); stream blocks add their own columns to the result.
    """
    return {
        "observer": observer,
        "session": session,
        "trial": plan.index,
        "condition": plan.condition,
        "adapter_offset_deg": plan.adapter_offset_deg,
        "lag": plan.lag,
        "track": plan.track,
        "test_offset_deg": plan.test_offset_deg,
        "response_cw": answer.response_cw,
        "rt_s": answer.rt_s,
        "dropped_frames": playback.dropped_frames,
        "timing_ok": playback.timing_ok,
        "practice": int(plan.practice),
        "period_s": period_s,
        "reference_deg": protocol.reference_deg,
        "test_direction_deg": round(plan.test_direction_deg, 6),
        "intervening_offsets_deg": plan.intervening_offsets_deg,
        "procedure": "practice" if plan.practice else protocol.procedure.method,
    }


def parse_response(text: str, where: str) -> int | None:
    """A logged ``response_cw`` cell as 1, 0 or None; anything else is an InputError."""
    if text == "":
        return None
    if text in ("0", "1", "0.0", "1.0"):     # as fit reads it (fitting.logfile.CELL_KINDS)
        return int(float(text))
    raise InputError(where, "response_cw", f"expected 0, 1 or empty, found {text!r}")


def _cell_against_plan(row: dict[str, str], plan: TrialPlan) -> tuple[str, str] | None:
    """The first of a row's adapter offset, lag, practice and intervening offsets cells that its trial's plan contradicts.

    Returns ``(column, what the plan has)``, or None when all agree.  Fit
    would refuse the log later, or fit the trial in the wrong condition.
    """
    for column, planned in (("adapter_offset_deg", plan.adapter_offset_deg), ("lag", plan.lag)):
        cell = row[column]
        if planned is None:
            if cell != "":
                return column, "empty"
        elif cell == "" or not math.isclose(float(cell), planned, abs_tol=1e-6):
            return column, format_value(planned)
    if row["practice"] != str(int(plan.practice)):
        return "practice", str(int(plan.practice))
    cell, planned = row["intervening_offsets_deg"], plan.intervening_offsets_deg
    values = [float(v) for v in cell.split(";")] if cell else []     # the cell rules let only numbers through
    if len(values) != len(planned) or not all(math.isclose(v, p, abs_tol=1e-6) for v, p in zip(values, planned)):
        return "intervening_offsets_deg", format_value(planned) or "empty"
    return None


class BlockRun:
    """One session of a protocol for one observer.

    Parameters
    ----------
    protocol : Protocol
    seed : int
        Session seed: schedule, tracks, dot fields.
    observer, session : str
        Written into every row.
    """

    def __init__(self, protocol: Protocol, seed: int, observer: str, session: str):
        self.protocol = protocol
        self.seed = int(seed)
        self.observer = observer
        self.session = session
        self.schedule: Schedule = build_schedule(protocol, self.seed)
        self.tracks = make_tracks(protocol, self.schedule, self.seed)
        self.frames = frame_plan(protocol)

    # -- the plan of one slot -------------------------------------------------
    def _skip(self, slot: ScheduledTrial) -> bool:
        return not slot.practice and self.tracks[_key(slot)].finished

    def _level(self, slot: ScheduledTrial) -> float:
        if slot.practice:
            return float(slot.practice_offset_deg)
        return float(self.tracks[_key(slot)].next_level())

    def plan(self, slot: ScheduledTrial, index: int) -> TrialPlan:
        """The trial to present in ``slot`` as trial number ``index``."""
        level = self._level(slot)
        cond = slot.condition
        return TrialPlan(
            index=index,
            condition=cond.name,
            adapter_offset_deg=cond.adapter_offset_deg,
            lag=cond.lag,
            track=slot.track,
            test_offset_deg=level,
            intervening_offsets_deg=slot.intervening_offsets_deg,
            practice=slot.practice,
            periods=trial_periods(self.protocol, cond.adapter_offset_deg, slot.intervening_offsets_deg, level),
            dots_seed=(self.seed, 3, index),
        )

    def first_adaptation(self) -> TrialPlan | None:
        """The initial long adaptation, or None if the protocol has none."""
        frames = self.frames["first_adaptation_s"].frames
        if not frames:
            return None
        offset = self.protocol.design.adapter_offsets_deg[0]
        period: Period = motion("first_adaptation", frames, self.protocol.reference_deg, offset)
        return TrialPlan(0, "first_adaptation", offset, None, None, math.nan, (), False, (period,), (self.seed, 3, 0))

    def expected_rows(self) -> int:
        """Rows a complete session writes if no track stops early."""
        return len(self.schedule.slots)

    def seconds_per_trial(self) -> float:
        """Rough duration of an average trial (for time-left estimates)."""
        f = self.frames
        mean_lag = sum(self.protocol.design.lags) / len(self.protocol.design.lags)
        return (
            f["adapter_s"].seconds
            + mean_lag * (f["period_s"].seconds + f["gap_s"].seconds)
            + f["gap_s"].seconds
            + f["test_s"].seconds
            + 0.8
            + f["pause_after_answer_s"].seconds
        )

    # -- replay ---------------------------------------------------------------
    def replay(self, rows: list[dict[str, str]], source: str) -> int:
        """Feed logged rows back into the tracks; return the index of the next slot to run.

        The number of slots when the rows complete the session (slots of
        finished tracks are never run).

        Raises
        ------
        InputError
            If a row is not the trial this protocol and seed produce next.
        """
        i = 0
        for slot_index, slot in enumerate(self.schedule.slots):
            if self._skip(slot):    # a finished track's slots are passed over, after the last row too
                continue
            if i == len(rows):
                return slot_index
            row, where = rows[i], f"{source}: line {i + 2}"
            plan = self.plan(slot, i + 1)
            expected = (plan.condition, "" if plan.track is None else str(plan.track), str(plan.index))
            found = (row["condition"], row["track"], row["trial"])
            if found != expected or not math.isclose(float(row["test_offset_deg"]), plan.test_offset_deg, abs_tol=1e-6):
                raise InputError(
                    where,
                    "condition/track/test_offset_deg",
                    f"the log does not follow this protocol and seed (expected trial {expected[2]} "
                    f"{expected[0]} track {expected[1]} at {plan.test_offset_deg:g} deg); "
                    "was the protocol changed since the session started, or an earlier answer edited?",
                )
            wrong = _cell_against_plan(row, plan)
            if wrong is not None:
                raise InputError(where, wrong[0], f"{row[wrong[0]]!r} where trial {plan.index} of condition "
                                 f"{plan.condition} has {wrong[1]}; was the log edited?")
            response = parse_response(row["response_cw"], where)
            if not slot.practice:
                self.tracks[_key(slot)].update(plan.test_offset_deg, response)
            i += 1
        if i < len(rows):
            raise InputError(f"{source}: line {i + 2}", "trial", "the log has more trials than the protocol's block")
        return len(self.schedule.slots)

    def track_states(self) -> dict:
        """JSON-ready states of every track."""
        return {k: t.state() for k, t in self.tracks.items()}

    # -- the loop -------------------------------------------------------------
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
        """Run (or continue) the session.

        Parameters
        ----------
        presenter : Presenter
        answers : AnswerSource
        append : callable
            Makes one row durable (``TrialLog.append``).
        rows : list of dict
            Rows already logged (empty for a new session); replayed first.
        texts : dict
            Screen texts: ``caution``, ``instructions``, ``practice_done``,
            ``break`` (with ``{done}``, ``{total}``), ``paused``, ``end``.
        console : Console, optional
        source : str
            Name of the log, for error messages.

        Returns
        -------
        SessionResult
        """
        console = console or Console()
        start_slot = self.replay(rows, source)
        total = len(self.schedule.slots)
        tally = Tally(rows, total, console)
        ended_by = "completed"
        main_done = sum(1 for r in rows if r["practice"] == "0")
        period_s = self.protocol.timing.period_s + self.protocol.timing.gap_s
        window = self.frames["answer_window_s"].frames
        pause = self.frames["pause_after_answer_s"].frames
        break_every = self.protocol.design.break_every

        def finish(how: str) -> SessionResult:
            return tally.finish(how, presenter, texts["end"], self.track_states())

        if start_slot >= total:
            return finish(ended_by)
        if not presenter.show_text(texts["caution"]) or not presenter.show_text(texts["instructions"]):
            return finish("quit")
        adaptation = self.first_adaptation()
        practice_left = any(s.practice for s in self.schedule.slots[start_slot:])
        if adaptation is not None and not practice_left:
            if presenter.play(adaptation).aborted:
                return finish("quit")

        slots = self.schedule.slots
        for slot_index in range(start_slot, total):
            slot = slots[slot_index]
            if self._skip(slot):
                continue
            asked = presenter.requests()
            if "quit" in asked:
                ended_by = "quit"
                break
            if "pause" in asked and not presenter.show_text(texts["paused"]):
                ended_by = "quit"
                break
            plan = self.plan(slot, tally.next_index)
            playback = presenter.play(plan)
            if playback.aborted:
                ended_by = "quit"
                break
            answer = answers.answer(plan, playback, window)
            if answer.quit:
                ended_by = "quit"
                break
            row = trial_row(self.protocol, self.observer, self.session, plan, answer, playback, period_s)
            append(row)
            tally.add(row, playback.dropped_frames, self.seconds_per_trial())
            if slot.practice:
                if self.protocol.design.practice_feedback and answer.response_cw is not None:
                    presenter.feedback(answer.response_cw == int(plan.test_offset_deg > 0))
            else:
                self.tracks[_key(slot)].update(plan.test_offset_deg, answer.response_cw)
                main_done += 1
            if not presenter.blank(pause):
                ended_by = "quit"
                break
            if slot.practice and (slot_index + 1 == total or not slots[slot_index + 1].practice):
                if not presenter.show_text(texts["practice_done"]):
                    ended_by = "quit"
                    break
                if adaptation is not None and presenter.play(adaptation).aborted:
                    ended_by = "quit"
                    break
            if not slot.practice and break_every and main_done % break_every == 0 and tally.next_index <= total:
                console.block_done(tally.logged)
                text = texts["break"].format(done=main_done, total=self.schedule.n_main)
                if not presenter.show_text(text):
                    ended_by = "quit"
                    break
        return finish(ended_by)
