"""The ``[stream]`` section of a protocol: continuous-stream blocks.

A protocol with a ``[stream]`` section is a stream block (no separate
selector: *stream present = stream block*).  Motion periods follow each
other without gaps, each in one direction of a set of equally spaced
directions; every ``nback_periods + 1``-th period is a test near the
reference whose direction the adaptive procedure of ``[procedure]`` chooses,
and the observer answers it.  :mod:`runner.stream` builds the sequence and
runs the loop.

Which other settings a stream uses
----------------------------------
``[display]``, ``[dots]``, ``[keys]``, ``[safety]`` and ``[procedure]`` as
for discrete trials; from ``[design]`` only ``tracks_per_condition``,
``trials_per_track`` (the tests are the trials of the tracks) and
``break_every`` (in tests); from ``[timing]`` only ``answer_window_s`` and
``pause_after_answer_s``.  Stream blocks refuse what they cannot honour:
practice trials, a first adaptation, blank gaps and tracks that stop early
(:func:`check_stream`).

This module imports nothing from :mod:`runner.protocol`, which imports it.
"""

from __future__ import annotations

import math
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator

from fitting.errors import InputError


class StreamSettings(BaseModel):
    """Settings of a continuous-stream block.

    Attributes
    ----------
    direction_step_deg : float
        Spacing of the stream's directions; they are the offsets
        ``0, ±step, ±2·step, ...`` from the reference (180 included when it
        is a multiple), so ``360 / step`` directions.  360 must be a whole
        multiple of the step.
    period_frames : int
        Frames of every period, tests included (whole frames by construction).
    nback_periods : int
        K: stream periods shown before each test, and the largest n
        analysed.  Every direction occurs equally often at every n ≤ K.
    answer : {"pause", "continue"}
        ``pause``: after each test the stream stops (fixation mark only)
        until the answer or the end of ``timing.answer_window_s``, then
        ``timing.pause_after_answer_s``.  ``continue``: the stream runs on and
        the answer is collected during the next periods; the answer window
        must end before the next test.
    """

    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False, frozen=True)

    direction_step_deg: float = Field(30.0, ge=5, le=180)
    period_frames: int = Field(60, ge=1, le=100000)
    nback_periods: int = Field(3, ge=1, le=12)
    answer: Literal["pause", "continue"] = "pause"

    @field_validator("direction_step_deg")
    @classmethod
    def _divides_circle(cls, v):
        n = 360.0 / v
        if abs(n - round(n)) > 1e-9:
            raise ValueError("expected a step that divides 360 degrees (e.g. 15, 30, 45, 60, 90)")
        return v

    @property
    def offsets_deg(self) -> tuple[float, ...]:
        """The stream's directions as offsets from the reference, in (-180, 180], sorted."""
        n = int(round(360.0 / self.direction_step_deg))
        out = []
        for j in range(n):
            o = (j * self.direction_step_deg + 180.0) % 360.0 - 180.0
            out.append(180.0 if math.isclose(o, -180.0) else round(o, 9))
        return tuple(sorted(out))

    @property
    def n_directions(self) -> int:
        """D, the number of directions."""
        return len(self.offsets_deg)


def check_stream(protocol) -> None:
    """Cross-checks of a stream protocol against its other sections.

    Parameters
    ----------
    protocol : runner.protocol.Protocol
        With ``protocol.stream`` set.

    Raises
    ------
    InputError
        With the field that must change (source left empty for the caller).
    """
    s = protocol.stream
    d, t = protocol.design, protocol.timing
    if d.practice_trials:
        raise InputError("", "design.practice_trials", "a stream block has no practice trials; set it to 0")
    if t.first_adaptation_s:
        raise InputError("", "timing.first_adaptation_s", "a stream block has no first adaptation; set it to 0")
    if t.gap_s:
        raise InputError("", "timing.gap_s", "the periods of a stream follow each other without gaps; set it to 0")
    if protocol.procedure.max_reversals:
        raise InputError(
            "", "procedure.max_reversals",
            "a stream needs every test its balanced sequence holds; stop tracks by trials (set it to 0)",
        )
    tests = d.tracks_per_condition * d.trials_per_track
    if tests % s.n_directions:
        raise InputError(
            "", "design.trials_per_track",
            f"the {tests} tests (tracks_per_condition x trials_per_track) must be a multiple of the "
            f"{s.n_directions} stream directions for the sequence to be balanced",
        )
    if s.answer == "continue":
        window = math.ceil(t.answer_window_s * protocol.display.refresh_hz - 1e-6)
        room = s.nback_periods * s.period_frames
        if window > room:
            raise InputError(
                "", "timing.answer_window_s",
                f"with stream.answer = 'continue' the answer window ({window} frames) must end before the "
                f"next test ({room} frames later)",
            )
