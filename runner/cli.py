"""The ``aftershift`` command.

Exit codes: 0 success; 1 a Python package missing from the set-up (one
line naming it); 2 bad input (protocol, data, arguments, observer ID)
with one line on stderr naming the file and field; 3 refused for safety
(photosensitivity, display timing) unless explicitly acknowledged; 4 the
display failed during a ``run`` or while its window opened (window closed
from outside, X connection lost), with one line naming how to go on; 130
stopped by Ctrl-C or SIGTERM.
"""

from __future__ import annotations

import argparse
import gc
import os
import re
import signal
import sys
from pathlib import Path

from fitting.errors import InputError, SafetyRefusal, name_too_long

EXIT_OK, EXIT_SETUP, EXIT_INPUT, EXIT_SAFETY, EXIT_DISPLAY = 0, 1, 2, 3, 4
DEFAULT_PROTOCOL = Path(__file__).resolve().parent.parent / "protocols" / "offset_by_lag.toml"


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors and exit code 2."""

    def error(self, message):  # noqa: D102 - argparse hook
        command = self.prog.partition(" ")[2]
        raise InputError("", command, f"{message} (see `{self.prog} --help`)")


def _int_arg(text: str) -> int:
    """argparse type of whole-number options: ASCII digits only.

    ``int`` also takes ``1_0`` and the digits of other scripts (fullwidth, superscript).
    """
    if not re.fullmatch(r"-?[0-9]{1,30}", text):
        raise argparse.ArgumentTypeError(f"expected a whole number written with the digits 0-9, not {text[:40]!r}")
    return int(text)


def _load(path: str, size_check: bool = True):
    """Read and validate a protocol; durations that are not whole frames are refused (exit 3)."""
    from runner import safety
    from runner.overview import check_size
    from runner.protocol import FrameTimingError, parse_protocol, read_protocol_text

    text = read_protocol_text(path)
    try:
        protocol = parse_protocol(text, source=str(path))
    except FrameTimingError as exc:
        raise safety.timing_refusal(exc.source, exc.field, exc.message) from None
    if size_check:
        check_size(protocol, str(path))
    return protocol, text


def _check_count(value, option: str, low: int, high: int, what: str):
    """Refuse a whole-number option outside [low, high] with one line."""
    if value is not None and not (low <= value <= high):
        raise InputError("argument", option, f"{what} must be from {low} to {high:,}, not {value:,}")
    return value


def _check_seed(value):
    """Refuse a ``--seed`` outside the 32-bit range sidecars hold."""
    from runner.trial_log import MAX_SEED

    return _check_count(value, "--seed", 0, MAX_SEED, "a seed")


def _screen(protocol, path: str, acknowledged: bool):
    """Run the photosensitivity screening; refuse (exit 3) unless it clears or is acknowledged."""
    from runner import safety

    result = safety.screen_protocol(protocol)
    refusal = safety.screening_refusal(result, source=str(path))
    if refusal is not None and not acknowledged:
        raise refusal
    return result


def _screen_before_window(protocol, path: str, acknowledged: bool):
    """Screen a protocol as ``check`` and ``run`` do (exit 3 unless cleared or acknowledged), then print the
    verdict and the caution: ``display-test`` draws the protocol's stimulus with no observer caution screen."""
    from runner import safety

    result = _screen(protocol, path, acknowledged)
    lines = result.summary_lines()
    print(lines[0])
    if not result.cleared:
        print(f"photosensitivity: {result.verdict}, acknowledged with {safety.ACKNOWLEDGE_OPTION}")
    print("\n".join(line.strip() for line in lines if line.startswith("  caution:")), flush=True)
    return result


def _light(protocol) -> dict | None:
    """Warn (stderr) about the protocol's light profile; its sidecar record, None without one."""
    from runner.light import light_plan

    plan = light_plan(protocol)
    if plan is None:
        return None
    for line in plan.warnings:
        print(f"aftershift: warning: {line}", file=sys.stderr)
    return plan.sidecar()


def cmd_check(args) -> int:
    from runner import safety
    from runner.light import light_plan
    from runner.overview import check_size, describe, duration_words, long_session_caution, session_size
    from runner.protocol import ignored_settings
    from runner.screens import screen_texts

    protocol, _ = _load(args.protocol, size_check=False)
    trials, seconds = session_size(protocol)
    print(f"size       {trials} trials, {duration_words(seconds)}")
    check_size(protocol, args.protocol)
    if protocol.stream is not None:
        from runner.stream import describe_stream

        print("\n".join(describe_stream(protocol)))
    else:
        print("\n".join(describe(protocol)))
    ignored = ignored_settings(protocol.procedure)
    if ignored:
        print(f"note       {', '.join(ignored)}: not used by method = \"{protocol.procedure.method}\"")
    caution = long_session_caution(seconds)
    if caution:
        print(caution)
    if light_plan(protocol) is not None:
        print()
        print("\n".join(light_plan(protocol).check_lines()))
        _light(protocol)
    screen_texts(protocol, safety.caution_text(protocol, args.protocol), args.protocol)  # lab texts, as `run` reads them
    result = safety.screen_protocol(protocol)
    print()
    print("\n".join(result.summary_lines()))
    refusal = safety.screening_refusal(result, source=args.protocol)
    if refusal is not None:
        if args.flicker_ack:
            print(f"photosensitivity: {result.verdict}, acknowledged with {safety.ACKNOWLEDGE_OPTION}")
            return EXIT_OK
        raise refusal
    return EXIT_OK


