"""The ``aftershift`` command.

Exit codes: 0 success; 2 bad input (protocol, data, arguments, observer ID)
with one line on stderr naming the file and field; 3 refused for safety
(photosensitivity, display timing) unless explicitly acknowledged.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from fitting.errors import InputError
from runner.safety import SafetyRefusal

EXIT_OK, EXIT_INPUT, EXIT_SAFETY = 0, 2, 3
DEFAULT_PROTOCOL = Path(__file__).resolve().parent.parent / "protocols" / "offset_by_lag.toml"


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors and exit code 2."""

    def error(self, message):  # noqa: D102 - argparse hook
        raise InputError("argument", self.prog, message)


def _load(path: str):
    """Read and validate a protocol; durations that are not whole frames are refused (exit 3)."""
    from runner import safety
    from runner.protocol import FrameTimingError, parse_protocol, read_protocol_text

    text = read_protocol_text(path)
    try:
        return parse_protocol(text, source=str(path)), text
    except FrameTimingError as exc:
        raise safety.timing_refusal(exc.source, exc.field, exc.message) from None


def _screen(protocol, path: str, acknowledged: bool):
    """Run the photosensitivity screening; refuse (exit 3) unless it passes or is acknowledged."""
    from runner import safety

    result = safety.screen_protocol(protocol)
    refusal = safety.screening_refusal(result, source=str(path))
    if refusal is not None and not acknowledged:
        raise refusal
    return result


def cmd_check(args) -> int:
    from runner import safety
    from runner.overview import describe

    protocol, _ = _load(args.protocol)
    if protocol.stream is not None:
        from runner.stream import describe_stream

        print("\n".join(describe_stream(protocol)))
    else:
        print("\n".join(describe(protocol)))
    result = safety.screen_protocol(protocol)
    print()
    print("\n".join(result.summary_lines()))
    refusal = safety.screening_refusal(result, source=args.protocol)
    if refusal is not None:
        if args.flicker_ack:
            print(f"photosensitivity: over the thresholds, acknowledged with {safety.ACKNOWLEDGE_OPTION}")
            return EXIT_OK
        raise refusal
    return EXIT_OK


def cmd_simulate(args) -> int:
    from runner.launch import simulate
    from runner.observers import load_model

    protocol, text = _load(args.protocol)
    screening = _screen(protocol, args.protocol, args.flicker_ack)
    model = load_model(args.model)
    if args.observers < 1:
        raise InputError("argument", "--observers", "expected at least 1")
    paths = simulate(
        protocol, args.protocol, text, args.out, model, args.observers, args.seed, args.resume, args.session,
        screening=screening.to_dict(),
    )
    for p in paths:
        print(p)
    return EXIT_OK


def cmd_run(args) -> int:
    from runner import display, safety
    from runner.console import ExperimenterConsole
    from runner.launch import run_on_screen
    from runner.trial_log import check_identifier

    check_identifier(args.observer, "--observer")
    check_identifier(args.session, "--session")
    protocol, text = _load(args.protocol)
    screening = _screen(protocol, args.protocol, args.flicker_ack)
    caution = safety.caution_text(protocol, args.protocol)
    console = ExperimenterConsole(quick_fit=_quick_fit_text)
    presenter, answers = display.open_screen(protocol, args.windowed, args.refresh_ack, console)
    extra = {
        "measured_refresh_hz": presenter.measured_hz,
        "acknowledged": {"flicker": bool(args.flicker_ack), "refresh_mismatch": bool(args.refresh_ack)},
        "safety": screening.to_dict(),
    }
    try:
        result = run_on_screen(
            protocol, args.protocol, text, args.out, args.observer, presenter, answers, caution, console, extra,
            resume=args.resume, session=args.session, seed=args.seed,
        )
    finally:
        presenter.close()
    print(f"session {result.ended_by}: {result.rows_added} trials this time, {result.rows_total} in the log")
    return EXIT_OK


def _quick_fit_text(rows: list[dict]) -> str:
    import pandas as pd

    from fitting import quick_shifts

    frame = pd.DataFrame(rows)
    try:
        table = quick_shifts(frame, n_boot=50, seed=0)
    except InputError as exc:
        return f"quick fit not possible yet: {exc.message}"
    if table.empty:
        return ""
    return "PSE shift so far (deg, rough 95% CI from 50 replicates):\n" + table.to_string(index=False)


