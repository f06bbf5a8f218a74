"""The validation pack: reads the labelled panel through an engine, projects with the model, runs the statistics.

This is the one place where validation reads the labelled panel
(``loan_outcomes``, ``loan_months``, ``loans``, ``macro``) and asks the
projection stage for model curves; it then hands plain arrays to the pure
statistics of ``_statistics.py``.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from ..data import (
    PREVIOUSLY_DEFAULTED,
    arrears_state_sql,
    event_params,
    panel_history_sql,
)
from ..errors import DataError
from ..forecast import (
    CHUNK_SIZE,
    band_labels,
    panel_history_columns,
    with_panel_history,
)
from ..model import HazardResults, MultiStateResults
from ._statistics import (
    ASSET_CORRELATION,
    CAUSES,
    aalen_johansen_states,
    age_band,
    as_1d,
    backtest,
    binomial_interval,
    calibration,
    coefficient_changes,
    discrimination,
    model_vs_nonparametric,
    one_factor_variance,
    psi,
    twelve_month_cohort,
)
from ._verdicts import (
    EXPECTED_DRIFT,
    FAIL,
    THRESHOLDS,
    VERDICT_COLUMNS,
    WATCH,
    area_verdicts,
    psi_verdict,
    verdict_table,
)

__all__ = [
    "PACK_COLUMNS", "ValidationPack", "input_stability", "out_of_time_in_sample", "transition_backtest", "validation_pack",
]

PACK_AGE_BAND_EDGES = (12, 24, 36, 60)
"""Age bands of ``backtest_by_age_band`` (see :func:`age_band`)."""

PACK_SAMPLE_ROWS = 200_000
"""Development rows read at most per stability index (a deterministic hash sample)."""

REALISED = "realised"
"""Name of the one scenario of the pack: the macro history itself."""

_BACKTEST_COLUMNS = (
    "cause", "n", "expected", "actual", "predicted_rate", "observed_rate",
    "observed_lo", "observed_hi", "outside", "z", "z_factor",
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
    "stability": ("variable", "psi", "verdict", "n_development", "n_current"),
    "backtest_transitions": (
        "origin", "destination", "n", "expected", "actual", "predicted_rate", "observed_rate", "z", "z_factor",
    ),
    "transitions_development": (
        "origin", "destination", "n", "expected", "actual", "predicted_rate", "observed_rate", "z", "z_factor",
    ),
    "coefficient_changes": (
        "cause", "term", "estimate_current", "estimate_prior", "std_error_current", "std_error_prior",
        "change", "change_in_se", "present",
    ),
    "incidence_by_vintage": (
        "vintage", "cause", "age", "model", "observed", "observed_se", "observed_lo", "observed_hi",
        "difference", "outside", "n_risk",
    ),
    "states_by_vintage": (
        "vintage", "state", "age", "model", "observed", "observed_se", "observed_lo", "observed_hi",
        "difference", "outside", "n_risk",
    ),
    "hazard_by_age": ("age", "cause", "n", "events", "observed", "observed_lo", "observed_hi", "model"),
    "verdicts": VERDICT_COLUMNS,
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
        self.panel_rules = list(getattr(source, "panel_rules", []))
        if hasattr(source, "derived_lags"):
            self.derived_lags = source.derived_lags
        self.age_cap = getattr(source, "age_cap", None)
        if hasattr(source, "transition_probabilities"):  # a multi-state model: its chain runs whole
            self.labels, self.states = source.labels, source.states
            self.transition_probabilities = source.transition_probabilities

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
    SELECT o.loan_id, p.age, p.balance, p.days_past_due
    FROM loan_outcomes AS o
    JOIN panel AS p ON p.loan_id = o.loan_id AND p.month_idx = $month
    WHERE (o.event_month_idx IS NULL OR o.event_month_idx > $month)
      AND p.balance > $paid_off
)"""


def out_of_time_in_sample(cfg) -> bool:
    """Whether the model was fitted on the out-of-time window too (``windows.fit_on``): its out-of-time backtest,
    and the 12-month outcomes after the development window, are then in-sample."""
    return cfg.windows.fit_on == "development_and_out_of_time" and cfg.windows.out_of_time is not None


def _has_spec(model) -> bool:
    """Whether the hazard source is a fitted model (one logit, or one per arrears state) with a feature spec."""
    return isinstance(model, (HazardResults, MultiStateResults))


def _sql(engine, sql: str, params: dict | list | None = None) -> pd.DataFrame:
    try:
        return engine.frame(sql, params)
    except DataError as exc:
        raise DataError(f"validation {exc}") from None


def _loan_columns(engine, drop=("age", "balance", "segment")) -> str:
    from ..sql import quote_ident

    return ", ".join(f"l.{quote_ident(c)}" for c in engine.columns("loans") if c not in drop)