def cmd_simulate(args) -> int:
    from fitting.outputs import check_out_dir
    from runner.launch import MAX_SIMULATED, simulate, simulated_observers_in
    from runner.observers import load_model
    from runner.trial_log import RESUME_ADVICE, StorageError, check_identifier

    _check_seed(args.seed)
    check_identifier(args.session, "--session")
    if args.observers is None:      # a resume continues every observer in --out, as its stop line advises
        args.observers = simulated_observers_in(args.out, args.session) if args.resume else 1
    _check_count(args.observers, "--observers", 1, MAX_SIMULATED, "the number of simulated observers")
    check_out_dir(args.out)
    protocol, text = _load(args.protocol)
    light = _light(protocol)
    screening = _screen(protocol, args.protocol, args.flicker_ack)
    model = load_model(args.model) if args.model else None
    try:
        paths = simulate(
            protocol, args.protocol, text, args.out, model, args.observers, args.seed, args.resume, args.session,
            screening=screening.to_dict(acknowledged=args.flicker_ack), light=light,
        )
    except StorageError as exc:         # name the whole command that continues, as a stop by a signal does
        exc.message = exc.message.replace(RESUME_ADVICE, f"continue: {_simulate_resume_command(args)}")
        raise
    for p in paths:
        print(p)
    return EXIT_OK


def cmd_run(args) -> int:
    from runner import display, safety
    from runner.console import ExperimenterConsole
    from runner.launch import (check_can_start, check_resume, close_complete_log, completed_rows, end_running_part,
                               run_on_screen)
    from runner.screens import screen_texts
    from runner.session_lock import SessionLock
    from runner.trial_log import RESUME_ADVICE, StorageError, check_identifier, log_paths
    from runner.x_connection import on_connection_lost

    check_identifier(args.observer, "--observer")
    check_identifier(args.session, "--session")
    _check_seed(args.seed)
    check_can_start(args.out, args.observer, args.session, args.resume, args.seed)
    done = completed_rows(args.out, args.observer, args.session) if args.resume else None
    if done is not None:     # nothing to run: say so without opening the display
        print(f"session complete already: {done} trials in the log; nothing to resume")
        return EXIT_OK
    protocol, text = _load(args.protocol)
    light = _light(protocol)
    screening = _screen(protocol, args.protocol, args.flicker_ack)
    caution = safety.caution_text(protocol, args.protocol)
    screen_texts(protocol, caution, args.protocol)  # a bad instructions file is refused before the display opens
    if args.resume:     # another protocol, light levels or --seed: refused before the display opens
        check_resume(args.out, args.observer, args.session, text, light, args.seed)
        done = close_complete_log(protocol, args.out, args.observer, args.session)
        if done is not None:
            print(f"session complete already: {done} trials in the log; nothing to resume")
            return EXIT_OK
    console = ExperimenterConsole(quick_fit=_quick_fit_text)
    # the session's lock before the window opens: of two runs started at once on one session the second ends
    # here, in one line and with no window; the log takes the lock over and releases it when it closes
    with SessionLock(log_paths(args.out, args.observer, args.session)[0]) as lock:
        when = "while its window opened"

        def connection_lost():      # Xlib ends the process after this: record the part, say how to go on
            end_running_part("failed")
            print(_display_failed_line(args, "the connection to the X server was lost", when), file=sys.stderr)

        on_connection_lost(connection_lost, EXIT_DISPLAY)     # before the window: Xlib's own ending prints two lines
        try:
            presenter, answers = display.open_screen(protocol, args.windowed, args.refresh_ack, console)
        except Exception as exc:
            if not _from_display(exc):
                raise
            print(_display_failed_line(args, _display_error(exc), when), file=sys.stderr)
            return EXIT_DISPLAY
        when = "during the session"
        extra = {
            "measured_refresh_hz": presenter.measured_hz,
            "acknowledged": {"flicker": bool(args.flicker_ack), "refresh_mismatch": bool(args.refresh_ack)},
            "safety": screening.to_dict(acknowledged=args.flicker_ack),
            **({"light": light} if light is not None else {}),
        }
        lost = stop = None
        try:
            result = run_on_screen(
                protocol, args.protocol, text, args.out, args.observer, presenter, answers, caution, console, extra,
                resume=args.resume, session=args.session, seed=args.seed, lock=lock,
            )
        except KeyboardInterrupt as exc:    # the stop line says whether the last quick fit was shown
            stop = exc
        except StorageError as exc:         # a full disk: name the whole command that continues, as simulate does
            exc.message = exc.message.replace(RESUME_ADVICE, f"continue: {_resume_command(args)}")
            raise
        except Exception as exc:
            if not _from_display(exc):
                raise
            lost = exc
        finally:
            try:
                presenter.close()
            except Exception as exc:
                if not _from_display(exc):
                    raise
    if stop is not None:
        return _interrupted(args, stop, quick_fit_shown=console.fit_is_current)
    if lost is not None:    # the part is marked failed in the sidecar
        print(_display_failed_line(args, f"{_display_error(lost)}; was the window closed?", when), file=sys.stderr)
        return EXIT_DISPLAY
    print(f"session {result.ended_by}: {result.rows_added} trials this time, {result.rows_total} in the log")
    if result.ended_by == "quit":
        print(f"to continue later, run the same command with --resume: {_resume_command(args)}")
    return EXIT_OK


def _run_kept(args, quick_fit_shown: bool = True) -> str:
    """What an ended ``run`` leaves, and how to go on: resume a session that started, else start it again.

    A session recorded complete has nothing to resume: its fit is named
    instead, and whether the stop skipped the quick fit after its last trial.
    """
    from runner.launch import completed_rows
    from runner.trial_log import log_paths

    log, sidecar = log_paths(args.out, args.observer, args.session)
    done = completed_rows(args.out, args.observer, args.session)
    if done is not None:
        skipped = "" if quick_fit_shown else "; the quick fit after the last trial was skipped"
        return (f"the session is complete: all {done} trials are saved in {log} (nothing to resume){skipped}; "
                f"to fit them: {_fit_command(log, args.out)}")
    if sidecar.exists():
        return f"every completed trial is in the log; to continue: {_resume_command(args)}"
    return f"the session had not started and nothing was recorded; to start it, {_again(args)}"


def _again(args) -> str:
    """How to start a command that recorded nothing: the same command, less ``--resume`` if it had it."""
    return "run the same command without --resume" if getattr(args, "resume", False) else "run the same command again"


