"""Covariance of the PSE shifts, written by ``fit`` and used by ``compare``.

The shifts of one observer all subtract the same baseline PSE, so their
errors are correlated (about 0.4 with equal trial counts); treating them as
independent inflates a chi-square of agreement.  ``fit`` therefore writes
``aftereffect_covariance.csv``, in long form, one row per pair of cells:

``observer, lag_a, adapter_offset_a_deg, lag_b, adapter_offset_b_deg,
covariance_deg2, replicates, dof``

* observers: the covariance of the paired bootstrap replicates of their
  shifts (``replicates`` = their number, ``dof`` empty: treated as known up
  to the Hartlap et al. (2007) correction of its inverse);
* ``group``: ``D R D`` with ``R`` the correlation of the random-effects
  weighted mean under the observers' own covariances and ``D`` the group
  standard errors implied by the group intervals (``(high - low) / (2
  t_{n-1})``); ``dof`` = n - 1 tells ``compare`` to read the standardised
  residuals against t, not normal, quantiles.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import special

COVARIANCE_COLUMNS = ["observer", "lag_a", "adapter_offset_a_deg", "lag_b", "adapter_offset_b_deg",
                      "covariance_deg2", "replicates", "dof"]


def long_table(observer, lags, offsets, cov, replicates, dof) -> pd.DataFrame:
    n = len(lags)
    ia, ib = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    ia, ib = ia.ravel(), ib.ravel()
    lags, offsets = np.asarray(lags, float), np.asarray(offsets, float)
    return pd.DataFrame({"observer": observer, "lag_a": lags[ia].astype(int),
                         "adapter_offset_a_deg": offsets[ia], "lag_b": lags[ib].astype(int),
                         "adapter_offset_b_deg": offsets[ib], "covariance_deg2": cov.ravel(),
                         "replicates": replicates, "dof": dof})


def observer_covariance(analysis) -> pd.DataFrame | None:
    """Long covariance table of one observer's shifts from its bootstrap replicates."""
    reps = analysis.curves.get("shift_reps") if analysis.curves else None
    if reps is None or reps.shape[0] < 3 or not len(analysis.aftereffect):
        return None
    cov = np.atleast_2d(np.cov(reps, rowvar=False))
    ae = analysis.aftereffect
    return long_table(analysis.observer, ae["lag"].to_numpy(float), ae["adapter_offset_deg"].to_numpy(float),
                 cov, reps.shape[0], np.nan)


def group_covariance(analyses, group_shifts: pd.DataFrame, weights: pd.DataFrame,
                     level: float) -> pd.DataFrame | None:
    """Long covariance table of the group shifts (see the module text)."""
    if group_shifts is None or not len(group_shifts):
        return None
    cells = list(zip(group_shifts["lag"].astype(float), group_shifts["adapter_offset_deg"].astype(float)))
    index = {c: i for i, c in enumerate(cells)}
    within = np.zeros((len(cells), len(cells)))
    n_obs = 0
    for a in analyses:
        reps = a.curves.get("shift_reps") if a.curves else None
        if reps is None or a.observer not in weights.index:
            continue
        n_obs += 1
        ae = a.aftereffect
        own = [index.get((float(lag), float(o))) for lag, o in zip(ae["lag"], ae["adapter_offset_deg"])]
        keep = [j for j, i in enumerate(own) if i is not None]
        pos = np.array([own[j] for j in keep])
        w = np.array([weights.loc[a.observer].get((lag, off), 0.0) for lag, off in
                      (cells[i] for i in pos)], dtype=float)
        w = np.nan_to_num(w)
        cov = np.atleast_2d(np.cov(reps[:, keep], rowvar=False))
        within[np.ix_(pos, pos)] += w[:, None] * w[None, :] * cov
    sd = np.sqrt(np.diagonal(within))
    if n_obs < 2 or not np.all(sd > 0):
        return None
    corr = within / np.outer(sd, sd)
    dof = max(n_obs - 1, 1)
    t = special.stdtrit(dof, 0.5 + level / 2.0)
    se = (group_shifts["ci_high"].to_numpy(float) - group_shifts["ci_low"].to_numpy(float)) / (2 * t)
    cov = corr * np.outer(se, se)
    return long_table(str(group_shifts["observer"].iloc[0]), [c[0] for c in cells], [c[1] for c in cells],
                 cov, np.nan, dof)


def covariance_matrix(table: pd.DataFrame, observer: str, lags, offsets):
    """The (n, n) covariance of ``observer``'s cells in the given order, its replicates and dof.

    Returns ``(None, nan, nan)`` when the table lacks the observer or a cell.
    """
    rows = table[table["observer"].astype(str) == str(observer)]
    if not len(rows):
        return None, np.nan, np.nan
    look = {(float(r.lag_a), float(r.adapter_offset_a_deg), float(r.lag_b), float(r.adapter_offset_b_deg)):
            float(r.covariance_deg2) for r in rows.itertuples()}
    cells = list(zip(np.asarray(lags, float), np.asarray(offsets, float)))
    out = np.empty((len(cells), len(cells)))
    for i, (la, oa) in enumerate(cells):
        for j, (lb, ob) in enumerate(cells):
            v = look.get((la, oa, lb, ob))
            if v is None:
                return None, np.nan, np.nan
            out[i, j] = v
    return out, float(rows["replicates"].iloc[0]), float(rows["dof"].iloc[0])