def _realised_path(engine, as_of_idx: int, until_idx: int) -> pd.DataFrame:
    """The macro history up to ``as_of_idx``, held at its last values up to ``until_idx``."""
    from ..forecast import extend_path

    if not _has_view(engine, "macro"):
        return pd.DataFrame(index=pd.RangeIndex(0, until_idx + 1, name="month_idx"))
    history = engine.macro_history()
    history = history.loc[history.index <= int(as_of_idx)]
    if len(history) < 2:
        raise DataError(f"the macro history has {len(history)} month(s) up to the reporting month; need at least 2")
    first = int(history.index.min())
    return extend_path(
        history, history.loc[history.index > first], max(int(until_idx), int(history.index.max())),
        "hold_last", as_of_idx=first, name=REALISED,
    )


def _has_view(engine, name: str) -> bool:
    return engine.has_table(name)


def _projection_options(cfg) -> dict:
    return {"collateral": cfg.collateral}


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


def _cohort(cfg, engine, model, month: int, notes: list) -> pd.DataFrame:
    state = arrears_state_sql("a.days_past_due", len(cfg.arrears.starts))
    sql = (
        f"WITH {_ALIVE_AT}\nSELECT {_loan_columns(engine)}, a.age, a.balance, 'all' AS segment,\n"
        f"       CAST({state} AS TINYINT) AS arrears_state,\n"
        # alive loans have had no event: none has a cured default behind it
        f"       CAST(0 AS TINYINT) AS {PREVIOUSLY_DEFAULTED}\n"
        "FROM alive AS a JOIN loans AS l USING (loan_id)\nORDER BY loan_id"
    )
    params = {"month": int(month), "paid_off": float(cfg.events.paid_off_balance), **event_params(cfg, state)}
    frame = _sql(engine, sql, params).sort_values("loan_id", kind="stable", ignore_index=True)  # the order project_loans uses
    needed = panel_history_columns(model)
    if needed:
        depth = max(j for _, j in needed)
        columns = sorted({c for c, _ in needed})
        history = _sql(engine, panel_history_sql(columns), {"first": int(month) - depth, "last": int(month)})
        frame = with_panel_history(frame, history, model, int(month))
    past = (frame["age"] >= frame["term"]).to_numpy()
    if past.any():
        notes.append(f"{int(past.sum())} loans alive at {_fmt_month(month)} at or past their term were left out")
        frame = frame[~past].reset_index(drop=True)
    return frame


def _fmt_month(idx: int) -> str:
    from ..months import format_month

    return format_month(int(idx))


def _project_cohort(cfg, model, cohort, path, month: int, window, chunk_size: int):
    """12-month PD of every cohort loan, and the hazards of the months ahead in ``window``.

    Only the first ``max(12, window end)`` months ahead are read, so the loans
    are projected in groups of similar age with the model cut off (hazards 0)
    past the oldest age of the group that is needed: the curves up to that
    horizon are exact and nothing past it is evaluated.
    """
    from ..forecast import project_loans

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


