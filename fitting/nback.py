"""n-back analysis of continuous-stream logs.

Model
-----
Each stream test ``t`` at offset ``x_t`` follows the K periods with offsets
``Δ_t1`` (1-back) ... ``Δ_tK``.  One psychometric regression covers all
tests of an observer::

    P(cw | x_t) = λ/2 + (1 − λ) · Φ((x_t − μ₀ − Σ_n a_n · g(Δ_tn; w)) / σ)
    g(Δ; w)     = (Δ / w) · exp(½ − ½ (Δ / w)²)

* **per-n model**: one DoG amplitude ``a_n`` per n, a shared peak offset
  ``w``, a shared spread ``σ`` and lapse ``λ`` (free in ``[0, lapse_max]``
  or fixed) — gives ``tuning.csv`` (lag = n − 1) and ``aftereffect.csv``;
* **decay model**: the same with ``a_n = A · exp(−(n − 1) / τ)`` — gives
  ``decay.csv``.  It is the simulated observer's formula
  (``runner.observers.ObserverModel.nback_shift_deg``) and, for n = 1, the
  discrete DoG (README, Models) at lag k = n − 1.

Both are fitted by maximum likelihood with one batched solver
(:func:`solve`): projected Fisher scoring with a backtracking line search;
the peak offset lives in ``fitting.aftereffect.peak_bounds`` of the stream's
offsets, ``τ`` in ``fitting.aftereffect.TAU_BOUNDS``.  Starting values come
from a grid over ``w`` (and ``τ``), each grid point fitted with that value
held, all in one batch.  With the lapse fixed at 0 and ``w`` held, the per-n
model is a probit GLM with predictors ``x`` and ``g(Δ_tn; w)``; the tests
check it against statsmodels.

Confidence intervals: parametric bootstrap (Wichmann & Hill 2001, II):
replicate answers are drawn from the per-n fit at the observer's own test
offsets and stream, and both models are refitted on every replicate (in one
batch each).  Intervals are percentiles of the replicates (default) or
bias-corrected (``"bc"``: BCa of :func:`fitting.bootstrap.bca_interval`
with zero acceleration).  As for discrete fits, adaptive levels are held
fixed in the replicates, so intervals are approximate.

``aftereffect.csv`` holds the fitted shift ``a_n · g(Δ; w)`` at every offset
of the stream's set other than 0 and 180 (where the DoG is 0 or has no
sign), with bootstrap intervals; ``n_trials`` is the number of tests that
offset preceded at that n.  It is the fitted curve at the stream's
offsets, not a free estimate per offset.

This module imports neither ``runner`` nor psychopy.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .aftereffect import TAU_BOUNDS, dog, peak_bounds
from .arrow import dense_solve
from .bootstrap import bca_interval, percentile_interval
from .covariance import long_table, spread_dof
from .errors import InputError
from .flags import MIN_TRIALS_FOR_INTERVAL, STEEP_FRACTION, flagged_first, join, off_interval
from .flags import on_bound as flag_on_bound
from .psychometric import DEFAULT_LAPSE_MAX, sigmoid_parts
from .same_person import same_person_notes
from .outputs import output_set
from .tables import (MAX_OFFSET_DEG, check_row_agreement, check_unique_trials, find_logs, read_log_table, write_csv,
                     write_text)

#: The ``block`` value of stream rows in a trial log.
STREAM_BLOCK = "stream"
INTERVALS = ("percentile", "bc")
_FLOOR = 1e-12
_MODELS = ("per_n", "decay")


# ----------------------------------------------------------------------------------------------
# data


@dataclass(frozen=True)
class StreamTrials:
    """The usable stream tests of one observer.

    Attributes
    ----------
    observer : str
    test_offset_deg : ndarray (T,)
    response_cw : ndarray (T,)
        1 = clockwise, 0 = counter-clockwise (missed answers removed).
    preceding_offsets_deg : ndarray (T, K)
        Column ``n - 1`` holds the offset of the n-th preceding period.
    period_s : float
        Duration of one period (NaN if unknown).
    """

    observer: str
    test_offset_deg: np.ndarray
    response_cw: np.ndarray
    preceding_offsets_deg: np.ndarray
    period_s: float = float("nan")

    @property
    def n_back(self) -> int:
        """K, the preceding periods of every test."""
        return self.preceding_offsets_deg.shape[1]

    @property
    def n_trials(self) -> int:
        return self.test_offset_deg.size


def is_stream_log(path) -> bool:
    """True when a trial log holds stream tests (its ``block`` column says ``stream``)."""
    try:
        head = pd.read_csv(path, dtype=str, keep_default_na=False, nrows=5, encoding="utf-8-sig")
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, OSError):
        return False
    return "block" in head.columns and (head["block"].str.strip() == STREAM_BLOCK).any()


def _fail(source: str, line: int, column: str, message: str):
    raise InputError(source, f"line {line}, column {column}", message)


def _read_stream_file(path: Path) -> pd.DataFrame:
    source = str(path)
    raw = read_log_table(path)
    need = ["observer", "test_offset_deg", "response_cw", "timing_ok", "block", "preceding_offsets_deg"]
    missing = [c for c in need if c not in raw.columns]
    if missing:
        raise InputError(source, f"column {missing[0]}", "missing; a stream log needs " + ", ".join(need))
    number = {c: pd.to_numeric(raw[c].str.strip() if c in raw else pd.Series(dtype=str), errors="coerce")
              for c in ("test_offset_deg", "lag")}
    practice = raw["practice"].str.strip().isin(("1", "true")) if "practice" in raw else pd.Series(False, raw.index)
    check_row_agreement(raw, source, [f"line {i + 2}" for i in range(len(raw))], number["test_offset_deg"],
                        practice, number["lag"].reindex(raw.index))
    other = np.flatnonzero(raw["block"].str.strip() != STREAM_BLOCK)
    if 0 < other.size < len(raw):       # dropped without a word before, and not counted in trials_read
        _fail(source, int(other[0]) + 2, "block", f"{raw['block'].iloc[other[0]].strip()[:20]!r} in a stream log "
              f"({other.size} such row{'s' * (other.size > 1)}): every test of a stream session has block "
              f"{STREAM_BLOCK!r}; adapt-test trials go in a log of their own, fitted separately")
    raw = raw[raw["block"].str.strip() == STREAM_BLOCK].reset_index(drop=True)     # none: not a stream log
    rows = []
    for i, r in raw.iterrows():
        line = i + 2
        obs = r["observer"].strip()
        if not obs:
            _fail(source, line, "observer", "empty; a value is required")
        cells = {}
        for column, what in (("test_offset_deg", "a number"), ("preceding_offsets_deg", "numbers (; between offsets)")):
            try:        # the cell at fault, by its own name
                cells[column] = tuple(float(v) for v in r[column].split(";"))
            except ValueError:
                _fail(source, line, column, f"{r[column][:40]!r}: expected {what}")
            if not all(np.isfinite(cells[column])) or len(cells["test_offset_deg"]) != 1:
                _fail(source, line, column, f"{r[column][:40]!r}: expected {what}, finite")
        (x,), prec = cells["test_offset_deg"], cells["preceding_offsets_deg"]
        if abs(x) > MAX_OFFSET_DEG or any(abs(v) > MAX_OFFSET_DEG for v in prec):
            _fail(source, line, "test_offset_deg/preceding_offsets_deg",
                  f"expected offsets within ±{MAX_OFFSET_DEG:g} deg")
        resp = r["response_cw"].strip()
        if resp not in ("", "0", "1"):
            _fail(source, line, "response_cw", f"'{resp}' is not 1, 0 or empty")
        ok = r["timing_ok"].strip().lower()
        if ok not in ("true", "false", "1", "0"):
            _fail(source, line, "timing_ok", f"'{ok}' is not true/false")
        period = float(r["period_s"]) if "period_s" in raw.columns and r["period_s"].strip() else float("nan")
        practice = "practice" in raw.columns and r["practice"].strip() in ("1", "true")
        session = r["session"].strip() if "session" in raw.columns else ""
        trial = r["trial"].strip() if "trial" in raw.columns else str(line)
        rows.append((obs, x, resp, ok in ("true", "1"), practice, prec, period, source, line, session, trial))
    return pd.DataFrame(rows, columns=["observer", "x", "response", "timing_ok", "practice", "preceding",
                                       "period_s", "source", "line", "session", "trial"])


def read_stream_logs(paths, include_bad_timing: bool = False) -> list[StreamTrials]:
    """Read stream trial logs; one :class:`StreamTrials` per observer.

    Practice tests, tests with ``timing_ok = false`` (unless kept) and
    missed answers are dropped.

    Raises
    ------
    InputError
        Bad paths or values (naming file, line and column), tests of one
        observer with different numbers of preceding periods, or no usable
        stream test.
    """
    return _observer_trials(_read_stream_table(paths), include_bad_timing)


def _read_stream_table(paths) -> pd.DataFrame:
    files = find_logs(paths)
    table = pd.concat([_read_stream_file(f) for f in files], ignore_index=True)
    check_unique_trials(table.assign(line="line " + table["line"].astype(str)))
    table.attrs["files"] = [str(f) for f in files]
    return table


def _kept(table: pd.DataFrame, include_bad_timing: bool) -> pd.Series:
    return ~table["practice"] & (table["timing_ok"] | include_bad_timing) & (table["response"] != "")


def stream_exclusions(table: pd.DataFrame, include_bad_timing: bool = False) -> pd.DataFrame:
    """Per observer: files, stream tests read and excluded (practice, bad timing, missed), tests used.

    The same columns as the adapt–test fit's ``exclusions.csv``; a test
    excluded for several reasons counts under the first of practice, timing,
    missed answer.
    """
    rows = []
    for obs, g in table.groupby("observer", sort=True):
        practice = g["practice"]
        bad_timing = ~practice & ~g["timing_ok"] & (not include_bad_timing)
        missed = ~practice & ~bad_timing & (g["response"] == "")
        rows.append({"observer": obs, "files": g["source"].nunique(), "trials_read": len(g),
                     "practice_excluded": int(practice.sum()), "bad_timing_excluded": int(bad_timing.sum()),
                     "missed_excluded": int(missed.sum()), "trials_used": int(_kept(g, include_bad_timing).sum())})
    return pd.DataFrame(rows)


def _observer_trials(table: pd.DataFrame, include_bad_timing: bool) -> list[StreamTrials]:
    files = table.attrs["files"]
    table = table[_kept(table, include_bad_timing)]
    if table.empty:
        raise InputError(str(files[0]) if len(files) == 1 else "logs", "block",
                         "no usable stream tests (block = stream, answered, timing ok)")
    out = []
    for obs, g in table.groupby("observer", sort=True):
        # in the order the tests were run, whatever the rows' order: the same tests give the same bootstrap
        g = g.assign(_trial=pd.to_numeric(g["trial"], errors="coerce")).sort_values(["session", "_trial"],
                                                                                    kind="stable")
        k = {len(p) for p in g["preceding"]}
        if len(k) > 1:
            first = g[g["preceding"].map(len) != len(g["preceding"].iloc[0])].iloc[0]
            raise InputError(first["source"], f"line {first['line']}, column preceding_offsets_deg",
                             f"observer {obs} has tests with {sorted(k)} preceding periods; expected one K")
        period = g["period_s"].dropna()
        out.append(StreamTrials(str(obs), g["x"].to_numpy(float), g["response"].astype(float).to_numpy(),
                                np.array(list(g["preceding"]), dtype=float),
                                float(period.iloc[0]) if len(period) else float("nan")))
    return out


# ----------------------------------------------------------------------------------------------
# the model and its solver


def _n_params(model: str, k: int) -> int:
    return 4 + (k if model == "per_n" else 2)


def _parts(theta, x, delta, model):
    """Probabilities (B, T) and their derivatives (B, T, P) for parameters (B, P).

    Parameter order: ``mu0, log spread, lapse, log w`` then ``a_1..a_K``
    (per-n) or ``A, rate`` with ``rate = 1 / tau`` (decay).
    """
    k = delta.shape[1]
    sigma = np.exp(theta[:, 1])[:, None]
    lam = theta[:, 2][:, None]
    u = delta[None] / np.exp(theta[:, 3])[:, None, None]                  # (B, T, K)
    e = np.exp(0.5 - 0.5 * u * u)
    g = u * e
    dg = -u * e * (1.0 - u * u)                                           # d g / d log w
    if model == "per_n":
        a = theta[:, 4:4 + k]
    else:
        steps = np.arange(k)
        decay = np.exp(-theta[:, 5][:, None] * steps[None])              # (B, K)
        a = theta[:, 4][:, None] * decay
    shift = np.matmul(g, a[:, :, None])[..., 0]
    z = (x[None] - theta[:, 0][:, None] - shift) / sigma
    cdf, pdf, _ = sigmoid_parts(z)
    p = np.clip(lam / 2 + (1 - lam) * cdf, _FLOOR, 1 - _FLOOR)
    dz = -(1 - lam) * pdf / sigma                                          # dp / d(mu)
    cols = [dz, -(1 - lam) * pdf * z, 0.5 - cdf, dz * np.matmul(dg, a[:, :, None])[..., 0]]
    if model == "per_n":
        jac = np.concatenate([np.stack(cols, axis=2), dz[:, :, None] * g], axis=2)
    else:
        gd = np.matmul(g, decay[:, :, None])[..., 0]
        gdr = np.matmul(g, (-theta[:, 4][:, None] * steps[None] * decay)[:, :, None])[..., 0]
        jac = np.stack(cols + [dz * gd, dz * gdr], axis=2)
    return p, jac


def _loglik(p, y):
    return (y * np.log(p) + (1 - y) * np.log1p(-p)).sum(axis=1)


def _room(lo, hi, share):
    """Tolerance for 'on a bound': a share of a finite box width, 0 for an open side."""
    width = hi - lo
    return share * np.where(np.isfinite(width), width, 0.0)


@dataclass
class Solution:
    """Result of :func:`solve` for B rows."""

    theta: np.ndarray        # (B, P)
    loglik: np.ndarray       # (B,)
    converged: np.ndarray    # (B,) bool
    at_bound: np.ndarray     # (B, P) bool


def solve(theta0, lo, hi, x, delta, y, model: str, max_iter: int = 100, tol: float = 1e-9) -> Solution:
    """Maximum-likelihood fits of many answer sets at once.

    Parameters
    ----------
    theta0 : ndarray (B, P) or (P,)
        Starting parameters (see :func:`_parts` for the order).
    lo, hi : ndarray (B, P) or (P,)
        Box; ``lo == hi`` holds a parameter fixed.
    x : ndarray (T,)
        Test offsets.
    delta : ndarray (T, K)
        Offsets of the preceding periods.
    y : ndarray (B, T)
        Answers (1 = clockwise) of each row.
    model : {"per_n", "decay"}

    Returns
    -------
    Solution
    """
    y = np.atleast_2d(np.asarray(y, dtype=float))
    b = y.shape[0]
    p_count = _n_params(model, delta.shape[1])
    lo = np.broadcast_to(np.asarray(lo, dtype=float), (b, p_count))
    hi = np.broadcast_to(np.asarray(hi, dtype=float), (b, p_count))
    theta = np.clip(np.array(np.broadcast_to(theta0, (b, p_count)), dtype=float), lo, hi)
    ll = _loglik(_parts(theta, x, delta, model)[0], y)
    converged = np.zeros(b, dtype=bool)
    todo = np.arange(b)
    eye = np.eye(p_count)
    for _ in range(max_iter):
        if todo.size == 0:
            break
        th, lt, ht, yt = theta[todo], lo[todo], hi[todo], y[todo]
        p, jac = _parts(th, x, delta, model)
        w = 1.0 / (p * (1 - p))
        grad = np.matmul(((yt - p) * w)[:, None, :], jac)[:, 0]
        info = np.matmul(jac.transpose(0, 2, 1) * w[:, None, :], jac)
        room = _room(lt, ht, 1e-9)
        fixed = (lt == ht) | ((th <= lt + room) & (grad < 0)) | ((th >= ht - room) & (grad > 0))
        mask = fixed[:, :, None] | fixed[:, None, :]
        g = np.where(fixed, 0.0, grad)
        scale = np.abs(np.diagonal(info, axis1=1, axis2=2)).max(axis=1)
        h = np.where(mask, 0.0, info) + fixed[:, :, None] * eye + (1e-10 * (1 + scale))[:, None, None] * eye
        step = dense_solve(h, g)             # NaN where no step exists: never accepted, not converged
        decrement = (g * step).sum(axis=1)
        done = decrement < tol
        converged[todo[done]] = True
        move = np.flatnonzero(~done)
        t = np.ones(move.size)
        accepted = np.zeros(move.size, dtype=bool)
        for _ls in range(30):
            open_ = np.flatnonzero(~accepted)
            if open_.size == 0:
                break
            rows = move[open_]
            cand = np.clip(th[rows] + t[open_, None] * step[rows], lt[rows], ht[rows])
            lc = _loglik(_parts(cand, x, delta, model)[0], yt[rows])
            ok = np.isfinite(lc) & (lc >= ll[todo[rows]] + 1e-4 * t[open_] * decrement[rows])
            good = open_[ok]
            theta[todo[move[good]]] = cand[ok]
            gain = lc[ok] - ll[todo[move[good]]]
            ll[todo[move[good]]] = lc[ok]
            accepted[good] = True
            converged[todo[move[good]]] = gain < 1e-12
            t[open_[~ok]] *= 0.5
        stuck = move[~accepted]
        converged[todo[stuck]] = decrement[stuck] < 1e-6
        still = move[accepted]
        todo = todo[still[~converged[todo[still]]]]
    room = _room(lo, hi, 1e-7)
    at_bound = (lo < hi) & ((theta <= lo + room) | (theta >= hi - room))
    return Solution(theta, ll, converged, at_bound)


# ----------------------------------------------------------------------------------------------
# fits


@dataclass
class NbackFit:
    """Point fits of both models for one observer.

    Attributes
    ----------
    trials : StreamTrials
    per_n, decay : ndarray (P,)
        Estimates of the per-n and the decay model (fitting scale; see
        the properties for natural units).
    loglik_per_n, loglik_decay : float
    converged : bool
        Both fits converged.
    lower_per_n, upper_per_n, lower_decay, upper_decay : ndarray (P,)
        The boxes.
    """

    trials: StreamTrials
    per_n: np.ndarray
    decay: np.ndarray
    loglik_per_n: float
    loglik_decay: float
    converged: bool
    lower_per_n: np.ndarray
    upper_per_n: np.ndarray
    lower_decay: np.ndarray
    upper_decay: np.ndarray

    @property
    def pse_deg(self) -> float:
        """μ₀, the PSE without n-back shift."""
        return float(self.per_n[0])

    @property
    def spread_deg(self) -> float:
        return float(np.exp(self.per_n[1]))

    @property
    def lapse(self) -> float:
        return float(self.per_n[2])

    @property
    def peak_offset_deg(self) -> float:
        """w, shared by every n (per-n model)."""
        return float(np.exp(self.per_n[3]))

    @property
    def amplitudes_deg(self) -> np.ndarray:
        """a_1 ... a_K (per-n model)."""
        return self.per_n[4:].copy()

    @property
    def decay_periods(self) -> float:
        """τ of the decay model."""
        return float(1.0 / self.decay[5])

    @property
    def decay_amplitude_deg(self) -> float:
        """A of the decay model (the amplitude at n = 1)."""
        return float(self.decay[4])


def _boxes(trials: StreamTrials, lapse, lapse_max: float):
    x = trials.test_offset_deg
    width = max(float(np.ptp(x)), 1.0)
    w_lo, w_hi = peak_bounds(trials.preceding_offsets_deg.ravel())
    w_hi = min(w_hi, 180.0)     # a stream's directions are circular: no peak lies beyond the opposite direction
    lam_lo, lam_hi = (0.0, lapse_max) if lapse == "free" else (float(lapse), float(lapse))
    base_lo = [x.min() - width, np.log(1e-3 * width), lam_lo, np.log(w_lo)]
    base_hi = [x.max() + width, np.log(10.0 * width), lam_hi, np.log(w_hi)]
    k = trials.n_back
    per_n = (np.array(base_lo + [-np.inf] * k), np.array(base_hi + [np.inf] * k))
    decay = (np.array(base_lo + [-np.inf, 1.0 / TAU_BOUNDS[1]]), np.array(base_hi + [np.inf, 1.0 / TAU_BOUNDS[0]]))
    return per_n, decay


def _held(lo, hi, column, values):
    """Boxes (G, P) that hold parameter ``column`` at each of ``values``."""
    lo_g = np.repeat(lo[None], len(values), axis=0)
    hi_g = np.repeat(hi[None], len(values), axis=0)
    lo_g[:, column] = hi_g[:, column] = values
    return lo_g, hi_g


def fit_nback(trials: StreamTrials, lapse="free", lapse_max: float = DEFAULT_LAPSE_MAX) -> NbackFit:
    """Maximum-likelihood fits of the per-n and the decay model.

    Parameters
    ----------
    trials : StreamTrials
    lapse : "free" or float
        ``"free"``: one lapse in ``[0, lapse_max]``; a number fixes it.
    lapse_max : float

    Returns
    -------
    NbackFit
    """
    x, delta, y = trials.test_offset_deg, trials.preceding_offsets_deg, trials.response_cw[None]
    (lo_n, hi_n), (lo_d, hi_d) = _boxes(trials, lapse, lapse_max)
    k = trials.n_back
    start = np.concatenate([[np.median(x), np.log(max(np.std(x), 0.5)), min(0.02, hi_n[2]) if lapse == "free"
                             else float(lapse), 0.5 * (lo_n[3] + hi_n[3])], np.zeros(k)])
    # per-n: w held on a grid, then the best point freed
    grid = np.linspace(lo_n[3], hi_n[3], 25)
    lo_g, hi_g = _held(lo_n, hi_n, 3, grid)
    held = solve(np.repeat(start[None], grid.size, 0), lo_g, hi_g, x, delta, np.repeat(y, grid.size, 0), "per_n")
    per_n = solve(held.theta[np.argmax(held.loglik)], lo_n, hi_n, x, delta, y, "per_n")
    # decay: rate held on a grid (w, A from the per-n fit), then freed
    rates = np.geomspace(lo_d[5], hi_d[5], 25)
    d0 = np.concatenate([per_n.theta[0, :4], [per_n.theta[0, 4], 1.0]])
    lo_g, hi_g = _held(lo_d, hi_d, 5, rates)
    starts = np.repeat(d0[None], rates.size, 0)
    starts[:, 5] = rates
    held = solve(starts, lo_g, hi_g, x, delta, np.repeat(y, rates.size, 0), "decay")
    decay = solve(held.theta[np.argmax(held.loglik)], lo_d, hi_d, x, delta, y, "decay")
    return NbackFit(trials, per_n.theta[0], decay.theta[0], float(per_n.loglik[0]), float(decay.loglik[0]),
                    bool(per_n.converged[0] and decay.converged[0]), lo_n, hi_n, lo_d, hi_d)


@dataclass
class NbackBootstrap:
    """Parametric-bootstrap refits of an :class:`NbackFit`.

    Attributes
    ----------
    fit : NbackFit
    per_n, decay : ndarray (R, P)
        Replicate estimates of both models.
    interval_method : {"percentile", "bc"}
    level : float
    """

    fit: NbackFit
    per_n: np.ndarray
    decay: np.ndarray
    interval_method: str = "percentile"
    level: float = 0.95
    _cache: dict = field(default_factory=dict, repr=False)

    def interval(self, estimate, replicates):
        """Confidence limits of statistics (S,) from their replicates (R, S)."""
        reps = np.asarray(replicates, dtype=float).reshape(self.per_n.shape[0], -1)
        if self.interval_method == "percentile":
            return percentile_interval(reps, self.level)
        return bca_interval(np.atleast_1d(estimate), reps, np.zeros(reps.shape[1]), self.level)

    @property
    def amplitude_ci(self):
        """(low, high) of a_1 ... a_K."""
        return self.interval(self.fit.amplitudes_deg, self.per_n[:, 4:])

    @property
    def peak_offset_ci(self):
        return tuple(v[0] for v in self.interval(self.fit.peak_offset_deg, np.exp(self.per_n[:, 3])))

    @property
    def decay_ci(self):
        """(low, high) of τ."""
        return tuple(v[0] for v in self.interval(self.fit.decay_periods, 1.0 / self.decay[:, 5]))

    def shift_ci(self, offsets):
        """Fitted shifts a_n g(Δ; w) (K, J) at ``offsets`` (J,) with limits (K, J) each."""
        offsets = np.asarray(offsets, dtype=float)
        est = dog(offsets[None, :], self.fit.amplitudes_deg[:, None], self.fit.peak_offset_deg)
        reps = dog(offsets[None, None, :], self.per_n[:, 4:, None], np.exp(self.per_n[:, 3])[:, None, None])
        lo, hi = self.interval(est.ravel(), reps.reshape(reps.shape[0], -1))
        return est, lo.reshape(est.shape), hi.reshape(est.shape)


def bootstrap_nback(fit: NbackFit, n_boot: int, rng: np.random.Generator, interval: str = "percentile",
                    level: float = 0.95) -> NbackBootstrap:
    """Draw ``n_boot`` answer sets from the per-n fit and refit both models on each.

    Parameters
    ----------
    fit : NbackFit
    n_boot : int
        Replicates (>= 2).
    rng : numpy.random.Generator
    interval : {"percentile", "bc"}
    level : float

    Returns
    -------
    NbackBootstrap
    """
    if n_boot < 2:
        raise ValueError("n_boot must be at least 2")
    if interval not in INTERVALS:
        raise ValueError(f"interval must be one of {INTERVALS}")
    tr = fit.trials
    x, delta = tr.test_offset_deg, tr.preceding_offsets_deg
    p_hat = _parts(fit.per_n[None], x, delta, "per_n")[0][0]
    y = (rng.random((n_boot, x.size)) < p_hat[None]).astype(float)
    per_n = solve(fit.per_n, fit.lower_per_n, fit.upper_per_n, x, delta, y, "per_n").theta
    decay = solve(fit.decay, fit.lower_decay, fit.upper_decay, x, delta, y, "decay").theta
    return NbackBootstrap(fit, per_n, decay, interval, level)


# ----------------------------------------------------------------------------------------------
# tables, figure and the whole job


def fit_flags(fit: NbackFit) -> list[str]:
    """Flag words (:mod:`fitting.flags`) that apply to every number of one stream fit."""
    tr = fit.trials
    words = []
    if np.all(tr.response_cw == tr.response_cw[0]):
        words.append("one-sided")
    room = 1e-6 * np.maximum(fit.upper_per_n[:4] - fit.lower_per_n[:4], 1e-9)
    th = fit.per_n[[0, 1]]
    if np.any((th <= fit.lower_per_n[[0, 1]] + room[[0, 1]]) | (th >= fit.upper_per_n[[0, 1]] - room[[0, 1]])):
        words.append("on-bound")
    x = tr.test_offset_deg
    if not (x.min() <= fit.pse_deg <= x.max()):
        words.append("outside-tested")
    iqr = np.subtract(*np.percentile(x, [75, 25]))
    if iqr > 0 and fit.spread_deg < STEEP_FRACTION * iqr:
        words.append("steep")
    if tr.n_trials < MIN_TRIALS_FOR_INTERVAL:
        words.append("few-trials")
    if not fit.converged:
        words.append("not-converged")
    return words


def _replicates_stand_still(boot: NbackBootstrap) -> bool:
    """True when some amplitude is the same in every bootstrap replicate.

    Answers the fit separates perfectly (every answer on the side the fitted
    curve gives it certainly) are drawn again unchanged, and every refit
    lands where the fit did: a zero-width interval that says nothing of
    the amplitude's error (its maximum-likelihood estimate does not exist).
    """
    amps = boot.per_n[:, 4:]
    return bool(np.any(np.ptp(amps, axis=0) <= 1e-9 * (1.0 + np.abs(boot.fit.amplitudes_deg))))


def _row_flags(common, est, lo, hi, bounds=None):
    """Flags of one estimate: the fit's, plus its own bound and interval checks."""
    words = list(common)
    if bounds is not None and flag_on_bound(est, lo, hi, bounds):
        words.append("on-bound")
    if off_interval(est, lo, hi):
        words.append("off-interval")
    return join(words)