def _fit_command(logs, out) -> str:
    """The ``fit`` command for ``logs`` (a log or a folder of them), into ``out/fit``."""
    import shlex

    return shlex.join(["aftershift", "fit", str(logs), "--out", str(Path(out) / "fit")])


def _display_failed_line(args, what: str, when: str) -> str:
    """The one line of a ``run`` whose display failed ``when`` (while its window opened, during the session)."""
    return f"aftershift run: the display failed {when} ({what}); {_run_kept(args)}"


def _display_error(exc: BaseException) -> str:
    """A window library's error in words: the X display named when it could no longer be reached."""
    if type(exc).__name__ == "NoSuchDisplayException":     # pyglet's, one class per platform
        return f"cannot connect to the X display {os.environ.get('DISPLAY') or '(DISPLAY not set)'}"
    return f"{type(exc).__name__}: {exc}"


def _from_display(exc: BaseException) -> bool:
    """True for an error of the window library (a window closed from outside, a lost X connection)."""
    return type(exc).__module__.split(".")[0] in ("pyglet", "psychopy")


def _simulate_kept(args) -> str:
    """What a stopped ``simulate`` leaves, and the command that continues it (:func:`_simulate_resume_command`)."""
    from runner.launch import completed_rows, simulated_names
    from runner.trial_log import log_paths

    names = simulated_names(args.observers or 1)
    if not log_paths(args.out, names[0], args.session)[0].exists():
        return f"nothing was recorded; {_again(args)}"
    done = [completed_rows(args.out, name, args.session, kind="simulation") for name in names]
    if None not in done:
        return (f"every session is complete: all {sum(done)} trials are saved in {args.out} (nothing to resume); "
                f"to fit them: {_fit_command(args.out, args.out)}")
    return f"every completed trial is in the log; to continue: {_simulate_resume_command(args)}"


def _simulate_resume_command(args) -> str:
    """The command line that continues a ``simulate``: its seed named (a session stopped before its sidecar
    was written cannot be resumed without it) and every observer."""
    import shlex

    from runner import safety

    words = ["aftershift", "simulate", args.protocol, "--out", args.out]
    if args.observers is not None:
        words += ["--observers", str(args.observers)]
    if args.seed is not None or not args.resume:        # a resume without --seed took the sidecars' seed
        words += ["--seed", str(args.seed or 0)]
    if args.model:
        words += ["--model", args.model]
    if args.session != "s1":
        words += ["--session", args.session]
    if args.flicker_ack:
        words.append(safety.ACKNOWLEDGE_OPTION)
    return shlex.join(words + ["--resume"])


def _resume_command(args) -> str:
    """The command line that continues this session."""
    import shlex

    from runner import safety

    words = ["aftershift", "run", args.protocol, "--observer", args.observer, "--out", args.out]
    if args.session != "s1":
        words += ["--session", args.session]
    for given, option in ((args.windowed, "--windowed"), (args.refresh_ack, safety.REFRESH_OVERRIDE_OPTION),
                          (args.flicker_ack, safety.ACKNOWLEDGE_OPTION)):
        if given:
            words.append(option)
    return shlex.join(words + ["--resume"])


def _quick_fit_text(rows: list[dict]) -> str:
    import pandas as pd

    from fitting import quick_shifts
    from fitting.flags import MIN_TRIALS_FOR_INTERVAL
    from fitting.report import exclusion_text

    if any(row.get("block") == "stream" for row in rows):
        return "no quick fit for a stream block: fit its log after the session (aftershift fit LOG)"
    frame = pd.DataFrame(rows)
    try:
        table = quick_shifts(frame, n_boot=50, seed=0)
    except InputError as exc:
        return f"quick fit not possible yet: {exc.message}"
    if table.empty:
        return ""
    return (f"PSE shift so far (deg, rough 95% CI from 50 replicates; no CI below "
            f"{MIN_TRIALS_FOR_INTERVAL} trials or with all answers on one side); "
            f"{exclusion_text(table.attrs.get('exclusions'))}:\n" + table.to_string(index=False))


#: Most bootstrap replicates ``fit`` accepts: far more than any interval needs, and within memory.
MAX_BOOTSTRAP = 100_000


