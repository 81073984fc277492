"""Agreement between measured after-effects and a table of predictions.

Measured: ``aftereffect.csv`` as written by ``aftershift fit`` (one row per
observer × lag × adapter offset with a 95 % CI).  Predicted: a CSV with
``lag``, ``adapter_offset_deg``, ``pse_shift_deg`` (same sign convention:
positive = clockwise, repulsion has the sign of the offset) and optionally
``sd_deg``, the prediction's own uncertainty.

Per observer, per lag and over all lags:

* RMSE of measured − predicted (deg);
* Pearson's r;
* gain g of measured ≈ g × predicted by generalised least squares through
  the origin, ``g = p' V^-1 m / p' V^-1 p``, with ``V`` treated as known up
  to a scale factor (Aitken 1935; the default of statsmodels' GLS): standard
  error ``sqrt(s2 / p' V^-1 p)`` with ``s2 = (m - g p)' V^-1 (m - g p) / (n - 1)``
  and t quantiles on n − 1 degrees of freedom (with a single point, ``s2 = 1``
  and normal quantiles); and the unweighted gain ``sum m p / sum p^2``;
* χ² = ``z' C^-1 z`` with as many degrees of freedom as points (the
  predictions are fixed, nothing is fitted), and its upper-tail p: ``z`` are
  the standardised residuals ``(m - p) / sd`` read against Student's t and
  mapped to normal scores, ``C`` the correlation of ``V`` (with t on infinite
  degrees of freedom this is ``r' V^-1 r``);
* the fraction of predictions inside the measured 95 % CIs.

``V`` is the covariance of the measured shifts plus the predictions' own
variance on its diagonal.  When ``aftereffect_covariance.csv`` sits beside
``aftereffect.csv`` (``fit`` writes it, see :mod:`fitting.covariance`) ``V``
is the full covariance:

* for an observer, of its paired bootstrap replicates, whose inverse is
  scaled by ``(R - n - 2) / (R - 1)`` (Hartlap, Simon & Schneider 2007, A&A
  464, 399) for R replicates and n points.  The shifts' errors scale with
  the fitted spread, itself estimated: ``V`` is a scaled χ²_ν / ν estimate,
  so ``χ² / n = r' V^-1 r / n`` is read against F(n, ν), with ν the
  spread's degrees of freedom from its replicates (``spread_dof``,
  Satterthwaite 1946; column ``chi2_reference`` names the distribution).
  ``benchmarks/bench_coverage.py`` measured this to bring false rejections
  at 24-40 adaptive trials inside 3-8 % where the earlier rule (each
  standardised residual read against t on ``n_trials - 2``, common practice,
  no source) gave up to 9 %; that rule remains for covariance files
  without ``spread_dof`` (written before it);
* for a stream fit, the same, but its shifts are a curve of K amplitudes
  and a peak offset, so the covariance of its cells has rank K + 1 (2 for
  one lag): the χ² uses the pseudo-inverse over that many leading
  directions and as many degrees of freedom (``shift_parameters`` in the
  covariance file), and a note says what it cannot see;
* for the group, the group standard errors with the correlation of the
  weighted mean, residuals read against t on n_obs − 1 degrees of freedom;
  its p value comes from 2,000 simulated groups drawn under "the
  predictions are the truth" from the observers' own covariances and
  their between-observer variance (:mod:`fitting.group_chi2`; the
  χ²(n) reading of those scores rejected true predictions too often with
  few observers); ``chi2_reference`` then reads ``simulated (2000 groups)``.
  The group's gain is the random-effects combination of the observers'
  gains (:func:`combine_gains`), like the group shifts.

Without that file ``V`` is diagonal, ``se = half-width / 1.96`` (errors
treated as independent, which overstates χ² because the shifts of one
observer share the baseline), and the residuals are read as normal.
"""

from __future__ import annotations

import csv
import os
from contextlib import nullcontext
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd
# scipy.special, not scipy.stats: the same functions bit for bit, without stats' 0.3 s import
from scipy import special

from fitting.covariance import COVARIANCE_COLUMNS, NO_COVARIANCE, covariance_matrix
from fitting.errors import InputError
from fitting.cells import check_numbers, check_ranges, line_of
from fitting.fit_copy import check_table, read_fit
from fitting.group import GROUP, MIN_OBSERVERS_FOR_INFERENCE
from fitting.group_chi2 import DRAWS, GroupData, calibrated_p
from fitting.meta import random_effects
from fitting.page import PAGE, write_page
from fitting.progress import phase
from fitting.provenance import read_report_data
from fitting.scores import inverse, score_chi2
from fitting.outputs import folder_lock, output_set, settle
from fitting.flags import MIN_TRIALS_FOR_INTERVAL
from fitting.tables import write_csv, write_text

Z95 = special.ndtri(0.975)
PREDICTION_COLUMNS = ("lag", "adapter_offset_deg", "pse_shift_deg")
MEASURED_COLUMNS = ("observer", "lag", "adapter_offset_deg", "pse_shift_deg", "ci_low", "ci_high")
AGREEMENT_COLUMNS = (
    "observer", "lag", "n_points", "rmse_deg", "pearson_r", "gain", "gain_ci_low", "gain_ci_high",
    "chi2", "dof", "chi2_p", "chi2_reference", "inside_ci_fraction", "gain_unweighted", "covariance", "points_left_out",
    "descriptive",
)
COVARIANCE_FILE = "aftereffect_covariance.csv"


#: Largest shift (deg) a fit can write: a PSE is boxed to the tested range widened by its own width on each
#: side (:func:`fitting.psychometric.parameter_bounds`) and tested levels lie within ±180°, so within ±540°.
MEASURED_LIMIT_DEG = 1080.0
#: An offset or a shift of a direction: within ±180°.
DIRECTION = (-180.0, 180.0, " deg")
#: Most bootstrap replicates ``fit`` draws (its ``--bootstrap`` limit, ``runner.cli.MAX_BOOTSTRAP``).
MAX_REPLICATES = 100_000
#: Flag words (:mod:`fitting.flags`) of a measured shift that cannot be judged, and why.
NOT_ESTIMABLE = {"one-sided": "every answer on one side, so the PSE is not estimable",
                 "few-trials": f"fewer than {MIN_TRIALS_FOR_INTERVAL} trials, so no interval",
                 "not-estimable": "no finite error, so no interval"}
#: Flag word (:mod:`fitting.group`) of a group cell resting on fewer than ``MIN_OBSERVERS_FOR_INFERENCE`` observers.
FEW_OBSERVERS = "descriptive"
#: Why a point is left out of the agreement statistics, in a word or two, by its flag word (the console line).
LEFT_OUT_WHY = {"one-sided": "PSE not estimable", "few-trials": "no interval", "not-estimable": "no interval",
                FEW_OBSERVERS: f"fewer than {MIN_OBSERVERS_FOR_INFERENCE} observers"}


