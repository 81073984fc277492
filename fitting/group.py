"""Across observers: a group curve with between-observer intervals, and a mixed model.

Group rows (observer ``group`` in the tables), made when there are two or
more observers:

* PSE and PSE shift per condition: the mean over the observers that have it,
  with a t interval from the between-observer standard deviation
  (``mean +- t_{n-1} sd / sqrt(n)``);
* tuning per lag and decay: the same DoG / decaying-DoG fits as for one
  observer, applied to the group-mean curve (cells measured in every
  observer, equal weights), with intervals from the jackknife over observers
  (leave one observer out, refit; ``est +- t_{n-1} se_jack``).  For a mean
  the jackknife gives exactly the t interval above, so the two kinds of group
  interval agree.  Intervals of the peak offset and decay are clipped to
  their fitting bounds.

The mixed model (statsmodels ``MixedLM``, REML, random intercept per observer)
regresses the PSE shift on adapter offset, lag and their interaction: a
simple linear summary of the whole data set, written to ``mixed_model.csv``.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from scipy import special

from .aftereffect import TAU_BOUNDS, fit_decay, fit_tuning, peak_bounds
from .observer import AFTEREFFECT_COLUMNS, DECAY_COLUMNS, PSE_COLUMNS, TUNING_COLUMNS

GROUP = "group"


def _t_quantile(n: np.ndarray, level: float) -> np.ndarray:
    return special.stdtrit(np.maximum(n - 1, 1), 0.5 + level / 2.0)


def _mean_ci(values: pd.DataFrame, keys: list[str], col: str, level: float) -> pd.DataFrame:
    g = values.groupby(keys, sort=False, dropna=False)[col]
    out = pd.DataFrame({"mean": g.mean(), "sd": g.std(ddof=1), "n": g.count()})
    half = _t_quantile(out["n"].to_numpy(), level) * out["sd"] / np.sqrt(out["n"])
    out["low"], out["high"] = out["mean"] - half, out["mean"] + half
    return out[out["n"] >= 2]


def group_pse(pse: pd.DataFrame, level: float) -> pd.DataFrame:
    """Group rows of ``pse.csv``: mean PSE per condition across observers."""
    key = pse.assign(_k=np.where(pse["lag"].isna(), "baseline",
                                 pse["adapter_offset_deg"].astype(str) + "|" + pse["lag"].astype(str)))
    m = _mean_ci(key, ["_k"], "pse_deg", level)
    g = key.groupby("_k", sort=False)
    first = g.first()
    out = pd.DataFrame({"observer": GROUP, "condition": first.loc[m.index, "condition"],
                        "adapter_offset_deg": first.loc[m.index, "adapter_offset_deg"],
                        "lag": first.loc[m.index, "lag"], "pse_deg": m["mean"],
                        "pse_ci_low": m["low"], "pse_ci_high": m["high"],
                        "spread_deg": g["spread_deg"].mean().loc[m.index],
                        "lapse": g["lapse"].mean().loc[m.index],
                        "n_trials": g["n_trials"].sum().loc[m.index]})
    return out[PSE_COLUMNS].reset_index(drop=True)


def group_aftereffect(shifts: pd.DataFrame, level: float) -> pd.DataFrame:
    """Group rows of ``aftereffect.csv``: mean shift per lag and offset."""
    m = _mean_ci(shifts, ["lag", "adapter_offset_deg"], "pse_shift_deg", level)
    n_trials = shifts.groupby(["lag", "adapter_offset_deg"], sort=False)["n_trials"].sum()
    out = m.reset_index()
    out = pd.DataFrame({"observer": GROUP, "lag": out["lag"].astype("Int64"),
                        "adapter_offset_deg": out["adapter_offset_deg"],
                        "pse_shift_deg": out["mean"], "ci_low": out["low"], "ci_high": out["high"],
                        "n_trials": n_trials.loc[list(zip(out["lag"], out["adapter_offset_deg"]))].to_numpy()})
    return out.sort_values(["lag", "adapter_offset_deg"]).reset_index(drop=True)[AFTEREFFECT_COLUMNS]


def _jackknife(estimates: np.ndarray, level: float, n: int):
    """Point (row 0) and t interval from leave-one-out rows 1..n."""
    est, loo = estimates[0], estimates[1:]
    se = np.sqrt((n - 1) / n * ((loo - loo.mean(axis=0)) ** 2).sum(axis=0))
    half = _t_quantile(np.array([n]), level)[0] * se
    return est, est - half, est + half


def group_curves(shifts: pd.DataFrame, level: float, notes: list):
    """Group tuning rows and decay row from the mean curve; jackknife intervals."""
    observers = sorted(shifts["observer"].unique())
    n = len(observers)
    wide = shifts.pivot_table(index="observer", columns=["lag", "adapter_offset_deg"],
                              values="pse_shift_deg")
    wide = wide.loc[observers].dropna(axis=1)          # cells measured in every observer
    empty = (pd.DataFrame(columns=TUNING_COLUMNS), pd.DataFrame(columns=DECAY_COLUMNS), pd.DataFrame(), {})
    if wide.shape[1] == 0:
        return empty
    lags = np.sort(wide.columns.get_level_values(0).unique().to_numpy(dtype=float))
    offsets = np.sort(wide.columns.get_level_values(1).unique().to_numpy(dtype=float))
    vals = wide.to_numpy()
    total = vals.sum(axis=0)
    rows = np.vstack([total / n, (total[None] - vals) / (n - 1)])    # mean, then leave-one-out means
    cube = np.zeros((rows.shape[0], lags.size, offsets.size))
    weight = np.zeros((lags.size, offsets.size))
    kk = np.searchsorted(lags, wide.columns.get_level_values(0).to_numpy(dtype=float))
    jj = np.searchsorted(offsets, wide.columns.get_level_values(1).to_numpy(dtype=float))
    cube[:, kk, jj] = rows
    weight[kk, jj] = 1.0
    prange = peak_bounds(offsets)
    tuning_rows, tuning_lags = [], []
    curves = {"offsets": offsets, "lags": lags}
    for i, lag in enumerate(lags):
        if ((weight[i] > 0) & (offsets != 0)).sum() < 3:
            continue
        t = fit_tuning(offsets, cube[:, i], weight[i], prange)
        a, alo, ahi = _jackknife(t.amplitude, level, n)
        w, wlo, whi = _jackknife(t.peak, level, n)
        tuning_rows.append({"observer": GROUP, "lag": int(lag), "amplitude_deg": a,
                            "amplitude_ci_low": alo, "amplitude_ci_high": ahi,
                            "peak_offset_deg": w, "peak_offset_ci_low": max(wlo, prange[0]),
                            "peak_offset_ci_high": min(whi, prange[1])})
        tuning_lags.append(i)
    tuning = pd.DataFrame(tuning_rows, columns=TUNING_COLUMNS)
    decay = pd.DataFrame(columns=DECAY_COLUMNS)
    detail = pd.DataFrame()
    if len(tuning_lags) >= 2:
        d = fit_decay(offsets, lags[tuning_lags], cube[:, tuning_lags], weight[tuning_lags], prange)
        a0 = _jackknife(d.amplitude0, level, n)
        w = _jackknife(d.peak, level, n)
        tau = _jackknife(d.tau, level, n)
        tau_ci = (max(tau[1], TAU_BOUNDS[0]), min(tau[2], TAU_BOUNDS[1]))
        decay = pd.DataFrame([{"observer": GROUP, "decay_periods": tau[0], "ci_low": tau_ci[0],
                               "ci_high": tau_ci[1]}], columns=DECAY_COLUMNS)
        detail = pd.DataFrame([{"observer": GROUP, "amplitude0_deg": a0[0], "amplitude0_ci_low": a0[1],
                                "amplitude0_ci_high": a0[2], "peak_offset_deg": w[0],
                                "peak_offset_ci_low": max(w[1], prange[0]),
                                "peak_offset_ci_high": min(w[2], prange[1]),
                                "decay_periods": tau[0], "decay_ci_low": tau_ci[0],
                                "decay_ci_high": tau_ci[1],
                                "lags_used": " ".join("%g" % lags[i] for i in tuning_lags)}])
        curves["decay"] = (a0[0], w[0], tau[0])
        if d.tau_at_bound[0]:
            notes.append(f"group: decay on its bound ({tau[0]:.3g} periods)")
    if n < 3:
        notes.append(f"group of {n} observers: between-observer intervals are very wide "
                     "(t with one degree of freedom)")
    return tuning, decay, detail, curves


def mixed_model(shifts: pd.DataFrame, notes: list) -> pd.DataFrame:
    """Linear mixed model of the shift on offset, lag and offset x lag.

    statsmodels ``MixedLM`` (REML) with a random intercept per observer.
    Returns a table ``term, estimate, std_error, z, p_value, ci_low,
    ci_high`` plus the two variance components; empty with a note when the
    data cannot support it.
    """
    import statsmodels.formula.api as smf

    data = shifts[["observer", "lag", "adapter_offset_deg", "pse_shift_deg"]].dropna().copy()
    data["lag"] = data["lag"].astype(float)
    cols = ["term", "estimate", "std_error", "z", "p_value", "ci_low", "ci_high"]
    if data["observer"].nunique() < 2 or len(data) < 6:
        notes.append("mixed model not fitted: needs at least 2 observers and 6 shifts")
        return pd.DataFrame(columns=cols)
    formula = "pse_shift_deg ~ adapter_offset_deg * lag" if data["lag"].nunique() > 1 \
        else "pse_shift_deg ~ adapter_offset_deg"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            res = smf.mixedlm(formula, data, groups=data["observer"]).fit(reml=True)
        except (np.linalg.LinAlgError, ValueError) as exc:
            notes.append(f"mixed model failed: {exc}")
            return pd.DataFrame(columns=cols)
    for w in caught:
        notes.append(f"mixed model: {str(w.message).splitlines()[0]}")
    if not res.converged:
        notes.append("mixed model did not converge")
    fe = res.fe_params
    ci = res.conf_int().loc[fe.index]
    out = pd.DataFrame({"term": fe.index, "estimate": fe.to_numpy(),
                        "std_error": res.bse_fe.to_numpy(), "z": res.tvalues.loc[fe.index].to_numpy(),
                        "p_value": res.pvalues.loc[fe.index].to_numpy(),
                        "ci_low": ci.iloc[:, 0].to_numpy(), "ci_high": ci.iloc[:, 1].to_numpy()})
    extra = pd.DataFrame({"term": ["observer intercept variance", "residual variance"],
                          "estimate": [float(res.cov_re.iloc[0, 0]), float(res.scale)]})
    return pd.concat([out, extra], ignore_index=True)[cols]