def cmd_fit(args) -> int:
    from fitting.nback import fit_stream_logs, is_stream_log
    from fitting.outputs import check_out_dir
    from fitting.tables import find_logs
    from runner.workpool import FIGURE_MODULES, FIT_MODULES, open_pool, task_mapper

    _check_count(args.bootstrap, "--bootstrap", 0, MAX_BOOTSTRAP, "bootstrap replicates")
    _check_seed(args.seed)
    check_out_dir(args.out, "fit")

    lapse = args.lapse
    if lapse != "free":
        try:
            lapse = float(lapse)
        except ValueError:
            raise InputError("argument", "--lapse", f"expected 'free' or a number, got {lapse!r}") from None
    logs = find_logs(args.logs)
    streams = [str(p) for p in logs if is_stream_log(p)]
    trials = [str(p) for p in logs if str(p) not in streams]
    if streams and trials:
        raise InputError(streams[0], "block", "stream logs and adapt-test logs need separate fit runs (different --out)")
    from runner.replay import check_sidecars

    check_sidecars(logs)    # another session's sidecar beside a log: refused before any fitting
    # local workers: the process they fork from starts importing what they need now, beside this
    # process's own imports and fitting (several logs: the fits and figures; one: its figures)
    preload = FIT_MODULES if len(trials) > 1 else () if args.no_figures else FIGURE_MODULES
    local = open_pool(None, args.jobs, preload=preload) if trials and preload and not args.scheduler else None
    from fitting import fit_logs
    common = dict(n_boot=args.bootstrap, seed=args.seed, lapse=lapse, lapse_max=args.lapse_max,
                  include_bad_timing=args.include_bad_timing, figures=not args.no_figures)
    if args.pdf and not streams:
        common["figure_formats"] = ("png", "pdf")
    if args.interval:
        allowed = ("bc", "percentile") if streams else ("by-statistic", "bca", "percentile", "profile", "studentized")
        if args.interval not in allowed:
            raise InputError("argument", "--interval", f"expected one of {', '.join(allowed)} for these logs")
        common["interval"] = args.interval
    from runner.overview import plan_from_text, settings_from_text

    notes: list[str] = []
    if streams:
        if args.scheduler:
            raise InputError("argument", "--scheduler", "stream logs are fitted on this machine; leave it out")
        for given, option, why in ((args.function != "gaussian", "--function", "the n-back regression is a "
                                    "cumulative Gaussian"),
                                   (args.spread != "shared", "--spread", "the n-back regression has one spread"),
                                   (args.include_practice, "--include-practice", "a stream has no practice trials"),
                                   (args.rerun_tracks or args.fixed_level_pilot,
                                    "--rerun-tracks" if args.rerun_tracks else "--fixed-level-pilot",
                                    "a stream's tests are not placed by adaptive tracks")):
            if given:
                raise InputError("argument", option, f"does not apply to stream logs ({why}); leave it out")
        report = fit_stream_logs(streams, args.out, plan=plan_from_text, level=args.level, **common)
    else:
        from runner.replay import track_factories

        # the pilot that sets the generating spread re-runs the tracks by default; --rerun-tracks re-runs
        # them for every replicate; --fixed-level-pilot keeps the levels fixed in the pilot too
        tracks = None if args.fixed_level_pilot else track_factories(trials, strict=args.rerun_tracks, notes=notes)
        pool = local or open_pool(args.scheduler, args.jobs)
        try:
            report = fit_logs(trials, args.out, spread=args.spread, include_practice=args.include_practice,
                              sigmoid=args.function, level=args.level, plan=plan_from_text,
                              settings=settings_from_text, map_tasks=task_mapper(pool, "fitting"), tracks=tracks,
                              track_use="replicates" if args.rerun_tracks else "pilot", **common)
        finally:
            pool.close()
    print(report.summary())
    print(f"report: {Path(args.out) / 'report.html'}", flush=True)
    for line in notes:         # after the fit: a fit that fails ends in its one line
        print(f"aftershift fit: note: {line}", file=sys.stderr)
    return EXIT_OK


#: ``predict``'s model options, by attribute of fitting.population.ChannelModel: (lowest, highest, default, what it
#: is); the defaults are ChannelModel's (a test checks), written out so that the parser does not import scipy.
PREDICT_OPTIONS = {"tuning_kappa": (1e-3, 1e3, 2.5, "von Mises concentration of the channels' tuning"),
                   "adapt_strength": (0.0, 0.999, 0.4, "fractional gain loss at the adapter, lag 0"),
                   "adapt_kappa": (1e-3, 1e3, 2.5, "von Mises concentration of the gain loss"),
                   "recovery_periods": (1e-3, 1e3, 2.0, "tau: the gain loss decays as exp(-k / tau) over k periods")}
PREDICT_CHANNELS = 72
PREDICT_HEADER = "lag,adapter_offset_deg,pse_shift_deg"


def cmd_predict(args) -> int:
    """Write the channel-population model's predicted shifts for a protocol's lags and adapter offsets."""
    import math

    from fitting.outputs import write_atomic
    from fitting.population import ChannelModel, predict_table

    protocol, _ = _load(args.protocol)
    values = {}
    for name, (low, high, _, _) in PREDICT_OPTIONS.items():
        value = getattr(args, name)
        if not (math.isfinite(value) and low <= value <= high):
            raise InputError("argument", "--" + name.replace("_", "-"), f"expected a number from {low:g} to {high:g}, "
                             f"not {value!r}")
        values[name] = value
    _check_count(args.channels, "--channels", 8, 3600, "channels")
    out = Path(args.out)
    if out.suffix.lower() != ".csv" or out.is_dir():
        raise InputError(str(out), "--out", "expected a .csv file name for the predictions table")
    if out.is_symlink() or (out.exists() and not out.is_file()):     # a FIFO would block the read below
        raise InputError(str(out), "--out", "is a link or not a regular file; name the predictions file itself")
    if out.exists():
        try:
            first = out.read_text(encoding="utf-8-sig").split("\n", 1)[0].strip()
        except (OSError, UnicodeDecodeError):
            first = ""
        if first != PREDICT_HEADER:     # a predictions table is replaced, any other file refused
            raise InputError(str(out), "--out", "exists and is not a predictions table (its first line is not "
                             f"{PREDICT_HEADER!r}); choose another name")
    if protocol.stream is not None:     # a stream's shifts: every direction but the reference and its opposite
        offsets = [o for o in protocol.stream.offsets_deg if o != 0 and abs(o) != 180]
        lags = list(range(protocol.stream.nback_periods))
    else:
        offsets, lags = list(protocol.design.adapter_offsets_deg), list(protocol.design.lags)
    model = ChannelModel(n_channels=args.channels, **values)
    try:
        table = predict_table(model, offsets, lags)
    except ValueError as exc:       # the adaptation overwhelms the tuning: the model has no PSE there
        raise InputError("argument", "--adapt-strength/--tuning-kappa/--adapt-kappa",
                         f"with these values the model gives no PSE: {exc}; choose weaker adaptation or "
                         "narrower tuning") from None
    try:
        write_atomic(out, table.to_csv(index=False, float_format="%.6f", lineterminator="\n").encode("utf-8"))
    except OSError as exc:
        raise InputError(str(out), "--out", f"cannot be written ({exc.strerror})") from None
    shown = ", ".join(f"{k.replace('_', ' ')} {v:g}" for k, v in values.items())
    print(f"predicted shifts of a population of {args.channels} direction-tuned channels ({shown}) for "
          f"{len(table)} cells ({len(lags)} lag{'s' * (len(lags) != 1)} x {len(offsets)} adapter "
          f"offset{'s' * (len(offsets) != 1)}): {out}")
    print(f"to compare a fit with them: aftershift compare FIT_FOLDER {out}")
    return EXIT_OK


