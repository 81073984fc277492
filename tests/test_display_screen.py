"""The on-screen presenter in a real psychopy window (Xvfb, Mesa software GL).

What the observer sees is read back from the X server after each flip (the
window's pixels as the server holds them, not psychopy's own buffers) and
compared with what the trial plan says; the keyboard is driven with
synthetic key events from xdotool.
"""

from __future__ import annotations

import math
import os
import threading
import time

import numpy as np
import pytest
from conftest_display import DATA, require_xdotool, send_key, x_display  # noqa: F401

from runner import geometry
from runner.plan import Period, TrialPlan, motion
from runner.protocol import load_protocol

pytestmark = pytest.mark.display

PROBE = DATA / "display_probe.toml"


@pytest.fixture(scope="module")
def probe():
    return load_protocol(PROBE)


@pytest.fixture(scope="module")
def screen(x_display, probe):  # noqa: F811 - fixture imported above
    from runner import display

    presenter, answers = display.open_screen(probe, windowed=True, allow_refresh_mismatch=True, console=None)
    yield presenter, answers
    presenter.close()


def grab(window) -> np.ndarray:
    """The window's pixels as the X server holds them: (rows, cols) grey 0..255."""
    from Xlib import X
    from Xlib import display as xdisplay

    conn = xdisplay.Display(os.environ["DISPLAY"])
    try:
        handle = conn.create_resource_object("window", window.winHandle._window)
        geom = handle.get_geometry()
        raw = handle.get_image(0, 0, geom.width, geom.height, X.ZPixmap, 0xFFFFFFFF)
        pixels = np.frombuffer(raw.data, np.uint8).reshape(geom.height, geom.width, 4)[..., :3]
        return pixels.astype(float).mean(axis=2)
    finally:
        conn.close()


def shift_between(a: np.ndarray, b: np.ndarray) -> tuple[float, float]:
    """Displacement (dx right, dy up; px) that carries image ``a`` onto ``b``.

    Peak of the FFT cross-correlation, refined to sub-pixel precision by a
    parabola through the peak and its neighbours on each axis.
    """
    fa = np.fft.rfft2(a - a.mean())
    fb = np.fft.rfft2(b - b.mean())
    corr = np.fft.irfft2(np.conj(fa) * fb, s=a.shape)
    r, c = np.unravel_index(np.argmax(corr), corr.shape)
    rows, cols = corr.shape

    def vertex(m1, m0, p1):
        den = m1 - 2 * m0 + p1
        return 0.0 if den == 0 else 0.5 * (m1 - p1) / den

    dr = r + vertex(corr[r - 1, c], corr[r, c], corr[(r + 1) % rows, c])
    dc = c + vertex(corr[r, c - 1], corr[r, c], corr[r, (c + 1) % cols])
    dr = dr - rows if dr > rows / 2 else dr
    dc = dc - cols if dc > cols / 2 else dc
    return float(dc), float(-dr)  # image rows grow downwards; y points up


def probe_trial(protocol, test_offset_deg: float, frames: int = 3) -> TrialPlan:
    ref = protocol.reference_deg
    periods = (
        motion("adapter", frames, ref, -30.0),
        motion("test", frames, ref, test_offset_deg),
    )
    return TrialPlan(1, "probe", -30.0, 0, 0, test_offset_deg, (), False, periods, (7, 3, 1))


def record(presenter, trial) -> tuple[list[tuple[Period, int, np.ndarray]], object]:
    """Play a trial, grabbing the picture after every flip."""
    shots = []
    presenter.frame_hook = lambda period, i: shots.append((period, i, grab(presenter.window)))
    try:
        playback = presenter.play(trial)
    finally:
        presenter.frame_hook = None
    return shots, playback