def result_tables(boot: NbackBootstrap) -> dict[str, pd.DataFrame]:
    """``pse``, ``aftereffect``, ``tuning`` and ``decay`` tables of one observer (lag = n − 1).

    Every row carries a ``flags`` cell (:mod:`fitting.flags`); with answers
    all on one side, or too few tests, the intervals are left empty.
    """
    fit = boot.fit
    tr = fit.trials
    k = tr.n_back
    obs = tr.observer
    common = fit_flags(fit)
    if "one-sided" not in common and _replicates_stand_still(boot):
        common.append("not-estimable")
    bare = bool({"one-sided", "few-trials", "not-estimable"} & set(common))

    def ci(pair):
        lo, hi = (np.asarray(v, dtype=float) for v in pair)
        return (np.full_like(lo, np.nan), np.full_like(hi, np.nan)) if bare else (lo, hi)

    mu_lo, mu_hi = ci(boot.interval(fit.pse_deg, boot.per_n[:, 0]))
    x = tr.test_offset_deg
    pse_box = (float(fit.lower_per_n[0]), float(fit.upper_per_n[0]))
    pse = pd.DataFrame({"observer": [obs], "condition": [STREAM_BLOCK], "adapter_offset_deg": [np.nan],
                        "lag": pd.array([pd.NA], dtype="Int64"), "pse_deg": [fit.pse_deg],
                        "pse_ci_low": [mu_lo[0]], "pse_ci_high": [mu_hi[0]], "spread_deg": [fit.spread_deg],
                        "lapse": [fit.lapse], "n_trials": [x.size],
                        "flags": [_row_flags(common, fit.pse_deg, mu_lo[0], mu_hi[0], pse_box)]})
    amp_lo, amp_hi = ci(boot.amplitude_ci)
    w_lo, w_hi = (v[0] for v in ci(([boot.peak_offset_ci[0]], [boot.peak_offset_ci[1]])))
    w_box = tuple(np.exp([fit.lower_per_n[3], fit.upper_per_n[3]]))
    offsets = np.unique(tr.preceding_offsets_deg)
    offsets = offsets[(offsets != 0) & (np.abs(offsets) != 180)]      # the shift rows' offsets
    tested = float(np.abs(offsets).max()) if offsets.size else 0.0    # a peak beyond them is extrapolated
    tuning = pd.DataFrame({
        "observer": obs, "lag": np.arange(k), "amplitude_deg": fit.amplitudes_deg,
        "amplitude_ci_low": amp_lo, "amplitude_ci_high": amp_hi, "peak_offset_deg": fit.peak_offset_deg,
        "peak_offset_ci_low": w_lo, "peak_offset_ci_high": w_hi,
        "flags": [join(_row_flags(common, a, lo, hi), _row_flags([], fit.peak_offset_deg, w_lo, w_hi, w_box),
                       ["outside-tested"] if fit.peak_offset_deg > tested else [])
                  for a, lo, hi in zip(fit.amplitudes_deg, amp_lo, amp_hi)],
    })
    est, lo, hi = boot.shift_ci(offsets)
    lo, hi = ci((lo, hi))
    rows = []
    for n in range(k):
        for j, o in enumerate(offsets):
            rows.append((obs, n, o, est[n, j], lo[n, j], hi[n, j], int((tr.preceding_offsets_deg[:, n] == o).sum()),
                         _row_flags(common, est[n, j], lo[n, j], hi[n, j])))
    after = pd.DataFrame(rows, columns=["observer", "lag", "adapter_offset_deg", "pse_shift_deg", "ci_low",
                                        "ci_high", "n_trials", "flags"])
    if k >= 2:
        t_lo, t_hi = (v[0] for v in ci(([boot.decay_ci[0]], [boot.decay_ci[1]])))
        decay = pd.DataFrame({"observer": [obs], "decay_periods": [fit.decay_periods], "ci_low": [t_lo],
                              "ci_high": [t_hi],
                              "flags": [_row_flags(common, fit.decay_periods, t_lo, t_hi, TAU_BOUNDS)]})
    else:       # one period back: no decay to fit, and no row (as for an adapt-test fit without one)
        decay = pd.DataFrame(columns=["observer", "decay_periods", "ci_low", "ci_high", "flags"])
    reps = dog(offsets[None, None, :], boot.per_n[:, 4:, None], np.exp(boot.per_n[:, 3])[:, None, None])
    reps = reps.reshape(reps.shape[0], -1)
    cov = long_table(obs, np.repeat(np.arange(k), offsets.size), np.tile(offsets, k),
                     np.atleast_2d(np.cov(reps, rowvar=False)), reps.shape[0], np.nan, spread_dof(boot.per_n[:, 1]),
                     [f"a{n + 1} w" for n in range(k) for _ in offsets])
    return {"pse": pse, "aftereffect": after, "tuning": tuning, "decay": decay, "aftereffect_covariance": cov}