def cmd_compare(args) -> int:
    from fitting.compare import compare_results
    from fitting.outputs import check_out_dir

    check_out_dir(args.out, "compare")

    result = compare_results(args.results, args.predictions, args.out, interpolate=args.interpolate)
    print(result.summary())
    if result.page is not None:
        print(f"report with the comparison: {result.page}")
    return EXIT_OK


def cmd_demo(args) -> int:
    from runner.demo import run_demo

    page = run_demo(args.out)
    print(f"demo written to {args.out}; open {page}")
    return EXIT_OK


def _study_settings(args):
    from runner.study import StudySettings

    return StudySettings(runs=args.runs, seed=args.seed, n_boot=args.bootstrap, lapse=args.lapse, jobs=args.jobs,
                         scheduler=args.scheduler)


def _check_study(args, command: str) -> None:
    """The checks ``plan`` and ``recover`` share, before any work: counts, the folder, the protocol."""
    from fitting.outputs import check_out_dir

    _check_seed(args.seed)
    _check_count(args.runs, "--runs", 1, 10_000, "simulated sessions per design")
    _check_count(args.jobs, "--jobs", 1, 256, "worker processes")
    check_out_dir(args.out, command)
    _load(args.protocol)  # timing refusals exit 3 here as everywhere


def cmd_plan(args) -> int:
    from runner.planner import plan_command

    _check_study(args, "plan")
    return plan_command(args.protocol, args.model, args.out, _study_settings(args), args.vary, args.target_half_width)


def cmd_recover(args) -> int:
    from runner.recovery import recover_command

    _check_study(args, "recover")
    return recover_command(args.protocol, args.model, args.out, _study_settings(args), args.vary)


def cmd_display_test(args) -> int:
    from runner import display

    display.check_seconds(args.seconds)
    protocol, _ = _load(args.protocol)
    if args.frames:
        from runner.display.capture import check_capture

        check_capture(protocol, args.frames, args.frames_per_period)
    # Both modes draw the protocol's stimulus on screen (--frames plays two trials to read them back).
    screening = _screen_before_window(protocol, args.protocol, args.flicker_ack)
    if args.frames:
        from runner.display.capture import capture_frames

        capture_frames(protocol, args.frames, args.frames_per_period, args.windowed)
        return EXIT_OK
    report = display.display_test(protocol, args.seconds, args.windowed, args.report,
                                  screening=screening.to_dict(acknowledged=args.flicker_ack))
    return EXIT_OK if report.get("verdict_ok", True) else EXIT_SAFETY


def cmd_measure_light(args) -> int:
    from runner import measure_light
    from runner.protocol import parse_protocol, read_protocol_text

    measure_light.check_out(args.out, {"readings file": args.readings, "protocol": args.protocol})
    protocol = None
    if args.protocol:
        # The levels as written: a [light] section may name the very profile being measured.
        protocol = parse_protocol(read_protocol_text(args.protocol), str(args.protocol), resolve_light=False)
    if args.readings:
        measure_light.from_csv(args.readings, args.out, protocol, args.label, args.fit_anyway)
        return EXIT_OK
    from runner.protocol import Protocol

    patch = None if args.full_field else args.patch_deg
    # Stopped early is not an error: the readings are kept and the message says how to resume.
    try:
        measure_light.on_screen(protocol or Protocol(), args.out, args.levels, args.repeats, args.per_gun, patch,
                                args.windowed, args.seed, args.resume, args.label, args.fit_anyway)
    except KeyboardInterrupt as exc:
        print(f"aftershift: {_light_kept(args, _how(exc))}; every accepted reading is in "
              f"{measure_light.readings_path(args.out)} (use --resume)", file=sys.stderr)
        return 130
    return EXIT_OK


