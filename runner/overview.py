"""The plan of a protocol, as ``aftershift check`` prints it."""

from __future__ import annotations

from fitting.errors import InputError
from runner.protocol import Protocol, frame_plan
from runner.schedule import design_conditions

#: Assumed seconds per answer and per break, for duration estimates only.
ANSWER_ESTIMATE_S = 0.8
BREAK_ESTIMATE_S = 60.0


def estimated_seconds(protocol: Protocol) -> tuple[float, int]:
    """Estimated session duration (s) and number of breaks.

    Each trial lasts its frames plus an assumed answer time of
    :data:`ANSWER_ESTIMATE_S`; each break is assumed to last
    :data:`BREAK_ESTIMATE_S`.
    """
    f = frame_plan(protocol)
    d = protocol.design
    per_lag = {}
    for lag in [None, *d.lags]:
        k = lag or 0
        per_lag[lag] = (
            f["adapter_s"].seconds
            + k * (f["period_s"].seconds + f["gap_s"].seconds)
            + f["gap_s"].seconds
            + f["test_s"].seconds
            + ANSWER_ESTIMATE_S
            + f["pause_after_answer_s"].seconds
        )
    per_track = d.trials_per_track * d.tracks_per_condition
    main = per_track * (per_lag[None] + len(d.adapter_offsets_deg) * sum(per_lag[lag] for lag in d.lags))
    n_main = per_track * (1 + len(d.adapter_offsets_deg) * len(d.lags))
    practice = d.practice_trials * sum(per_lag.values()) / len(per_lag)
    breaks = (n_main - 1) // d.break_every if d.break_every else 0
    adaptation = f["first_adaptation_s"].seconds * (2 if d.practice_trials else 1)
    return main + practice + adaptation + breaks * BREAK_ESTIMATE_S, breaks


#: Largest session ``check`` accepts: trials, and hours of trials (sittings joined by --resume).
MAX_TRIALS = 50_000
MAX_HOURS = 48.0


def session_size(protocol: Protocol) -> tuple[int, float]:
    """Trials of one session and their estimated duration (s), breaks included."""
    d = protocol.design
    per_track = d.trials_per_track * d.tracks_per_condition
    if protocol.stream is None:
        seconds, _ = estimated_seconds(protocol)
        return per_track * (1 + len(d.adapter_offsets_deg) * len(d.lags)) + d.practice_trials, seconds
    s, f = protocol.stream, frame_plan(protocol)
    per_test = (s.nback_periods + 1) * s.period_frames / protocol.display.refresh_hz \
        + ANSWER_ESTIMATE_S + f["pause_after_answer_s"].seconds
    breaks = (per_track - 1) // d.break_every if d.break_every else 0
    return per_track, per_track * per_test + breaks * BREAK_ESTIMATE_S


def check_size(protocol: Protocol, source: str) -> None:
    """Refuse a session too large to be meant.

    Raises
    ------
    InputError
        Over :data:`MAX_TRIALS` trials or :data:`MAX_HOURS` hours.
    """
    too_large = size_problem(protocol)
    if too_large:
        raise InputError(source, "design.trials_per_track",
                         f"{too_large}; split the design into several protocols or sessions (--session) with fewer "
                         "tracks, trials, offsets or lags")


def size_problem(protocol: Protocol) -> str | None:
    """Why one session of ``protocol`` is larger than :func:`check_size` accepts, or ``None``."""
    trials, seconds = session_size(protocol)
    if trials > MAX_TRIALS or seconds > MAX_HOURS * 3600:
        return (f"{trials} trials, about {seconds / 3600:.0f} hours: more than one session can hold "
                f"({MAX_TRIALS} trials, {MAX_HOURS:g} hours)")
    return None


def header_lines(protocol: Protocol) -> list[str]:
    """Title, reference and display geometry: the first lines of every plan."""
    p, disp = protocol, protocol.display
    width_deg, height_deg = disp.extent_deg
    return [
        f"protocol   {p.title}",
        f"reference  {p.reference_deg:g} deg (direction, counter-clockwise from rightward); offsets positive = clockwise",
        f"display    {disp.screen_px[0]}x{disp.screen_px[1]} px, {disp.screen_cm[0]:g}x{disp.screen_cm[1]:g} cm "
        f"at {disp.distance_cm:g} cm = {width_deg:.1f}x{height_deg:.1f} deg, {disp.px_per_deg:.1f} px/deg, "
        f"{disp.refresh_hz:g} Hz",
    ]


