"""Shared test helpers: running the command line in-process or as a process."""

from __future__ import annotations

import signal
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PROTOCOLS = ROOT / "protocols"


def run_cli(*args, timeout=300, **kwargs) -> subprocess.CompletedProcess:
    """Run ``aftershift ARGS`` as a separate process (as a user would)."""
    return subprocess.run(
        [sys.executable, "-m", "runner.cli", *map(str, args)],
        capture_output=True, text=True, timeout=timeout, cwd=ROOT, **kwargs,
    )


@pytest.fixture(scope="session", autouse=True)
def library_runs_as_the_command_line_does():
    """In-process calls of the library run with one BLAS thread, as every command does (fitting/threads.py).

    With a test worker per core, BLAS threads of their own only wait for each other: two in-process tests
    that re-run Bayesian tracks took 47 s with them and 22 s without on a busy 2-core machine.
    """
    from fitting.threads import one_blas_thread

    with one_blas_thread():
        yield


@pytest.fixture
def cli():
    """The command line as a separate process."""
    return run_cli


# --------------------------------------------------------------------------
# the quick subset
# --------------------------------------------------------------------------
#
# ``python -m pytest -m "not slow and not display"`` is the contributors' quick
# loop (under 60 s on 2 cores); the default command runs everything.  Tests
# that take more than about 3 s on a quiet 2-core machine (2.5 s with the
# tests running in parallel, as they do by default) are ``slow``: either
# marked in their file, or listed here by node-id prefix (kept in one place so
# that files edited by others need no change).  Measured with
# ``python -m pytest --durations=30``.
SLOW_TESTS = (
    "tests/test_fit_bootstrap.py::test_pse_interval_coverage_400_data_sets_of_80_trials",
    "tests/test_adaptive.py::test_bayesian_pse_precision_near_cramer_rao_bound",
    "tests/test_adaptive.py::test_mean_placement_keeps_trials_nearer_the_pse_than_entropy_placement",
    "tests/test_resume.py::test_killed_and_resumed_session_writes_identical_rows",
    "tests/test_resume.py::test_torn_last_line_is_dropped_with_a_warning_and_the_rest_kept",
    "tests/test_resume.py::test_existing_data_is_never_overwritten",
    "tests/test_resume.py::test_resume_with_a_changed_protocol_is_refused",
    "tests/test_resume.py::test_bayesian_session_cut_short_and_resumed_writes_identical_rows",
    "tests/test_planner.py::test_more_trials_give_narrower_intervals",
    "tests/test_planner.py::test_constant_stimuli_pse_half_width_matches_fisher_information",
    "tests/test_fit_aftereffect.py::test_parameter_recovery_fast",
    "tests/test_nback.py::test_fast_recovery_of_amplitudes_and_decay_on_simulated_streams",
    "tests/test_nback.py::test_fit_stream_logs_writes_the_tables_compare_reads",
    "tests/test_nback.py::test_stream_and_discrete_analyses_agree_when_only_the_1_back_period_matters",
    "tests/test_inference.py::test_t_scores_hold_the_level_when_each_standard_error_is_estimated",
    "tests/test_intervals.py::test_profile_with_one_spread_per_condition_is_refused_in_one_line",
    "tests/test_inference.py::test_a_pilot_that_reruns_bayesian_tracks_widens_the_generating_spread",
    # 2.5-10 s each with the tests running in parallel (measured with -m "not slow and not display" --durations)
    "tests/test_study.py::test_same_numbers_on_one_or_two_local_workers_and_reused_on_rerun",
    "tests/test_faults.py::test_full_tmpfs_during_simulate_and_fit",
    "tests/test_cli.py::test_run_refuses_an_existing_session_before_opening_the_display",
    "tests/test_inference.py::test_a_pilot_that_reruns_constant_stimuli_matches_the_fixed_level_pilot",
    "tests/test_inference.py::test_a_pilot_that_reruns_up_down_tracks_widens_the_generating_spread",
    "tests/test_fit_report.py::test_same_seed_same_bytes_and_nothing_else_touched",
    "tests/test_fit_report.py::test_figures_are_written_as_png_and_pdf",
    "tests/test_figures.py::test_parallel_and_serial_drawing_write_the_same_files",
    # 2.7-11 s each (measured 2026-12-03, when the quick subset had grown to 61 s on this machine)
    "tests/test_fit_report.py::test_figures_drawn_beside_the_fits_are_the_bytes_drawn_after_them",
    "tests/test_fit_aftereffect.py::test_fit_writes_the_profile_interval_of_its_own_shifts_and_covariance",
    "tests/test_fit_aftereffect.py::test_decay_profile_interval_equals_a_scipy_profile",
    # 1.7-5.3 s each on an AMD EPYC 2-core machine that runs the suite 1.6 times slower than the earlier one,
    # where the quick subset had grown to 85 s (2026-12-05, measured with -m "not display and not slow"
    # --durations=45)
    "tests/test_inference.py::test_rerun_sessions_share_evidence_as_the_real_session_did",
    "tests/test_faults.py::test_a_set_waits_for_the_folder_lock_and_lands_after_it",
    "tests/test_fit_psychometric.py::test_bootstrap_refits_are_moved_off_saddles",
    "tests/test_inference.py::test_compare_uses_the_covariance_file_and_refuses_a_corrupt_one",
    "tests/test_study.py::test_study_tasks_fit_with_the_pilot_that_reruns_the_tracks",
    "tests/test_inference.py::test_compare_says_when_the_group_p_cannot_be_simulated",
    "tests/test_group_rows.py::test_designs_that_differ_say_why_the_group_has_no_curves",
    "tests/test_fit_psychometric.py::test_fit_reports_every_curve_of_logs_that_lost_them",
    "tests/test_inference.py::test_an_unreadable_sidecar_fixes_the_levels_of_its_observer_only",
    "tests/test_fit_aftereffect.py::test_fit_writes_the_profile_intervals_of_its_own_shifts_and_covariance",
    "tests/test_inference.py::test_tracks_that_stop_by_reversals_are_rerun_until_they_stop",
    "tests/test_inference.py::test_compare_refuses_a_covariance_cell_no_fit_writes",
    "tests/test_fit_aftereffect.py::test_a_lag_with_fewer_than_eight_shifts_takes_the_covariance_as_exact",
    "tests/test_faults.py::test_refit_replaces_the_earlier_fit_as_a_set_and_keeps_other_files",
    "tests/test_study.py::test_sessions_without_usable_trials_are_failed_runs_not_the_end_of_the_study",
    "tests/test_study.py::test_scheduler_without_the_cluster_extra_is_one_line",
    "tests/test_study.py::test_a_second_process_on_the_same_study_folder_is_refused",
    "tests/test_study.py::test_task_files_that_do_not_validate_are_redone_with_one_note",
    "tests/test_fit_psychometric.py::test_the_default_lapse_bound_keeps_short_tracks_from_collapsing_the_spread",
    "tests/test_study.py::test_plan_and_recover_run_on_the_bundled_protocol_in_cd_m2",
    "tests/test_fit_aftereffect.py::test_too_few_replicates_for_a_covariance_fall_back_to_bca_with_a_note",
    "tests/test_inference.py::test_full_covariance_chi2_is_calibrated_where_the_diagonal_one_is_not",
    "tests/test_inference.py::test_rerun_tracks_bootstrap_replays_the_logged_procedure",
    "tests/test_faults.py::test_a_count_written_as_1_0_resumes_as_fit_reads_it",
)


def pytest_configure(config):
    """Give Ctrl-C back its usual meaning when the test run was started with it ignored.

    A background job of a non-interactive shell (and some CI runners) starts
    with SIGINT ignored, and every command a test starts would inherit that:
    the tests that press Ctrl-C on a command could not interrupt it.
    """
    if signal.getsignal(signal.SIGINT) == signal.SIG_IGN:
        signal.signal(signal.SIGINT, signal.default_int_handler)


def pytest_collection_modifyitems(config, items):
    """Mark the tests of :data:`SLOW_TESTS` as ``slow``, and start the slow and display tests first.

    With the tests spread over worker processes, a long test that starts last
    leaves the other cores idle until it ends; started first, the short tests
    fill the gaps beside it.
    """
    for item in items:
        if item.nodeid.startswith(SLOW_TESTS):
            item.add_marker(pytest.mark.slow)
    items.sort(key=lambda item: item.get_closest_marker("slow") is None and item.get_closest_marker("display") is None)