def _version() -> str:
    """The installed distribution's version, or the source tree's when not installed."""
    import importlib.metadata

    try:
        return importlib.metadata.version("aftershift")
    except importlib.metadata.PackageNotFoundError:
        import re

        pyproject = Path(__file__).resolve().parent.parent / "pyproject.toml"
        found = re.search(r'^version = "([^"]+)"', pyproject.read_text(encoding="utf-8"), re.M)
        return found.group(1) if found else "unknown"


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every subcommand."""
    from runner import safety

    ack_flag = safety.ACKNOWLEDGE_OPTION
    parser = _Parser(prog="aftershift", description="Direction after-effect experiments, from protocol to after-effect curves.",
                     epilog="Run `aftershift COMMAND --help` for a command's options.")
    parser.add_argument("--version", action="version", version=f"aftershift {_version()}")
    sub = parser.add_subparsers(dest="command", title="commands", metavar="COMMAND", parser_class=_Parser)

    def protocol_arg(p, optional=False):
        if optional:
            p.add_argument("protocol", nargs="?", default=str(DEFAULT_PROTOCOL), help="protocol file (TOML)")
        else:
            p.add_argument("protocol", help="protocol file (TOML)")

    def ack(p):
        p.add_argument(ack_flag, dest="flicker_ack", action="store_true",
                       help="run a protocol that fails the photosensitivity screening or is not screened in full, "
                            "after review (recorded in the sidecar or report)")

    p = sub.add_parser("check", help="validate a protocol and print its plan and safety screening")
    protocol_arg(p)
    ack(p)
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("simulate", help="run simulated observers through the session loop (no display)")
    protocol_arg(p)
    p.add_argument("--out", required=True, help="output folder for trial logs and sidecars")
    p.add_argument("--model", help="observer model file (TOML, flat keys; default built in; a resume uses the "
                                   "sidecar's)")
    p.add_argument("--observers", type=_int_arg, default=None,
                   help="number of simulated observers (default 1; with --resume, as many as the first run asked for)")
    p.add_argument("--seed", type=_int_arg, help="seed (default 0; a resume uses the sidecar's)")
    p.add_argument("--session", default="s1", help="session label: letters, digits, - and _ (default s1)")
    p.add_argument("--resume", action="store_true", help="continue interrupted sessions in --out")
    ack(p)
    p.set_defaults(func=cmd_simulate)

    p = sub.add_parser("run", help="run an observer on the real display")
    protocol_arg(p)
    p.add_argument("--observer", required=True, help="observer ID: letters, digits, - and _")
    p.add_argument("--out", required=True, help="output folder")
    p.add_argument("--session", default="s1", help="session label (default s1)")
    p.add_argument("--windowed", action="store_true", help="a window instead of full screen (tests, piloting)")
    p.add_argument("--resume", action="store_true", help="continue an interrupted session")
    p.add_argument("--seed", type=_int_arg, help="seed (default: drawn at random and stored); a session other "
                                                "than s1 mixes its label in")
    p.add_argument(safety.REFRESH_OVERRIDE_OPTION, dest="refresh_ack", action="store_true",
                   help="run although the measured refresh rate differs from the protocol's (recorded)")
    ack(p)
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("fit", help="fit trial logs: PSEs, after-effects, tuning, decay, figures")
    p.add_argument("logs", nargs="+", help="trial logs (*.trials.csv) or folders holding them")
    p.add_argument("--out", required=True, help="output folder for tables and figures")
    p.add_argument("--bootstrap", type=_int_arg, default=1000, help="parametric bootstrap replicates (default 1000)")
    p.add_argument("--seed", type=_int_arg, default=0, help="seed (default 0)")
    p.add_argument("--lapse", default="free", help="'free' (bounded to [0, --lapse-max]) or a fixed value (default free)")
    p.add_argument("--spread", choices=["shared", "per_condition"], default="shared",
                   help="one spread per observer or one per condition, with a likelihood-ratio test (default shared)")
    p.add_argument("--function", choices=["gaussian", "logistic"], default="gaussian",
                   help="psychometric function: cumulative Gaussian or logistic (default gaussian)")
    p.add_argument("--interval", choices=["by-statistic", "bca", "bc", "percentile", "profile", "studentized"],
                   help="interval: by-statistic (adapt-test default: percentile for PSEs, shifts and peak "
                        "offsets, profile intervals for tuning amplitudes and the decay, as measured best), BCa (Efron 1987), "
                        "bias-corrected, profile likelihood or studentized bootstrap (PSEs "
                        "and shifts of adapt-test logs), or percentile (stream default; streams take bc too)")
    p.add_argument("--level", type=float, default=0.95, help="confidence level (default 0.95)")
    p.add_argument("--lapse-max", type=float, default=0.06,
                   help="upper bound of a free lapse rate (default 0.06, Wichmann & Hill 2001)")
    p.add_argument("--include-bad-timing", action="store_true", help="keep trials with timing_ok = false")
    p.add_argument("--include-practice", action="store_true", help="keep practice trials")
    p.add_argument("--no-figures", action="store_true", help="tables only")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--jobs", type=_int_arg, help="observers fitted at once in local worker processes "
                                                "(default: every available core)")
    where.add_argument("--scheduler", metavar="ADDRESS", help="fit the observers on a Dask cluster, e.g. "
                                                              "tcp://HOST:8786 (needs the cluster extra)")
    pilot = p.add_mutually_exclusive_group()
    pilot.add_argument("--rerun-tracks", action="store_true",
                   help="bootstrap by re-running each adaptive track with the fitted observer (protocol from the "
                        "sidecars; closer to nominal coverage, slower: minutes with Bayesian tracks)")
    pilot.add_argument("--fixed-level-pilot", action="store_true",
                   help="set the bootstrap's generating spread from a pilot with the levels held fixed (earlier "
                        "default) instead of one that re-runs the adaptive tracks (the default when the sidecars "
                        "give the protocol)")
    p.add_argument("--pdf", action="store_true", help="PDF copies of the figures beside the PNGs")
    p.set_defaults(func=cmd_fit)

    p = sub.add_parser("predict", help="predicted after-effects of a channel-population model for a protocol's "
                                       "lags and adapter offsets (a table compare reads)")
    p.add_argument("protocol", help="protocol TOML file (its lags and adapter offsets, or its stream's directions)")
    p.add_argument("--out", default="predictions.csv", help="the predictions table to write (default predictions.csv)")
    for name, (_, _, default, what) in PREDICT_OPTIONS.items():
        p.add_argument("--" + name.replace("_", "-"), type=float, default=default, help=f"{what} (default {default:g})")
    p.add_argument("--channels", type=_int_arg, default=PREDICT_CHANNELS,
                   help=f"channels, preferred directions evenly around the circle (default {PREDICT_CHANNELS})")
    p.set_defaults(func=cmd_predict)

    p = sub.add_parser("compare", help="agreement of measured after-effects with a predictions table")
    p.add_argument("results", help="a fit output folder (with aftereffect.csv) or the file itself")
    p.add_argument("predictions", help="CSV with lag, adapter_offset_deg, pse_shift_deg[, sd_deg]")
    p.add_argument("--out", required=True, help="output folder")
    p.add_argument("--interpolate", action="store_true", help="interpolate predictions over adapter offsets within a lag")
    p.set_defaults(func=cmd_compare)

    p = sub.add_parser("demo", help="simulate, fit, compare and report on the default protocol (invented data)")
    p.add_argument("--out", default="results_demo", help="output folder (default results_demo)")
    p.set_defaults(func=cmd_demo)

    def study_args(p, runs, boot, out):
        protocol_arg(p)
        p.add_argument("--model", help="observer model file (TOML, flat keys)")
        p.add_argument("--vary", action="append", metavar="FIELD=[V1, V2, ...]",
                       help="run a design for each value (TOML values) of a protocol field (e.g. "
                            "procedure.method) or of the observer model (model.KEY); several --vary form a grid")
        p.add_argument("--runs", type=_int_arg, default=runs, help=f"simulated sessions per design (default {runs})")
        p.add_argument("--bootstrap", type=_int_arg, default=boot,
                       help=f"bootstrap replicates per fit (default {boot})")
        p.add_argument("--lapse", default="free", help="lapse of the fits: 'free' or a fixed value (default free)")
        p.add_argument("--out", default=out, help=f"study folder; finished tasks are kept there and a rerun "
                                                  f"continues (default {out})")
        p.add_argument("--seed", type=_int_arg, default=0, help="seed (default 0)")
        where = p.add_mutually_exclusive_group()
        where.add_argument("--jobs", type=_int_arg, help="local worker processes (default: every available core)")
        where.add_argument("--scheduler", metavar="ADDRESS",
                           help="run the tasks on a Dask cluster, e.g. tcp://HOST:8786 (needs the cluster extra)")

    p = sub.add_parser("plan", help="expected 95%% CI half-widths and coverage of designs by simulation, and the "
                                    "trials a target needs")
    study_args(p, runs=20, boot=200, out="plan")
    p.add_argument("--target-half-width", type=float, help="target 95%% CI half-width of the DoG amplitude, deg")
    p.set_defaults(func=cmd_plan)

    p = sub.add_parser("recover", help="parameter recovery and interval coverage of your protocol and observer "
                                       "model, by simulation")
    study_args(p, runs=100, boot=500, out="recovery")
    p.set_defaults(func=cmd_recover)

    p = sub.add_parser("display-test", help="measure refresh rate, frame jitter and dropped frames")
    protocol_arg(p, optional=True)
    p.add_argument("--seconds", type=float, default=10.0, help="how long to measure (default 10)")
    p.add_argument("--windowed", action="store_true", help="a window instead of full screen")
    p.add_argument("--report", default="display_test.json", help="JSON report path (default display_test.json)")
    p.add_argument("--frames", metavar="DIR",
                   help="instead of timing, write rendered frames of each period type as PNGs and a table to DIR")
    p.add_argument("--frames-per-period", type=_int_arg, default=3, help="frames written per period type (default 3)")
    ack(p)
    p.set_defaults(func=cmd_display_test)

    p = sub.add_parser("measure-light", help="photometer readings of this display -> light profile for [light]")
    p.add_argument("protocol", nargs="?", help="protocol whose [display] geometry and background are used")
    p.add_argument("--out", required=True, help="light profile to write (TOML); readings go to OUT.readings.csv")
    p.add_argument("--readings", metavar="CSV", help="fit readings from a CSV file (level, luminance_cd_m2[, gun]); no screen")
    p.add_argument("--levels", type=_int_arg, default=9, help="grey levels from 0 to 1 (default 9)")
    p.add_argument("--repeats", type=_int_arg, default=2, help="readings per level (default 2)")
    p.add_argument("--per-gun", action="store_true", help="also measure red, green and blue alone")
    p.add_argument("--patch-deg", type=float, default=5.0, help="side of the central patch, deg (default 5)")
    p.add_argument("--full-field", action="store_true", help="light the whole screen instead of a patch")
    p.add_argument("--windowed", action="store_true", help="a window instead of full screen")
    p.add_argument("--seed", type=_int_arg, default=None,
                   help="seed of the random order (default 0; a resumed measurement keeps its own)")
    p.add_argument("--resume", action="store_true", help="continue the readings in OUT.readings.csv")
    p.add_argument("--label", default="", help="free text naming the display, written into the profile")
    p.add_argument("--fit-anyway", action="store_true",
                   help="fit readings that have problems (they are listed and recorded in the profile)")
    p.set_defaults(func=cmd_measure_light)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``aftershift`` command; returns the exit code."""
    _install_signal_handlers()
    args = None
    try:
        from fitting.heap import arrays_on_the_heap

        arrays_on_the_heap()        # the bootstrap's arrays: 1.5x faster, and not by luck (fitting/heap.py)
        parser = build_parser()
        args = parser.parse_args(argv)
        if args.command is None:  # bare `aftershift`: list the commands
            parser.print_help()
            return EXIT_OK
        from fitting.threads import one_blas_thread

        with one_blas_thread():  # small batched solves: threads only cost (fitting/threads.py)
            return args.func(args)
    except InputError as exc:
        _name_the_protocol(exc, args)
        print(f"aftershift: {exc.line()}", file=sys.stderr)
        return EXIT_INPUT
    except SafetyRefusal as exc:
        _name_the_protocol(exc, args)
        print(f"aftershift: {exc.line()}", file=sys.stderr)
        return EXIT_SAFETY
    except BrokenPipeError:  # output piped into e.g. `head`: stop quietly
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_OK
    except KeyboardInterrupt as exc:
        return _interrupted(args, exc)
    except ModuleNotFoundError as exc:  # a set-up without every package (the heavy imports are late)
        if _stopped_by is not None:     # an import broken by the signal itself
            return _interrupted(args, _stop_exception())
        print(f"aftershift: the Python package {exc.name!r} is missing; run ./setup.sh (or "
              f"pip install -e \".[display,dev]\") in this environment", file=sys.stderr)
        return EXIT_SETUP
    except OSError as exc:
        too_long = name_too_long(exc)
        if too_long is None:
            raise
        print(f"aftershift: {too_long.line()}", file=sys.stderr)
        return EXIT_INPUT
    except Exception as exc:
        interrupt = _interrupt_behind(exc)
        if interrupt is None and _stopped_by is not None:
            interrupt = _stop_exception()
        if interrupt is None:
            raise
        return _interrupted(args, interrupt)


