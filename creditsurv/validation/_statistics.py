"""Validation statistics: backtest, discrimination, calibration, stability, curves.

The statistics are pure and work on plain arrays or DataFrames that the
validation pack (``_pack.py``) has already read; they never touch the panel,
the config or the model artifact. Tables are tidy frames with stable column
names; interval bounds carry the suffixes ``_lo`` and ``_hi`` and standard
errors ``_se``.

Conventions
-----------
- Outcome codes follow the hazard model: 0 no event this month, 1 default,
  2 prepayment.  In per-loan tables (:func:`aalen_johansen`) event 0 means
  censored.
- Scores and PDs are "higher means riskier" (AUC > 0.5 for a useful score).
- Binomial intervals default to Jeffreys (Brown, Cai & DasGupta 2001,
  *Statistical Science* 16:101-133), with their edge rule: the lower bound is
  0 when there are no events and the upper bound is 1 when every trial is an
  event.

Inputs are checked once where each public function starts; a problem raises
:class:`~creditsurv.errors.DataError` naming the argument or column.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from ..data import CAUSE_CODES
from ..errors import DataError

__all__ = [
    "ASSET_CORRELATION",
    "one_factor_variance",
    "binomial_interval",
    "age_band",
    "backtest",
    "discrimination",
    "twelve_month_cohort",
    "calibration",
    "psi",
    "coefficient_changes",
    "aalen_johansen",
    "aalen_johansen_states",
    "model_vs_nonparametric",
]

CAUSES = {code: name for name, code in CAUSE_CODES.items()}  # outcome code -> cause, defined once in data
PSI_FLOOR = 1e-6


# --------------------------------------------------------------------------- shared checks


def _check_level(level: float) -> float:
    level = float(level)
    if not 0.0 < level < 1.0:
        raise DataError(f"level must lie strictly between 0 and 1, got {level!r}")
    return level


def as_1d(x, name: str, *, dtype=float) -> np.ndarray:
    """``x`` as a one-dimensional array (``DataError`` naming ``name`` otherwise); used by the pack too."""
    arr = np.asarray(x, dtype=dtype)
    if arr.ndim != 1:
        raise DataError(f"{name} must be one-dimensional, got shape {arr.shape}")
    return arr


def _check_finite(arr: np.ndarray, name: str) -> None:
    bad = ~np.isfinite(arr)
    if bad.any():
        first = np.flatnonzero(bad)[:5].tolist()
        raise DataError(f"{name} has {int(bad.sum())} missing or infinite values (positions {first})")


def _check_binary(arr, name: str) -> np.ndarray:
    arr = as_1d(arr, name)
    _check_finite(arr, name)
    bad = (arr != 0) & (arr != 1)
    if bad.any():
        vals = sorted(set(np.unique(arr[bad]).tolist()))[:5]
        raise DataError(f"{name} must hold 0 or 1 only; found {vals}")
    return arr.astype(np.int64)


def _check_same_length(**arrays) -> None:
    lengths = {k: len(v) for k, v in arrays.items()}
    if len(set(lengths.values())) > 1:
        raise DataError(f"arrays must have the same length, got {lengths}")


def _missing_columns(frame: pd.DataFrame, needed: Sequence[str], what: str) -> None:
    missing = [c for c in needed if c not in frame.columns]
    if missing:
        raise DataError(f"{what} lacks columns {missing}; it has {list(frame.columns)}")


# --------------------------------------------------------------------------- intervals


def binomial_interval(k, n, level: float = 0.95, method: str = "jeffreys"):
    """Two-sided interval for a binomial proportion, vectorised.

    Parameters
    ----------
    k, n : array_like of int
        Events and trials; broadcast against each other.  ``0 <= k <= n``.
    level : float, default 0.95
        Coverage of the interval.
    method : {"jeffreys", "wilson"}
        ``jeffreys``: equal-tailed Beta(k + 1/2, n - k + 1/2) quantiles, with
        lower bound 0 when ``k == 0`` and upper bound 1 when ``k == n``.
        ``wilson``: the score interval (Wilson 1927).

    Returns
    -------
    lo, hi : ndarray or float
        Same shape as the broadcast inputs (floats for scalar inputs); NaN
        where ``n == 0``.
    """
    level = _check_level(level)
    if method not in ("jeffreys", "wilson"):
        raise DataError(f"method must be 'jeffreys' or 'wilson', got {method!r}")
    k, n = np.broadcast_arrays(np.asarray(k, dtype=float), np.asarray(n, dtype=float))
    if np.any(k < 0) or np.any(k > n):
        raise DataError("binomial_interval needs 0 <= k <= n for every element")
    alpha = 1.0 - level
    empty = n == 0
    with np.errstate(divide="ignore", invalid="ignore"):
        if method == "jeffreys":
            a, b = k + 0.5, n - k + 0.5
            lo = np.where(k == 0, 0.0, stats.beta.ppf(alpha / 2, a, b))
            hi = np.where(k == n, 1.0, stats.beta.isf(alpha / 2, a, b))
        else:
            z = stats.norm.isf(alpha / 2)
            p = k / n
            denom = 1.0 + z**2 / n
            centre = (p + z**2 / (2 * n)) / denom
            half = z * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2)) / denom
            lo = np.clip(centre - half, 0.0, 1.0)
            hi = np.clip(centre + half, 0.0, 1.0)
    lo = np.where(empty, np.nan, lo)
    hi = np.where(empty, np.nan, hi)
    if lo.ndim == 0:
        return float(lo), float(hi)
    return lo, hi


# --------------------------------------------------------------------------- backtest


def age_band(age, edges):
    """Label loan ages with age bands.

    Bands follow the feature spec's convention: the first band holds ages
    below ``edges[0]``, band ``j`` holds ages in ``[edges[j-1], edges[j])``
    and the last band ages at or above ``edges[-1]``.  Labels read
    ``"1-11"``, ``"12-23"``, ..., ``"120+"``.

    Parameters
    ----------
    age : array_like of int, shape (n,)
        Loan age in months (1 = first month after origination).
    edges : sequence of int
        Strictly increasing band edges, at least one.

    Returns
    -------
    pandas.Categorical or pandas.Series
        Ordered categorical of band labels; a Series with the same index when
        ``age`` is a Series.
    """
    e = [int(x) for x in edges]
    if not e or any(b <= a for a, b in zip(e, e[1:])):
        raise DataError(f"edges must be a non-empty, strictly increasing list of ages, got {list(edges)}")
    arr = as_1d(age, "age")
    _check_finite(arr, "age")
    labels = [f"1-{e[0] - 1}" if e[0] > 2 else "1"]
    labels += [f"{lo}-{hi - 1}" if hi - 1 > lo else f"{lo}" for lo, hi in zip(e, e[1:])]
    labels.append(f"{e[-1]}+")
    codes = np.searchsorted(np.asarray(e, dtype=float), arr, side="right")
    out = pd.Categorical.from_codes(codes, categories=labels, ordered=True)
    if isinstance(age, pd.Series):
        return pd.Series(out, index=age.index, name="age_band")
    return out


ASSET_CORRELATION = 0.15
"""Default asset correlation of the one-factor backtest: the Basel II value for residential mortgage exposures
(BCBS, International Convergence of Capital Measurement, 2006, paragraph 328; cited from memory)."""


def one_factor_variance(n, p, rho: float) -> np.ndarray:
    """Variance of the number of events among ``n`` exposures each with probability ``p`` when they depend on one
    normal factor with asset correlation ``rho`` (Vasicek's one-factor model).

    Var = n p (1 - p) + n (n - 1) (P2 - p^2), with P2 = Phi_2(c, c; rho) the probability that two exposures both
    have the event, c = Phi^-1(p). For equal arguments the bivariate normal probability has the closed form
    Phi_2(c, c; rho) = Phi(c) - 2 T(c, sqrt((1 - rho) / (1 + rho))), T Owen's T function (Owen 1956). With
    rho = 0 it is the binomial variance. References (from memory): Vasicek, "Loan portfolio value", Risk, 2002;
    BCBS Working Paper 14, Studies on the validation of internal rating systems, 2005 (default-count tests
    under correlation); Owen, Annals of Mathematical Statistics, 1956.
    """
    from scipy import special

    n_arr, p_arr = np.broadcast_arrays(np.asarray(n, dtype=float), np.asarray(p, dtype=float))
    if not 0.0 <= rho < 1.0:
        raise DataError(f"asset correlation must be in [0, 1), got {rho}")
    out = n_arr * p_arr * (1.0 - p_arr)
    inside = (p_arr > 0.0) & (p_arr < 1.0)
    if rho == 0.0 or not inside.any():
        return out
    q = np.where(inside, p_arr, 0.5)
    c = stats.norm.ppf(q)
    both = stats.norm.cdf(c) - 2.0 * special.owens_t(c, np.sqrt((1.0 - rho) / (1.0 + rho)))
    return out + np.where(inside, n_arr * (n_arr - 1.0) * np.maximum(both - q * q, 0.0), 0.0)


def backtest(
    frame: pd.DataFrame, by, *, level: float = 0.95, asset_correlation: float = ASSET_CORRELATION, period: str = "month",
) -> pd.DataFrame:
    """Out-of-time backtest of monthly hazards, per group and cause.

    Parameters
    ----------
    frame : DataFrame
        One row per loan-month of the out-of-time window with columns
        ``h_default`` and ``h_prepay`` (predicted hazards), ``outcome``
        (0 none, 1 default, 2 prepayment) and the grouping columns.
    by : str or list of str
        Grouping columns, e.g. ``"month"`` or ``["vintage", "age_band"]``.
    level : float, default 0.95
        Coverage of the Jeffreys interval of the observed rate.

    Returns
    -------
    DataFrame
        One row per group and cause, sorted by the groups then cause, with the
        ``by`` columns and ``cause`` ("default" or "prepay"), ``n`` (loan-months
        at risk), ``expected`` (sum of hazards), ``actual`` (events),
        ``predicted_rate`` (expected / n), ``observed_rate`` (actual / n),
        ``observed_lo`` and ``observed_hi`` (Jeffreys interval of the observed
        rate), ``outside`` (predicted rate outside that interval) and ``z``
        = (actual - expected) / sqrt(sum h (1 - h)), the standardised
        difference under the Poisson-binomial law of independent loan-months
        (NaN when that variance is 0), and ``z_factor``, the same difference over the standard deviation of
        the one-factor model (:func:`one_factor_variance`, ``asset_correlation``): the loan-months of one
        ``period`` (a column of ``frame``, e.g. the calendar month; without it, the whole group) share one
        draw of an economic factor, periods independent, so a common surprise of a month (a macro shock the
        scenario did not have) is not read as model failure.
    """
    level = _check_level(level)
    by = [by] if isinstance(by, str) else list(by)
    if not by:
        raise DataError("backtest needs at least one grouping column in `by`")
    _missing_columns(frame, ["h_default", "h_prepay", "outcome", *by], "backtest frame")
    hd = frame["h_default"].to_numpy(dtype=float)
    hp = frame["h_prepay"].to_numpy(dtype=float)
    y = frame["outcome"].to_numpy(dtype=float)
    for name, h in (("h_default", hd), ("h_prepay", hp)):
        _check_finite(h, f"backtest column {name!r}")
        if np.any((h < 0) | (h > 1)):
            raise DataError(f"backtest column {name!r} must hold hazards in [0, 1]")
    if np.any(hd + hp > 1 + 1e-12):
        raise DataError("h_default + h_prepay exceeds 1 on some rows; the hazards must be of one competing-risk model")
    _check_finite(y, "backtest column 'outcome'")
    if not np.isin(y, (0, 1, 2)).all():
        raise DataError(f"backtest column 'outcome' must hold 0, 1 or 2; found {sorted(np.unique(y).tolist())[:6]}")

    work = frame[by].copy()
    for k, h in ((1, hd), (2, hp)):
        work[f"e{k}"] = h
        work[f"v{k}"] = h * (1.0 - h)
        work[f"a{k}"] = (y == k).astype(float)
    work["n"] = 1
    sums = work.groupby(by, sort=True, observed=True, dropna=False).sum().reset_index()
    factor_var = _factor_variances(frame, work, by, period, asset_correlation, sums)

    parts = []
    for k, cause in CAUSES.items():
        t = sums[by].copy()
        t["cause"] = cause
        t["n"] = sums["n"].astype(np.int64)
        t["expected"] = sums[f"e{k}"]
        t["actual"] = sums[f"a{k}"].round().astype(np.int64)
        t["predicted_rate"] = t["expected"] / t["n"]
        t["observed_rate"] = t["actual"] / t["n"]
        lo, hi = binomial_interval(t["actual"].to_numpy(), t["n"].to_numpy(), level=level)
        t["observed_lo"] = lo
        t["observed_hi"] = hi
        t["outside"] = (t["predicted_rate"] < lo) | (t["predicted_rate"] > hi)
        var = sums[f"v{k}"].to_numpy()
        with np.errstate(divide="ignore", invalid="ignore"):
            t["z"] = np.where(var > 0, (t["actual"] - t["expected"]) / np.sqrt(var), np.nan)
            factor = factor_var[k]
            t["z_factor"] = np.where(factor > 0, (t["actual"] - t["expected"]) / np.sqrt(factor), np.nan)
        parts.append(t)
    out = pd.concat(parts, ignore_index=True)
    order = {c: i for i, c in enumerate(CAUSES.values())}
    out["_cause_order"] = out["cause"].map(order)
    out = out.sort_values([*by, "_cause_order"], kind="stable").drop(columns="_cause_order")
    return out.reset_index(drop=True)


def _factor_variances(frame, work, by, period, rho, sums) -> dict[int, np.ndarray]:
    """Per cause, the one-factor variance of each group of ``sums``: summed over the group's periods (one
    factor draw each) when ``frame`` has the ``period`` column, else one draw for the group."""
    cells = list(by)
    if period in frame.columns and period not in cells:
        work = work.assign(**{"_period": frame[period].to_numpy()})
        cells = [*by, "_period"]
    per_cell = work.groupby(cells, sort=True, observed=True, dropna=False)[["n", "e1", "e2"]].sum().reset_index()
    out = {}
    for k in (1, 2):
        n = per_cell["n"].to_numpy(dtype=float)
        per_cell[f"f{k}"] = one_factor_variance(n, per_cell[f"e{k}"].to_numpy() / n, rho)
        total = per_cell.groupby(list(by), sort=True, observed=True, dropna=False)[f"f{k}"].sum().reset_index()
        out[k] = sums[list(by)].merge(total, on=list(by), how="left")[f"f{k}"].to_numpy()
    return out


# --------------------------------------------------------------------------- discrimination


def _auc_ks_from_counts(d: np.ndarray, c: np.ndarray):
    """AUC and KS from defaulter (d) and non-defaulter (c) counts per level.

    ``d`` and ``c`` have shape (L,) over ascending score levels.  AUC is
    the Mann-Whitney probability that a defaulter outscores a non-defaulter,
    ties counting one half; KS the largest gap between the two score CDFs.
    """
    D, C = d.sum(), c.sum()
    ks = np.abs(np.cumsum(d) / D - np.cumsum(c) / C).max()
    return _auc_from_counts(d, c), ks


def _auc_from_counts(d: np.ndarray, c: np.ndarray) -> float:
    below = np.cumsum(c) - c  # non-defaulters strictly below each level
    with np.errstate(divide="ignore", invalid="ignore"):
        return (d @ (below + 0.5 * c)) / (d.sum() * c.sum())


def discrimination(score, default, *, bootstrap: int = 200, seed: int = 0, level: float = 0.95) -> dict:
    """Rank-order power of a score against realised defaults.

    Parameters
    ----------
    score : array_like, shape (n,)
        Risk score or PD per loan; higher means riskier.
    default : array_like of {0, 1}, shape (n,)
        Realised default flag (e.g. from :func:`twelve_month_cohort`).
    bootstrap : int, default 200
        Resamples of loans (with replacement) for the percentile interval of
        AUC and Gini; 0 skips the interval (bounds NaN).
    seed : int, default 0
        Seed of the numpy Generator used for resampling; same seed, same
        interval.
    level : float, default 0.95
        Coverage of the bootstrap interval.

    Returns
    -------
    dict
        ``n``, ``defaults``, ``auc``, ``auc_lo``, ``auc_hi``, ``gini``
        (= 2 AUC - 1), ``gini_lo``, ``gini_hi``, ``ks`` and ``bootstrap``
        (resamples used; resamples without both classes are dropped).
    """
    s = as_1d(score, "score")
    y = _check_binary(default, "default")
    _check_same_length(score=s, default=y)
    _check_finite(s, "score")
    level = _check_level(level)
    if int(bootstrap) < 0:
        raise DataError(f"bootstrap must be 0 or more, got {bootstrap!r}")
    n, n1 = len(y), int(y.sum())
    if n1 == 0 or n1 == n:
        raise DataError(f"discrimination needs both defaulters and non-defaulters; got {n1} defaults among {n} loans")

    levels, code = np.unique(s, return_inverse=True)
    L = len(levels)
    d = np.bincount(code, weights=y, minlength=L)
    c = np.bincount(code, weights=1 - y, minlength=L)
    auc, ks = _auc_ks_from_counts(d, c)

    lo = hi = np.nan
    used = 0
    if bootstrap:
        rng = np.random.default_rng(seed)
        aucs = np.empty(int(bootstrap))
        yf = y.astype(float)
        # One resample at a time keeps memory at O(n); each costs two bincounts
        # over the score levels.
        for b in range(int(bootstrap)):
            idx = rng.integers(0, n, size=n)
            lv = code[idx]
            db = np.bincount(lv, weights=yf[idx], minlength=L)
            cb = np.bincount(lv, minlength=L) - db
            aucs[b] = _auc_from_counts(db, cb)
        aucs = aucs[np.isfinite(aucs)]
        used = len(aucs)
        if used:
            lo, hi = np.quantile(aucs, [(1 - level) / 2, (1 + level) / 2])
    return {
        "n": n,
        "defaults": n1,
        "auc": float(auc),
        "auc_lo": float(lo),
        "auc_hi": float(hi),
        "gini": float(2 * auc - 1),
        "gini_lo": float(2 * lo - 1),
        "gini_hi": float(2 * hi - 1),
        "ks": float(ks),
        "bootstrap": used,
    }


_EVENT_CODES = {0: None, **CAUSES, 3: "maturity"}


def _event_name(v):
    if pd.isna(v):
        return None
    if isinstance(v, str):
        return None if v.strip().lower() in ("", "none") else v
    return _EVENT_CODES.get(int(v), f"code {v}")


def twelve_month_cohort(
    outcomes: pd.DataFrame, start_idx: int, *, horizon: int = 12, keep_censored: bool = False
) -> pd.DataFrame:
    """Realised default flag over the months after ``start_idx``, censoring handled honestly.

    Parameters
    ----------
    outcomes : DataFrame
        One row per loan alive (no event) at month ``start_idx``, with columns
        ``loan_id``, ``event`` ("default", "prepay", "maturity", or missing /
        "" / "none" for no event; the integer codes 0 none, 1 default,
        2 prepay, 3 maturity are accepted too), ``event_month_idx`` (month
        index of the event, missing when none), ``last_month_idx`` (last
        month the loan was observed) and ``censor_reason`` (free text kept
        for the record).
    start_idx : int
        Month index of the cohort date.
    horizon : int, default 12
        Months in the outcome window ``start_idx + 1 .. start_idx + horizon``.
    keep_censored : bool, default False
        Keep the loans left out (with ``default_12m`` missing) instead of
        dropping them.

    Returns
    -------
    DataFrame
        Columns ``loan_id``, ``default_12m`` (Int8: 1 default in the window,
        0 otherwise, missing when left out), ``basis`` and ``censor_reason``.
        ``basis`` is ``default`` (default in the window), ``prepay`` or
        ``maturity`` (ended in the window without default: a non-default),
        ``survived`` (observed through the window end, including loans that
        default later) or ``censored`` (left the data, or the data ended,
        before the window end without an event: left out, since its outcome
        is unknown).
    """
    _missing_columns(
        outcomes, ["loan_id", "event", "event_month_idx", "last_month_idx", "censor_reason"], "outcomes"
    )
    start, end = int(start_idx), int(start_idx) + int(horizon)
    if int(horizon) < 1:
        raise DataError(f"horizon must be at least 1 month, got {horizon!r}")

    event = pd.Series([_event_name(v) for v in outcomes["event"].tolist()], dtype=object)
    bad = sorted({str(v) for v in event.dropna().unique()} - {"default", "prepay", "maturity"})
    if bad:
        raise DataError(f"outcomes column 'event' has unknown values {bad}; use default, prepay, maturity or none")
    has_event = event.notna().to_numpy()
    ev_idx = pd.to_numeric(outcomes["event_month_idx"]).to_numpy(dtype=float)
    last = pd.to_numeric(outcomes["last_month_idx"]).to_numpy(dtype=float)
    _check_finite(last, "outcomes column 'last_month_idx'")
    if np.any(has_event & ~np.isfinite(ev_idx)):
        raise DataError("outcomes rows with an event need 'event_month_idx'")
    early = has_event & (ev_idx <= start)
    if early.any():
        ids = outcomes["loan_id"].to_numpy()[early][:5].tolist()
        raise DataError(f"{int(early.sum())} loans had their event at or before start_idx {start} (e.g. {ids}); "
                        "pass only loans alive at the cohort date")

    in_window = has_event & (ev_idx <= end)
    ev = event.to_numpy(dtype=object)
    basis = np.where(
        in_window,
        ev,
        np.where(has_event | (last >= end), "survived", "censored"),
    ).astype(object)
    flag = pd.array(np.where(basis == "default", 1, 0), dtype="Int8")
    flag[basis == "censored"] = pd.NA
    out = pd.DataFrame(
        {
            "loan_id": outcomes["loan_id"].to_numpy(),
            "default_12m": flag,
            "basis": pd.array(basis.astype(str), dtype="str"),
            "censor_reason": outcomes["censor_reason"].to_numpy(),
        }
    )
    if not keep_censored:
        out = out[basis != "censored"].reset_index(drop=True)
    return out


# --------------------------------------------------------------------------- calibration


def _quantile_groups(x: np.ndarray, groups: int) -> np.ndarray:
    # Tied PDs always share a group: position = number of loans with a strictly
    # lower PD, so the grouping does not depend on the input order.
    pos = stats.rankdata(x, method="min") - 1
    return np.floor(pos * groups / len(x)).astype(np.int64) + 1


HL_DEGREES_OF_FREEDOM = {"development": 2, "external": 0}
"""Degrees of freedom the Hosmer-Lemeshow statistic loses, by sample: ``groups - 2`` on the sample the model
was fitted on, ``groups`` on an external (out-of-sample or out-of-time) one, where no parameter was estimated
from the outcomes (Hosmer, Lemeshow & Sturdivant 2013, *Applied Logistic Regression*, 3rd ed., the chapter on
external validation; cited from memory)."""


def calibration(predicted, default, *, groups: int = 10, grade=None, level: float = 0.95, sample: str = "development"):
    """Predicted PD against realised default rates, by PD group or by grade.

    Parameters
    ----------
    predicted : array_like, shape (n,)
        Predicted PD per loan over the outcome window (e.g. 12-month PD).
    default : array_like of {0, 1}, shape (n,)
        Realised default flag.
    groups : int, default 10
        Quantile groups of the predicted PD when ``grade`` is not given.
        Loans with tied PDs share a group, so heavy ties can give fewer groups.
    grade : array_like, shape (n,), optional
        Group loans by this (e.g. a rating grade) instead of PD quantiles; an ordered
        ``pandas.Categorical`` keeps its order in the table, other values sort.
    level : float, default 0.95
        Coverage of the Jeffreys interval.

    Returns
    -------
    table : DataFrame
        Index ``group`` (1 = lowest PD) or ``grade``; columns ``n``,
        ``pd_mean``, ``pd_min``, ``pd_max``, ``expected`` (sum of PD),
        ``actual``, ``observed_rate``, ``observed_lo``, ``observed_hi``,
        ``p_value`` (exact two-sided binomial test of ``actual`` against
        ``pd_mean``, scipy.stats.binomtest) and ``hl_term``.
    summary : dict
        ``n``, ``groups``, ``expected``, ``actual``, ``hl_statistic``
        = sum (O - E)^2 / (E (1 - E / n)), ``hl_df`` and ``hl_p_value``
        (chi-square upper tail; NaN when hl_df < 1), and ``hl_sample``.
    sample : {"development", "external"}, default "development"
        Where the outcomes come from: the sample the model was fitted on
        (``hl_df`` = groups - 2) or an external one, e.g. outcomes after the
        development window (``hl_df`` = groups); see :data:`HL_DEGREES_OF_FREEDOM`.
    """
    if sample not in HL_DEGREES_OF_FREEDOM:
        raise DataError(f"sample must be one of {list(HL_DEGREES_OF_FREEDOM)}, got {sample!r}")
    return _calibration(predicted, default, groups=groups, grade=grade, level=level, sample=sample)


def _calibration(pred, default, *, groups, grade, level, sample="development"):
    p = as_1d(pred, "pd")
    y = _check_binary(default, "default")
    _check_same_length(pd=p, default=y)
    _check_finite(p, "pd")
    if np.any((p < 0) | (p > 1)):
        raise DataError("pd must hold probabilities in [0, 1]")
    level = _check_level(level)
    if len(p) == 0:
        raise DataError("calibration needs at least one loan")
    if grade is None:
        if int(groups) < 2:
            raise DataError(f"groups must be 2 or more, got {groups!r}")
        key, name = _quantile_groups(p, int(groups)), "group"
    else:
        key = grade if isinstance(grade, pd.Categorical) else np.asarray(grade)  # a Categorical keeps its order
        if key.shape != p.shape:
            raise DataError(f"grade must have one value per loan: {key.shape} vs {p.shape}")
        name = "grade"

    frame = pd.DataFrame({name: key, "p": p, "y": y})
    g = frame.groupby(name, sort=True, observed=True, dropna=False)
    table = pd.DataFrame(
        {
            "n": g.size(),
            "pd_mean": g["p"].mean(),
            "pd_min": g["p"].min(),
            "pd_max": g["p"].max(),
            "expected": g["p"].sum(),
            "actual": g["y"].sum().astype(np.int64),
        }
    )
    table["observed_rate"] = table["actual"] / table["n"]
    lo, hi = binomial_interval(table["actual"].to_numpy(), table["n"].to_numpy(), level=level)
    table["observed_lo"] = lo
    table["observed_hi"] = hi
    table["p_value"] = [
        stats.binomtest(int(k), int(m), float(min(max(q, 0.0), 1.0))).pvalue
        for k, m, q in zip(table["actual"], table["n"], table["pd_mean"])
    ]
    e, o, m = table["expected"], table["actual"], table["n"]
    with np.errstate(divide="ignore", invalid="ignore"):
        table["hl_term"] = (o - e) ** 2 / (e * (1 - e / m))
    stat = float(table["hl_term"].sum())
    dof = len(table) - HL_DEGREES_OF_FREEDOM[sample]
    summary = {
        "n": int(len(p)),
        "groups": int(len(table)),
        "expected": float(e.sum()),
        "actual": int(o.sum()),
        "hl_statistic": stat,
        "hl_df": dof,
        "hl_p_value": float(stats.chi2.sf(stat, dof)) if dof >= 1 else float("nan"),
        "hl_sample": sample,
    }
    return table, summary


# --------------------------------------------------------------------------- stability


def psi(expected, actual, *, bins: int = 10, categorical: bool = False, floor: float = PSI_FLOOR):
    """Population stability index of ``actual`` against ``expected``.

    PSI = sum over bins (a - e) ln(a / e), with ``e`` and ``a`` the shares of
    the two samples in each bin.

    Parameters
    ----------
    expected : array_like, shape (n_e,)
        Reference sample (e.g. the development window).
    actual : array_like, shape (n_a,)
        Sample compared with it (e.g. the current book).
    bins : int, default 10
        Numeric only: bins at the quantiles 1/bins, 2/bins, ... of
        ``expected``; the outer bins are open-ended and bins are closed on the
        right.  Repeated quantiles (ties) merge bins, so fewer may result.
    categorical : bool, default False
        One bin per level seen in either sample instead.
    floor : float, default 1e-6
        A share below ``floor`` is raised to it before the log, so that a bin
        empty in one sample contributes a large but finite term.  Shares are
        not renormalised; the effect on the total is of order ``floor``.

    Missing values (NaN / None) form a bin of their own, labelled
    ``"missing"``, when either sample has any.

    Returns
    -------
    value : float
    table : DataFrame
        One row per bin: ``bin`` (label), ``lower`` and ``upper`` (numeric
        only), ``expected_n``, ``actual_n``, ``expected_share``,
        ``actual_share``, ``contribution``.
    """
    if not float(floor) > 0:
        raise DataError(f"floor must be positive, got {floor!r}")
    if categorical:
        table = _psi_categorical(expected, actual)
    else:
        table = _psi_numeric(expected, actual, int(bins))
    ne, na = table["expected_n"].sum(), table["actual_n"].sum()
    if ne == 0 or na == 0:
        raise DataError(f"psi needs non-empty samples; got {ne} expected and {na} actual values")
    table["expected_share"] = table["expected_n"] / ne
    table["actual_share"] = table["actual_n"] / na
    e = np.maximum(table["expected_share"].to_numpy(), floor)
    a = np.maximum(table["actual_share"].to_numpy(), floor)
    table["contribution"] = (a - e) * np.log(a / e)
    return float(table["contribution"].sum()), table


def _psi_numeric(expected, actual, bins: int) -> pd.DataFrame:
    if bins < 2:
        raise DataError(f"bins must be 2 or more, got {bins!r}")
    e = as_1d(expected, "expected")
    a = as_1d(actual, "actual")
    e_ok, a_ok = ~np.isnan(e), ~np.isnan(a)
    if not e_ok.any():
        raise DataError("expected has no non-missing values to define bins")
    if np.isinf(e).any() or np.isinf(a).any():
        raise DataError("psi needs finite values (missing values are allowed)")
    edges = np.unique(np.quantile(e[e_ok], np.arange(1, bins) / bins))
    k = len(edges) + 1
    ce = np.bincount(np.searchsorted(edges, e[e_ok], side="left"), minlength=k)
    ca = np.bincount(np.searchsorted(edges, a[a_ok], side="left"), minlength=k)
    lower = np.r_[-np.inf, edges]
    upper = np.r_[edges, np.inf]
    labels = [f"({lo:.6g}, {hi:.6g}]" if np.isfinite(hi) else f"({lo:.6g}, inf)" for lo, hi in zip(lower, upper)]
    table = pd.DataFrame({"bin": labels, "lower": lower, "upper": upper, "expected_n": ce, "actual_n": ca})
    n_miss_e, n_miss_a = int((~e_ok).sum()), int((~a_ok).sum())
    if n_miss_e or n_miss_a:
        miss = pd.DataFrame(
            {"bin": ["missing"], "lower": [np.nan], "upper": [np.nan], "expected_n": [n_miss_e], "actual_n": [n_miss_a]}
        )
        table = pd.concat([table, miss], ignore_index=True)
    return table


def _psi_categorical(expected, actual) -> pd.DataFrame:
    e = pd.Series(np.asarray(expected, dtype=object)).astype(object)
    a = pd.Series(np.asarray(actual, dtype=object)).astype(object)
    e = e.where(e.notna(), "missing").astype(str)
    a = a.where(a.notna(), "missing").astype(str)
    ce, ca = e.value_counts(), a.value_counts()
    levels = sorted(set(ce.index) | set(ca.index))
    return pd.DataFrame(
        {
            "bin": levels,
            "expected_n": ce.reindex(levels, fill_value=0).to_numpy(dtype=np.int64),
            "actual_n": ca.reindex(levels, fill_value=0).to_numpy(dtype=np.int64),
        }
    )


# --------------------------------------------------------------------------- model movement


def coefficient_changes(current: pd.DataFrame, prior: pd.DataFrame) -> pd.DataFrame:
    """Compare two tidy coefficient tables term by term.

    Parameters
    ----------
    current, prior : DataFrame
        Columns ``cause``, ``term``, ``estimate``, ``std_error``; one row per
        cause and term.

    Returns
    -------
    DataFrame
        One row per cause and term in either table (current's order first,
        then terms only in the prior), with ``estimate_current``,
        ``estimate_prior``, ``std_error_current``, ``std_error_prior``,
        ``change`` (current - prior), ``change_in_se`` (change in units of the
        prior standard error, i.e. how far the new estimate moved measured on
        the prior fit's precision; the two fits share data, so this is a
        yardstick, not a test) and ``present`` ("both", "current only",
        "prior only").
    """
    cols = ["cause", "term", "estimate", "std_error"]
    for name, t in (("current", current), ("prior", prior)):
        _missing_columns(t, cols, f"{name} coefficient table")
        dup = t.duplicated(["cause", "term"])
        if dup.any():
            first = t.loc[dup, ["cause", "term"]].head(3).to_dict("records")
            raise DataError(f"{name} coefficient table repeats cause/term pairs: {first}")
    cur = current[cols].rename(columns={"estimate": "estimate_current", "std_error": "std_error_current"})
    pri = prior[cols].rename(columns={"estimate": "estimate_prior", "std_error": "std_error_prior"})
    out = cur.merge(pri, on=["cause", "term"], how="left", indicator=True)
    only_prior = pri.merge(cur[["cause", "term"]], on=["cause", "term"], how="left", indicator=True)
    only_prior = only_prior[only_prior["_merge"] == "left_only"].drop(columns="_merge")
    out = pd.concat([out, only_prior.assign(_merge="prior_only")], ignore_index=True)
    labels = {"both": "both", "left_only": "current only", "prior_only": "prior only"}
    out["present"] = out["_merge"].astype(str).map(labels)
    out = out.drop(columns="_merge")
    out["change"] = out["estimate_current"] - out["estimate_prior"]
    se = out["std_error_prior"].to_numpy(dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out["change_in_se"] = np.where(se > 0, out["change"].to_numpy(dtype=float) / se, np.nan)
    return out[
        [
            "cause",
            "term",
            "estimate_current",
            "estimate_prior",
            "std_error_current",
            "std_error_prior",
            "change",
            "change_in_se",
            "present",
        ]
    ].reset_index(drop=True)


# --------------------------------------------------------------------------- non-parametric curves


def aalen_johansen(time, event, *, causes=(1, 2), entry=None) -> pd.DataFrame:
    """Discrete-time Aalen-Johansen cumulative incidence per cause.

    Parameters
    ----------
    time : array_like of int, shape (n,)
        Loan age at the event or at censoring (last month observed).
    event : array_like of int, shape (n,)
        0 censored, else the cause code (one of ``causes``).
    causes : tuple of int, default (1, 2)
        Cause codes to report, in order.
    entry : array_like of int, shape (n,), optional
        Age at which a loan entered observation (left truncation): it is in
        the risk set from age ``entry + 1``.  Default: at risk from age 1.

    Returns
    -------
    DataFrame
        Index ``time`` (every integer age from the earliest to the latest
        observed time); columns ``n_risk`` (loans at risk at the start of the
        month), ``events_k`` and ``censored``, ``survival`` (all-cause
        Kaplan-Meier) and ``survival_se`` (Greenwood), and per cause
        ``cif_k`` and ``cif_k_se``.  A censored loan counts as at risk in its
        last month, as in the loan-month panel.  Standard errors are the
        delta-method variance that statsmodels' ``CumIncidenceRight`` reports
        (Marubini & Valsecchi 1995); they are NaN where every loan at risk
        has an event, and are approximate under left truncation.
    """
    t, ev, causes, ent, start = _checked_lifetimes(time, event, causes, entry)
    grid = np.arange(start, int(t.max()) + 1)
    pos = t - start
    m = len(grid)
    leaving = np.bincount(pos, minlength=m)
    if ent is None:
        n = np.cumsum(leaving[::-1])[::-1].astype(float)
    else:
        entering = np.bincount(ent + 1 - start, minlength=m)
        n = (np.cumsum(entering) - np.cumsum(leaving) + leaving).astype(float)
    d = {k: np.bincount(pos, weights=(ev == k).astype(float), minlength=m) for k in causes}
    da = sum(d.values())
    with np.errstate(divide="ignore", invalid="ignore"):
        h_all = np.where(n > 0, da / n, 0.0)
        surv = np.cumprod(1.0 - h_all)
        s_prev = np.r_[1.0, surv[:-1]]
        out = pd.DataFrame(index=pd.Index(grid, name="time"))
        out["n_risk"] = n.astype(np.int64)
        for k in causes:
            out[f"events_{k}"] = d[k].astype(np.int64)
        out["censored"] = (leaving - da).astype(np.int64)
        # Where every loan at risk has an event the variance terms are
        # undefined; NaN carries forward from there (as statsmodels does).
        ra_all = np.where(n > 0, da / (n * (n - da)), 0.0)
        ra_all[(n > 0) & (n == da)] = np.nan
        out["survival"] = surv
        out["survival_se"] = surv * np.sqrt(np.cumsum(ra_all))
        for k in causes:
            hk = np.where(n > 0, d[k] / n, 0.0)
            cif = np.cumsum(s_prev * hk)
            out[f"cif_{k}"] = cif
            out[f"cif_{k}_se"] = np.sqrt(_cif_variance(cif, s_prev, n, d[k], ra_all))
    return out


def aalen_johansen_states(age, origin, end, count=None, *, n_transient: int, n_states: int) -> pd.DataFrame:
    """Aalen-Johansen state occupation probabilities of a discrete-time Markov multi-state model.

    Every loan starts in transient state 0 (current) before its first month. In each month of
    age ``a`` the empirical transition matrix P(a) has row j = the share of the loan-months of
    age ``a`` starting in state j that ended in each state (a state nobody occupied stays put);
    the occupation probabilities are p(a) = p(a - 1) P(a), the product-limit (Aalen & Johansen
    1978). Censoring and late entry need nothing more: a loan counts in the months it was seen.

    Parameters
    ----------
    age : array_like of int, shape (m,)
        Loan age of the month (1 is the first month on book).
    origin : array_like of int, shape (m,)
        Transient state at the start of the month, ``0 .. n_transient - 1``.
    end : array_like of int, shape (m,)
        State at the end of the month, ``0 .. n_states - 1``: the transient states first,
        then the absorbing ones.
    count : array_like of int, shape (m,), optional
        Loan-months each row stands for (rows may be pre-aggregated); 1 each by default.
    n_transient, n_states : int
        How many transient states, and states in all.

    Returns
    -------
    DataFrame
        Index ``age`` (1 to the last age seen); ``n_risk`` (loan-months of the age, in any
        transient state) and per state k ``p_k`` and ``p_k_se``. The standard errors are the
        Greenwood-type estimate (Andersen, Borgan, Gill & Keiding 1993, *Statistical Models
        Based on Counting Processes*, section IV.4, from memory): with the rows of P(a)
        multinomial given the past, Cov p(a) = P(a)' Cov p(a - 1) P(a) + sum_j p_j(a - 1)^2
        (diag(r_j) - r_j r_j') / n_j(a). With one transient state it is Greenwood's formula
        for the survival.
    """
    a = as_1d(age, "age")
    o = as_1d(origin, "origin")
    e = as_1d(end, "end")
    c = np.ones(len(a)) if count is None else as_1d(count, "count")
    _check_same_length(age=a, origin=o, end=e, count=c)
    for name, arr in (("age", a), ("origin", o), ("end", e), ("count", c)):
        _check_finite(arr, name)
    T, S = int(n_transient), int(n_states)
    if not 1 <= T < S:
        raise DataError(f"need 1 <= n_transient < n_states, got {T} and {S}")
    if len(a) == 0:
        raise DataError("aalen_johansen_states needs at least one loan-month")
    if (a < 1).any() or (a != np.round(a)).any():
        raise DataError("age must hold whole months from 1")
    if ((o < 0) | (o >= T) | (o != np.round(o))).any():
        raise DataError(f"origin must be a transient state code 0..{T - 1}")
    if ((e < 0) | (e >= S) | (e != np.round(e))).any():
        raise DataError(f"end must be a state code 0..{S - 1}")
    if (c < 0).any():
        raise DataError("count must not be negative")
    A = int(a.max())
    counts = np.zeros((A, T, S))
    np.add.at(counts, (a.astype(np.int64) - 1, o.astype(np.int64), e.astype(np.int64)), c)
    n = counts.sum(axis=2)  # (A, T) loan-months starting in each transient state
    p = np.zeros(S)
    p[0] = 1.0
    cov = np.zeros((S, S))
    eye = np.eye(S)
    occupancy, se = np.empty((A, S)), np.empty((A, S))
    for k in range(A):
        P = eye.copy()  # absorbing rows and unoccupied transient rows stay put
        step_var = np.zeros((S, S))
        for j in range(T):
            if n[k, j] > 0:
                r = counts[k, j] / n[k, j]
                P[j] = r
                step_var += p[j] ** 2 * (np.diag(r) - np.outer(r, r)) / n[k, j]
        cov = P.T @ cov @ P + step_var
        p = p @ P
        occupancy[k], se[k] = p, np.sqrt(np.clip(np.diag(cov), 0.0, None))
    out = pd.DataFrame(index=pd.Index(np.arange(1, A + 1), name="age"))
    out["n_risk"] = n.sum(axis=1).round().astype(np.int64)
    for k in range(S):
        out[f"p_{k}"] = occupancy[:, k]
        out[f"p_{k}_se"] = se[:, k]
    return out


def _checked_lifetimes(time, event, causes, entry):
    """Check the inputs of :func:`aalen_johansen`.

    Returns the times and events as arrays, the cause codes as ints, the entry
    ages (``None`` without left truncation) and the first age of the grid.
    """
    t = as_1d(time, "time")
    ev = as_1d(event, "event")
    _check_same_length(time=t, event=ev)
    _check_finite(t, "time")
    _check_finite(ev, "event")
    if len(t) == 0:
        raise DataError("aalen_johansen needs at least one loan")
    if np.any(t != np.round(t)):
        raise DataError("time must hold whole months")
    causes = tuple(int(k) for k in causes)
    unknown = sorted(set(np.unique(ev).tolist()) - {0, *causes})
    if unknown:
        raise DataError(f"event has codes {unknown} outside censored (0) and causes {list(causes)}")
    t = t.astype(np.int64)
    if entry is None:
        start = min(int(t.min()), 1)
        ent = None
    else:
        ent = as_1d(entry, "entry")
        _check_same_length(time=t, entry=ent)
        _check_finite(ent, "entry")
        ent = ent.astype(np.int64)
        if np.any(ent >= t):
            raise DataError("entry must be earlier than time for every loan")
        start = int(ent.min()) + 1
    return t, ev, causes, ent, start


def _cif_variance(cif, s_prev, n, dk, ra_all):
    # Delta-method variance of the cumulative incidence (Marubini & Valsecchi
    # 1995, eq. 10.12 form), written as statsmodels' _calc_incidence_right has it.
    v = cif**2 * np.cumsum(ra_all)
    v -= 2 * cif * np.cumsum(cif * ra_all)
    v += np.cumsum(cif**2 * ra_all)
    safe_n = np.where(n > 0, n, 1.0)
    v += np.cumsum(np.where(n > 0, s_prev**2 * (n - dk) * dk / safe_n**3, 0.0))
    ra = np.where(n > 0, s_prev * dk / safe_n**2, 0.0)
    v -= 2 * cif * np.cumsum(ra)
    v += 2 * np.cumsum(cif * ra)
    return np.maximum(v, 0.0)


def _model_curves(model, vintages) -> dict:
    """Normalise the model curves to {vintage: Series indexed by age}."""
    if isinstance(model, pd.DataFrame):
        missing = [v for v in vintages if v not in model.columns]
        if missing:
            raise DataError(f"model curves lack vintages {missing[:5]}; they have {list(model.columns)[:10]}")
        return {v: model[v].astype(float) for v in vintages}
    if isinstance(model, Mapping):
        missing = [v for v in vintages if v not in model]
        if missing:
            raise DataError(f"model curves lack vintages {missing[:5]}; they have {list(model)[:10]}")
        curves = {v: np.asarray(model[v], dtype=float) for v in vintages}
    else:
        arr = as_1d(model, "model")
        curves = {v: arr for v in vintages}
    return {v: pd.Series(c, index=pd.RangeIndex(1, len(c) + 1, name="age")) for v, c in curves.items()}


def model_vs_nonparametric(
    model, time, event, vintage, *, cause: int = 1, entry=None, level: float = 0.95
) -> pd.DataFrame:
    """Model-implied cumulative incidence against Aalen-Johansen, by vintage.

    Parameters
    ----------
    model : array_like, Mapping or DataFrame
        Model cumulative incidence of ``cause`` by loan age: a 1-D array
        (element ``j`` is age ``j + 1``) used for every vintage, a mapping
        vintage -> such array, or a DataFrame indexed by age with one column
        per vintage.  Typically the average over the vintage's loans of the
        model's F_k(age) from origination.
    time, event : array_like of int, shape (n,)
        Per loan, as in :func:`aalen_johansen` (causes 1 and 2).
    vintage : array_like, shape (n,)
        Vintage label per loan.
    cause : int, default 1
        Which cause to compare (1 default, 2 prepayment).
    entry : array_like of int, shape (n,), optional
        Left-truncation ages, as in :func:`aalen_johansen`.
    level : float, default 0.95
        Coverage of the pointwise normal-approximation interval
        ``observed +/- z * observed_se``, clipped to [0, 1].

    Returns
    -------
    DataFrame
        Columns ``vintage``, ``age``, ``model``, ``observed``, ``observed_se``,
        ``observed_lo``, ``observed_hi``, ``difference`` (model - observed),
        ``outside`` (model outside the interval) and ``n_risk``.  Ages run from
        1 (or, with ``entry``, the vintage's earliest entry age + 1) to the
        last age observed in the vintage that the model curve also covers.
        With ``entry`` the observed curve is conditional on survival to the
        vintage's earliest entry age; give the model curve on the same basis.
    """
    level = _check_level(level)
    if cause not in (1, 2):
        raise DataError(f"cause must be 1 (default) or 2 (prepayment), got {cause!r}")
    t = as_1d(time, "time")
    ev = as_1d(event, "event")
    vin = np.asarray(vintage)
    _check_same_length(time=t, event=ev, vintage=vin)
    ent = None if entry is None else as_1d(entry, "entry")
    if ent is not None:
        _check_same_length(time=t, entry=ent)
    vintages = list(pd.unique(vin))
    try:
        vintages = sorted(vintages)
    except TypeError:
        pass
    curves = _model_curves(model, vintages)
    z = stats.norm.isf((1 - level) / 2)
    parts = []
    for v in vintages:
        rows = vin == v
        aj = aalen_johansen(t[rows], ev[rows], causes=(1, 2), entry=None if ent is None else ent[rows])
        parts.append(_vintage_comparison(v, curves[v], aj, cause, z))
    return pd.concat(parts, ignore_index=True)


def _vintage_comparison(v, curve: pd.Series, aj: pd.DataFrame, cause: int, z: float) -> pd.DataFrame:
    """One vintage's model curve against its Aalen-Johansen curve, at the ages both cover.

    ``z`` is the normal quantile of the interval ``observed +/- z * observed_se``.
    """
    ages = curve.index[(curve.index >= max(1, aj.index.min())) & (curve.index <= aj.index.max())]
    aj = aj.loc[ages]
    obs = aj[f"cif_{cause}"].to_numpy()
    se = aj[f"cif_{cause}_se"].to_numpy()
    lo, hi = np.clip(obs - z * se, 0, 1), np.clip(obs + z * se, 0, 1)
    mod = curve.loc[ages].to_numpy()
    return pd.DataFrame(
        {
            "vintage": v,
            "age": np.asarray(ages, dtype=np.int64),
            "model": mod,
            "observed": obs,
            "observed_se": se,
            "observed_lo": lo,
            "observed_hi": hi,
            "difference": mod - obs,
            "outside": (mod < lo) | (mod > hi),
            "n_risk": aj["n_risk"].to_numpy(dtype=np.int64),
        }
    )