def cmd_fit(args) -> int:
    from fitting import fit_logs

    lapse = args.lapse
    if lapse != "free":
        try:
            lapse = float(lapse)
        except ValueError:
            raise InputError("argument", "--lapse", f"expected 'free' or a number, got {lapse!r}") from None
    from fitting.nback import fit_stream_logs, is_stream_log
    from fitting.tables import find_logs

    logs = find_logs(args.logs)
    streams = [str(p) for p in logs if is_stream_log(p)]
    trials = [str(p) for p in logs if str(p) not in streams]
    if streams and trials:
        raise InputError(streams[0], "block", "stream logs and adapt-test logs need separate fit runs (different --out)")
    common = dict(n_boot=args.bootstrap, seed=args.seed, lapse=lapse, lapse_max=args.lapse_max,
                  include_bad_timing=args.include_bad_timing, figures=not args.no_figures)
    if args.pdf and not streams:
        common["figure_formats"] = ("png", "pdf")
    if args.interval:
        allowed = ("bc", "percentile") if streams else ("bca", "percentile")
        if args.interval not in allowed:
            raise InputError("argument", "--interval", f"expected one of {', '.join(allowed)} for these logs")
        common["interval"] = args.interval
    if streams:
        report = fit_stream_logs(streams, args.out, **common)
    else:
        report = fit_logs(trials, args.out, spread=args.spread, include_practice=args.include_practice,
                          sigmoid=args.function, level=args.level, **common)
    print(report.summary())
    return EXIT_OK


def cmd_compare(args) -> int:
    from fitting.compare import compare_results

    result = compare_results(args.results, args.predictions, args.out, interpolate=args.interpolate)
    print(result.summary())
    return EXIT_OK


def cmd_demo(args) -> int:
    from runner.demo import run_demo

    page = run_demo(args.out)
    print(f"demo written to {args.out}; open {page}")
    return EXIT_OK


def cmd_plan(args) -> int:
    from runner.planner import plan_command

    _load(args.protocol)  # timing refusals exit 3 here as everywhere
    return plan_command(args.protocol, args.model, args.runs, args.target_half_width, args.out, args.seed, args.jobs)