def _name_the_protocol(exc: InputError | SafetyRefusal, args) -> None:
    """Name the protocol file in an error about one of its fields raised without it (the display's checks)."""
    protocol = getattr(args, "protocol", None)
    if not exc.source and protocol and exc.field.split(".")[0] in _protocol_sections():
        exc.source = str(protocol)


def _protocol_sections() -> tuple[str, ...]:
    from runner.protocol import Protocol

    return tuple(Protocol.model_fields)


def console() -> int:
    """The installed ``aftershift`` command: :func:`main`, then a quick exit.

    The process ends right after; freezing the garbage collector spares the
    collections that interpreter shutdown runs over everything still held
    (about 0.7 s after a demo, measured with ``perf``). Ctrl-C and SIGTERM are
    ignored from here on: shutdown puts back the default handlers, and a
    second signal then would end the process by the signal after its one line
    was printed and its exit code chosen.
    """
    try:
        code = main()
    finally:
        _stop_listening()
    gc.freeze()
    return code


def _stop_listening() -> None:
    """Ignore any further Ctrl-C or SIGTERM, in every thread, until the process has ended.

    :data:`_stopping` first, so that a signal still pending when the handler
    changes is passed over by :func:`_on_stop_signal` (``signal.signal`` runs
    pending handlers before it changes one).
    """
    global _stopping
    _stopping = True
    for sig in (signal.SIGINT, signal.SIGTERM):
        if signal.getsignal(sig) is _on_stop_signal:
            signal.signal(sig, signal.SIG_IGN)


