"""aftershift's fitting side: everything that happens to a trial log after a session.

Public entry points
-------------------
fit_logs(paths, out_dir, n_boot=1000, seed=0, lapse="free", spread="shared",
         include_bad_timing=False, progress=True, figures=True, ...) -> FitReport
    Read logs, fit every observer and the group, write tables, figures and report.html.
write_page(fit_dir, page_path=None, compare_dir=None) -> Path
    The report page of a fit folder (:mod:`fitting.page`), with a comparison if given.
quick_shifts(trials, n_boot=50, seed=0) -> pandas.DataFrame
    Fast PSE shifts with rough intervals after a block; writes nothing.
read_logs(paths, include_bad_timing=False, include_practice=False) -> pandas.DataFrame
    Checked, pooled trials; ``.attrs["exclusions"]`` has the exclusion counts.
fit_trials(trials, ...) -> FitReport
    :func:`fit_logs` without reading or writing files.
fit_psychometric, fit_joint, fit_cells
    The psychometric fits themselves (:mod:`fitting.psychometric`).
parametric_bootstrap
    Batched parametric bootstrap with percentile and BCa intervals.

``fitting`` never imports the session engine (``runner``) or psychopy.
Bad input raises :class:`fitting.errors.InputError`.
"""

import importlib

_EXPORTS = {
    "BootstrapResult": "bootstrap", "parametric_bootstrap": "bootstrap",
    "InputError": "errors",
    "PsychometricFit": "psychometric", "fit_cells": "psychometric", "fit_joint": "psychometric",
    "fit_psychometric": "psychometric",
    "FitReport": "report", "fit_logs": "report", "fit_trials": "report", "quick_shifts": "report",
    "read_logs": "tables", "write_page": "page",
}
__all__ = sorted(_EXPORTS)


def __getattr__(name):
    # Lazy exports: ``import fitting.errors`` (the session engine does) stays
    # cheap, and pandas/scipy load only when a fit is asked for.
    if name in _EXPORTS:
        return getattr(importlib.import_module(f".{_EXPORTS[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