def _read_csv(path: Path, required: tuple[str, ...], may_be_empty: tuple[str, ...] = (),
              optional: tuple[str, ...] = (), by_fit: bool = False) -> pd.DataFrame:
    """Read ``path``; ``required`` columns must be finite numbers (``observer`` any text) except empty
    cells of ``may_be_empty``; ``optional`` columns are checked the same way, may be empty, and are NaN
    when absent.  ``by_fit``: a table ``fit`` writes, whose rows are whole (:func:`check_table`)."""
    try:
        found = path.is_file()
    except OSError as exc:                 # a folder on the way that this user may not enter
        raise InputError(str(path), "file", f"cannot be read ({exc.strerror})") from None
    if not found:
        raise InputError(str(path), "file", "does not exist or is not a file")
    try:
        if by_fit:
            check_table(path, path.read_bytes())
        frame = pd.read_csv(path)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(str(path), "file", f"cannot be read as CSV ({str(exc).splitlines()[0]})") from None
    except OSError as exc:                 # e.g. a colleague's file without read permission
        raise InputError(str(path), "file", f"cannot be read ({exc.strerror})") from None
    for col in required:
        if col not in frame.columns:
            raise InputError(str(path), col, "column missing")
    for col in optional:
        if col not in frame.columns:
            frame[col] = np.nan
    check_numbers(frame, path, [c for c in (*required, *optional) if c != "observer"], (*may_be_empty, *optional))
    return frame


def _refuse_odd_values(frame: pd.DataFrame, path: Path, keys: tuple[str, ...], what: str,
                       lags: tuple[str, ...], ranges: dict[str, tuple[float, float, str]]) -> None:
    """Refuse a second row for the same ``keys`` (``what`` names them), a lag that is not a whole number >= 0,
    and a value of a ``ranges`` column outside its ``(low, high, unit)``, naming the line and column."""
    dup = frame.duplicated(list(keys))
    if dup.any():
        raise InputError(str(path), f"line {line_of(dup)}", f"a second row for the same {what}")
    check_ranges(frame, path, lags, ranges)


def read_predictions(path: str | Path) -> pd.DataFrame:
    """Read and validate a predictions table.

    Raises
    ------
    InputError
        Missing columns, non-numbers, duplicate grid points, a lag that is not
        a whole number >= 0, offsets or shifts beyond ±180°, an sd below 0 or
        above 180°.
    """
    p = Path(path)
    cols = PREDICTION_COLUMNS + (("sd_deg",) if "sd_deg" in _header(p) else ())
    frame = _read_csv(p, cols)
    if frame.empty:
        raise InputError(str(p), "file", "holds no predictions")
    # an offset or a shift of a direction is within ±180°; an sd is at least 0 and below 180° too
    _refuse_odd_values(frame, p, ("lag", "adapter_offset_deg"), "lag and adapter offset", ("lag",),
                       {"adapter_offset_deg": DIRECTION, "pse_shift_deg": DIRECTION,
                        **({"sd_deg": (0.0, 180.0, " deg")} if "sd_deg" in frame else {})})
    if "sd_deg" not in frame:
        frame["sd_deg"] = 0.0
    frame["sd_deg"] = frame["sd_deg"].fillna(0.0)
    return frame


def read_measured(path: str | Path) -> pd.DataFrame:
    """Read and validate ``aftereffect.csv`` as ``fit`` writes it.

    Raises
    ------
    InputError
        A cut last row or a row with missing cells, missing columns,
        non-numbers, no rows, a second row for one observer, lag and adapter
        offset, a lag that is not a whole number >= 0, an offset beyond ±180°,
        a shift or CI limit beyond ±:data:`MEASURED_LIMIT_DEG`, a CI whose
        low limit exceeds its high one.
    """
    p = Path(path)
    frame = _read_csv(p, MEASURED_COLUMNS, may_be_empty=("pse_shift_deg", "ci_low", "ci_high"), by_fit=True)
    if frame.empty:
        raise InputError(str(p), "file", "holds no after-effects")
    limit = (-MEASURED_LIMIT_DEG, MEASURED_LIMIT_DEG, " deg (what fit can write)")
    _refuse_odd_values(frame, p, ("observer", "lag", "adapter_offset_deg"), "observer, lag and adapter offset",
                       ("lag",), {"adapter_offset_deg": DIRECTION, "pse_shift_deg": limit, "ci_low": limit,
                                  "ci_high": limit})
    swapped = frame["ci_low"] > frame["ci_high"]
    if swapped.any():
        raise InputError(str(p), f"line {line_of(swapped)}", "ci_low: above ci_high, as no fit writes it "
                         "(a changed or damaged cell?)")
    # fit's order (observers by name, the group last; lags, then offsets): every number compare prints,
    # the simulated groups' p included, then follows from the table's content, not from its rows' order
    key = frame["observer"].eq(GROUP).map(int).astype(str) + frame["observer"]
    order = np.lexsort((frame["adapter_offset_deg"].to_numpy(float), frame["lag"].to_numpy(float), key.to_numpy()))
    return frame.iloc[order].reset_index(drop=True)


def read_covariance(path: Path, measured: pd.DataFrame) -> pd.DataFrame:
    """Read and validate ``aftereffect_covariance.csv`` (:mod:`fitting.covariance`) beside ``measured``.

    Raises
    ------
    InputError
        As :func:`read_measured` for its rows (a covariance beyond
        :data:`MEASURED_LIMIT_DEG` squared), replicates that are not a whole
        number from 1 to ``fit``'s limit, labels that differ within an
        observer, an observer whose rows are not one per pair of its cells
        or whose covariance is not symmetric positive semi-definite, or one
        that ``measured`` lacks (a cut copy of it).
    """
    table = _read_csv(path, tuple(COVARIANCE_COLUMNS[:6]), optional=("replicates", "dof", "spread_dof"), by_fit=True)
    variance = MEASURED_LIMIT_DEG**2
    _refuse_odd_values(table, path, tuple(COVARIANCE_COLUMNS[:5]), "observer and pair of cells", ("lag_a", "lag_b"),
                       {"adapter_offset_a_deg": DIRECTION, "adapter_offset_b_deg": DIRECTION,
                        "covariance_deg2": (-variance, variance, " deg2 (what fit can write)"),
                        "replicates": (1.0, MAX_REPLICATES, " (what fit can draw)")})
    whole = table["replicates"].isna() | (table["replicates"] == np.round(table["replicates"]))
    if not whole.all():
        raise InputError(str(path), f"line {line_of(~whole)}", "replicates: expected a whole number, found "
                         f"{table['replicates'].iloc[line_of(~whole) - 2]:g}")
    _check_covariance_labels(table, path)
    for observer, rows in table.groupby("observer", sort=False):
        cells = rows[["lag_a", "adapter_offset_a_deg"]].drop_duplicates()
        found = covariance_matrix(rows, observer, cells["lag_a"], cells["adapter_offset_a_deg"]).matrix
        if found is None or len(rows) != len(cells) ** 2:
            raise InputError(str(path), "observer", f"{observer}: {len(rows)} rows, not one per pair of its "
                             f"{len(cells)} cells (a cut or changed file?); run fit again")
        _check_covariance(found, path, observer)
        _check_stream_labels(rows, found, path, observer)
    _check_cells_measured(table, measured, path)
    named = set(measured["observer"])
    absent = [o for o in dict.fromkeys(table["observer"]) if o not in named]
    if absent:
        raise InputError(str(path.parent / "aftereffect.csv"), "observer",
                         f"{', '.join(map(str, absent[:4]))}{' and more' if len(absent) > 4 else ''}: in "
                         f"{COVARIANCE_FILE} but not here (a cut or changed copy?); copy the fit's folder again "
                         "or run fit again")
    return table


def _header(path: Path) -> list[str]:
    try:
        with open(path, encoding="utf-8") as fh:
            return [c.strip() for c in fh.readline().split(",")]
    except (OSError, UnicodeDecodeError):
        return []