class Terminated(KeyboardInterrupt):
    """SIGTERM, handled like Ctrl-C."""


#: Set by the first Ctrl-C or SIGTERM: the command is winding down.
_stopping = False
#: The signal that stopped the command (None: none came).
_stopped_by: int | None = None


def _on_stop_signal(signum, frame):  # noqa: ARG001 - signal handler
    """The first Ctrl-C or SIGTERM stops the command; later ones are ignored while it winds down.

    A second signal while the sidecar is closed or the progress bar's
    thread ends would print a traceback and could leave the part ``running``.
    """
    global _stopping, _stopped_by
    if _stopping:
        return      # not SIG_IGN: Python would raise "ignored due to race condition" for one already pending
    _stopping, _stopped_by = True, signum
    raise _stop_exception()


def _stop_exception() -> KeyboardInterrupt:
    """The exception of the signal that stopped the command: :class:`Terminated` for SIGTERM."""
    return Terminated() if _stopped_by == signal.SIGTERM else KeyboardInterrupt()


def _interrupt_behind(exc: BaseException) -> KeyboardInterrupt | None:
    """The Ctrl-C (or SIGTERM) that caused ``exc``, if any.

    Some compiled modules turn a Ctrl-C that lands while they load into an
    error of their own (scipy's linear-programming module raises
    ``ImportError: initialization failed`` from the ``KeyboardInterrupt``);
    numpy's, at one instant, into an ``ImportError`` that no longer holds it
    (``main`` then goes by :data:`_stopped_by`).
    """
    seen = set()
    while exc is not None and id(exc) not in seen:
        if isinstance(exc, KeyboardInterrupt):
            return exc
        seen.add(id(exc))
        exc = exc.__cause__ or exc.__context__
    return None


def _interrupted(args, exc: KeyboardInterrupt, quick_fit_shown: bool = True) -> int:
    """Say in one line that the command was interrupted, and what of its work is kept; return 130.

    ``quick_fit_shown``: False when a ``run`` was stopped before its last quick fit covered every trial.
    """
    command = getattr(args, "command", None)
    print(f"aftershift{' ' + command if command else ''}: {_interrupted_line(args, exc, quick_fit_shown)}",
          file=sys.stderr)
    return 130


def _interrupted_line(args, exc: BaseException, quick_fit_shown: bool = True) -> str:
    command = getattr(args, "command", None)
    how = _how(exc)
    if command == "run":
        return f"{how}; {_run_kept(args, quick_fit_shown)}"
    if command == "simulate":
        return f"{how}; {_simulate_kept(args)}"
    if command == "measure-light":
        return _light_kept(args, how)
    if command in ("fit", "compare", "plan", "recover"):
        from fitting.outputs import committed

        if committed():   # the signal came while the set was moved in, and waited for it to be complete
            return f"{how} after its outputs were written in full to {committed()[-1]}"
        return f"{how}; nothing was half-written (earlier results in --out are unchanged)"
    return how


def _how(exc: BaseException) -> str:
    return "stopped by SIGTERM" if isinstance(exc, Terminated) else "interrupted"


def _light_kept(args, how: str) -> str:
    """What an interrupted ``measure-light`` leaves of the light profile at ``--out``."""
    from runner.measure_light import written

    if written():   # the signal came while the files were moved in, and waited for both
        return f"{how} after the light profile and its figure were written in full to {written()[-1]}"
    return f"{how}; nothing was half-written (a light profile already at {args.out} is unchanged)"


def _install_signal_handlers() -> None:
    """Let Ctrl-C and SIGTERM stop a command once (:func:`_on_stop_signal`).

    A signal ignored by whoever started the process (a background job's
    SIGINT) stays ignored.
    """
    global _stopping, _stopped_by, _passed_on
    for sig, ours in ((signal.SIGINT, (signal.default_int_handler,)), (signal.SIGTERM, (signal.SIG_DFL, None))):
        if signal.getsignal(sig) in ours:
            signal.signal(sig, _on_stop_signal)
    _stopping, _stopped_by = False, None
    if sys.unraisablehook is not _stop_again:
        _passed_on, sys.unraisablehook = sys.unraisablehook, _stop_again


#: The hook :func:`_stop_again` passes other unraisable exceptions to.
_passed_on = sys.unraisablehook


def _stop_again(unraisable) -> None:
    """A stop signal whose exception Python could only print and ignore is given again.

    Python calls some functions where an exception cannot propagate (the
    import system's clean-up callbacks); a Ctrl-C or SIGTERM handled there
    printed "Exception ignored in: ..." and the command ran on to its end.
    Given again from another thread a moment later, when the main thread has
    left that function, it stops the command there (should it land in such a
    function once more, this runs again).
    """
    global _stopping
    if isinstance(unraisable.exc_value, KeyboardInterrupt) and _stopped_by is not None:
        import _thread
        import threading

        _stopping = False
        again = threading.Timer(0.01, _thread.interrupt_main, (_stopped_by,))
        again.daemon = True
        again.start()
        return
    _passed_on(unraisable)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(console())