def plot_amplitudes(boot: NbackBootstrap, tuning: pd.DataFrame, base: Path) -> list[str]:
    """Figure of the DoG amplitude against n with the intervals ``tuning`` (its table) holds and the fitted decay."""
    from .figures import _STYLE, pyplot, outside_legend, save, single_plot

    fit = boot.fit
    k = fit.trials.n_back
    n = np.arange(1, k + 1)
    est = np.asarray(fit.amplitudes_deg, dtype=float)
    lo, hi = tuning["amplitude_ci_low"].to_numpy(float), tuning["amplitude_ci_high"].to_numpy(float)
    held = np.isfinite(lo) & np.isfinite(hi) & (lo <= est) & (est <= hi)    # as the table holds it
    plt = pyplot()
    title = f"{fit.trials.observer}: n-back amplitudes, peak offset {fit.peak_offset_deg:.3g} deg"
    with plt.rc_context(_STYLE):
        fig, ax = single_plot(plt, 6.6, 3.6, 2.6, title)
        ax.axhline(0, color="#9a9a9a", lw=0.6)
        if held.any():
            ax.errorbar(n[held], est[held], yerr=[est[held] - lo[held], hi[held] - est[held]], fmt="o",
                        color="#1b4965", capsize=3, label=f"per-n amplitude, {boot.level * 100:g} % CI")
        if not held.all():
            ax.plot(n[~held], est[~held], "o", mfc="none", color="#1b4965",
                    label="per-n amplitude, no interval (flagged)")
        if k >= 2:
            fine = np.linspace(1, k, 100)
            ax.plot(fine, fit.decay_amplitude_deg * np.exp(-(fine - 1) / fit.decay_periods), color="#c8553d",
                    label=f"A·exp(-(n-1)/τ), τ = {fit.decay_periods:.2g} periods")
        ax.set_xticks(n)
        ax.set_xlabel("n (periods back; lag = n - 1)")
        ax.set_ylabel("DoG amplitude (deg)")
        outside_legend(ax)
    return save(fig, base)