def _backtest_tables(cfg, engine, cohort, hd_grid, hp_grid, month: int, notes: list) -> tuple[dict, dict]:
    oot = cfg.windows.out_of_time
    params = {"month": int(month), "paid_off": float(cfg.events.paid_off_balance),
              "start": int(oot.start), "end": int(oot.end)}  # fmt: skip
    rows = _sql(
        engine,
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
        t = backtest(frame, by=by, asset_correlation=cfg.validation.asset_correlation)
        if by == "age_band":
            t["age_band"] = t["age_band"].astype(str)
        tables[name] = t[list(PACK_COLUMNS[name])]
    by_month = tables["backtest_by_month"]
    rho = cfg.validation.asset_correlation
    summary = {"loan_months": int(len(frame)), "months": int(by_month["month"].nunique()), "asset_correlation": rho}
    y = frame["outcome"].to_numpy()
    for k, cause in CAUSES.items():
        h = frame["h_default" if k == 1 else "h_prepay"].to_numpy()
        var = float(np.sum(h * (1 - h)))
        part = by_month[by_month["cause"] == cause]
        diff = float((y == k).sum()) - float(h.sum())
        # each calendar month one draw of the factor, as in the tables: the months' variances add
        factor = float(np.sum(_month_factor_variance(frame, k, rho)))
        summary[cause] = {
            "expected": float(h.sum()),
            "actual": int((y == k).sum()),
            "z_total": diff / np.sqrt(var) if var > 0 else float("nan"),
            "z_total_factor": diff / np.sqrt(factor) if factor > 0 else float("nan"),
            "share_months_outside": float(part["outside"].mean()) if len(part) else float("nan"),
        }
    return tables, summary


def _month_factor_variance(frame: pd.DataFrame, k: int, rho: float) -> np.ndarray:
    """Per calendar month of ``frame``, the one-factor variance of the events of cause ``k``."""
    h = frame["h_default" if k == 1 else "h_prepay"]
    g = h.groupby(frame["month"], sort=True).agg(["size", "mean"])
    return one_factor_variance(g["size"].to_numpy(dtype=float), g["mean"].to_numpy(dtype=float), rho)


def _cohort_outcomes(cfg, engine, month: int) -> pd.DataFrame:
    params = {"month": int(month), "paid_off": float(cfg.events.paid_off_balance)}
    return _sql(
        engine,
        f"WITH {_ALIVE_AT}\n"
        "SELECT o.loan_id, CASE WHEN o.event = 'censored' THEN NULL ELSE o.event END AS event,\n"
        "       o.event_month_idx, o.last_month_idx, o.censor_reason\n"
        "FROM loan_outcomes AS o JOIN alive USING (loan_id)\nORDER BY loan_id",
        params,
    )


# --------------------------------------------------------------------------- stability


def _read_inputs(engine, model, start: int, end: int, max_rows: int):
    """Raw model inputs of the risk-set rows of months ``start..end``, hash-sampled to ``max_rows``.

    Returns the frame, the sampling step ``k`` (every k-th row by a hash of
    loan and month) and the inputs that could not be read.
    """
    names = [n for n in model.required_inputs if n != "log_age"]
    if _has_spec(model):
        readable = names
    else:
        readable = [n for n in names if n == "age"]
    skipped = [n for n in names if n not in readable]
    if not readable:
        return pd.DataFrame(), 1, skipped
    n_rows = _sql(engine, "SELECT count(*) AS n FROM loan_months WHERE month_idx BETWEEN $s AND $e",
                  {"s": int(start), "e": int(end)})["n"].iloc[0]
    k = max(1, int(np.ceil(int(n_rows) / max_rows)))
    where = "month_idx BETWEEN ? AND ? AND hash(loan_id, month_idx) % ? = 0"
    params = [int(start), int(end), k]
    if _has_spec(model):
        body = model.spec.raw_query(engine.con, where, order=False)
    else:
        body = f"SELECT loan_id, month_idx, age FROM loan_months WHERE {where}"
    from ..sql import quote_ident

    cols = ", ".join(quote_ident(n) for n in readable)
    try:
        frame = engine.frame(f"WITH data AS (\n{body}\n)\nSELECT {cols} FROM data", params)
    except DataError as exc:
        raise DataError(f"cannot read the model inputs of {_fmt_month(start)}..{_fmt_month(end)}: {exc}") from None
    return frame, k, skipped


def input_stability(
    engine, model, development, current, *, bins: int = 10, max_rows: int = PACK_SAMPLE_ROWS,
    psi_watch: float = THRESHOLDS["psi_watch"], psi_fail: float = THRESHOLDS["psi_fail"],
) -> pd.DataFrame:
    """PSI of every raw model input: the risk-set rows of one window against another.

    Parameters
    ----------
    engine : creditsurv.engines.Engine
        Inputs opened by an engine, on which ``label_events`` has run.
    model : hazard source
        A fitted :class:`~creditsurv.model.HazardResults` (inputs read with
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
    psi_watch, psi_fail : float, default 0.10 and 0.25
        The levels of :func:`psi_verdict` (common practice): a PSI at or
        above ``psi_watch`` is watch, at or above ``psi_fail`` fail.

    Returns
    -------
    DataFrame
        ``variable``, ``psi``, ``verdict`` (:func:`psi_verdict`: an input
        that moves with the calendar reads ``expected drift``),
        ``n_development`` and ``n_current`` (rows read).
    """
    table, _ = _input_stability(engine, model, development, current, bins=bins, max_rows=max_rows,
                                levels=(psi_watch, psi_fail))  # fmt: skip
    return table


def _input_stability(engine, model, development, current, *, bins, max_rows, levels):
    dev, k_dev, skipped = _read_inputs(engine, model, int(development[0]), int(development[1]), max_rows)
    cur, k_cur, _ = _read_inputs(engine, model, int(current[0]), int(current[1]), max_rows)
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
        verdict = psi_verdict(value, name, watch=levels[0], fail=levels[1])
        rows.append({"variable": name, "psi": value, "verdict": verdict,
                     "n_development": int(len(e)), "n_current": int(len(a))})  # fmt: skip
    table = pd.DataFrame(rows, columns=list(PACK_COLUMNS["stability"]))
    info = {"sampled_every": {"development": k_dev, "current": k_cur}, "skipped": skipped, "n_current": len(cur)}
    return table, info


# --------------------------------------------------------------------------- in-sample fit by age


_FIXED_ONE = float(2**32)


def _fixed(x) -> np.ndarray:
    """``x`` in fixed point, units of 2**-32, as int64 (exact, order-free sums)."""
    return np.round(np.asarray(x, dtype=np.float64) * _FIXED_ONE).astype(np.int64)


def _hazard_by_age(engine, model, start: int, end: int, batch_size: int) -> pd.DataFrame | None:
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

    if _has_spec(model):
        sql = model.spec.raw_query(
            engine.con, "month_idx BETWEEN ? AND ?", order=False, carry=getattr(model, "risk_set_inputs", ())
        )
        for batch in engine.batches(sql, [int(start), int(end)], batch_size):
            raw = {nm: batch.column(i).to_numpy(zero_copy_only=False)
                   for i, nm in enumerate(batch.schema.names) if nm != "loan_id"}  # fmt: skip
            if len(raw["age"]) == 0:
                continue
            hd, hp = model.hazards(raw)
            age = np.asarray(raw["age"], dtype=np.int64)
            y = np.asarray(raw["outcome"])
            # Hazards are summed in fixed point (units of 2**-32): integer sums do
            # not depend on the order the engine streams the rows in, so neither does the table.
            add(age, {"n": np.ones(len(age)), "d1": (y == 1) * 1.0, "d2": (y == 2) * 1.0,
                      "h1": _fixed(hd), "h2": _fixed(hp)})  # fmt: skip
    elif set(model.required_inputs) <= {"age", "log_age"}:
        grouped = _sql(
            engine,
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


def _incidence_by_vintage(cfg, engine, model, path, chunk_size: int, notes: list):
    """Model against Aalen-Johansen by vintage: cumulative incidence, and for a multi-state model every state.

    Returns ``(incidence_by_vintage, states_by_vintage)``; either is ``None`` when it cannot be built.
    """
    from ..errors import ProjectionError
    from ..forecast import project_loans

    loans = _sql(
        engine,
        f"SELECT {_loan_columns(engine)}, 0 AS age, l.original_balance AS balance, 'all' AS segment,\n"
        f"       CAST(0 AS TINYINT) AS {PREVIOUSLY_DEFAULTED},\n"
        "       CAST(CASE WHEN o.event = 'censored' THEN o.last_age ELSE o.event_age END AS INTEGER) AS _time,\n"
        "       CAST(CASE o.event WHEN 'default' THEN 1 WHEN 'prepay' THEN 2 ELSE 0 END AS INTEGER) AS _cause,\n"
        "       o.entry_age AS _entry_age\n"
        "FROM loan_outcomes AS o JOIN loans AS l USING (loan_id)\n"
        f"WHERE {_FROM_ORIGINATION}\n"
        "ORDER BY l.origination_idx, loan_id",
    )
    # a loan first seen at age e > 1 is in the risk set from age e on (left truncation): it counts from there
    loans["_entry"] = np.maximum(loans["_entry_age"].to_numpy(dtype=np.int64) - 1, 0)
    empty = (loans["_time"] <= loans["_entry"]).to_numpy()
    if empty.any():
        notes.append(f"incidence_by_vintage: {int(empty.sum())} loans with no month at risk were left out")
        loans = loans[~empty].reset_index(drop=True)
    if loans.empty:
        return None, None
    multi = isinstance(model, MultiStateResults)
    no_history = pd.DataFrame(columns=["loan_id", "month_idx", *{c for c, _ in panel_history_columns(model)}])
    loans["_vintage"] = loans["origination_idx"].to_numpy(dtype=np.int64) // 12
    curves, keep = {}, np.zeros(len(loans), dtype=bool)
    for vintage, rows in loans.groupby("_vintage", sort=True).indices.items():
        group = loans.iloc[rows]
        T = int(group["_time"].max())
        source = _UpToAge(model, T)
        sums = {"d": np.zeros(T), "p": np.zeros(T)}
        if multi:
            sums["s"] = np.zeros((T, len(model.labels)))

        def collect(chunk):
            parts = [("d", chunk.cum_default[REALISED]), ("p", chunk.cum_prepay[REALISED])]
            if multi:  # the transient states at the end of each month ahead (month 0 is the start)
                parts.append(("s", chunk.arrears_states[REALISED][:, 1:]))
            for key, F in parts:
                H = F.shape[1]
                if H >= T:
                    sums[key] += F[:, :T].sum(axis=0)
                else:  # every loan of the chunk has matured by T: its curve stays flat
                    sums[key][:H] += F.sum(axis=0)
                    sums[key][H:] += F[:, -1].sum(axis=0)

        try:
            for m, sub in group.groupby("origination_idx", sort=True):
                # before its first month a loan has no panel row: a panel input takes its before-first value
                sub = with_panel_history(sub, no_history, model, int(m))
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
        return None, None
    obs = loans[keep]
    first_entry = obs.groupby("_vintage")["_entry"].min()
    late = {int(v): int(e) for v, e in first_entry.items() if e > 0}
    if late:
        notes.append(
            f"incidence_by_vintage: vintages {sorted(late)} have no loan seen from origination: their curves are "
            "conditional on survival to the vintage's first age observed, the model's too"
        )
    parts = []
    for k, cause in CAUSES.items():
        key = "d" if k == 1 else "p"
        t = model_vs_nonparametric(
            {v: _conditional_on_survival(c, key, late.get(v, 0)) for v, c in curves.items()},
            obs["_time"].to_numpy(), obs["_cause"].to_numpy(), obs["_vintage"].to_numpy(), cause=k,
            entry=obs["_entry"].to_numpy(),
        )
        t.insert(1, "cause", cause)
        parts.append(t)
    out = pd.concat(parts, ignore_index=True).sort_values(["vintage", "cause", "age"], kind="stable")
    incidence = out.reset_index(drop=True)[list(PACK_COLUMNS["incidence_by_vintage"])]
    from_origination = {v: c for v, c in curves.items() if v not in late}
    return incidence, (_states_by_vintage(engine, model, from_origination) if multi and from_origination else None)


def _conditional_on_survival(curve: dict, key: str, age: int) -> np.ndarray:
    """The vintage's model incidence of ``key`` by age, conditional on survival to ``age`` (as is the observed
    curve of a vintage first seen at that age): (F(a) - F(age)) / S(age), S = 1 - F_default - F_prepay."""
    F = curve[key]
    if age <= 0:
        return F
    survival = 1.0 - curve["d"][age - 1] - curve["p"][age - 1]
    return (F - F[age - 1]) / survival if survival > 0 else np.full_like(F, np.nan)


# Loans the vintage comparisons can follow from their first month on book.
_FROM_ORIGINATION = "l.origination_idx IS NOT NULL AND l.term >= 1"


def _states_by_vintage(engine, model, curves: dict) -> pd.DataFrame:
    """Each state's model occupation probability by age against the Aalen-Johansen estimate, per vintage.

    The observed side is every first-spell loan-month (before any cured default, as the projection
    from origination) with a known origin state, in the vintages of ``curves``: a loan first seen at
    age e counts from its first transition, e + 1 (the product of the monthly transition matrices
    estimated from the loans under observation at each age is the left-truncated Aalen-Johansen
    estimate). Every vintage of ``curves`` has loans seen from origination.
    """
    from ..data import end_states

    counts = _sql(
        engine,
        "SELECT l.origination_idx, m.age, m.origin_state, m.destination, count(*) AS loan_months\n"
        "FROM loan_months AS m JOIN loans AS l USING (loan_id)\n"
        f"WHERE {_FROM_ORIGINATION} AND m.origin_state IS NOT NULL\n"
        f"  AND m.{PREVIOUSLY_DEFAULTED} = 0 AND m.age >= 1\n"
        "GROUP BY l.origination_idx, m.age, m.origin_state, m.destination",
    )
    labels, states = list(model.labels), list(model.states)
    n_transient = len(labels)
    vintage = counts["origination_idx"].to_numpy(dtype=np.int64) // 12
    origin = counts["origin_state"].to_numpy(dtype=np.int64)
    end = end_states(origin, counts["destination"].to_numpy(dtype=np.int64), n_transient)
    z = stats.norm.isf(0.025)
    parts = []
    for v, c in curves.items():
        rows = vintage == v
        if not rows.any():
            continue
        aj = aalen_johansen_states(
            counts["age"].to_numpy()[rows], origin[rows], end[rows], counts["loan_months"].to_numpy()[rows],
            n_transient=n_transient, n_states=len(states),
        )
        model_curve = np.column_stack([c["s"], c["d"], c["p"]])  # (ages, states) in state order
        ages = np.arange(1, min(len(aj), len(model_curve)) + 1)
        for k, state in enumerate(states):
            obs, se = aj[f"p_{k}"].to_numpy()[ages - 1], aj[f"p_{k}_se"].to_numpy()[ages - 1]
            lo, hi = np.clip(obs - z * se, 0, 1), np.clip(obs + z * se, 0, 1)
            mod = model_curve[ages - 1, k]
            parts.append(pd.DataFrame({
                "vintage": v, "state": state, "age": ages, "model": mod, "observed": obs, "observed_se": se,
                "observed_lo": lo, "observed_hi": hi, "difference": mod - obs, "outside": (mod < lo) | (mod > hi),
                "n_risk": aj["n_risk"].to_numpy()[ages - 1],
            }))  # fmt: skip
    if not parts:
        return None
    return pd.concat(parts, ignore_index=True)[list(PACK_COLUMNS["states_by_vintage"])]


# --------------------------------------------------------------------------- the pack


def _cohort_section(cfg, engine, model, path, month, chunk_size, tables, summary, notes):
    """The development cohort's 12-month PD, backtest, discrimination and calibration; returns its 12-month PDs."""
    oot = cfg.windows.out_of_time
    as_of = int(cfg.as_of)
    cohort = _cohort(cfg, engine, model, month, notes)
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
            bt_tables, summary["backtest"] = _backtest_tables(cfg, engine, cohort, hd_grid, hp_grid, month, notes)
            tables.update(bt_tables)
        del hd_grid, hp_grid
        if as_of < month + 12:
            notes.append(
                f"the data end {as_of - month} months after {_fmt_month(month)}: a 12-month outcome cannot be "
                "observed, so discrimination and calibration are not produced"
            )
        else:
            tables.update(_score_tables(cfg, engine, cohort, proj, month, summary, notes))
    return cohort_pd


def transition_backtest(
    engine, model, start: int, end: int, *, asset_correlation: float = ASSET_CORRELATION
) -> pd.DataFrame:
    """Each move of a multi-state model in months ``start..end``: the model's expected count against the actual.

    For the months starting in each arrears state, with the months' own inputs (one month ahead, the state
    known): expected = the sum of the model's probabilities of each end state, actual = the months that
    ended there, z = (actual - expected) / sqrt(sum p (1 - p)). Staying is a row too; a state's rows add
    up to its months on both sides. ``z_factor`` is the same difference over the standard deviation of the
    one-factor model (:func:`one_factor_variance`, ``asset_correlation``), the loan-months of one calendar
    month sharing one draw of the factor, as in the backtest of each cause.

    Returns
    -------
    DataFrame
        ``origin``, ``destination``, ``n`` (months starting in the origin), ``expected``, ``actual``,
        ``predicted_rate``, ``observed_rate``, ``z``, ``z_factor``.
    """
    from ..data import end_states

    labels, states = list(model.labels), list(model.states)
    rows = []
    for j, origin in enumerate(labels):
        body = model.spec.raw_query(engine.con, "month_idx BETWEEN ? AND ?", order=False, origin_state=j, carry=("destination",))
        frame = _sql(engine, f"WITH data AS (\n{body}\n)\nSELECT * FROM data ORDER BY loan_id, month_idx", [int(start), int(end)])
        n = len(frame)
        if n == 0:
            continue
        probabilities = model.transition_probabilities({c: frame[c].to_numpy() for c in frame.columns}, origin)
        ended = end_states(np.full(n, j), frame["destination"].to_numpy(dtype=np.int64), len(labels))
        month, at, month_n = np.unique(frame["month_idx"].to_numpy(dtype=np.int64), return_inverse=True, return_counts=True)
        for k, name in enumerate(states):
            p = probabilities[:, k]
            expected, actual, var = float(p.sum()), int((ended == k).sum()), float(np.sum(p * (1.0 - p)))
            # each calendar month one draw of the factor: the months' one-factor variances add
            month_mean = np.bincount(at, weights=p, minlength=len(month)) / month_n
            factor = float(np.sum(one_factor_variance(month_n.astype(float), month_mean, asset_correlation)))
            rows.append({
                "origin": origin, "destination": name, "n": n, "expected": expected, "actual": actual,
                "predicted_rate": expected / n, "observed_rate": actual / n,
                "z": (actual - expected) / np.sqrt(var) if var > 0 else float("nan"),
                "z_factor": (actual - expected) / np.sqrt(factor) if factor > 0 else float("nan"),
            })  # fmt: skip
    return pd.DataFrame(rows, columns=list(PACK_COLUMNS["backtest_transitions"]))


def _stability_section(cfg, engine, model, cohort_pd, current_pd_12m, tables, summary, notes) -> None:
    """Stability (PSI) of every model input and of the 12-month PD against the development cohort."""
    dev, as_of = cfg.windows.development, int(cfg.as_of)
    levels = (cfg.validation.thresholds.psi_watch, cfg.validation.thresholds.psi_fail)
    stab, info = _input_stability(
        engine, model, (int(dev.start), int(dev.end)), (as_of, as_of),
        bins=cfg.validation.psi_bins, max_rows=PACK_SAMPLE_ROWS, levels=levels,
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
        cur = as_1d(current_pd_12m, "current_pd_12m")
        value, _ = psi(cohort_pd, cur, bins=cfg.validation.psi_bins)
        row = {"variable": "pd_12m", "psi": value, "verdict": psi_verdict(value, watch=levels[0], fail=levels[1]),
               "n_development": int(len(cohort_pd)), "n_current": int(len(cur))}  # fmt: skip
        stab = pd.concat([stab, pd.DataFrame([row])], ignore_index=True) if len(stab) else pd.DataFrame([row])
    elif current_pd_12m is None:
        notes.append("stability: no current 12-month PD was given, so its PSI is not reported")
    else:
        notes.append("stability: the development cohort has no 12-month PD, so the PSI of pd_12m is not reported")
    tables["stability"] = stab[list(PACK_COLUMNS["stability"])]
    summary["stability"] = {
        verdict.replace(" ", "_"): stab.loc[stab["verdict"] == verdict, "variable"].tolist()
        for verdict in (WATCH, FAIL, EXPECTED_DRIFT)
    }


def _incidence_section(cfg, engine, model, path, chunk_size, tables, summary, notes) -> None:
    """Model cumulative incidence by vintage against Aalen-Johansen."""
    inc, by_state = _incidence_by_vintage(cfg, engine, model, path, chunk_size, notes)
    if by_state is not None:
        tables["states_by_vintage"] = by_state
        summary["states_by_vintage"] = {
            "vintages": int(by_state["vintage"].nunique()),
            **{
                state: {"share_ages_outside": float(rows["outside"].mean())}
                for state, rows in by_state.groupby("state", sort=False)
            },
        }
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


def validation_pack(cfg, engine, model, *, current_pd_12m=None, chunk_size: int = CHUNK_SIZE) -> ValidationPack:
    """Out-of-time backtest, discrimination, calibration, stability and curves of one model.

    Parameters
    ----------
    cfg : Config
        The run configuration: windows, ``validation`` settings, ``seed``,
        ``collateral`` and ``segments``.
    engine : creditsurv.engines.Engine
        Inputs opened by an engine, on which :func:`~creditsurv.engines.label_events` has run.
    model : hazard source
        Usually a fitted :class:`~creditsurv.model.HazardResults`. Any source
        of the projection's protocol (``required_inputs``, ``hazards``) works
        for the projected parts; what needs a fitted model (coefficients,
        inputs beyond loan age) is left out with a note.
    current_pd_12m : array_like, optional
        The current book's probability-weighted 12-month PD; when given, its
        PSI against the development cohort's 12-month PD is reported.
    chunk_size : int, default 256
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
        ``states_by_vintage``
            For a multi-state model, the same comparison state by state: the
            model's probability of being in each arrears state (and of having
            defaulted or prepaid) at each age, averaged over the vintage,
            against the Aalen-Johansen state occupation probabilities of the
            loans' first spells (:func:`aalen_johansen_states`, with its
            Greenwood-type 95% interval).
        ``hazard_by_age``
            In-sample fit: observed monthly hazard (events / at risk, with its
            Jeffreys interval) and mean model hazard by loan age over the
            development window.
        ``verdicts``
            :func:`verdict_table`: every statistic read as ``pass``,
            ``watch`` or ``fail`` (``expected drift`` for an input that moves
            with the calendar) against ``validation.thresholds``, with a
            sentence saying what was seen.

        The summary's ``verdicts`` holds ``areas`` (each area's verdict, the
        worst of its items: :func:`area_verdicts`), ``thresholds`` (the
        levels used) and ``items`` (the rows of the ``verdicts`` table).
    """
    as_of, month = int(cfg.as_of), int(cfg.windows.development.end)
    notes: list[str] = []
    tables: dict[str, pd.DataFrame] = {}
    summary = _summary_header(cfg)
    fitted = _has_spec(model)
    if out_of_time_in_sample(cfg) and fitted:
        notes.append(
            "the model was fitted on the development and out-of-time windows together (windows.fit_on): the "
            "out-of-time backtest, discrimination and calibration are in-sample, and Hosmer-Lemeshow takes groups - 2 "
            "degrees of freedom"
        )
    if not fitted:
        notes.append(
            f"the hazard source ({type(model).__name__}) is not a fitted model: coefficient changes are not "
            "produced and stability covers loan age only"
        )
    max_term = _sql(engine, "SELECT coalesce(max(term), 0) AS t FROM loans")["t"].iloc[0]
    path = _realised_path(engine, as_of, max(as_of, month) + int(max_term) + 1)

    cohort_pd = _cohort_section(cfg, engine, model, path, month, chunk_size, tables, summary, notes)
    _stability_section(cfg, engine, model, cohort_pd, current_pd_12m, tables, summary, notes)
    _coefficient_section(cfg, model, fitted, tables, notes)
    _incidence_section(cfg, engine, model, path, chunk_size, tables, summary, notes)
    _hazard_by_age_section(cfg, engine, model, tables, notes)
    oot, dev = cfg.windows.out_of_time, cfg.windows.development
    if isinstance(model, MultiStateResults):
        # on the rows it was fitted to, a logit with a free intercept per move reproduces each move's count
        tables["transitions_development"] = transition_backtest(
            engine, model, int(dev.start), int(dev.end), asset_correlation=cfg.validation.asset_correlation
        )
    if isinstance(model, MultiStateResults) and oot is not None:
        moves = transition_backtest(
            engine, model, int(oot.start), int(oot.end), asset_correlation=cfg.validation.asset_correlation
        )
        tables["backtest_transitions"] = moves
        seen = moves[moves["origin"] != moves["destination"]]
        summary["backtest_transitions"] = {
            "moves": int(len(seen)), "outside_2_se": seen.loc[seen["z"].abs() > 2, ["origin", "destination"]].values.tolist(),
        }  # fmt: skip

    _verdict_section(cfg, tables, summary, notes)
    summary["tables"] = sorted(tables)
    summary["notes"] = notes
    return ValidationPack(tables=tables, summary=_json_safe(summary))


def _verdict_section(cfg, tables, summary, notes) -> None:
    """The verdict of every statistic (``verdicts`` table) and of every area (``summary["verdicts"]``)."""
    levels = dataclasses.asdict(cfg.validation.thresholds)
    table = verdict_table(_json_safe(summary), tables, levels)
    cal = summary.get("calibration")
    if cal and not np.isfinite(cal.get("hl_p_value", np.nan)):
        notes.append(
            f"verdicts: calibration has no verdict: Hosmer-Lemeshow has {cal.get('hl_df')} degrees of freedom"
        )
    tables["verdicts"] = table
    summary["verdicts"] = {
        "areas": area_verdicts(table),
        "thresholds": levels,
        "items": table.to_dict(orient="records"),
    }


def _summary_header(cfg) -> dict:
    """The summary's opening entries: the reporting month, the windows and the cohort month."""
    dev, oot = cfg.windows.development, cfg.windows.out_of_time
    return {
        "as_of": _fmt_month(int(cfg.as_of)),
        "development": {"start": _fmt_month(dev.start), "end": _fmt_month(dev.end)},
        "out_of_time": None if oot is None else {"start": _fmt_month(oot.start), "end": _fmt_month(oot.end)},
        "cohort_month": _fmt_month(int(dev.end)),
        "fit_on": cfg.windows.fit_on,
        "out_of_time_in_sample": out_of_time_in_sample(cfg),
    }


def _coefficient_section(cfg, model, fitted: bool, tables, notes) -> None:
    """Coefficient changes against the prior model, when one is configured and the source is fitted."""
    prior = cfg.validation.prior_model
    if prior is not None and fitted:
        from ..model import load_model

        tables["coefficient_changes"] = coefficient_changes(model.summary(), load_model(prior).summary())
    elif prior is None:
        notes.append("no prior model is configured (validation.prior_model): coefficient changes are not produced")


def _hazard_by_age_section(cfg, engine, model, tables, notes) -> None:
    """In-sample fit: observed and model hazard by loan age over the development window."""
    dev = cfg.windows.development
    hba = _hazard_by_age(engine, model, int(dev.start), int(dev.end), _batch_size(cfg))
    if hba is None:
        notes.append("hazard_by_age: the hazard source needs inputs beyond loan age and is not a fitted model")
    else:
        tables["hazard_by_age"] = hba


def _batch_size(cfg) -> int:
    return int(getattr(getattr(cfg.model, "fit", None), "batch_size", 250_000))


def _score_tables(cfg, engine, cohort, proj, month: int, summary: dict, notes: list) -> dict:
    """``development_cohort``, ``discrimination`` and ``calibration`` of the cohort's 12-month PD."""
    outcomes = _cohort_outcomes(cfg, engine, month)
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
        grade = pd.Categorical(known["band"], categories=band_labels(seg.band_edges), ordered=True) if graded else None
        # the 12 months after the development window: outcomes the fit never saw (an external sample), unless
        # the model was fitted on the out-of-time window too
        sample = "development" if out_of_time_in_sample(cfg) else "external"
        table, cal = calibration(p, y, groups=cfg.validation.pd_groups, grade=grade, sample=sample)
        table = table.reset_index().rename(columns={"grade": "group"})
        out["calibration"] = table[list(PACK_COLUMNS["calibration"])]
        summary["calibration"] = cal
        summary["calibration"]["grouping"] = f"grades of {seg.band_column}" if graded else "pd quantile groups"
    return out