def describe(protocol: Protocol) -> list[str]:
    """Lines describing conditions, trials, frames and the expected duration."""
    p = protocol
    d, disp, dots = p.design, p.display, p.dots
    conditions = design_conditions(p)
    per_condition = d.tracks_per_condition * d.trials_per_track
    n_main = per_condition * len(conditions)
    lines = header_lines(p) + [
        f"dots       {dots.n_dots} dots of {dots.dot_size_deg:g} deg in a {dots.aperture_radius_deg:g} deg radius aperture, "
        f"{dots.speed_deg_s:g} deg/s, coherence {dots.coherence:g}, lifetime {dots.lifetime_frames} frames",
        "",
        f"conditions {len(conditions)}: baseline ({d.baseline}) + {len(d.adapter_offsets_deg)} adapter offsets "
        f"x {len(d.lags)} lags",
        "           offsets (deg): " + ", ".join(f"{o:+g}" for o in d.adapter_offsets_deg),
        "           lags (periods): " + ", ".join(str(k) for k in d.lags),
        f"           intervening directions: {d.intervening}"
        + (f" from {', '.join(f'{o:+g}' for o in d.intervening_offsets_deg)}" if d.intervening == "balanced" else ""),
        f"tracks     {d.tracks_per_condition} per condition x {d.trials_per_track} trials, method {p.procedure.method}",
        f"trials     {n_main} main + {d.practice_trials} practice = {n_main + d.practice_trials}",
        "",
        "frames at {:g} Hz:".format(disp.refresh_hz),
    ]
    for name, fc in frame_plan(p).items():
        lines.append(f"  {name:<22} {fc.requested_s:>8g} s = {fc.frames:>5d} frames = {fc.seconds * 1000:10.3f} ms")
    seconds, breaks = estimated_seconds(p)
    lines += ["", duration_line(seconds, breaks)]
    return lines


def duration_words(seconds: float) -> str:
    """"under a minute" or "about N min"."""
    return "under a minute" if seconds < 60 else f"about {seconds / 60:.0f} min"


#: Sessions longer than this (s) get the long-session caution in ``check`` (common practice, no source).
LONG_SESSION_S = 45 * 60
#: Longer than this (s) and the caution asks for several sittings outright (common practice, no source).
SITTING_S = 2 * 3600


def long_session_caution(seconds: float) -> str:
    """``check``'s caution for a long session in a darkened room; empty for a short one."""
    if seconds <= LONG_SESSION_S:
        return ""
    split = ("split it over several sittings" if seconds > SITTING_S else
             "consider splitting it over sittings")
    return (f"caution    {duration_words(seconds)} in a darkened room is tiring and can disorient: keep "
            f"the breaks, stay with the observer, stop at once if they feel unwell, {split} (Escape at a break, "
            "then --resume), and keep to your ethics board's limits")


def duration_line(seconds: float, breaks: int) -> str:
    """The plan's duration line, with the assumptions behind the estimate."""
    return (f"duration   {duration_words(seconds)} including {breaks} break{'s' if breaks != 1 else ''} "
            f"(assuming {ANSWER_ESTIMATE_S:g} s per answer and {BREAK_ESTIMATE_S:g} s per break)")


def settings_from_text(text: str) -> dict | None:
    """A protocol's settings as "the same protocol" compares them, defaults filled in; None if it cannot be read.

    The validated protocol (:func:`runner.protocol.parse_protocol`, its light
    profile not read) through :func:`fitting.provenance.measured_settings`:
    a value written out that equals its default is the same setting as one
    left out.
    """
    from fitting.errors import InputError
    from fitting.provenance import measured_settings
    from runner.protocol import parse_protocol

    try:
        protocol = parse_protocol(text, source="recorded protocol", resolve_light=False)
    except (InputError, ValueError):
        return None
    return measured_settings(protocol.model_dump(mode="json"))


def plan_from_text(text: str) -> list[str]:
    """The plan of a protocol given as text (as ``check`` prints it), for reports.

    Raises
    ------
    InputError
        The text is not a valid protocol for this version.
    """
    from runner.protocol import parse_protocol

    protocol = parse_protocol(text, source="recorded protocol")
    if protocol.stream is not None:
        from runner.stream import describe_stream

        return describe_stream(protocol)
    return describe(protocol)