def match_predictions(measured: pd.DataFrame, predictions: pd.DataFrame, source: str, interpolate: bool) -> pd.DataFrame:
    """Attach a prediction (and its sd) to every measured point.

    Parameters
    ----------
    measured : DataFrame
        ``aftereffect.csv`` rows.
    predictions : DataFrame
        From :func:`read_predictions`.
    source : str
        The predictions file, for error messages.
    interpolate : bool
        Interpolate linearly over adapter offsets within a lag (never over
        lags, never beyond the predicted range).

    Raises
    ------
    InputError
        Listing the lags and offsets without a prediction.
    """
    out = measured.copy()
    lags, offsets = out["lag"].to_numpy(float), out["adapter_offset_deg"].to_numpy(float)
    shift, sd = np.full(len(out), np.nan), np.full(len(out), np.nan)
    for lag, same_lag in predictions.groupby("lag", sort=False):
        rows = np.flatnonzero(lags == float(lag))
        same_lag = same_lag.sort_values("adapter_offset_deg", kind="stable")
        x = same_lag["adapter_offset_deg"].to_numpy(float)
        y, y_sd = same_lag["pse_shift_deg"].to_numpy(float), same_lag["sd_deg"].to_numpy(float)
        below, above = _neighbours(x, offsets[rows])
        hit = np.where(np.isclose(x[below], offsets[rows]), below,
                       np.where(np.isclose(x[above], offsets[rows]), above, -1))
        shift[rows] = np.where(hit >= 0, y[hit], np.nan)
        sd[rows] = np.where(hit >= 0, y_sd[hit], np.nan)
        if interpolate and x.size >= 2:
            inside = rows[(hit < 0) & (offsets[rows] >= x[0]) & (offsets[rows] <= x[-1])]
            shift[inside] = np.interp(offsets[inside], x, y)
            sd[inside] = np.interp(offsets[inside], x, y_sd)
    missing = list(dict.fromkeys(f"lag {lag:g} offset {o:+g}" for lag, o in zip(lags[np.isnan(shift)],
                                                                                  offsets[np.isnan(shift)])))
    if missing:
        shown = ", ".join(missing[:6]) + (f" and {len(missing) - 6} more" if len(missing) > 6 else "")
        hint = "" if interpolate else " (or pass --interpolate to interpolate over offsets)"
        raise InputError(source, "lag/adapter_offset_deg", f"no prediction for {shown}{hint}")
    out["predicted_deg"] = shift
    out["prediction_sd_deg"] = sd
    return out


