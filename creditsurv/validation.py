"""Validation statistics: backtest, discrimination, calibration, stability, curves.

The statistics are pure and work on plain arrays or DataFrames that the
pipeline has already read from DuckDB; they never touch the panel, the config
or the model artifact. The last section, the validation pack
(:func:`validation_pack`), is the one place that reads the labelled panel and
projects with the model, then hands plain arrays to those statistics.  Tables are tidy frames with stable column
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
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from .errors import DataError

__all__ = [
    "binomial_interval",
    "age_band",
    "backtest",
    "discrimination",
    "twelve_month_cohort",
    "calibration",
    "psi",
    "psi_flag",
    "coefficient_changes",
    "aalen_johansen",
    "model_vs_nonparametric",
    "PACK_COLUMNS",
    "ValidationPack",
    "input_stability",
    "validation_pack",
]

CAUSES = {1: "default", 2: "prepay"}
PSI_FLOOR = 1e-6


# --------------------------------------------------------------------------- shared checks


def _check_level(level: float) -> float:
    level = float(level)
    if not 0.0 < level < 1.0:
        raise DataError(f"level must lie strictly between 0 and 1, got {level!r}")
    return level


def _as_1d(x, name: str, *, dtype=float) -> np.ndarray:
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
    arr = _as_1d(arr, name)
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
    arr = _as_1d(age, "age")
    _check_finite(arr, "age")
    labels = [f"1-{e[0] - 1}" if e[0] > 2 else "1"]
    labels += [f"{lo}-{hi - 1}" if hi - 1 > lo else f"{lo}" for lo, hi in zip(e, e[1:])]
    labels.append(f"{e[-1]}+")
    codes = np.searchsorted(np.asarray(e, dtype=float), arr, side="right")
    out = pd.Categorical.from_codes(codes, categories=labels, ordered=True)
    if isinstance(age, pd.Series):
        return pd.Series(out, index=age.index, name="age_band")
    return out


def backtest(frame: pd.DataFrame, by, *, level: float = 0.95) -> pd.DataFrame:
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
        (NaN when that variance is 0).
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
        parts.append(t)
    out = pd.concat(parts, ignore_index=True)
    order = {c: i for i, c in enumerate(CAUSES.values())}
    out["_cause_order"] = out["cause"].map(order)
    out = out.sort_values([*by, "_cause_order"], kind="stable").drop(columns="_cause_order")
    return out.reset_index(drop=True)


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
    s = _as_1d(score, "score")
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


_EVENT_CODES = {0: None, 1: "default", 2: "prepay", 3: "maturity"}


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


def calibration(predicted, default, *, groups: int = 10, grade=None, level: float = 0.95):
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
        Group loans by this (e.g. a rating grade) instead of PD quantiles.
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
        = sum (O - E)^2 / (E (1 - E / n)), ``hl_df`` = groups - 2 and
        ``hl_p_value`` (chi-square upper tail; NaN when hl_df < 1).  The
        groups - 2 degrees of freedom are Hosmer and Lemeshow's for the
        sample the model was fitted on; out of sample the statistic is often
        referred to ``groups`` degrees of freedom instead, which a reader can
        apply from ``hl_statistic``.
    """
    return _calibration(predicted, default, groups=groups, grade=grade, level=level)