def cmd_display_test(args) -> int:
    from runner import display

    protocol, _ = _load(args.protocol)
    report = display.display_test(protocol, args.seconds, args.windowed, args.report)
    return EXIT_OK if report.get("verdict_ok", True) else EXIT_SAFETY


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every subcommand."""
    from runner import safety

    ack_flag = safety.ACKNOWLEDGE_OPTION
    parser = _Parser(prog="aftershift", description="Direction after-effect experiments, from protocol to after-effect curves.")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    def protocol_arg(p, optional=False):
        if optional:
            p.add_argument("protocol", nargs="?", default=str(DEFAULT_PROTOCOL), help="protocol file (TOML)")
        else:
            p.add_argument("protocol", help="protocol file (TOML)")

    def ack(p):
        p.add_argument(ack_flag, dest="flicker_ack", action="store_true",
                       help="run a protocol that fails the photosensitivity screening, after review (recorded)")

    p = sub.add_parser("check", help="validate a protocol and print its plan and safety screening")
    protocol_arg(p)
    ack(p)
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("simulate", help="run simulated observers through the session loop (no display)")
    protocol_arg(p)
    p.add_argument("--out", required=True, help="output folder for trial logs and sidecars")
    p.add_argument("--model", help="observer model file (TOML, flat keys)")
    p.add_argument("--observers", type=int, default=1, help="number of simulated observers (default 1)")
    p.add_argument("--seed", type=int, default=0, help="seed (default 0)")
    p.add_argument("--session", default="s1", help="session label (default s1)")
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
    p.add_argument("--seed", type=int, help="session seed (default: drawn at random and stored)")
    p.add_argument(safety.REFRESH_OVERRIDE_OPTION, dest="refresh_ack", action="store_true",
                   help="run although the measured refresh rate differs from the protocol's (recorded)")
    ack(p)
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("fit", help="fit trial logs: PSEs, after-effects, tuning, decay, figures")
    p.add_argument("logs", nargs="+", help="trial logs (*.trials.csv) or folders holding them")
    p.add_argument("--out", required=True, help="output folder for tables and figures")
    p.add_argument("--bootstrap", type=int, default=1000, help="parametric bootstrap replicates (default 1000)")
    p.add_argument("--seed", type=int, default=0, help="seed (default 0)")
    p.add_argument("--lapse", default="free", help="'free' (bounded to [0, 0.1]) or a fixed value (default free)")
    p.add_argument("--spread", choices=["shared", "per_condition"], default="shared",
                   help="one spread per observer or one per condition, with a likelihood-ratio test (default shared)")
    p.add_argument("--function", choices=["gaussian", "logistic"], default="gaussian",
                   help="psychometric function: cumulative Gaussian or logistic (default gaussian)")
    p.add_argument("--interval", choices=["bca", "bc", "percentile"],
                   help="bootstrap interval: BCa (Efron 1987; adapt-test default), bias-corrected (stream default) "
                        "or percentile")
    p.add_argument("--level", type=float, default=0.95, help="confidence level (default 0.95)")
    p.add_argument("--lapse-max", type=float, default=0.1, help="upper bound of a free lapse rate (default 0.1)")
    p.add_argument("--include-bad-timing", action="store_true", help="keep trials with timing_ok = false")
    p.add_argument("--include-practice", action="store_true", help="keep practice trials")
    p.add_argument("--no-figures", action="store_true", help="tables only")
    p.add_argument("--pdf", action="store_true", help="PDF copies of the figures beside the PNGs")
    p.set_defaults(func=cmd_fit)

    p = sub.add_parser("compare", help="agreement of measured after-effects with a predictions table")
    p.add_argument("results", help="a fit output folder (with aftereffect.csv) or the file itself")
    p.add_argument("predictions", help="CSV with lag, adapter_offset_deg, pse_shift_deg[, sd_deg]")
    p.add_argument("--out", required=True, help="output folder")
    p.add_argument("--interpolate", action="store_true", help="interpolate predictions over adapter offsets within a lag")
    p.set_defaults(func=cmd_compare)

    p = sub.add_parser("demo", help="simulate, fit, compare and report on the default protocol (invented data)")
    p.add_argument("--out", default="results_demo", help="output folder (default results_demo)")
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("plan", help="expected 95%% CI half-widths of a design by simulation, and the trials a target needs")
    protocol_arg(p)
    p.add_argument("--model", help="observer model file (TOML, flat keys)")
    p.add_argument("--runs", type=int, default=20, help="simulated sessions per design (default 20)")
    p.add_argument("--target-half-width", type=float, help="target 95%% CI half-width of the DoG amplitude, deg")
    p.add_argument("--out", default="plan", help="output folder (default plan)")
    p.add_argument("--seed", type=int, default=0, help="seed (default 0)")
    p.add_argument("--jobs", type=int, default=2, help="worker processes (default 2)")
    p.set_defaults(func=cmd_plan)

    p = sub.add_parser("display-test", help="measure refresh rate, frame jitter and dropped frames")
    protocol_arg(p, optional=True)
    p.add_argument("--seconds", type=float, default=10.0, help="how long to measure (default 10)")
    p.add_argument("--windowed", action="store_true", help="a window instead of full screen")
    p.add_argument("--report", default="display_test.json", help="JSON report path (default display_test.json)")
    p.set_defaults(func=cmd_display_test)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``aftershift`` command; returns the exit code."""
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        from fitting.threads import one_blas_thread

        with one_blas_thread():  # small batched solves: threads only cost (fitting/threads.py)
            return args.func(args)
    except InputError as exc:
        print(f"aftershift: {exc.line()}", file=sys.stderr)
        return EXIT_INPUT
    except SafetyRefusal as exc:
        print(f"aftershift: {exc.line()}", file=sys.stderr)
        return EXIT_SAFETY
    except BrokenPipeError:  # output piped into e.g. `head`: stop quietly
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_OK
    except KeyboardInterrupt:
        print("aftershift: interrupted; every completed trial is in the log (use --resume)", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