def test_picture_moves_as_the_plan_says(screen, probe):
    """Two successive frames of a coherent field: direction within 3 deg, speed within 5 %."""
    presenter, _ = screen
    trial = probe_trial(probe, test_offset_deg=60.0)  # direction 90 - 60 = 30 deg
    assert trial.test_direction_deg == pytest.approx(30.0)
    shots, _ = record(presenter, trial)
    tests = [img for period, _, img in shots if period.role == "test"]
    assert len(tests) == 3
    d = probe.display
    h, w = tests[0].shape
    half = int((probe.dots.aperture_radius_deg + 1.0) * d.px_per_deg)  # the aperture, not the light patch
    crop = np.s_[h // 2 - half:h // 2 + half, w // 2 - half:w // 2 + half]
    for first, second in zip(tests, tests[1:]):
        # colours in 0..1 of the range: dots at dots.level, background at display.background
        assert first[crop].max() == pytest.approx(255 * probe.dots.level, abs=2)
        assert np.median(first) == pytest.approx(255 * d.background, abs=1)
        dx, dy = shift_between(first[crop], second[crop])
        direction = math.degrees(math.atan2(dy, dx)) % 360
        # px -> deg with the exact visual angle θ = 2·atan(s / 2d) (trigonometry; at 57 cm, 1 cm is about 1 deg: common practice, no source)
        step_deg = geometry.px_to_deg(math.hypot(dx, dy), d.distance_cm, d.screen_cm[0], d.screen_px[0])
        speed = step_deg * d.refresh_hz  # one kinematic step per nominal frame
        assert abs((direction - trial.test_direction_deg + 180) % 360 - 180) < 3.0
        assert speed == pytest.approx(probe.dots.speed_deg_s, rel=0.05)


def test_light_patch_size_and_timing(screen, probe):
    """The light patch: white only on test frames, flush with the lower-left corner, 2 deg wide."""
    presenter, _ = screen
    shots, _ = record(presenter, probe_trial(probe, test_offset_deg=10.0))
    d = probe.display
    side_deg = probe.safety.photodiode_patch_deg
    for period, _, img in shots:
        corner = img[-200:, :200]  # lower-left, far outside the aperture
        white = corner > 250
        if period.role != "test":
            assert not white.any(), "the light patch was on outside the test"
            continue
        rows = np.flatnonzero(white.any(axis=1))
        cols = np.flatnonzero(white.any(axis=0))
        assert rows[-1] == corner.shape[0] - 1 and cols[0] == 0, "the patch is not in the corner"
        side_px = (cols[-1] - cols[0] + 1, rows[-1] - rows[0] + 1)
        # θ = 2·atan(s / 2d) solved for s (trigonometry)
        expected_px = 2 * d.distance_cm * math.tan(math.radians(side_deg) / 2) * d.screen_px[0] / d.screen_cm[0]
        for s in side_px:
            assert abs(s - expected_px) <= 1.0
            # at 57 cm, 1 cm on screen is about 1 deg (common practice, no source)
            assert s / (d.screen_px[0] / d.screen_cm[0]) == pytest.approx(side_deg, rel=0.02)


def test_monitor_geometry_follows_visual_angle(x_display):  # noqa: F811
    """psychopy's deg units on our in-memory monitor agree with θ = 2·atan(s / 2d)."""
    from runner.display.window import make_monitor, px_per_deg

    base = load_protocol(PROBE)
    for distance in (40.0, 57.0, 114.0):
        proto = base.model_copy(update={"display": base.display.model_copy(update={"distance_cm": distance})})
        monitor = make_monitor(proto)
        assert monitor.getDistance() == distance and monitor.getWidth() == 20.0
        assert list(monitor.getSizePix()) == [800, 600]
        # 1 deg at the centre, exact: s = 2·d·tan(0.5 deg) (trigonometry)
        exact = 2 * distance * math.tan(math.radians(0.5)) * 800 / 20.0
        assert px_per_deg(monitor) == pytest.approx(exact, rel=1e-3)
        assert px_per_deg(monitor) == pytest.approx(proto.display.px_per_deg, rel=1e-3)
    # at 57 cm, 1 cm is about 1 deg (common practice, no source): 40 px/cm -> about 40 px/deg
    assert px_per_deg(make_monitor(base)) == pytest.approx(40.0, rel=0.01)


def test_every_period_runs_its_frames(screen, probe):
    """Each period is shown for exactly its frame count; flips are timed and audited."""
    presenter, _ = screen
    ref = probe.reference_deg
    periods = (
        Period("baseline", "static", 4),
        Period("gap", "blank", 2),
        motion("intervening", 5, ref, 45.0),
        motion("test", 6, ref, -5.0),
    )
    trial = TrialPlan(2, "probe", None, None, None, -5.0, (), False, periods, (7, 3, 2))
    seen = []
    presenter.frame_hook = lambda period, i: seen.append((period.role, i))
    try:
        playback = presenter.play(trial)
    finally:
        presenter.frame_hook = None
    assert seen == [(p.role, i) for p in periods for i in range(p.frames)]
    assert playback.n_frames == 17 and not playback.aborted
    assert playback.test_offset_s > playback.test_onset_s
    summary = presenter.timing_summary()
    assert summary["paced_without_vsync"] == (summary["measured_refresh_hz"] > 1.5 * probe.display.refresh_hz)
    assert summary["frame_intervals"] >= 18 and summary["dropped_frames"] >= playback.dropped_frames


def _press_later(presenter, key: str, delay_s: float = 0.4) -> threading.Timer:
    """Send ``key`` to the presenter's own window after ``delay_s`` (closed
    windows of earlier tests may linger on the X server under the same name)."""
    window = str(presenter.window.winHandle._window)
    timer = threading.Timer(delay_s, send_key, (window, key, dict(os.environ)))
    timer.start()
    return timer


@pytest.mark.parametrize(("key", "expected"), [("right", 1), ("left", 0)])
def test_answer_keys(screen, probe, key, expected):
    """Synthetic arrow keys become answers, timed from the test onset."""
    require_xdotool()
    from runner.display._psychopy import core

    presenter, answers = screen
    trial = probe_trial(probe, test_offset_deg=5.0)
    playback = presenter.play(trial)
    window = str(presenter.window.winHandle._window)
    sent = []

    def press():
        sent.append(core.getTime())  # the session clock, just before xdotool runs
        send_key(window, key, dict(os.environ))

    timer = threading.Timer(0.4, press)
    timer.start()
    answer = answers.answer(trial, playback, window_frames=240)
    timer.join()
    assert answer.response_cw == expected and not answer.quit
    # rt is on the session clock: the key lands after it was sent, within
    # xdotool's start-up and one frame (generous bound for a loaded machine)
    sent_rt = sent[0] - playback.test_onset_s
    assert sent_rt <= answer.rt_s <= sent_rt + 0.3


def test_no_key_is_a_missed_answer(screen, probe):
    presenter, answers = screen
    trial = probe_trial(probe, test_offset_deg=5.0)
    answer = answers.answer(trial, presenter.play(trial), window_frames=6)
    assert answer.response_cw is None and answer.rt_s is None and not answer.quit


def test_quit_and_pause_keys(screen, probe):
    """Escape ends the answer wait with quit; the pause key is kept for the session loop."""
    require_xdotool()
    presenter, answers = screen
    presenter.requests()
    timer = _press_later(presenter, "p", 0.2)
    assert presenter.blank(40) is True
    timer.join()
    assert presenter.requests() == {"pause"}
    assert presenter.requests() == set()
    trial = probe_trial(probe, test_offset_deg=5.0)
    playback = presenter.play(trial)
    timer = _press_later(presenter, "escape")
    answer = answers.answer(trial, playback, window_frames=240)
    timer.join()
    assert answer.quit and answer.response_cw is None


def test_escape_during_practice_feedback_is_obeyed_at_once(screen):
    # before, an Escape during the feedback was only noted for the loop's next request: the "practice is
    # over" screen and then the whole first adaptation (20 s in a bundled protocol) came first
    require_xdotool()
    presenter, _ = screen
    presenter.requests()
    send_key(str(presenter.window.winHandle._window), "escape", dict(os.environ))
    time.sleep(0.2)                 # delivered before the feedback's first flip reads the keys
    presenter.feedback(True)
    assert presenter.blank(1) is False
    assert presenter.requests() == set(), "one Escape ends the session once"


def test_the_windows_close_button_is_the_quit_key(screen):
    # before, the close button of a --windowed session (the window manager's WM_DELETE_WINDOW) did nothing
    presenter, _ = screen
    presenter.requests()
    _close_once(presenter.window.winHandle._window)
    timer = _press_later(presenter, "space", 60.0)      # only if the close is never obeyed: fails, does not hang
    try:
        assert presenter.show_text("Press space to go on.") is False
        assert presenter.show_text("Press space to go on.", wait=False) is True, "one close, one quit"
    finally:
        timer.cancel()                                  # obeyed: no key is ever sent
        timer.join()


def _close_once(window_id: int) -> None:
    """Send the window manager's close message to a window, once, and return when the X server has carried it out.

    ``sync`` is a round trip: its reply comes after the server has carried
    out the send, so the message waits in the window's connection from then
    on and the window's next flip sees it, however slow the machine.  A
    flush alone, with the connection closed right after, lost the message
    whenever the busy server saw the connection closed before reading the
    request (under two busy loops, 3 of 3 runs; never obeyed in 60 s): that
    was this test's flakiness, not a late delivery.
    """
    from Xlib import X, display as xdisplay, protocol

    conn = xdisplay.Display(os.environ["DISPLAY"])
    try:
        window = conn.create_resource_object("window", window_id)
        message = protocol.event.ClientMessage(
            window=window, client_type=conn.intern_atom("WM_PROTOCOLS"),
            data=(32, [conn.intern_atom("WM_DELETE_WINDOW"), X.CurrentTime, 0, 0, 0]))
        window.send_event(message, event_mask=0)
        conn.sync()
    finally:
        conn.close()


def test_text_waits_for_proceed(screen):
    require_xdotool()
    presenter, _ = screen
    timer = _press_later(presenter, "space")
    assert presenter.show_text("Press space to go on.") is True
    timer.join()
    timer = _press_later(presenter, "escape")
    assert presenter.show_text("Press space to go on.") is False
    timer.join()


def test_refresh_mismatch_is_refused(x_display, probe):  # noqa: F811
    """A display that does not refresh at the protocol's rate is refused unless overridden."""
    from runner import display, safety

    odd = probe.model_copy(update={"display": probe.display.model_copy(update={"refresh_hz": 47.0})})
    with pytest.raises(safety.SafetyRefusal) as caught:
        display.open_screen(odd, windowed=True, allow_refresh_mismatch=False, console=None)
    assert caught.value.kind == "timing"
    assert safety.REFRESH_OVERRIDE_OPTION in str(caught.value)


def _screen_size():
    from runner.display._psychopy import pyglet

    screen = pyglet.canvas.get_display().get_default_screen()
    return screen.width, screen.height


def test_full_screen_must_have_the_protocol_resolution(x_display, probe):  # noqa: F811
    """Full screen at another resolution would put every stimulus at the wrong size: bad input."""
    from fitting.errors import InputError
    from runner import display

    if list(_screen_size()) == list(probe.display.screen_px):
        pytest.skip("the X screen happens to have the probe's resolution")
    with pytest.raises(InputError) as caught:
        display.open_screen(probe, windowed=False, allow_refresh_mismatch=True, console=None)
    assert caught.value.field == "display.screen_px"


def test_full_screen_hides_the_cursor(x_display, probe):  # noqa: F811
    from runner import display

    w, h = _screen_size()
    fitted = probe.display.model_copy(update={"screen_px": [w, h], "screen_cm": [w / 40, h / 40]})
    presenter, _ = display.open_screen(probe.model_copy(update={"display": fitted}), windowed=False,
                                       allow_refresh_mismatch=True, console=None)
    try:
        assert list(presenter.window.size) == [w, h]
        assert presenter.window.mouseVisible is False
        assert presenter.window.useNativeGamma, "the gamma table must stay as the system set it"
        assert presenter.timing_summary()["fullscreen"] is True
    finally:
        presenter.close()


def test_a_stalled_frame_counts_as_dropped(screen, probe):
    """A frame held up for 0.1 s (six 60 Hz frames) is seen as dropped frames in the playback."""
    import time

    presenter, _ = screen
    trial = probe_trial(probe, test_offset_deg=5.0, frames=4)
    presenter.frame_hook = lambda period, i: time.sleep(0.1) if (period.role, i) == ("adapter", 1) else None
    try:
        playback = presenter.play(trial)
    finally:
        presenter.frame_hook = None
    # an interval of about 0.1 s spans at least 6 refreshes at 60 Hz: 5 or more lost
    assert playback.dropped_frames >= 5 and not playback.timing_ok


def test_escape_stops_a_trial_at_once(screen, probe):
    require_xdotool()
    presenter, _ = screen
    trial = probe_trial(probe, test_offset_deg=5.0, frames=120)  # 4 s at 60 Hz
    timer = _press_later(presenter, "escape", 0.3)
    playback = presenter.play(trial)
    timer.join()
    assert playback.aborted and 0 < playback.n_frames < 240
    assert presenter.take_test_keys() == []