def _neighbours(grid: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Indices into the sorted, non-empty ``grid`` of its nearest entries at or below and at or above each value.

    At the grid's ends both are its first or last entry.  An entry
    ``np.isclose`` to a value is one of the two: the nearest on its side
    (``np.isclose``'s tolerance, 1e-8 + 1e-5 of the second number, changes
    by far less between neighbouring offsets than their spacing).
    """
    above = np.minimum(np.searchsorted(grid, values), grid.size - 1)
    return np.maximum(above - 1, 0), above


#: Bootstrap replicates behind the χ² measurements of ``benchmarks/bench_coverage.py`` (``fit``'s default).
CALIBRATED_REPLICATES = 1000
#: How far to trust the χ² p-values: measured by ``benchmarks/bench_coverage.py`` (benchmarks/README.md).
CHI2_CAVEAT = ("chi2 p-values: with the true after-effect curve as the prediction, simulated single observers were "
               "rejected at the 5 % level in 4.8-6.3 % of cases with up-down tracks and 3.9-5.3 % with Bayesian tracks "
               "(24-40 trials per condition), groups of 3 and of 8 observers (p from simulated groups) in 2.6-6.5 % "
               "(target 3-8 %; "
               "benchmarks/bench_coverage.py); read p just under 0.05 as a prompt to look, and weigh whether the "
               "observers' own rows agree")


@dataclass(frozen=True)
class Agreement:
    """Agreement statistics for one set of points (see the module text)."""

    n_points: int
    rmse_deg: float
    pearson_r: float
    gain: float
    gain_ci_low: float
    gain_ci_high: float
    chi2: float
    dof: int
    chi2_p: float
    inside_ci_fraction: float
    gain_unweighted: float = float("nan")
    covariance: str = "diagonal"
    gain_se: float = float("nan")
    chi2_reference: str = ""
    reference_dof: float = float("nan")      # ν of an F(n, ν) reference (not a column of agreement.csv)


def gls_gain(measured, predicted, v_inverse, free_scale: bool = True, rank: int | None = None):
    """Gain of ``measured ≈ g × predicted`` by GLS through the origin.

    Returns ``(g, se, dof)``: with ``free_scale`` (and more than one point)
    ``V`` is known up to a factor estimated from the residuals (``se`` as
    statsmodels' GLS ``bse``, ``dof = n - 1``, or ``rank - 1`` when
    ``v_inverse`` is the pseudo-inverse of a covariance of that rank);
    otherwise ``V`` is taken as known (``dof`` infinite).
    """
    m, p = np.asarray(measured, float), np.asarray(predicted, float)
    spp = float(p @ v_inverse @ p)
    if not spp > 0:
        return float("nan"), float("nan"), float("inf")
    g = float(p @ v_inverse @ m / spp)
    n = m.size if rank is None else int(rank)
    if not free_scale or n < 2:
        return g, float(np.sqrt(1.0 / spp)), float("inf")
    r = m - g * p
    s2 = float(r @ v_inverse @ r) / (n - 1)
    if not s2 >= 0:           # rounding in a nearly singular inverse: no standard error rather than a warning
        return g, float("nan"), float(n - 1)
    return g, float(np.sqrt(s2 / spp)), float(n - 1)


def agreement(measured, ci_low, ci_high, predicted, prediction_sd=None, covariance=None,
              replicates: float = np.nan, dof: float = np.nan, trials=None,
              spread_dof: float = np.nan, rank: int | None = None) -> Agreement:
    """Compute the agreement statistics of measured points with predictions.

    Parameters
    ----------
    measured, ci_low, ci_high, predicted : array_like
        Measured shifts with their 95 % CIs, and predicted shifts (deg).
    prediction_sd : array_like, optional
        Uncertainty of the predictions (deg); zero when not given.
    covariance : array_like (n, n), optional
        Full covariance of the measured shifts; diagonal from the CIs if omitted.
    replicates : float
        Bootstrap replicates behind ``covariance`` (Hartlap correction); NaN: none.
    dof : float
        Degrees of freedom of the standard errors in ``covariance`` (group);
        NaN: not given.
    trials : array_like, optional
        Trials behind each measured point (an observer's ``n_trials``); with
        a bootstrap ``covariance`` and neither ``dof`` nor ``spread_dof``,
        each standardised residual is read against t on ``trials - 2``
        degrees of freedom.
    spread_dof : float
        Degrees of freedom of the observer's fitted spread
        (:func:`fitting.covariance.spread_dof`); with a ``covariance`` and no
        ``dof``, ``chi2 / n`` is read against F(n, spread_dof).  NaN: not given.
    rank : int, optional
        Rank of ``covariance`` when below the number of points (a stream
        fit's shifts are functions of fewer parameters): the χ² and the gain
        then use its pseudo-inverse over the ``rank`` leading directions and
        ``rank`` degrees of freedom.

    Returns
    -------
    Agreement
    """
    m = np.asarray(measured, float)
    lo, hi = np.asarray(ci_low, float), np.asarray(ci_high, float)
    p = np.asarray(predicted, float)
    sd = np.zeros_like(p) if prediction_sd is None else np.asarray(prediction_sd, float)
    n = m.size
    if covariance is None:
        se = (hi - lo) / (2 * Z95)
        v = np.diag(se**2 + sd**2)
    else:
        v = np.asarray(covariance, float) + np.diag(sd**2)
    resid = m - p
    pp = float(np.sum(p * p))
    r = float(np.corrcoef(m, p)[0, 1]) if n >= 3 and m.std() > 0 and p.std() > 0 else float("nan")
    if np.any(~np.isfinite(np.diagonal(v))):
        # no interval (a fit without bootstrap): the interval-based statistics cannot be computed
        nan = float("nan")
        return Agreement(n_points=n, rmse_deg=float(np.sqrt(np.mean(resid**2))), pearson_r=r, gain=nan,
                         gain_ci_low=nan, gain_ci_high=nan, chi2=nan, dof=n, chi2_p=nan, inside_ci_fraction=nan,
                         gain_unweighted=float(np.sum(m * p) / pp) if pp > 0 else nan,
                         covariance="diagonal" if covariance is None else "full")
    if np.any(np.diagonal(v) <= 0):
        if covariance is None:
            raise InputError("aftereffect.csv", "ci_low/ci_high", "a measured point has a zero-width CI and no prediction sd")
        raise InputError(COVARIANCE_FILE, "covariance_deg2", "a measured point has zero variance and no prediction sd")
    k = int(rank) if covariance is not None and rank is not None and 1 <= rank < n else n
    scale = 1.0
    if np.isfinite(replicates) and replicates > k + 2:
        scale = (replicates - k - 2) / (replicates - 1)      # Hartlap et al. (2007)
    f_dof = float("nan")
    if np.isfinite(dof) and dof >= 1:
        nu = np.full(n, float(dof))                          # group: t on n_obs - 1
    elif covariance is not None and np.isfinite(spread_dof) and spread_dof > 0:
        nu = np.full(n, np.inf)                              # observer: r' V^-1 r / n against F(n, spread_dof)
        f_dof = float(spread_dof)
    elif covariance is not None and trials is not None:
        nu = np.asarray(trials, float) - 2.0                 # observer: t on n_trials - 2 (common practice)
        nu = np.where(nu >= 1, nu, np.nan)
    else:
        nu = np.full(n, np.inf)
    if k < n:
        # the pseudo-inverse over the k leading directions; residuals read as they are (no t scores)
        vals, vecs = np.linalg.eigh(v)
        lead = vecs[:, -k:] / np.sqrt(vals[-k:])
        vinv = scale * lead @ lead.T
        chi2 = float(resid @ vinv @ resid)
    else:
        chi2 = float(score_chi2(resid, v, nu, scale))
        vinv = scale * inverse(v)
    if np.isfinite(f_dof):
        chi2_p, reference = float(special.fdtrc(k, f_dof, chi2 / k)), f"F({k}, {f_dof:.1f})"
    else:
        chi2_p, reference = float(special.chdtrc(k, chi2)), f"chi2({k})"
    g, g_se, g_dof = gls_gain(m, p, vinv, rank=k)
    q = special.stdtrit(g_dof, 0.975) if np.isfinite(g_dof) else Z95
    # never more certain than with V known: residuals that happen to lie close to the predicted curve (two
    # points leave the scale one degree of freedom) are chance, not a smaller error; the group rows' rule
    # (fitting.meta.random_effects: Hartung-Knapp, never narrower than the fixed-effect interval)
    known_se = gls_gain(m, p, vinv, free_scale=False, rank=k)[1]
    half = max(q * g_se, Z95 * known_se)
    g_se = max(g_se, known_se)           # what the group's combination of gains (combine_gains) weighs it by
    return Agreement(
        n_points=n,
        rmse_deg=float(np.sqrt(np.mean(resid**2))),
        pearson_r=r,
        gain=g,
        gain_ci_low=g - half,
        gain_ci_high=g + half,
        chi2=chi2,
        dof=k,
        chi2_p=chi2_p,
        chi2_reference=reference,
        inside_ci_fraction=float(np.mean((p >= lo) & (p <= hi))),
        gain_unweighted=float(np.sum(m * p) / pp) if pp > 0 else float("nan"),
        covariance="diagonal" if covariance is None else "full",
        gain_se=g_se,
        reference_dof=f_dof,
    )


def combine_gains(gains, gain_ses, level: float = 0.95):
    """The group gain from the observers' own: ``(estimate, low, high)``, NaN with fewer than two.

    A random-effects mean (DerSimonian–Laird between-observer variance,
    Hartung–Knapp interval on k − 1 degrees of freedom, never narrower than
    the fixed-effect one: :func:`fitting.meta.random_effects`, as for the
    group shifts).  The GLS gain of the group shifts cannot see that
    observers differ in amplitude, which moves all of an observer's shifts
    together, and its interval held the true gain in only 50-70 % of
    simulated groups (benchmarks/README.md).
    """
    g, se = np.asarray(gains, float), np.asarray(gain_ses, float)
    ok = np.isfinite(g) & np.isfinite(se) & (se > 0)
    if ok.sum() < 2:
        return float("nan"), float("nan"), float("nan")
    c = random_effects(g[ok], se[ok] ** 2, level)
    return float(c.estimate), float(c.low), float(c.high)


@dataclass(frozen=True)
class Comparison:
    """Result of :func:`compare_results`.

    Attributes
    ----------
    points : DataFrame
        Every measured point with its prediction.
    table : DataFrame
        ``agreement.csv``: per observer, per lag and ``all``.
    page : Path or None
        ``report.html`` in the output folder: the fit's report with this
        comparison added (None when the results were given as a file).
    """

    points: pd.DataFrame
    table: pd.DataFrame
    page: Path | None = None
    notes: tuple = ()

    def summary(self) -> str:
        """A short text for the console."""
        overall = self.table[self.table["lag"] == "all"]
        lines = ["agreement with predictions (all lags):"]
        judged = set(overall.loc[overall["n_points"] > 0, "observer"])
        for observer in dict.fromkeys(self.points["observer"]):
            if observer not in judged:        # every point left out: the line says why, the notes say which
                lines.append(f"  {observer:>8}: no agreement statistics: {_left_out_text(self.points, observer)}")
        for _, row in overall[overall["n_points"] > 0].iterrows():
            start = f"  {row['observer']:>8}: RMSE {row['rmse_deg']:.2f} deg, r {_shown(row['pearson_r'])}"
            left = _left_out_text(self.points, row["observer"])
            left = f"; {left}" if left else ""
            if row["descriptive"]:
                left += f"; descriptive only (fewer than {MIN_OBSERVERS_FOR_INFERENCE} observers)"
            if not np.isfinite(row["inside_ci_fraction"]):
                lines.append(start + "; no interval statistics (see note)" + left)
                continue
            if not (np.isfinite(row["gain"]) or np.isfinite(row["chi2"])):
                lines.append(start + f", {row['inside_ci_fraction']:.0%} of predictions inside the 95% CIs; "
                             f"no gain or chi2 (unweighted gain {_shown(row['gain_unweighted'])}; see note)" + left)
                continue
            lines.append(
                start + ", " + _gain_text(row) + ", "
                + (_chi2_text(row) + ", " if np.isfinite(row["chi2"]) else "")
                + f"{row['inside_ci_fraction']:.0%} of predictions inside the 95% CIs"
                + ("" if row["covariance"] == "full" else "; errors treated as independent")
                + left
            )
        return "\n".join(lines + [f"note: {n}" for n in (*self.notes, CHI2_CAVEAT)])


def _described_only(points: pd.DataFrame) -> bool:
    """True when every group cell rests on fewer than three observers (flagged :data:`FEW_OBSERVERS`)."""
    flags = points.loc[points["observer"] == GROUP, "flags"] if "flags" in points else pd.Series(dtype=object)
    return len(flags) > 0 and all(isinstance(f, str) and FEW_OBSERVERS in f.split() for f in flags)


def _left_out_text(points: pd.DataFrame, observer) -> str:
    """How many of ``observer``'s points (the group's cells) are left out of the statistics, and why; "" if none."""
    if "in_statistics" not in points:
        return ""
    mine = points[points["observer"] == observer]
    out = mine[~mine["in_statistics"].astype(bool)]
    if not len(out):
        return ""
    words = {w for f in out.get("flags", pd.Series(dtype=object)) if isinstance(f, str) for w in f.split()}
    why = ", ".join(f"{w}: {reason}" for w, reason in LEFT_OUT_WHY.items() if w in words)
    what = "cells" if observer == GROUP else "points"
    count = f"all {len(mine)} {what}" if len(out) == len(mine) else f"{len(out)} of {len(mine)} {what}"
    return f"{count} left out ({why}; see note)"


def unused_predictions(measured: pd.DataFrame, predictions: pd.DataFrame, interpolate: bool) -> tuple[str, ...]:
    """A note on predicted points that no measured after-effect uses (empty when every one is used).

    A lag the fit lacks is never used; with ``interpolate`` an offset of a
    measured lag may still serve to interpolate, so only lags are counted.
    """
    m_lags, m_offsets = measured["lag"].to_numpy(float), measured["adapter_offset_deg"].to_numpy(float)
    lags, offsets = predictions["lag"].to_numpy(float), predictions["adapter_offset_deg"].to_numpy(float)
    used = np.isin(lags, m_lags)
    if not interpolate:
        for lag in np.unique(m_lags):
            grid = np.unique(m_offsets[m_lags == lag])
            rows = np.flatnonzero(lags == lag)
            below, above = _neighbours(grid, offsets[rows])
            used[rows] = np.isclose(offsets[rows], grid[below]) | np.isclose(offsets[rows], grid[above])
    unused = np.flatnonzero(~used)
    if not unused.size:
        return ()
    shown = ", ".join(f"lag {lags[i]:g} offset {offsets[i]:+g}" for i in unused[:4]) + (
        f" and {unused.size - 4} more" if unused.size > 4 else "")
    many = unused.size > 1
    return (f"{unused.size} predicted point{'s match' if many else ' matches'} no measured after-effect and "
            f"{'are' if many else 'is'} not used: {shown}",)


def few_replicates(cov_table: pd.DataFrame | None) -> tuple[set, tuple[str, ...]]:
    """Observers whose shifts' covariance rests on too few bootstrap replicates, and notes saying so.

    With no more replicates than shifts + 2 the covariance is singular and
    its corrected inverse (Hartlap et al. 2007) undefined, so gain and χ²
    would be noise: those observers (and the group, whose χ² p is drawn from
    the observers' covariances) are returned, to be left out.  Below the
    replicates the χ² was measured with the statistics are kept, with a
    caution.
    """
    if cov_table is None or "replicates" not in cov_table:
        return set(), ()
    by_observer = cov_table.groupby("observer", sort=False)
    reps = pd.to_numeric(by_observer["replicates"].first(), errors="coerce")
    shifts = (by_observer.size() ** 0.5).round().astype(int)
    blank = {o for o, r in reps.items() if np.isfinite(r) and r <= shifts[o] + 2}
    noisy = [o for o, r in reps.items() if np.isfinite(r) and o not in blank and r < CALIBRATED_REPLICATES]
    notes = []
    if blank:
        shown = sorted(blank, key=list(reps.index).index)
        notes.append(f"{', '.join(map(str, shown))}: the shifts' covariance rests on "
                     f"{reps[shown[0]]:g} bootstrap replicates, no more than the shifts + 2, so it is singular; gain "
                     f"and chi2 are left out{' (the group' + chr(39) + 's with them)' if GROUP in reps.index else ''}: "
                     f"fit again with --bootstrap {CALIBRATED_REPLICATES}")
        blank.add(GROUP)
    if noisy:
        notes.append(f"{', '.join(map(str, noisy))}: the shifts' covariance rests on {reps[noisy[0]]:g} bootstrap "
                     f"replicates; chi2 and gain were checked with {CALIBRATED_REPLICATES} and swing with fewer "
                     f"(fit again with --bootstrap {CALIBRATED_REPLICATES} before reading p)")
    return blank, tuple(notes)


def _shown(value) -> str:
    """A statistic with two decimals, or "undefined" (r of constant predictions, gain of all-zero ones)."""
    return f"{value:.2f}" if np.isfinite(value) else "undefined"


def _gain_text(row) -> str:
    """The gain of an agreement row with its interval, or why there is none."""
    if not np.isfinite(row["gain"]):
        return "gain undefined (see note)"
    interval = (f" [{row['gain_ci_low']:.2f}, {row['gain_ci_high']:.2f}]"
                if np.isfinite(row["gain_ci_low"]) and np.isfinite(row["gain_ci_high"]) else " (no interval)")
    return f"gain {row['gain']:.2f}{interval} (unweighted {_shown(row['gain_unweighted'])})"


def _chi2_text(row) -> str:
    """The χ² of an agreement row with the distribution its p-value is read from."""
    reference = str(row.get("chi2_reference") or "")
    if reference.startswith("F"):
        return f"chi2 {row['chi2']:.1f}, chi2/{row['dof']:g} read against {reference} (p {row['chi2_p']:.3g})"
    if reference.startswith("simulated"):
        floor = row["chi2_p"] * (DRAWS + 1) <= 1.0 + 1e-6      # no simulated group reached it
        p = f"p <= {row['chi2_p']:.2g}" if floor else f"p {row['chi2_p']:.3g}"
        return f"chi2 {row['chi2']:.1f} on {row['dof']:g} points ({p} from {DRAWS} simulated groups)"
    return f"chi2 {row['chi2']:.1f} on {row['dof']:g} df (p {row['chi2_p']:.3g})"


def powerless_chi2_note(observer, a: Agreement) -> str | None:
    """A note when ``a``'s χ² is read against an F(n, ν) whose 5 % point is more than twice χ²(n)'s, else None.

    ν is the degrees of freedom of the observer's fitted spread; with ν near
    1 (few trials per condition) the F reference is so wide that hardly any
    χ² rejects, and a p-value near 1 says nothing of agreement.
    """
    if not (np.isfinite(a.reference_dof) and np.isfinite(a.chi2) and a.dof >= 1):
        return None
    needed, usual = a.dof * float(special.fdtri(a.dof, a.reference_dof, 0.95)), float(special.chdtri(a.dof, 0.05))
    if not needed > 2.0 * usual:
        return None
    return (f"{observer}: its spread rests on {a.reference_dof:.1f} degrees of freedom, so its chi2 would have to "
            f"exceed {needed:,.0f} (chi2({a.dof}): {usual:.1f}) to reject at 5 %: the test can hardly reject; read the "
            "RMSE and the fraction inside the CIs (more trials per condition give the spread more)")


def _reduced_rank_notes(table: pd.DataFrame) -> tuple[str, ...]:
    """Say where the χ² saw fewer directions than points (stream fits), and what that leaves out."""
    fewer = table[pd.to_numeric(table["dof"], errors="coerce") < table["n_points"]]
    return tuple(f"{observer}: its shifts are a curve of few fitted parameters (a stream fit), so chi2 and gain "
                 "judge the predictions only in the directions that curve can move in (chi2 on as many degrees of "
                 "freedom); a prediction of another shape can pass them; read the RMSE and the fraction inside "
                 "the CIs too" for observer in fewer["observer"].unique())


#: Columns of ``agreement.csv`` that need the measured intervals.
INTERVAL_COLUMNS = ("gain", "gain_ci_low", "gain_ci_high", "chi2", "dof", "chi2_p", "chi2_reference",
                    "inside_ci_fraction")


def not_estimable(points: pd.DataFrame) -> tuple[np.ndarray, tuple[str, ...]]:
    """Measured points whose flags say they cannot be judged (:data:`NOT_ESTIMABLE`), and a note per observer.

    Such a shift, or its interval, is not estimated from the answers (a PSE
    on its fitting bound, an interval of zero width or none), so it would
    swamp χ² and gain; it is left out of every agreement statistic.

    Returns
    -------
    left_out : ndarray of bool
        One per row of ``points``.
    notes : tuple of str
    """
    words = _flag_words(points)
    left_out = np.array([bool(w & NOT_ESTIMABLE.keys()) for w in words], dtype=bool)
    notes = []
    for observer in dict.fromkeys(points["observer"][left_out]):
        mine = (points["observer"] == observer).to_numpy()
        out = np.flatnonzero(mine & left_out)
        why = " or ".join(f"{w} ({reason})" for w, reason in NOT_ESTIMABLE.items() if any(w in words[i] for i in out))
        if out.size == mine.sum():
            notes.append(f"{observer}: every measured point is flagged {why}; the observer is left out of chi2, gain "
                         "and the other agreement statistics")
            continue
        notes.append(f"{observer}: {out.size} of {int(mine.sum())} measured points are flagged {why} and left out "
                     f"of chi2, gain and the other agreement statistics: {_cells_text(points, out)}")
    return left_out, tuple(notes)


def few_observer_cells(points: pd.DataFrame) -> tuple[np.ndarray, tuple[str, ...]]:
    """Group cells that rest on fewer than ``MIN_OBSERVERS_FOR_INFERENCE`` observers, and a note saying so.

    ``fit`` flags such a group row :data:`FEW_OBSERVERS` (:mod:`fitting.group`):
    its interval describes those observers, it is no inference about a
    population, and with two observers it is often tens of degrees wide, so
    it would pass any prediction.  Such cells are left out of every agreement
    statistic of the group, its gain included (:func:`_group_gain`), unless
    every cell is one (a group of fewer than three observers): then the
    statistics are kept and labelled descriptive only.

    Returns
    -------
    left_out : ndarray of bool
        One per row of ``points``.
    notes : tuple of str
    """
    mine = (points["observer"] == GROUP).to_numpy()
    left_out = mine & np.array([FEW_OBSERVERS in w for w in _flag_words(points)], dtype=bool)
    if not left_out.any():
        return left_out, ()
    why = (f"rest on fewer than {MIN_OBSERVERS_FOR_INFERENCE} observers (flagged {FEW_OBSERVERS}: their intervals "
           "describe those observers, they are not inference about a population)")
    if left_out.sum() == mine.sum():      # a group of fewer than three observers: described, not left out
        return np.zeros_like(left_out), (f"{GROUP}: every cell {why.replace('rest on', 'rests on', 1)}; so are its "
                                          "agreement statistics, which are descriptive only",)
    out = np.flatnonzero(left_out)
    if out.size == 1:
        why = why.replace("rest on", "rests on", 1)
    return left_out, (f"{GROUP}: {out.size} of {int(mine.sum())} cells {why} and {'is' if out.size == 1 else 'are'} "
                      "left out of the group's chi2, gain (the observers' gains are combined over the other cells) "
                      f"and the other agreement statistics: {_cells_text(points, out)}",)


def _flag_words(points: pd.DataFrame) -> list[set]:
    """Each point's flag words (none where ``points`` has no flags)."""
    flags = points["flags"] if "flags" in points else pd.Series("", index=points.index)
    return [set(f.split()) if isinstance(f, str) else set() for f in flags]


def _cells_text(points: pd.DataFrame, rows) -> str:
    """The cells of ``points`` at positions ``rows``, as "lag 0 offset +30, …", the first four and a count."""
    cells = [f"lag {points['lag'].iloc[i]:g} offset {points['adapter_offset_deg'].iloc[i]:+g}" for i in rows]
    return ", ".join(cells[:4]) + (f" and {len(cells) - 4} more" if len(cells) > 4 else "")


def _undefined_gain_notes(points: pd.DataFrame, table: pd.DataFrame) -> tuple[str, ...]:
    """Say why a row has a χ² but no gain: every prediction it is compared with is 0 (or, for a stream fit,
    outside the directions its shifts can move in); one note for the observers it holds for alike."""
    alike: dict[str, list] = {}
    for observer, rows in table[table["gain"].isna() & table["chi2"].notna()].groupby("observer", sort=False):
        lags = list(rows["lag"])
        mine = points[points["observer"] == observer]
        if "all" not in lags:
            mine = mine[mine["lag"].map("{:g}".format).isin(lags)]
        where = "over all lags" if "all" in lags else "at lag " + ", ".join(lags)
        why = (f"every prediction {where} is 0 (no after-effect)" if (mine["predicted_deg"] == 0).all() else
               f"the predictions {where} lie outside the directions the fitted curve of the shifts can move in")
        alike.setdefault(why, []).append(str(observer))
    return tuple(f"{', '.join(observers)}: {why}, so the gain (measured = g x predicted) is undefined; chi2 tests "
                 "the prediction as it stands" for why, observers in alike.items())


def _leave_out_interval_statistics(points: pd.DataFrame, table: pd.DataFrame) -> tuple[str, ...]:
    """Blank the interval-based statistics of observers whose points lack CIs; say so.

    A fit without bootstrap (or a point whose interval could not be
    computed) has no CI: weights, χ² and the fraction inside the CIs cannot
    be computed and are left empty rather than reported as 0 %.
    """
    lacking = points[["ci_low", "ci_high"]].isna().any(axis=1) | points["pse_shift_deg"].isna()
    notes = []
    for observer, miss in lacking.groupby(points["observer"], sort=False):
        if miss.any():
            table.loc[table["observer"] == observer, list(INTERVAL_COLUMNS)] = np.nan
            notes.append(f"{observer}: {int(miss.sum())} of {miss.size} measured points have no confidence "
                         "interval (a fit without --bootstrap?); gain, chi2 and the fraction inside the CIs "
                         "are left out")
    return tuple(notes)


def _check_covariance(cov: np.ndarray, path: Path, observer) -> None:
    """Refuse a covariance that no fit writes: not symmetric, or not positive semi-definite.

    ``fit`` writes 6 significant digits, which moves entries and eigenvalues
    by far less than the tolerance here (1e-4 of the largest variance).
    """
    tol = 1e-4 * float(np.abs(np.diagonal(cov)).max())
    if not (np.abs(cov - cov.T).max() <= tol and np.linalg.eigvalsh((cov + cov.T) / 2.0).min() >= -tol):
        raise InputError(str(path), "covariance_deg2", f"observer {observer}: the shifts' covariance is not symmetric "
                         "positive semi-definite, as no fit writes it (a changed or damaged cell?)")


def _check_stream_labels(rows: pd.DataFrame, cov: np.ndarray, path: Path, observer) -> None:
    """Refuse ``shift_parameters`` other than a stream fit writes them: ``a<n> w`` for lag n − 1, in every cell or none.

    They set the degrees of freedom of ``compare``'s χ² (:func:`fitting.covariance.covariance_matrix`).
    """
    named = rows.get("shift_parameters", pd.Series("", index=rows.index)).astype(object)
    text = named.where(named.notna(), "").astype(str).str.strip()
    if not (text != "").any():      # an adapt-test fit's: none named, and a covariance of full rank
        _check_full_rank(cov, float(rows["replicates"].iloc[0]), path, observer)
        return
    expected = rows["lag_a"].map(lambda lag: f"a{int(lag) + 1} w" if float(lag).is_integer() else "")
    wrong = text != expected
    if wrong.any():
        i = int(np.flatnonzero(wrong.to_numpy())[0])
        raise InputError(str(path), "shift_parameters", f"{observer}, lag {rows['lag_a'].iloc[i]:g}: "
                         f"{text.iloc[i][:20]!r}, not {expected.iloc[i]!r} as a stream fit writes it (they set the "
                         "chi2's degrees of freedom; a changed cell?); run fit again")


#: An eigenvalue below this share of the largest counts as zero: ``fit`` writes 6 significant digits; a stream
#: fit's covariance has eigenvalues of 1e-16 of the largest beyond its rank, an adapt–test fit's 1e-2 and more.
RANK_TOLERANCE = 1e-6


def _check_full_rank(cov: np.ndarray, replicates: float, path: Path, observer) -> None:
    """Refuse a covariance without ``shift_parameters`` whose rank is below its cells' number.

    Only a stream fit writes such a covariance (its shifts are functions of
    K + 1 parameters), and it names them: read as full rank, the χ² would be
    read on as many degrees of freedom as cells. Covariances from no more
    replicates than cells + 2 are singular by nature (:func:`few_replicates`
    says so and leaves their χ² out).
    """
    n = cov.shape[0]
    if np.isfinite(replicates) and replicates <= n + 2:
        return
    # cells that did not vary over the replicates (a point on a bound) are left to compare's own rules
    varied = np.diagonal(cov) > RANK_TOLERANCE * np.abs(np.diagonal(cov)).max()
    values = np.linalg.eigvalsh((cov + cov.T)[np.ix_(varied, varied)] / 2.0)
    rank = int(np.sum(values > RANK_TOLERANCE * values[-1])) if values.size else 0
    if rank < varied.sum():
        raise InputError(str(path), "shift_parameters", f"{observer}: empty, but the shifts' covariance has rank "
                         f"{rank} for {int(varied.sum())} cells, as only a stream fit writes it, naming the parameters "
                         "(they set the chi2's degrees of freedom; a changed column?); run fit again")


def _check_cells_measured(table: pd.DataFrame, measured: pd.DataFrame, path: Path) -> None:
    """Refuse a covariance cell whose point ``aftereffect.csv`` lacks (a row deleted from it)."""
    have = set(zip(measured["observer"].astype(str), measured["lag"].astype(float),
                   measured["adapter_offset_deg"].astype(float)))
    cells = table[["observer", "lag_a", "adapter_offset_a_deg"]].drop_duplicates()
    for observer, lag, offset in zip(cells["observer"].astype(str), cells["lag_a"].astype(float),
                                     cells["adapter_offset_a_deg"].astype(float)):
        if observer in set(measured["observer"].astype(str)) and (observer, lag, offset) not in have:
            raise InputError(str(path.parent / "aftereffect.csv"), "observer",
                             f"{observer}, lag {lag:g}, offset {offset:+g}: in {COVARIANCE_FILE} but not here (a "
                             "deleted row?); copy the fit's folder again or run fit again")


def _check_covariance_labels(table: pd.DataFrame, path: Path) -> None:
    """Refuse what no fit writes: ``spread_dof`` not positive or not one per observer, ``shift_parameters``
    differing between the rows of one cell."""
    if (table["spread_dof"] <= 0).any():
        line = int(np.flatnonzero((table["spread_dof"] <= 0).to_numpy())[0]) + 2
        raise InputError(str(path), f"line {line}", "spread_dof: degrees of freedom must be positive "
                         "(no fit writes this; a changed or damaged cell?)")
    named = table.get("shift_parameters", pd.Series("", index=table.index)).astype(object)
    labels = table.assign(shift_parameters=named.where(named.notna(), "").astype(str),
                          spread_dof=table["spread_dof"].fillna(-1.0))
    for column, keys in (("spread_dof", ["observer"]),
                         ("shift_parameters", ["observer", "lag_a", "adapter_offset_a_deg"])):
        varied = labels.groupby(keys, sort=False)[column].nunique()
        if (varied > 1).any():
            where = ", ".join(f"{k} {v}" for k, v in zip(keys, np.atleast_1d(varied[varied > 1].index[0])))
            raise InputError(str(path), column, f"{where}: differs between rows, as no fit writes it "
                             "(a changed or damaged cell?)")


def _shown_path(path: Path, out: Path) -> str:
    """``path`` relative to ``out`` when it lies beside it (same bytes wherever the pair lies), else absolute."""
    rel = os.path.relpath(path.resolve(), out.resolve())
    return rel if not rel.startswith(os.pardir + os.sep + os.pardir) else str(path.resolve())


def _with_empty_parts(rows: list[dict], points: pd.DataFrame, left_out: np.ndarray, described: bool) -> list[dict]:
    """``rows`` with a row of no statistics (``n_points`` 0) for each observer and lag whose every point is left out.

    Every observer and lag measured has its row in ``agreement.csv``, so a
    reader sees that a lag was judged on nothing (and ``points_left_out``
    says how many points it had) rather than missing from the table.  Rows
    in the order of ``points``' observers, lags ascending, then ``all``.
    """
    found = {(row["observer"], row["lag"]): row for row in rows}
    empty = {column: np.nan for column in AGREEMENT_COLUMNS}
    lag_text = points["lag"].map("{:g}".format).to_numpy()
    out = []
    for observer in dict.fromkeys(points["observer"]):
        mine = (points["observer"] == observer).to_numpy()
        for lag in [*(f"{x:g}" for x in sorted(points.loc[mine, "lag"].unique())), "all"]:
            part = mine if lag == "all" else mine & (lag_text == lag)
            out.append(found.get((observer, lag)) or {
                **empty, "observer": observer, "lag": lag, "n_points": 0, "chi2_reference": "", "covariance": "",
                "points_left_out": int((part & left_out).sum()), "descriptive": observer == GROUP and described})
    return out


def _agreement_of(g: pd.DataFrame, observer, cov_table: pd.DataFrame | None, usable: bool):
    """:func:`agreement` of one observer's points ``g``, with their covariance when ``usable``; and that covariance."""
    found = (NO_COVARIANCE if not usable else
             covariance_matrix(cov_table, observer, g["lag"], g["adapter_offset_deg"]))
    a = agreement(g["pse_shift_deg"], g["ci_low"], g["ci_high"], g["predicted_deg"],
                  g["prediction_sd_deg"], found.matrix, found.replicates, found.dof,
                  trials=pd.to_numeric(g["n_trials"], errors="coerce") if "n_trials" in g else None,
                  spread_dof=found.spread_dof, rank=found.rank)
    return a, found


def _group_gain(used: pd.DataFrame, cells: pd.DataFrame, cov_table: pd.DataFrame | None, too_few: set):
    """The group's gain over its ``cells``: the combination (:func:`combine_gains`) of each observer's gain over
    those of its points that lie in them, so a cell left out of the group's statistics stays out of its gain."""
    inside = set(zip(cells["lag"].astype(float), cells["adapter_offset_deg"].astype(float)))
    gains, ses = [], []
    for observer, rows in used[used["observer"] != GROUP].groupby("observer", sort=False):
        mine = rows[[(float(lag), float(o)) in inside for lag, o in zip(rows["lag"], rows["adapter_offset_deg"])]]
        if len(mine):
            a, _ = _agreement_of(mine, observer, cov_table, cov_table is not None and observer not in too_few)
            gains.append(a.gain)
            ses.append(a.gain_se)
    return combine_gains(gains, ses)


def _simulated_group_tests(points: pd.DataFrame, cov_table: pd.DataFrame, group: pd.DataFrame,
                           parts: list) -> list | None:
    """The group's χ² with p values from simulated groups (:mod:`fitting.group_chi2`), one per part.

    ``parts``: the index labels of ``group`` (the group's points) in each
    scored set.  None when the observers' own covariances are not all in the
    covariance file (the t-read normal scores then stay).
    """
    observers = points[points["observer"] != GROUP]
    covariances = {}
    for observer, rows in observers.groupby("observer", sort=True):
        covariances[observer] = covariance_matrix(cov_table, observer, rows["lag"],
                                                  rows["adapter_offset_deg"]).matrix
    cells = list(zip(group["lag"].astype(float), group["adapter_offset_deg"].astype(float)))
    data = GroupData.from_tables(observers, covariances, cells)
    if data is None:
        return None
    where = {label: j for j, label in enumerate(group.index)}
    selects = [np.array([where[label] for label in labels]) for labels in parts]
    return calibrated_p(data, group["predicted_deg"].to_numpy(float), group["prediction_sd_deg"].to_numpy(float),
                        selects)


def compare_results(results_dir: str | Path, predictions_path: str | Path, out_dir: str | Path,
                    interpolate: bool = False, figures: bool = True, progress: bool | None = None) -> Comparison:
    """Compare ``RESULTS_DIR/aftereffect.csv`` with a predictions table.

    Writes ``agreement.csv``, ``comparison_points.csv``,
    ``predictions_source.txt``, (with ``figures``) ``comparison.png`` /
    ``.pdf`` and, when ``results_dir`` is a fit folder, ``report.html``: the
    fit's report with the comparison added (:mod:`fitting.page`).
    ``progress``: None shows a progress line only on a terminal.

    Raises
    ------
    InputError
        Missing or malformed files, or predictions that do not cover the
        measured grid.
    """
    results = Path(results_dir)
    settle(results if results.is_dir() else results.parent)    # a fit killed while moving its set in
    # read under the fit folder's shared lock: a fit moving its set in meanwhile waits (fitting.outputs)
    with folder_lock(results, exclusive=False) if results.is_dir() else nullcontext():
        return _compare(results, predictions_path, out_dir, interpolate, figures, progress)


def _compare(results: Path, predictions_path, out_dir, interpolate: bool, figures: bool, progress) -> Comparison:
    measured_path = results / "aftereffect.csv" if results.is_dir() else results
    measured = read_measured(measured_path)
    shown = None
    if results.is_dir():
        shown = read_fit(results)          # what the page shows, checked now (no link followed) and copied
        read_report_data(results)          # refused now, not after the work, if the page could not be made
    cov_path = measured_path.parent / COVARIANCE_FILE
    cov_table = read_covariance(cov_path, measured) if cov_path.is_file() else None
    predictions = read_predictions(predictions_path)
    points = match_predictions(measured, predictions, str(predictions_path), interpolate)
    left_out, estimable_notes = not_estimable(points)
    few, few_notes = few_observer_cells(points)
    left_out |= few
    described = _described_only(points)     # a group of fewer than three observers: its statistics describe them
    points["in_statistics"] = ~left_out          # the figure draws the others hollow
    used = points[~left_out]
    rows, fallback, powerless = [], (), ()
    too_few, replicate_notes = few_replicates(None if cov_table is None else
                                              cov_table[cov_table["observer"].isin(used["observer"])])
    for observer, group in used.groupby("observer", sort=False):
        parts = [(f"{lag:g}", g) for lag, g in group.groupby("lag")] + [("all", group)]
        usable = cov_table is not None and observer not in too_few
        simulated = (_simulated_group_tests(used, cov_table, group, [g.index for _, g in parts])
                     if observer == GROUP and usable else None)
        if observer == GROUP and usable and simulated is None:
            fallback = (f"{GROUP}: the observers' own rows or their covariances in {COVARIANCE_FILE} are not all "
                        "there, so the group's chi2 p is read from chi2(n), which rejects true predictions too often "
                        "with few observers",)
        mine = points["observer"] == observer
        for (lag, g), calibrated in zip(parts, simulated or [None] * len(parts)):
            try:
                a, found = _agreement_of(g, observer, cov_table, usable)
            except InputError as exc:       # named where the user looks: the file in its folder, whose points
                where = cov_path if exc.source == COVARIANCE_FILE else measured_path
                raise InputError(str(where), exc.field, f"{exc.message} (observer {observer}, lag {lag})") from None
            if calibrated is not None and found.matrix is not None and np.isfinite(a.chi2):
                a = replace(a, chi2=calibrated[0], chi2_p=calibrated[1],
                            chi2_reference=f"simulated ({DRAWS} groups)")
            if observer == GROUP:
                gain, low, high = _group_gain(used, g, cov_table, too_few)
                if np.isfinite(gain):
                    a = replace(a, gain=gain, gain_ci_low=low, gain_ci_high=high)
            part = mine if lag == "all" else mine & (points["lag"].map("{:g}".format) == lag)
            weak = powerless_chi2_note(observer, a) if lag == "all" and observer not in too_few else None
            powerless += (weak,) if weak else ()
            rows.append({"observer": observer, "lag": lag, **a.__dict__,
                         "points_left_out": int((part & left_out).sum()),
                         "descriptive": observer == GROUP and described})
    table = pd.DataFrame(_with_empty_parts(rows, points, left_out, described), columns=AGREEMENT_COLUMNS)
    table.loc[table["observer"].isin(too_few), ["gain", "gain_ci_low", "gain_ci_high", "chi2", "chi2_p",
                                                "chi2_reference"]] = np.nan
    notes = (estimable_notes + few_notes + _leave_out_interval_statistics(used, table) + replicate_notes
             + _undefined_gain_notes(used, table) + powerless + _reduced_rank_notes(table) + fallback
             + unused_predictions(measured, predictions, interpolate) + (shown.notes if shown else ())
             + (() if results.is_dir() else ("no report page: it is made when the fit's folder is given, not one "
                                               "of its tables",)))
    with output_set(out_dir, "compare") as staged:
        out = staged.folder
        write_csv(table, out / "agreement.csv")
        write_csv(points, out / "comparison_points.csv")
        write_text(out / "predictions_source.txt", _shown_path(Path(predictions_path), staged.final_dir) + "\n")
        if figures:
            from fitting.compare_figure import overlay_figure

            with phase("drawing the comparison", show=progress):
                overlay_figure(points, out / "comparison")
        # the page shows a copy of the fit (fitting.fit_copy), so a later fit into that folder cannot change it
        page = (write_page(shown.write(out), out / PAGE, compare_dir=out, fit_name=results.resolve().name,
                           notes=shown.notes) if shown else None)
    return Comparison(points=points, table=table, page=None if page is None else Path(staged.final(page)),
                      notes=notes)
