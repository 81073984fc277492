"""Short words that mark doubtful numbers in every table's ``flags`` column.

A row's ``flags`` cell holds zero or more of these words, separated by
spaces (empty = nothing unusual):

``one-sided``        every answer of the condition on one side (all clockwise or
                     all counter-clockwise): the PSE is not estimable (no
                     interval, for it or for a shift from it)
``separated``        every clockwise answer at a larger offset than every
                     counter-clockwise one: the condition's own spread is not
                     estimable (under a shared spread its PSE is, leaning on
                     the other conditions' spread)
``on-bound``         the estimate or a confidence limit sits on a fitting bound
                     (read it as "at least" / "at most")
``outside-tested``   the PSE lies outside the range of tested offsets (a tuning
                     row: the peak offset lies beyond the largest adapter
                     offset, where the curve is extrapolated)
``steep``            the fitted spread is implausibly small for the tested
                     levels (below a tenth of their interquartile range; with a
                     shared spread, of the median range over conditions): the
                     function may have collapsed on too few trials; its
                     bootstrap draws answers at half that range instead
                     (:func:`steep_floor`, :data:`STEEP_DRAW_FRACTION`)
``not-estimable``    the PSE has no finite error (for a shift: the condition's or
                     the baseline's PSE): answers all on one side, the estimate on
                     its bound, separated answers with nothing to hold the spread,
                     or a PSE the answers do not pin down; the observer's curve
                     fits leave it out
``few-trials``       fewer than :data:`MIN_TRIALS_FOR_INTERVAL` trials: no interval
``off-interval``     the estimate lies outside its own interval (a degenerate
                     bootstrap distribution, e.g. from very few replicates), or
                     a profile interval reached it only by being stretched to it
``not-converged``    the optimisation stopped before converging (the point fit,
                     or more than 1 % of the bootstrap refits)
``model-not-converged``  a model fitted by statsmodels reported no convergence
``descriptive``      a group of fewer than three observers: its interval is
                     descriptive, not inference about a population
``partial``          a group row without some observers' estimates, left out
                     because they are not usable (:data:`NOT_USABLE`); the
                     group's notes name them
``protocols-differ`` a group row (or group curve, or mixed-model term) that pools
                     observers who ran different protocols (files whose text
                     differs): its cells may not be the same measurement; the
                     notes name the protocols and who ran each

Group rows, the group curves and the mixed model use only the observers'
rows that carry none of the words in :data:`NOT_USABLE` (:func:`usable`).
"""

from __future__ import annotations

from collections import Counter

import numpy as np

MIN_TRIALS_FOR_INTERVAL = 10
STEEP_FRACTION = 0.1
#: Spread, as a fraction of the same interquartile range, at which a ``steep`` fit's bootstrap draws its answers.
STEEP_DRAW_FRACTION = 0.5
WORDS = ("one-sided", "separated", "on-bound", "outside-tested", "steep", "not-estimable", "few-trials",
         "off-interval", "not-converged", "model-not-converged", "descriptive", "partial", "protocols-differ")
#: Words that keep an observer's row out of the group: its estimate says nothing (the PSE is not estimable)
#: or comes without an interval (too few trials).  ``on-bound`` alone is not among them: an estimate on its
#: bound is ``not-estimable`` as well, while a confidence limit on a bound only makes the interval wide.
NOT_USABLE = ("one-sided", "not-estimable", "few-trials")


def join(*groups) -> str:
    """Merge flag strings or word lists into one cell, each word once, in :data:`WORDS` order."""
    found = set()
    for g in groups:
        if not g:
            continue
        found.update(g.split() if isinstance(g, str) else g)
    unknown = found - set(WORDS)
    if unknown:
        raise ValueError(f"unknown flag words {sorted(unknown)}")
    return " ".join(w for w in WORDS if w in found)


def usable(flags) -> np.ndarray:
    """True for each ``flags`` cell (a sequence of strings) without a word of :data:`NOT_USABLE`."""
    return np.array([not (set(str(f).split()) & set(NOT_USABLE)) if isinstance(f, str) else True
                     for f in flags], dtype=bool)


