"""``aftershift display-test --frames DIR``: rendered frames for checking stimuli offline.

Two trials of the protocol are played on the real window exactly as a
session plays them (:meth:`runner.display.presenter.ScreenPresenter.play`):
an adapted trial at the first adapter offset and the largest lag, and a
baseline trial.  The first ``frames_per_period`` frames of every period type
(adapter, baseline, intervening, gap, test — the test frames carry the
photodiode patch when the protocol has one) are read back from the front
picture as the X server holds it after their flip (read back with python-xlib,
as the display tests do: the OpenGL front buffer is not readable after a
swap on every driver) and written as PNG files, with a side table
``frames.csv``: file, trial, period, look, direction and offset, frame number
within the period and within the trial, and whether the photodiode patch is
on.  A lab can then check direction, speed, contrast and the patch without
reading the code.
"""

from __future__ import annotations

import csv
import sys
from pathlib import Path

from fitting.errors import InputError
from runner.plan import TrialPlan, trial_periods
from runner.protocol import Protocol

#: Columns of the side table.
TABLE_COLUMNS = ("file", "trial", "period", "look", "direction_deg", "offset_deg", "frame_in_period",
                 "frame_in_trial", "patch_on")


def window_picture(win):
    """The window's pixels as the X server holds them, as a PIL RGB image."""
    from PIL import Image
    from Xlib import X
    from Xlib import display as xdisplay

    conn = xdisplay.Display()
    try:
        handle = conn.create_resource_object("window", win.winHandle._window)
        geom = handle.get_geometry()
        raw = handle.get_image(0, 0, geom.width, geom.height, X.ZPixmap, 0xFFFFFFFF)
        return Image.frombytes("RGB", (geom.width, geom.height), raw.data, "raw", "BGRX")
    finally:
        conn.close()


def _trials(protocol: Protocol) -> list[tuple[str, TrialPlan]]:
    d, ref_offset = protocol.design, protocol.procedure.start_offset_deg
    lag = max(d.lags)
    if d.intervening == "balanced":
        pool = list(d.intervening_offsets_deg)
        intervening = tuple(pool[i % len(pool)] for i in range(lag))
    else:
        intervening = (0.0,) * lag
    adapter = d.adapter_offsets_deg[0]
    adapted = trial_periods(protocol, adapter, intervening, ref_offset)
    baseline = trial_periods(protocol, None, (), -ref_offset)
    return [
        ("adapted", TrialPlan(1, f"adapt{adapter:+g}_lag{lag}", adapter, lag, 0, ref_offset, intervening, False,
                              adapted, (0, 3, 1))),
        ("baseline", TrialPlan(2, "baseline", None, None, 0, -ref_offset, (), False, baseline, (0, 3, 2))),
    ]


def check_capture(protocol: Protocol, out_dir: str | Path, frames_per_period: int) -> None:
    """Refuse what :func:`capture_frames` cannot do, before the screening and caution are printed.

    Raises
    ------
    InputError
        A stream protocol (frames are taken of adapt-test trials), a count
        outside 1..100, or ``out_dir`` naming something that is not a folder.
    """
    if protocol.stream is not None:
        raise InputError("argument", "--frames", "frame capture covers adapt-test trials only; this protocol is a "
                         "stream block")
    if not 1 <= frames_per_period <= 100:
        raise InputError("argument", "--frames-per-period", f"expected 1 to 100, got {frames_per_period}")
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(str(out), "--frames", "is a file, not a folder; name a folder for the frames")


def capture_frames(protocol: Protocol, out_dir: str | Path, frames_per_period: int = 3, windowed: bool = False,
                   stream=None) -> Path:
    """Write rendered frames of each period type and their table.

    Parameters
    ----------
    protocol : Protocol
        A discrete adapt–test protocol.
    out_dir : str or Path
        Folder for the PNG files and ``frames.csv`` (made if missing).
    frames_per_period : int
        Frames written from the start of each period type (1..100).
    windowed : bool
        A window instead of full screen.
    stream : file-like, optional
        Where a summary is printed (default standard output).

    Returns
    -------
    Path
        The table.

    Raises
    ------
    InputError
        A stream protocol, a bad count, or a folder that cannot be written.
    """
    from runner.display.presenter import open_screen

    check_capture(protocol, out_dir, frames_per_period)
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(str(out), "--frames", f"cannot be made ({exc.strerror})") from None
    stream = stream or sys.stdout
    rows: list[dict] = []
    presenter, _ = open_screen(protocol, windowed, allow_refresh_mismatch=True)
    patch_side = protocol.safety.photodiode_patch_deg
    try:
        win = presenter.window
        for kind, trial in _trials(protocol):
            seen: dict[str, int] = {}
            count = {"frame": 0}

            def grab(period, i, kind=kind):
                count["frame"] += 1
                if i == 0:
                    seen[period.role] = seen.get(period.role, 0) + 1
                if i >= frames_per_period or seen[period.role] > 1:
                    return  # the first period of each type is enough
                name = f"{kind}_{count['frame']:04d}_{period.role}_{i:03d}.png"
                window_picture(win).save(out / name)
                rows.append({
                    "file": name, "trial": kind, "period": period.role, "look": period.look,
                    "direction_deg": "" if period.direction_deg is None else f"{period.direction_deg:g}",
                    "offset_deg": "" if period.offset_deg is None else f"{period.offset_deg:g}",
                    "frame_in_period": i, "frame_in_trial": count["frame"] - 1,
                    "patch_on": int(period.role == "test" and patch_side > 0),
                })

            presenter.frame_hook = grab
            presenter.play(trial)
        presenter.frame_hook = None
    finally:
        presenter.close()
    table = out / "frames.csv"
    with table.open("w", newline="", encoding="utf-8") as f:
        writer = csv.DictWriter(f, fieldnames=TABLE_COLUMNS)
        writer.writeheader()
        writer.writerows(rows)
    kinds = sorted({r["period"] for r in rows})
    missing = [k for k in ("adapter", "intervening", "gap", "test") if k not in kinds]
    stream.write(f"{len(rows)} frames of {', '.join(kinds)} written to {out} (table: {table.name})\n")
    if missing:
        stream.write(f"this protocol has no {', '.join(missing)} periods\n")
    if patch_side <= 0:
        stream.write("this protocol has no photodiode patch (safety.photodiode_patch_deg = 0)\n")
    stream.flush()
    return table
