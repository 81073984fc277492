"""``aftershift display-test``: frame timing of this display under load.

The test opens the observer's window, measures the refresh rate as a
session does, then draws the heaviest frame a protocol can ask for — its
whole dot field moving coherently, the fixation mark and the light patch —
for a given time, timestamping every flip.  It reports the refresh rate,
the mean, SD and longest frame interval, the dropped frames, and a verdict.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

import numpy as np

from fitting.errors import InputError
from runner import safety
from runner.display import MIN_TEST_S, check_seconds
from runner.display._psychopy import event, version as psychopy_version
from runner.display.presenter import dot_spec, open_measured_scene
from runner.display.window import UNSYNCED_FACTOR, px_per_deg, renderer_name
from runner.dots import DotField
from runner.protocol import Protocol
from runner.timing import audit_flips

#: Words in an OpenGL renderer name that mean drawing in software, not on a GPU.
SOFTWARE_RENDERERS = ("llvmpipe", "softpipe", "swrast", "software")


def _verdict(report: dict) -> tuple[bool, str]:
    ok, text = _timing_verdict(report)
    if not report["stopped_early"]:
        return ok, text
    if report["seconds_measured"] < MIN_TEST_S:
        return False, (f"no verdict: stopped by the quit key after {report['seconds_measured']:.2f} s; measure "
                       f"for at least {MIN_TEST_S:g} s")
    return ok, f"{text} (stopped by the quit key after {report['seconds_measured']:.1f} of " \
               f"{report['seconds_requested']:g} s)"


def _timing_verdict(report: dict) -> tuple[bool, str]:
    if report["flips_unsynced"]:
        return False, (
            f"flips are not synchronised to the display: {report['refresh_hz_measured']:.0f} per second "
            f"for a {report['refresh_hz_protocol']:g} Hz protocol (no vsync; a virtual or remote display, or "
            "vsync switched off in the graphics driver); 'aftershift run' refuses this display unless "
            f"{safety.REFRESH_OVERRIDE_OPTION} is given"
        )
    if not report["refresh_within_tolerance"]:
        return False, (
            f"refresh mismatch: measured {report['refresh_hz_measured']:.2f} Hz, the protocol says "
            f"{report['refresh_hz_protocol']:g} Hz (more than {safety.REFRESH_TOLERANCE:.0%} apart); "
            f"'aftershift run' refuses this display unless {safety.REFRESH_OVERRIDE_OPTION} is given"
        )
    if report["dropped_frames"]:
        return False, (
            f"dropped frames: {report['dropped_frames']} in {report['frames']} frames while drawing "
            f"{report['n_dots']} dots; close other programs, use full screen, or lower dots.density_per_deg2"
        )
    return True, f"ok: {report['frames']} frames at {report['refresh_hz_measured']:.2f} Hz, none dropped"


def display_test(protocol: Protocol | None = None, seconds: float = 10.0, windowed: bool = False,
                 report_path=None, stream=None, screening: dict | None = None) -> dict:
    """Measure frame timing while the protocol's full dot field is drawn.

    Parameters
    ----------
    protocol : Protocol, optional
        Default: the built-in defaults of :class:`runner.protocol.Protocol`.
    seconds : float
        How long to draw, :data:`MIN_TEST_S` to :data:`MAX_TEST_S`.  The
        quit key ends the test early (with no verdict before
        :data:`MIN_TEST_S`).
    windowed : bool
        A window instead of full screen.
    report_path : str or Path, optional
        Where to write the JSON report (folders are made); None writes none.
    stream : file-like, optional
        Where the verdict is printed (default standard output).
    screening : dict, optional
        The photosensitivity screening of the protocol and whether it was
        acknowledged (:meth:`runner.safety.Screening.to_dict`), recorded as
        ``safety``.

    Returns
    -------
    dict
        The report: refresh rates, frame-interval mean/SD/max (ms), dropped
        frames, CPU time per frame, window and renderer, ``verdict`` (text)
        and ``verdict_ok``, and ``safety`` when ``screening`` is given.

    Raises
    ------
    InputError
        ``--seconds`` out of range, or a report path that is a folder.
    """
    check_seconds(seconds)
    if report_path is not None and Path(report_path).is_dir():
        raise InputError(str(report_path), "--report", "is a folder; expected a file name for the JSON report")
    protocol = protocol or Protocol()
    stream = stream or sys.stdout
    hz = float(protocol.display.refresh_hz)
    win, scene, measured = open_measured_scene(protocol, windowed)
    try:
        field = DotField(dot_spec(protocol), np.random.default_rng(0))
        field.start_period(protocol.reference_deg)
        event.clearEvents()
        scene.draw(None)
        flips = [win.flip()]
        cpu = []
        end = flips[0] + seconds
        stopped = False
        while flips[-1] < end and not stopped:
            start = time.perf_counter()
            scene.draw(field.step(), patch=True)
            cpu.append(time.perf_counter() - start)
            flips.append(win.flip())
            stopped = protocol.keys.quit in event.getKeys()
        size = [int(win.size[0]), int(win.size[1])]
        scale = px_per_deg(win.monitor)
        renderer = renderer_name()
    finally:
        win.close()
    audit = audit_flips(flips, hz)
    report = {
        "protocol_title": protocol.title,
        "refresh_hz_protocol": hz,
        "refresh_hz_measured": round(measured, 3),
        "refresh_within_tolerance": safety.check_refresh(measured, hz) is None,
        "flips_unsynced": measured > UNSYNCED_FACTOR * hz,
        "seconds_requested": float(seconds),
        "seconds_measured": round(flips[-1] - flips[0], 4),
        "stopped_early": stopped,
        "n_dots": scene.n_dots,
        "frames": audit.n_intervals,
        "frame_interval_mean_ms": round(audit.mean_s * 1e3, 4),
        "frame_interval_sd_ms": round(audit.sd_s * 1e3, 4),
        "frame_interval_max_ms": round(audit.longest_s * 1e3, 4),
        "dropped_frames": audit.dropped,
        "cpu_ms_per_frame_mean": round(float(np.mean(cpu)) * 1e3, 4) if cpu else 0.0,
        "cpu_ms_per_frame_max": round(float(np.max(cpu)) * 1e3, 4) if cpu else 0.0,
        "window_px": size,
        "fullscreen": not windowed,
        "px_per_deg": round(scale, 4),
        "renderer": renderer,
        "software_rendering": any(word in renderer.lower() for word in SOFTWARE_RENDERERS),
        "psychopy": psychopy_version,
    }
    report["verdict_ok"], report["verdict"] = _verdict(report)
    if screening is not None:
        report["safety"] = screening
    lines = [
        f"display test: {report['n_dots']} dots, {report['frames']} frames in {report['seconds_measured']:.2f} s",
        f"  refresh   {report['refresh_hz_measured']:.2f} Hz measured, {hz:g} Hz in the protocol",
        f"  interval  mean {report['frame_interval_mean_ms']:.3f} ms, SD {report['frame_interval_sd_ms']:.3f} ms, "
        f"max {report['frame_interval_max_ms']:.3f} ms",
        f"  dropped   {report['dropped_frames']}",
        f"  renderer  {renderer}" + (" (software rendering)" if report["software_rendering"] else ""),
        f"verdict: {report['verdict']}",
    ]
    if report_path is not None:
        path = Path(report_path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
        lines.append(f"report: {path}")
    stream.write("\n".join(lines) + "\n")
    stream.flush()
    return report