#: Why a stream fit of several observers has no group rows (summary, console and report).
NO_GROUP_NOTE = ("no group rows: a stream fit reports every observer on their own (the group combination and "
                 "the mixed model are made for adapt-test fits only); compare the observers' rows")


@dataclass
class StreamReport:
    """What :func:`fit_stream_logs` did."""

    out_dir: Path
    fits: list
    files: list = field(default_factory=list)
    tables: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)

    def summary(self) -> str:
        """Readable lines for the command line (and ``summary.txt``), flagged rows first."""
        lines = [f"stream n-back fits written to {self.out_dir}"]
        flagged = []
        for name, label in (("pse", lambda r: f"{r['observer']} PSE"),
                            ("tuning", lambda r: f"{r['observer']} tuning lag {r['lag']}"),
                            ("decay", lambda r: f"{r['observer']} decay")):
            flagged += flagged_first(self.tables.get(name), label)
        after = self.tables.get("aftereffect")
        if after is not None and len(after):
            bad = after[after["flags"].fillna("") != ""]
            for obs, g in bad.groupby("observer", sort=False):
                flagged.append(f"{obs} shifts ({len(g)} rows): {' '.join(sorted(set(' '.join(g['flags']).split())))}")
        lines += ([f"Flagged rows ({len(flagged)}; the words are explained in the README):"]
                  + [f"  {f}" for f in flagged]) if flagged else ["Flagged rows: none"]
        tuning, decay = self.tables["tuning"], self.tables["decay"]
        for boot in self.fits:       # the intervals the tables hold: none where they are left empty
            f = boot.fit
            rows = tuning[tuning["observer"] == f.trials.observer]
            amps = ", ".join(f"n={i + 1}: {a:.2f}{_shown(l, h, '.2f')}"
                             for i, (a, l, h) in enumerate(zip(rows["amplitude_deg"], rows["amplitude_ci_low"],
                                                               rows["amplitude_ci_high"])))
            first = rows.iloc[0]
            line = (f"{f.trials.observer}: {f.trials.n_trials} tests; PSE {f.pse_deg:.2f} deg; amplitudes (deg) "
                    f"{amps}; peak offset {f.peak_offset_deg:.3g} deg"
                    f"{_shown(first['peak_offset_ci_low'], first['peak_offset_ci_high'], '.3g')}; lapse {f.lapse:.3f}"
                    f"{_lapse_bound(f)}")
            if f.trials.n_back >= 2:
                row = decay[decay["observer"] == f.trials.observer].iloc[0]
                line += f"; decay {f.decay_periods:.3g} periods{_shown(row['ci_low'], row['ci_high'], '.3g')}"
            lines.append(line)
        lines += [f"note: {n}" for n in self.notes]
        one_back = [boot.fit.trials.observer for boot in self.fits if boot.fit.trials.n_back < 2]
        if one_back:
            lines.append(f"note: {', '.join(one_back)}: one period back only (K = 1): no decay fit, no decay row")
        if len(self.fits) > 1:
            lines.append(f"note: {NO_GROUP_NOTE}")
        return "\n".join(lines)