def on_bound(estimate, low, high, bounds, rel: float = 1e-6) -> bool:
    """True when the estimate or a limit is within ``rel`` of a bound."""
    lo_b, hi_b = bounds
    tol = rel * max(abs(hi_b), abs(lo_b), 1.0)
    vals = np.array([estimate, low, high], dtype=float)
    vals = vals[np.isfinite(vals)]
    return bool(np.any(np.abs(vals - lo_b) <= tol) or np.any(np.abs(vals - hi_b) <= tol))


def off_interval(estimate, low, high) -> bool:
    """True when finite limits do not hold the estimate."""
    return bool(np.isfinite(low) and np.isfinite(high) and not (low <= estimate <= high))


def steep_floor(cells, shared: bool) -> np.ndarray:
    """Spread below which a fit is flagged ``steep``, per condition (C,).

    :data:`STEEP_FRACTION` of the interquartile range of the condition's
    tested levels, trial by trial; with a shared spread, of the median range
    over conditions. 0 for a condition with fewer than two tested levels.
    """
    iqr = np.zeros(cells.x.shape[0])
    for c in range(iqr.size):
        used = cells.n[c] > 0
        if used.sum() >= 2:
            levels = np.repeat(cells.x[c][used], cells.n[c][used].astype(int))
            iqr[c] = np.subtract(*np.percentile(levels, [75, 25]))
    if shared:
        iqr[:] = np.median(iqr)
    return STEEP_FRACTION * iqr


def psychometric_flags(fit, boot=None) -> list[str]:
    """Flags of each condition of a :class:`~fitting.psychometric.PsychometricFit`.

    Parameters
    ----------
    fit : PsychometricFit
    boot : BootstrapResult, optional
        Adds ``not-converged`` when more than 1 % of its refits did not converge.
    """
    cells = fit.cells
    out = []
    refits_bad = boot is not None and (1.0 - boot.converged.mean()) > 0.01
    floor = steep_floor(cells, fit.layout.shared_spread)
    for c in range(len(fit.conditions)):
        words = []
        sep = fit.separation[c] if fit.separation else ""
        if sep.startswith("all"):
            words.append("one-sided")
        elif sep:
            words.append("separated")
        if fit.pse_at_bound[c] or fit.spread_at_bound[c]:
            words.append("on-bound")
        used = cells.n[c] > 0
        x = cells.x[c][used]
        if x.size and not (x.min() <= fit.pse[c] <= x.max()):
            words.append("outside-tested")
        if fit.spread[c] < floor[c]:
            words.append("steep")
        if not np.isfinite(fit.pse_se[c]):
            words.append("not-estimable")
        if fit.n_trials[c] < MIN_TRIALS_FOR_INTERVAL:
            words.append("few-trials")
        if not fit.converged or refits_bad:
            words.append("not-converged")
        out.append(join(words))
    return out


def condense(messages) -> list[str]:
    """One line per distinct message (its first line), with a count when repeated."""
    first = [str(m).strip().splitlines()[0] if str(m).strip() else "" for m in messages]
    counts = Counter(m for m in first if m)
    return [m if n == 1 else f"{m} (x{n})" for m, n in counts.items()]


def flagged_first(table, label) -> list[str]:
    """Lines ``label(row): flags`` for the flagged rows of ``table`` (for summaries)."""
    if table is None or not len(table) or "flags" not in table:
        return []
    rows = table[table["flags"].fillna("").astype(str) != ""]
    return [f"{label(r)}: {r['flags']}" for _, r in rows.iterrows()]


def shared_notes(notes: dict, observers) -> list[str]:
    """Notes that every one of two or more ``observers`` has, in the first one's order.

    Such notes mostly follow from the protocol rather than from anyone's
    answers (two adapter offsets per lag give no tuning curve for anybody),
    so a report says them once instead of once per observer.

    Parameters
    ----------
    notes : dict
        Observer -> list of note strings.
    observers : sequence of str
        The observers to look at (the group is not one of them).

    Returns
    -------
    list of str
        Empty with fewer than two observers.
    """
    observers = list(observers)
    if len(observers) < 2:
        return []
    first = list(dict.fromkeys(notes.get(observers[0], [])))
    return [n for n in first if all(n in notes.get(o, []) for o in observers[1:])]