def _calibration(pred, default, *, groups, grade, level):
    p = _as_1d(pred, "pd")
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
        key = np.asarray(grade)
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
    dof = len(table) - 2
    summary = {
        "n": int(len(p)),
        "groups": int(len(table)),
        "expected": float(e.sum()),
        "actual": int(o.sum()),
        "hl_statistic": stat,
        "hl_df": dof,
        "hl_p_value": float(stats.chi2.sf(stat, dof)) if dof >= 1 else float("nan"),
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
    e = _as_1d(expected, "expected")
    a = _as_1d(actual, "actual")
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


# Thresholds 0.10 and 0.25 are the customary rule of thumb in credit scoring;
# they have no single published source and no statistical derivation, so treat
# the flag as a prompt to look, not a test.
PSI_WATCH = 0.10
PSI_SHIFT = 0.25


def psi_flag(value: float) -> str:
    """Verbal reading of a PSI: ``stable`` below 0.10, ``watch`` below 0.25, else ``shift``."""
    v = float(value)
    if np.isnan(v):
        raise DataError("psi_flag got NaN; compute the PSI on non-empty samples first")
    if v < PSI_WATCH:
        return "stable"
    if v < PSI_SHIFT:
        return "watch"
    return "shift"


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
    t = _as_1d(time, "time")
    ev = _as_1d(event, "event")
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
        ent = _as_1d(entry, "entry")
        _check_same_length(time=t, entry=ent)
        _check_finite(ent, "entry")
        ent = ent.astype(np.int64)
        if np.any(ent >= t):
            raise DataError("entry must be earlier than time for every loan")
        start = int(ent.min()) + 1
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
        arr = _as_1d(model, "model")
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
    t = _as_1d(time, "time")
    ev = _as_1d(event, "event")
    vin = np.asarray(vintage)
    _check_same_length(time=t, event=ev, vintage=vin)
    ent = None if entry is None else _as_1d(entry, "entry")
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
        curve = curves[v]
        ages = curve.index[(curve.index >= max(1, aj.index.min())) & (curve.index <= aj.index.max())]
        aj = aj.loc[ages]
        obs = aj[f"cif_{cause}"].to_numpy()
        se = aj[f"cif_{cause}_se"].to_numpy()
        lo, hi = np.clip(obs - z * se, 0, 1), np.clip(obs + z * se, 0, 1)
        mod = curve.loc[ages].to_numpy()
        parts.append(
            pd.DataFrame(
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
        )
    return pd.concat(parts, ignore_index=True)


# ===========================================================================
# The validation pack: reads the panel and projects with the model
# ===========================================================================
#
# Everything above is pure. The functions below are the one place where
# validation reads the labelled panel (``loan_outcomes``, ``loan_months``,
# ``loans``, ``macro``) and asks the projection stage for model curves; they
# then hand plain arrays to the statistics above.

PACK_AGE_BAND_EDGES = (12, 24, 36, 60)
"""Age bands of ``backtest_by_age_band`` (see :func:`age_band`)."""

PACK_SAMPLE_ROWS = 200_000
"""Development rows read at most per stability index (a deterministic hash sample)."""

REALISED = "realised"
"""Name of the one scenario of the pack: the macro history itself."""

_BACKTEST_COLUMNS = (
    "cause", "n", "expected", "actual", "predicted_rate", "observed_rate",
    "observed_lo", "observed_hi", "outside", "z",
)  # fmt: skip

PACK_COLUMNS: dict[str, tuple[str, ...]] = {
    "backtest_by_month": ("month", *_BACKTEST_COLUMNS),
    "backtest_by_age_band": ("age_band", *_BACKTEST_COLUMNS),
    "backtest_by_vintage": ("vintage", *_BACKTEST_COLUMNS),
    "development_cohort": ("loan_id", "vintage", "age", "band", "pd_12m", "default_12m", "basis"),
    "discrimination": (
        "cohort_month", "n", "defaults", "auc", "auc_lo", "auc_hi", "gini", "gini_lo", "gini_hi", "ks", "bootstrap",
    ),
    "calibration": (
        "group", "n", "pd_mean", "pd_min", "pd_max", "expected", "actual", "observed_rate",
        "observed_lo", "observed_hi", "p_value", "hl_term",
    ),
    "stability": ("variable", "psi", "flag", "n_development", "n_current"),
    "coefficient_changes": (
        "cause", "term", "estimate_current", "estimate_prior", "std_error_current", "std_error_prior",
        "change", "change_in_se", "present",
    ),
    "incidence_by_vintage": (
        "vintage", "cause", "age", "model", "observed", "observed_se", "observed_lo", "observed_hi",
        "difference", "outside", "n_risk",
    ),
    "hazard_by_age": ("age", "cause", "n", "events", "observed", "observed_lo", "observed_hi", "model"),
}  # fmt: skip
"""Columns of every table the pack can produce, in order."""


@dataclass(frozen=True)
class ValidationPack:
    """The tables and headline numbers of one validation.

    Attributes
    ----------
    tables : dict of str to DataFrame
        The tables produced, keyed by the names of :data:`PACK_COLUMNS` with
        those columns; a table that does not apply is absent (see
        ``summary["notes"]``).
    summary : dict
        JSON-safe headline numbers (NaN written as None) and ``notes``: what
        was skipped or sampled, and why.
    """

    tables: dict
    summary: dict


class _UpToAge:
    """A hazard source that is the model up to loan age ``limit`` and 0 after.

    Curves past ``limit`` are then flat and never read; the point is not to
    evaluate the design on months nobody looks at.
    """

    def __init__(self, source, limit: int):
        self.source = source
        self.limit = int(limit)
        self.required_inputs = list(source.required_inputs)

    def hazards(self, raw):
        age = np.asarray(raw["age"])
        keep = age <= self.limit
        hd, hp = np.zeros(age.shape[0]), np.zeros(age.shape[0])
        if keep.all():
            return self.source.hazards(raw)
        if keep.any():
            a, b = self.source.hazards({k: np.asarray(v)[keep] for k, v in raw.items()})
            hd[keep], hp[keep] = a, b
        return hd, hp


# The loans alive and not in default at the end of month $month: a panel row in
# that month with a balance above the paid-off threshold and no event up to it
# (default is absorbing, so a loan in workout has had its event).
_ALIVE_AT = """
alive AS (
    SELECT o.loan_id, p.age, p.balance
    FROM loan_outcomes AS o
    JOIN panel AS p ON p.loan_id = o.loan_id AND p.month_idx = $month
    WHERE (o.event_month_idx IS NULL OR o.event_month_idx > $month)
      AND p.balance > $paid_off
)"""


def _sql(panel, sql: str, params: dict | list | None = None) -> pd.DataFrame:
    import duckdb

    try:
        return panel.con.execute(sql, params or {}).df()
    except duckdb.Error as exc:
        first = str(exc).strip().splitlines()[0]
        raise DataError(f"validation query failed: {first}") from None


def _loan_columns(panel, drop=("age", "balance", "segment")) -> str:
    from .panel import quote_ident

    return ", ".join(f"l.{quote_ident(c)}" for c in panel.columns("loans") if c not in drop)


def _realised_path(panel, as_of_idx: int, until_idx: int) -> pd.DataFrame:
    """The macro history up to ``as_of_idx``, held at its last values up to ``until_idx``."""
    from .projection import extend_path

    if not _has_view(panel, "macro"):
        return pd.DataFrame(index=pd.RangeIndex(0, until_idx + 1, name="month_idx"))
    history = _sql(panel, "SELECT * EXCLUDE (month) FROM macro WHERE month_idx <= $as_of ORDER BY month_idx",
                   {"as_of": int(as_of_idx)}).set_index("month_idx")
    if len(history) < 2:
        raise DataError(f"the macro history has {len(history)} month(s) up to the reporting month; need at least 2")
    first = int(history.index.min())
    return extend_path(
        history, history.loc[history.index > first], max(int(until_idx), int(history.index.max())),
        "hold_last", as_of_idx=first, name=REALISED,
    )


def _has_view(panel, name: str) -> bool:
    rows = panel.con.execute(
        "SELECT 1 FROM duckdb_views() WHERE view_name = $n\n"
        "UNION ALL SELECT 1 FROM duckdb_tables() WHERE table_name = $n",
        {"n": name},
    ).fetchall()
    return bool(rows)


def _projection_options(cfg) -> dict:
    c = cfg.collateral
    return {"hpi_series": c.hpi_series, "region_column": c.region_column, "market_rate_series": c.market_rate_series}


def _json_safe(value):
    if isinstance(value, Mapping):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer, int)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        v = float(value)
        return v if np.isfinite(v) else None
    if value is None or isinstance(value, str):
        return value
    if value is pd.NA:
        return None
    return str(value)


# --------------------------------------------------------------------------- the development cohort


def _cohort(cfg, panel, month: int, notes: list) -> pd.DataFrame:
    params = {"month": int(month), "paid_off": float(cfg.events.paid_off_balance)}
    frame = _sql(
        panel,
        f"WITH {_ALIVE_AT}\nSELECT {_loan_columns(panel)}, a.age, a.balance, 'all' AS segment\n"
        "FROM alive AS a JOIN loans AS l USING (loan_id)\nORDER BY loan_id",
        params,
    ).sort_values("loan_id", kind="stable", ignore_index=True)  # the order project_loans uses
    past = (frame["age"] >= frame["term"]).to_numpy()
    if past.any():
        notes.append(f"{int(past.sum())} loans alive at {_fmt_month(month)} at or past their term were left out")
        frame = frame[~past].reset_index(drop=True)
    return frame


def _fmt_month(idx: int) -> str:
    from ._months import format_month

    return format_month(int(idx))


def _project_cohort(cfg, model, cohort, path, month: int, window, chunk_size: int):
    """12-month PD of every cohort loan, and the hazards of the months ahead in ``window``.

    Only the first ``max(12, window end)`` months ahead are read, so the loans
    are projected in groups of similar age with the model cut off (hazards 0)
    past the oldest age of the group that is needed: the curves up to that
    horizon are exact and nothing past it is evaluated.
    """
    from .projection import project_loans

    a0, a1 = window if window is not None else (1, 0)
    width = max(a1 - a0 + 1, 0)
    horizon = max(12, a1)
    n = len(cohort)
    hd_grid = np.full((n, width), np.nan)
    hp_grid = np.full((n, width), np.nan)
    band_column = cfg.segments.band_column if cfg.segments.band_column in cohort.columns else None
    age = cohort["age"].to_numpy(dtype=np.int64)
    parts = []
    for _, rows in pd.Series(age // 12).groupby(age // 12, sort=True).indices.items():
        group = cohort.iloc[rows]
        where = np.asarray(rows)  # the group keeps the cohort's loan_id order

        def keep(chunk, where=where):
            if width == 0:
                return
            H = chunk.mask.shape[1]
            hi = min(a1, H)
            if hi < a0:
                return
            cols = slice(a0 - 1, hi)
            m = chunk.mask[:, cols]
            at = where[chunk.rows]
            hd_grid[at, : hi - a0 + 1] = np.where(m, chunk.h_default[REALISED][:, cols], np.nan)
            hp_grid[at, : hi - a0 + 1] = np.where(m, chunk.h_prepay[REALISED][:, cols], np.nan)

        result = project_loans(
            group, _UpToAge(model, int(group["age"].max()) + horizon), {REALISED: path}, as_of_idx=int(month),
            weights={REALISED: 1.0}, chunk_size=chunk_size, band_column=band_column,
            band_edges=cfg.segments.band_edges if band_column else (), on_chunk=keep, **_projection_options(cfg),
        )
        parts.append(result.loans[["loan_id", "age", "band", f"pd_12m_{REALISED}"]])
    loans = pd.concat(parts, ignore_index=True).sort_values("loan_id", kind="stable", ignore_index=True)
    return loans, hd_grid, hp_grid


def _month_labels(idx) -> np.ndarray:
    """``YYYY-MM`` text of an array of month indices."""
    idx = np.asarray(idx, dtype=np.int64)
    uniq, inv = np.unique(idx, return_inverse=True)
    return np.asarray([_fmt_month(m) for m in uniq], dtype=object)[inv.reshape(-1)]


def _backtest_tables(cfg, panel, cohort, hd_grid, hp_grid, month: int, notes: list) -> tuple[dict, dict]:
    oot = cfg.windows.out_of_time
    params = {"month": int(month), "paid_off": float(cfg.events.paid_off_balance),
              "start": int(oot.start), "end": int(oot.end)}  # fmt: skip
    rows = _sql(
        panel,
        f"WITH {_ALIVE_AT}\n"
        "SELECT lm.loan_id, lm.month_idx, lm.age, lm.outcome, l.origination_idx\n"
        "FROM loan_months AS lm JOIN alive USING (loan_id) JOIN loans AS l USING (loan_id)\n"
        "WHERE lm.month_idx BETWEEN $start AND $end\nORDER BY lm.loan_id, lm.month_idx",
        params,
    )
    pos = pd.Index(cohort["loan_id"]).get_indexer(rows["loan_id"])
    col = rows["month_idx"].to_numpy(dtype=np.int64) - int(oot.start)
    ok = pos >= 0
    hd = np.full(len(rows), np.nan)
    hp = np.full(len(rows), np.nan)
    hd[ok], hp[ok] = hd_grid[pos[ok], col[ok]], hp_grid[pos[ok], col[ok]]
    found = np.isfinite(hd) & np.isfinite(hp)
    if (~found).any():
        notes.append(
            f"backtest: {int((~found).sum())} out-of-time loan-months had no projected hazard and were left out"
        )
    frame = pd.DataFrame(
        {
            "month": _month_labels(rows["month_idx"].to_numpy()[found]),
            "age_band": np.asarray(age_band(rows["age"].to_numpy()[found], PACK_AGE_BAND_EDGES)),
            "vintage": rows["origination_idx"].to_numpy(dtype=np.int64)[found] // 12,
            "h_default": hd[found],
            "h_prepay": hp[found],
            "outcome": rows["outcome"].to_numpy()[found],
        }
    )
    frame["age_band"] = pd.Categorical(
        frame["age_band"], categories=list(age_band([1], PACK_AGE_BAND_EDGES).categories), ordered=True
    )
    tables = {}
    for by in ("month", "age_band", "vintage"):
        name = f"backtest_by_{by}"
        t = backtest(frame, by=by)
        if by == "age_band":
            t["age_band"] = t["age_band"].astype(str)
        tables[name] = t[list(PACK_COLUMNS[name])]
    by_month = tables["backtest_by_month"]
    summary = {"loan_months": int(len(frame)), "months": int(by_month["month"].nunique())}
    y = frame["outcome"].to_numpy()
    for k, cause in CAUSES.items():
        h = frame["h_default" if k == 1 else "h_prepay"].to_numpy()
        var = float(np.sum(h * (1 - h)))
        part = by_month[by_month["cause"] == cause]
        summary[cause] = {
            "expected": float(h.sum()),
            "actual": int((y == k).sum()),
            "z_total": (float((y == k).sum()) - float(h.sum())) / np.sqrt(var) if var > 0 else float("nan"),
            "share_months_outside": float(part["outside"].mean()) if len(part) else float("nan"),
        }
    return tables, summary


def _cohort_outcomes(cfg, panel, month: int) -> pd.DataFrame:
    params = {"month": int(month), "paid_off": float(cfg.events.paid_off_balance)}
    return _sql(
        panel,
        f"WITH {_ALIVE_AT}\n"
        "SELECT o.loan_id, CASE WHEN o.event = 'censored' THEN NULL ELSE o.event END AS event,\n"
        "       o.event_month_idx, o.last_month_idx, o.censor_reason\n"
        "FROM loan_outcomes AS o JOIN alive USING (loan_id)\nORDER BY loan_id",
        params,
    )


# --------------------------------------------------------------------------- stability


def _read_inputs(panel, model, start: int, end: int, max_rows: int):
    """Raw model inputs of the risk-set rows of months ``start..end``, hash-sampled to ``max_rows``.

    Returns the frame, the sampling step ``k`` (every k-th row by a hash of
    loan and month) and the inputs that could not be read.
    """
    names = [n for n in model.required_inputs if n != "log_age"]
    if hasattr(model, "spec"):
        readable = names
    else:
        readable = [n for n in names if n == "age"]
    skipped = [n for n in names if n not in readable]
    if not readable:
        return pd.DataFrame(), 1, skipped
    n_rows = _sql(panel, "SELECT count(*) AS n FROM loan_months WHERE month_idx BETWEEN $s AND $e",
                  {"s": int(start), "e": int(end)})["n"].iloc[0]
    k = max(1, int(np.ceil(int(n_rows) / max_rows)))
    where = "month_idx BETWEEN ? AND ? AND hash(loan_id, month_idx) % ? = 0"
    params = [int(start), int(end), k]
    if hasattr(model, "spec"):
        body = model.spec.raw_query(panel.con, where, order=False)
    else:
        body = f"SELECT loan_id, month_idx, age FROM loan_months WHERE {where}"
    import duckdb

    from .panel import quote_ident

    cols = ", ".join(quote_ident(n) for n in readable)
    try:
        frame = panel.con.execute(f"WITH data AS (\n{body}\n)\nSELECT {cols} FROM data", params).df()
    except duckdb.Error as exc:
        first = str(exc).strip().splitlines()[0]
        raise DataError(f"cannot read the model inputs of {_fmt_month(start)}..{_fmt_month(end)}: {first}") from None
    return frame, k, skipped


def input_stability(
    panel, model, development, current, *, bins: int = 10, max_rows: int = PACK_SAMPLE_ROWS
) -> pd.DataFrame:
    """PSI of every raw model input: the risk-set rows of one window against another.

    Parameters
    ----------
    panel : Panel
        An open panel on which ``label_events`` has run.
    model : hazard source
        A fitted :class:`~creditsurv.hazard.HazardResults` (inputs read with
        its feature spec's ``raw_query``), or any source with
        ``required_inputs`` (then only ``age`` is read, from ``loan_months``).
    development, current : tuple of int
        ``(first, last)`` month indices of the two windows, e.g. the
        development window and ``(as_of, as_of)``.
    bins : int, default 10
        Quantile bins of :func:`psi` for numeric inputs; text inputs get one
        bin per level.
    max_rows : int, default 200,000
        Rows read at most per window: when a window has more, every k-th row
        by a hash of loan and month is read (the same rows on every run).

    Returns
    -------
    DataFrame
        ``variable``, ``psi``, ``flag`` (:func:`psi_flag`), ``n_development``
        and ``n_current`` (rows read).
    """
    table, _ = _input_stability(panel, model, development, current, bins=bins, max_rows=max_rows)
    return table


def _input_stability(panel, model, development, current, *, bins, max_rows):
    dev, k_dev, skipped = _read_inputs(panel, model, int(development[0]), int(development[1]), max_rows)
    cur, k_cur, _ = _read_inputs(panel, model, int(current[0]), int(current[1]), max_rows)
    rows = []
    for name in dev.columns:
        if name not in cur.columns:
            continue
        e, a = dev[name], cur[name]
        categorical = not (pd.api.types.is_numeric_dtype(e) and pd.api.types.is_numeric_dtype(a))
        if len(a) == 0 or e.notna().sum() == 0:
            continue
        value, _ = psi(e.to_numpy() if categorical else e.to_numpy(dtype=float),
                       a.to_numpy() if categorical else a.to_numpy(dtype=float),
                       bins=bins, categorical=categorical)  # fmt: skip
        rows.append({"variable": name, "psi": value, "flag": psi_flag(value),
                     "n_development": int(len(e)), "n_current": int(len(a))})  # fmt: skip
    table = pd.DataFrame(rows, columns=list(PACK_COLUMNS["stability"]))
    info = {"sampled_every": {"development": k_dev, "current": k_cur}, "skipped": skipped, "n_current": len(cur)}
    return table, info


# --------------------------------------------------------------------------- in-sample fit by age


_FIXED_ONE = float(2**32)


def _fixed(x) -> np.ndarray:
    """``x`` in fixed point, units of 2**-32, as int64 (exact, order-free sums)."""
    return np.round(np.asarray(x, dtype=np.float64) * _FIXED_ONE).astype(np.int64)


def _hazard_by_age(panel, model, start: int, end: int, batch_size: int) -> pd.DataFrame | None:
    """Observed and mean model hazard of each cause by loan age over months ``start..end``."""
    sums: dict[str, np.ndarray] = {}

    def add(age, weights: dict):
        top = int(age.max()) + 1
        for key, w in weights.items():
            cur = sums.get(key, np.zeros(0, dtype=np.int64))
            if len(cur) < top:
                cur = np.r_[cur, np.zeros(top - len(cur), dtype=np.int64)]
            if w.dtype == np.int64:
                part = np.zeros(len(cur), dtype=np.int64)
                np.add.at(part, age, w)
            else:
                part = np.round(np.bincount(age, weights=w, minlength=len(cur))).astype(np.int64)
            sums[key] = cur + part

    if hasattr(model, "spec"):
        sql = model.spec.raw_query(panel.con, "month_idx BETWEEN ? AND ?", order=False)
        rel = panel.con.sql(sql, params=[int(start), int(end)])
        with rel.to_arrow_reader(batch_size=batch_size) as reader:
            for batch in reader:
                raw = {nm: batch.column(i).to_numpy(zero_copy_only=False)
                       for i, nm in enumerate(batch.schema.names) if nm != "loan_id"}  # fmt: skip
                if len(raw["age"]) == 0:
                    continue
                hd, hp = model.hazards(raw)
                age = np.asarray(raw["age"], dtype=np.int64)
                y = np.asarray(raw["outcome"])
                # Hazards are summed in fixed point (units of 2**-32): integer sums do
                # not depend on the order DuckDB streams the rows in, so neither does the table.
                add(age, {"n": np.ones(len(age)), "d1": (y == 1) * 1.0, "d2": (y == 2) * 1.0,
                          "h1": _fixed(hd), "h2": _fixed(hp)})  # fmt: skip
    elif set(model.required_inputs) <= {"age", "log_age"}:
        grouped = _sql(
            panel,
            "SELECT age, count(*) AS n, count(*) FILTER (WHERE outcome = 1) AS d1,\n"
            "       count(*) FILTER (WHERE outcome = 2) AS d2\n"
            "FROM loan_months WHERE month_idx BETWEEN $s AND $e GROUP BY age ORDER BY age",
            {"s": int(start), "e": int(end)},
        )
        if len(grouped):
            age = grouped["age"].to_numpy(dtype=np.int64)
            raw = {"age": age.astype(float), "log_age": np.log(np.maximum(age, 1).astype(float))}
            hd, hp = model.hazards({k: raw[k] for k in model.required_inputs})
            n = grouped["n"].to_numpy(dtype=float)
            add(age, {"n": n, "d1": grouped["d1"].to_numpy(float), "d2": grouped["d2"].to_numpy(float),
                      "h1": _fixed(n * np.asarray(hd)), "h2": _fixed(n * np.asarray(hp))})  # fmt: skip
    else:
        return None
    if not sums:
        return pd.DataFrame(columns=list(PACK_COLUMNS["hazard_by_age"]))
    ages = np.flatnonzero(sums["n"] > 0)
    n = sums["n"][ages]
    parts = []
    for k, cause in CAUSES.items():
        d = sums[f"d{k}"][ages]
        lo, hi = binomial_interval(d, n)
        parts.append(
            pd.DataFrame(
                {
                    "age": ages.astype(np.int64),
                    "cause": cause,
                    "n": n.astype(np.int64),
                    "events": d.astype(np.int64),
                    "observed": d / n,
                    "observed_lo": lo,
                    "observed_hi": hi,
                    "model": sums[f"h{k}"][ages] / _FIXED_ONE / n,
                }
            )
        )
    out = pd.concat(parts, ignore_index=True).sort_values(["age", "cause"], kind="stable")
    return out.reset_index(drop=True)[list(PACK_COLUMNS["hazard_by_age"])]


# --------------------------------------------------------------------------- cumulative incidence by vintage


def _incidence_by_vintage(cfg, panel, model, path, chunk_size: int, notes: list) -> pd.DataFrame | None:
    """Model cumulative incidence from origination, averaged by vintage, against Aalen-Johansen."""
    from .errors import ProjectionError
    from .projection import project_loans

    loans = _sql(
        panel,
        f"SELECT {_loan_columns(panel)}, 0 AS age, l.original_balance AS balance, 'all' AS segment,\n"
        "       CAST(CASE WHEN o.event = 'censored' THEN o.last_age ELSE o.event_age END AS INTEGER) AS _time,\n"
        "       CAST(CASE o.event WHEN 'default' THEN 1 WHEN 'prepay' THEN 2 ELSE 0 END AS INTEGER) AS _cause,\n"
        "       o.entry_age AS _entry_age\n"
        "FROM loan_outcomes AS o JOIN loans AS l USING (loan_id)\n"
        "WHERE l.origination_idx IS NOT NULL AND l.term >= 1\n"
        "ORDER BY l.origination_idx, loan_id",
    )
    late = (loans["_entry_age"] > 1).to_numpy() | (loans["_time"] < 1).to_numpy()
    if late.any():
        notes.append(
            f"incidence_by_vintage: {int(late.sum())} loans not observed from their first month (or with no "
            "month at risk) were left out; the comparison is on loans seen from origination"
        )
        loans = loans[~late].reset_index(drop=True)
    if loans.empty:
        return None
    loans["_vintage"] = loans["origination_idx"].to_numpy(dtype=np.int64) // 12
    curves, keep = {}, np.zeros(len(loans), dtype=bool)
    for vintage, rows in loans.groupby("_vintage", sort=True).indices.items():
        group = loans.iloc[rows]
        T = int(group["_time"].max())
        source = _UpToAge(model, T)
        sums = {"d": np.zeros(T), "p": np.zeros(T)}

        def collect(chunk):
            for key, F in (("d", chunk.cum_default[REALISED]), ("p", chunk.cum_prepay[REALISED])):
                H = F.shape[1]
                if H >= T:
                    sums[key] += F[:, :T].sum(axis=0)
                else:  # every loan of the chunk has matured by T: its curve stays flat
                    sums[key][:H] += F.sum(axis=0)
                    sums[key][H:] += F[:, -1].sum()

        try:
            for m, sub in group.groupby("origination_idx", sort=True):
                project_loans(
                    sub, source, {REALISED: path}, as_of_idx=int(m), weights={REALISED: 1.0},
                    chunk_size=chunk_size, on_chunk=collect, **_projection_options(cfg),
                )
        except ProjectionError as exc:
            first = str(exc).splitlines()[0]
            notes.append(f"incidence_by_vintage: vintage {vintage} left out, its loans cannot be projected ({first})")
            continue
        curves[int(vintage)] = {k: v / len(group) for k, v in sums.items()}
        keep[rows] = True
    if not curves:
        return None
    obs = loans[keep]
    parts = []
    for k, cause in CAUSES.items():
        key = "d" if k == 1 else "p"
        t = model_vs_nonparametric(
            {v: c[key] for v, c in curves.items()},
            obs["_time"].to_numpy(), obs["_cause"].to_numpy(), obs["_vintage"].to_numpy(), cause=k,
        )
        t.insert(1, "cause", cause)
        parts.append(t)
    out = pd.concat(parts, ignore_index=True).sort_values(["vintage", "cause", "age"], kind="stable")
    return out.reset_index(drop=True)[list(PACK_COLUMNS["incidence_by_vintage"])]


# --------------------------------------------------------------------------- the pack


def validation_pack(cfg, panel, model, *, current_pd_12m=None, chunk_size: int = 2000) -> ValidationPack:
    """Out-of-time backtest, discrimination, calibration, stability and curves of one model.

    Parameters
    ----------
    cfg : Config
        The run configuration: windows, ``validation`` settings, ``seed``,
        ``collateral`` and ``segments``.
    panel : Panel
        An open panel on which :func:`~creditsurv.events.label_events` has run.
    model : hazard source
        Usually a fitted :class:`~creditsurv.hazard.HazardResults`. Any source
        of the projection's protocol (``required_inputs``, ``hazards``) works
        for the projected parts; what needs a fitted model (coefficients,
        inputs beyond loan age) is left out with a note.
    current_pd_12m : array_like, optional
        The current book's probability-weighted 12-month PD; when given, its
        PSI against the development cohort's 12-month PD is reported.
    chunk_size : int, default 2000
        Loans per projection chunk (memory grows with it).

    Returns
    -------
    ValidationPack
        Tables (columns in :data:`PACK_COLUMNS`):

        ``backtest_by_month``, ``backtest_by_age_band``, ``backtest_by_vintage``
            :func:`backtest` of the loans alive and not in default at the end
            of the development window (the *development cohort*), projected
            under one scenario ``realised`` (the macro history; held at its
            last value beyond it), against their risk-set loan-months in the
            out-of-time window; grouped by calendar month (YYYY-MM), by age
            band (:data:`PACK_AGE_BAND_EDGES`) and by vintage (origination
            year).
        ``development_cohort``
            Per cohort loan: projected 12-month PD and the realised 12-month
            default flag of :func:`twelve_month_cohort` (missing when
            censored before 12 months without an event).
        ``discrimination`` (one row), ``calibration``
            :func:`discrimination` and :func:`calibration` of that 12-month
            PD against that flag; calibration by grade when
            ``segments.band_column`` and ``band_edges`` are set, else by
            ``validation.pd_groups`` PD groups (column ``group`` either way).
        ``stability``
            :func:`input_stability` of each raw model input, development
            window against the reporting month, and of ``pd_12m``
            (development cohort against ``current_pd_12m``).
        ``coefficient_changes``
            Against ``validation.prior_model``, when set.
        ``incidence_by_vintage``
            Per vintage, the model's cumulative incidence of default and of
            prepayment from origination (each loan projected from age 0 under
            the realised path, averaged over the vintage) against the
            Aalen-Johansen estimate on the same loans (:func:`model_vs_nonparametric`;
            maturity counts as censoring); ages up to the last one observed.
        ``hazard_by_age``
            In-sample fit: observed monthly hazard (events / at risk, with its
            Jeffreys interval) and mean model hazard by loan age over the
            development window.
    """
    dev, oot = cfg.windows.development, cfg.windows.out_of_time
    as_of, month = int(cfg.as_of), int(dev.end)
    notes: list[str] = []
    tables: dict[str, pd.DataFrame] = {}
    summary: dict = {
        "as_of": _fmt_month(as_of),
        "development": {"start": _fmt_month(dev.start), "end": _fmt_month(dev.end)},
        "out_of_time": None if oot is None else {"start": _fmt_month(oot.start), "end": _fmt_month(oot.end)},
        "cohort_month": _fmt_month(month),
    }
    fitted = hasattr(model, "predict_hazards") and hasattr(model, "spec")
    if not fitted:
        notes.append(
            f"the hazard source ({type(model).__name__}) is not a fitted model: coefficient changes are not "
            "produced and stability covers loan age only"
        )

    max_term = _sql(panel, "SELECT coalesce(max(term), 0) AS t FROM loans")["t"].iloc[0]
    path = _realised_path(panel, as_of, max(as_of, month) + int(max_term) + 1)

    # 1-2. The development cohort: backtest, discrimination, calibration.
    cohort = _cohort(cfg, panel, month, notes)
    summary["cohort_loans"] = int(len(cohort))
    cohort_pd = None
    if cohort.empty:
        notes.append(
            f"no loan is alive and out of default at {_fmt_month(month)}: no backtest, discrimination or calibration"
        )
    else:
        window = None if oot is None else (int(oot.start) - month, int(oot.end) - month)
        proj, hd_grid, hp_grid = _project_cohort(cfg, model, cohort, path, month, window, chunk_size)
        cohort_pd = proj[f"pd_12m_{REALISED}"].to_numpy(dtype=float)
        if oot is None:
            notes.append("no out-of-time window is configured: the backtest tables are not produced")
        else:
            bt_tables, summary["backtest"] = _backtest_tables(cfg, panel, cohort, hd_grid, hp_grid, month, notes)
            tables.update(bt_tables)
        del hd_grid, hp_grid
        if as_of < month + 12:
            notes.append(
                f"the data end {as_of - month} months after {_fmt_month(month)}: a 12-month outcome cannot be "
                "observed, so discrimination and calibration are not produced"
            )
        else:
            tables.update(_score_tables(cfg, panel, cohort, proj, month, summary, notes))

    # 3. Stability of the inputs and of the 12-month PD.
    stab, info = _input_stability(
        panel, model, (int(dev.start), int(dev.end)), (as_of, as_of),
        bins=cfg.validation.psi_bins, max_rows=PACK_SAMPLE_ROWS,
    )
    k_dev = info["sampled_every"]["development"]
    if k_dev > 1:
        notes.append(
            f"stability: the development rows were sampled, one loan-month in {k_dev} chosen by a hash of loan "
            f"and month (at most {PACK_SAMPLE_ROWS:,} rows; the same rows on every run with this DuckDB version)"
        )
    if info["skipped"]:
        notes.append(f"stability: inputs {info['skipped']} cannot be read for this hazard source")
    if info["n_current"] == 0:
        notes.append(f"stability: no risk-set rows at the reporting month {_fmt_month(as_of)}")
    if current_pd_12m is not None and cohort_pd is not None and len(cohort_pd):
        cur = _as_1d(current_pd_12m, "current_pd_12m")
        value, _ = psi(cohort_pd, cur, bins=cfg.validation.psi_bins)
        row = {"variable": "pd_12m", "psi": value, "flag": psi_flag(value),
               "n_development": int(len(cohort_pd)), "n_current": int(len(cur))}  # fmt: skip
        stab = pd.concat([stab, pd.DataFrame([row])], ignore_index=True) if len(stab) else pd.DataFrame([row])
    elif current_pd_12m is None:
        notes.append("stability: no current 12-month PD was given, so its PSI is not reported")
    else:
        notes.append("stability: the development cohort has no 12-month PD, so the PSI of pd_12m is not reported")
    tables["stability"] = stab[list(PACK_COLUMNS["stability"])]
    summary["stability"] = {
        flag: stab.loc[stab["flag"] == flag, "variable"].tolist() for flag in ("watch", "shift")
    }

    # 4. Coefficient changes against a prior model.
    prior = cfg.validation.prior_model
    if prior is not None and fitted:
        from .hazard import load_model

        tables["coefficient_changes"] = coefficient_changes(model.summary(), load_model(prior).summary())
    elif prior is None:
        notes.append("no prior model is configured (validation.prior_model): coefficient changes are not produced")

    # 5. Cumulative incidence by vintage.
    inc = _incidence_by_vintage(cfg, panel, model, path, chunk_size, notes)
    if inc is None:
        notes.append("incidence_by_vintage: no loan observed from origination")
    else:
        tables["incidence_by_vintage"] = inc
        degenerate = int((inc["outside"] & (inc["observed_se"] == 0)).sum())
        if degenerate:
            notes.append(
                f"incidence_by_vintage: {degenerate} ages are flagged outside only because the vintage has had no "
                "event of the cause yet, where the normal interval of the Aalen-Johansen estimate has zero width"
            )
        summary["incidence"] = {
            "vintages": int(inc["vintage"].nunique()),
            **{
                cause: {"share_ages_outside": float(inc.loc[inc["cause"] == cause, "outside"].mean())}
                for cause in CAUSES.values()
            },
        }

    # 6. In-sample fit by loan age.
    hba = _hazard_by_age(panel, model, int(dev.start), int(dev.end), _batch_size(cfg))
    if hba is None:
        notes.append("hazard_by_age: the hazard source needs inputs beyond loan age and is not a fitted model")
    else:
        tables["hazard_by_age"] = hba

    summary["tables"] = sorted(tables)
    summary["notes"] = notes
    return ValidationPack(tables=tables, summary=_json_safe(summary))


def _batch_size(cfg) -> int:
    return int(getattr(getattr(cfg.model, "fit", None), "batch_size", 250_000))


def _score_tables(cfg, panel, cohort, proj, month: int, summary: dict, notes: list) -> dict:
    """``development_cohort``, ``discrimination`` and ``calibration`` of the cohort's 12-month PD."""
    outcomes = _cohort_outcomes(cfg, panel, month)
    flags = twelve_month_cohort(outcomes, month, keep_censored=True).set_index("loan_id")
    frame = pd.DataFrame(
        {
            "loan_id": proj["loan_id"].to_numpy(),
            "vintage": cohort.set_index("loan_id")["origination_idx"].reindex(proj["loan_id"]).to_numpy(dtype=np.int64)
            // 12,
            "age": proj["age"].to_numpy(dtype=np.int64),
            "band": proj["band"].astype(str).to_numpy(),
            "pd_12m": proj[f"pd_12m_{REALISED}"].to_numpy(dtype=float),
        }
    )
    frame["default_12m"] = flags["default_12m"].reindex(frame["loan_id"]).to_numpy()
    frame["basis"] = flags["basis"].reindex(frame["loan_id"]).to_numpy()
    out = {"development_cohort": frame[list(PACK_COLUMNS["development_cohort"])]}
    known = frame[frame["default_12m"].notna()]
    left = len(frame) - len(known)
    if left:
        notes.append(
            f"discrimination and calibration: {left} cohort loans censored within 12 months without an event "
            "were left out"
        )
    y = known["default_12m"].to_numpy(dtype=np.int64)
    p = known["pd_12m"].to_numpy(dtype=float)
    try:
        d = discrimination(p, y, bootstrap=cfg.validation.bootstrap, seed=cfg.seed)
    except DataError as exc:
        notes.append(f"discrimination not produced: {exc}")
    else:
        row = pd.DataFrame([{"cohort_month": _fmt_month(month), **d}])
        out["discrimination"] = row[list(PACK_COLUMNS["discrimination"])]
        summary["discrimination"] = d
    if len(known):
        seg = cfg.segments
        graded = bool(seg.band_column and seg.band_edges and seg.band_column in cohort.columns)
        grade = known["band"].to_numpy() if graded else None
        table, cal = calibration(p, y, groups=cfg.validation.pd_groups, grade=grade)
        table = table.reset_index().rename(columns={"grade": "group"})
        out["calibration"] = table[list(PACK_COLUMNS["calibration"])]
        summary["calibration"] = cal
        summary["calibration"]["grouping"] = f"grades of {seg.band_column}" if graded else "pd quantile groups"
    return out