def _lapse_bound(fit: NbackFit) -> str:
    """`` (on its bound)`` for a free lapse fitted at its upper bound (``--lapse-max``), as adapt-test fits note it."""
    lo, hi = float(fit.lower_per_n[2]), float(fit.upper_per_n[2])
    return " (on its bound: raise --lapse-max or read it as at least this)" if hi > lo and fit.lapse >= hi - 1e-6 else ""


def _shown(lo, hi, spec: str) -> str:
    """`` [lo, hi]``, or `` (no interval)`` where the table leaves it empty."""
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return " (no interval)"
    return f" [{lo:{spec}}, {hi:{spec}}]"


def fit_stream_logs(paths, out_dir, n_boot: int = 1000, seed: int = 0, lapse="free",
                    lapse_max: float = DEFAULT_LAPSE_MAX, include_bad_timing: bool = False,
                    interval: str = "percentile", figures: bool = True, plan=None,
                    progress: bool | None = None, level: float = 0.95) -> StreamReport:
    """Fit stream logs and write the same layout as adapt–test fits, and the report.

    Writes ``pse.csv`` (μ₀, condition ``stream``), ``aftereffect.csv``,
    ``tuning.csv`` (with the peak offset's interval), ``decay.csv``, every
    row with its ``flags``; ``aftereffect_covariance.csv`` for ``compare``;
    ``exclusions.csv`` (as for adapt–test fits); ``summary.txt``;
    ``figures/nback_<observer>.png`` / ``.pdf``; ``report_data.json`` and
    ``report.html`` (:mod:`fitting.page`).

    Parameters
    ----------
    paths : path or list of paths
        Stream trial logs or folders holding them.
    out_dir : path
    n_boot : int
        Bootstrap replicates.
    seed : int
        Seed of the bootstrap (each observer gets its own stream from it).
    lapse : "free" or float
    lapse_max : float
    include_bad_timing : bool
    interval : {"percentile", "bc"}
    figures : bool
        Write ``nback_<observer>.png`` / ``.pdf``.
    plan : callable, optional
        ``protocol text -> lines`` of its plan, for the report.
    progress : bool or None
        Progress on stderr (None: only on a terminal).
    level : float
        Confidence level of the intervals.

    Returns
    -------
    StreamReport

    Raises
    ------
    InputError
        Options out of range, checked as for adapt–test fits.
    """
    from .figures import safe_name

    from .page import PAGE, write_page
    from .progress import ProgressBar, phase
    from .provenance import REPORT_DATA, collect, write_report_data

    from .report import _check_options

    if interval not in INTERVALS:
        raise InputError("argument", "--interval", f"one of {', '.join(INTERVALS)} for stream logs, not {interval!r}")
    lapse = _check_options(n_boot, seed, lapse, "shared", "gaussian", "percentile", level, lapse_max, progress).lapse
    if n_boot < 2:    # the tables and the peak offset's interval are built from the replicates
        raise InputError("argument", "--bootstrap", f"a stream fit needs at least 2 replicates (1,000 recommended), "
                         f"got {n_boot}")
    out = Path(out_dir)
    raw = _read_stream_table(paths)
    observers = _observer_trials(raw, include_bad_timing)
    fits, tunings = [], []
    tables = {"pse": [], "aftereffect": [], "tuning": [], "decay": [], "aftereffect_covariance": []}
    with ProgressBar(len(observers), "n-back fits and bootstrap", show=progress, unit="observers") as bar:
        for i, trials in enumerate(observers):
            boot = bootstrap_nback(fit_nback(trials, lapse, lapse_max), n_boot,
                                   np.random.default_rng([seed, 17, i]), interval, level)
            fits.append(boot)
            for name, table in result_tables(boot).items():
                tables[name].append(table)
            tunings.append(tables["tuning"][-1])
            bar.advance()
    joined = {name: pd.concat([p for p in parts if len(p)] or parts[:1], ignore_index=True)
              for name, parts in tables.items()}
    joined["exclusions"] = stream_exclusions(raw, include_bad_timing)
    with output_set(out, "fit") as staged:
        folder = staged.folder
        files = []
        for name, table in joined.items():
            path = folder / f"{name}.csv"
            write_csv(table, path)
            files.append(str(path))
        if figures:
            with phase("drawing figures", show=progress):
                for boot, tuning in zip(fits, tunings):
                    files += plot_amplitudes(boot, tuning,
                                             folder / "figures" / f"nback_{safe_name(boot.fit.trials.observer)}")
        files += [str(folder / "summary.txt"), str(folder / REPORT_DATA), str(folder / PAGE)]
        report = StreamReport(out, fits, staged.final_paths(files), joined, same_person_notes(raw))
        write_text(folder / "summary.txt", report.summary() + "\n")
        options = (f"stream n-back regression, lapse {'free in [0, ' + format(lapse_max, 'g') + ']' if lapse == 'free' else 'fixed at ' + str(lapse)}; "
                   f"{level * 100:g}% {interval} intervals from {n_boot} parametric bootstrap replicates (seed {seed})")
        data = collect(paths, plan)
        notes = report.notes + ([NO_GROUP_NOTE] if len(fits) > 1 else [])
        data.update(kind="stream", options=options, notes={"group": notes} if notes else {})
        write_report_data(folder, data)
        write_page(folder)
    return report
