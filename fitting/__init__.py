"""aftershift's fitting side: everything that happens to a trial log after a session.

Public entry points
-------------------
fit_logs(paths, out_dir, n_boot=1000, seed=0, lapse="free", spread="shared",
         include_bad_timing=False, progress=True, figures=True, ...) -> FitReport
    Read logs, fit every observer and the group, write tables and figures.
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

from .bootstrap import BootstrapResult, parametric_bootstrap
from .errors import InputError
from .psychometric import PsychometricFit, fit_cells, fit_joint, fit_psychometric
from .report import FitReport, fit_logs, fit_trials, quick_shifts
from .tables import read_logs

__all__ = ["BootstrapResult", "FitReport", "InputError", "PsychometricFit", "fit_cells", "fit_joint",
           "fit_logs", "fit_psychometric", "fit_trials", "parametric_bootstrap", "quick_shifts",
           "read_logs"]
