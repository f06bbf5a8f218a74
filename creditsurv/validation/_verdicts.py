"""Verdicts: every statistic of the validation pack read as ``pass``, ``watch`` or ``fail``.

Pure rules, numbers in and words out: the pack (``_pack.py``) gathers the numbers, the config
(``validation.thresholds``) gives the levels, and :func:`verdict_table` turns a pack's summary and tables into one
tidy table of verdicts with a sentence each. The default levels are common practice, not statistical law: a verdict
is a prompt to look, and the validator's judgement decides.

The rules, with the side of each threshold that is closed:

- **PSI** (stability of a model input, or of the 12-month PD): below ``psi_watch`` pass; *at or above*
  ``psi_watch`` (0.10) watch; *at or above* ``psi_fail`` (0.25) fail. The customary levels of credit scoring
  (common practice; no single published source). An input that moves with the calendar
  (:func:`moves_with_calendar`: a macro series, loan age) is not judged: its verdict is ``expected drift`` whatever
  its PSI, and it is left out of the stability area's verdict.
- **p-values** (the backtest of each cause and, for the arrears-state model, of each move; Hosmer-Lemeshow): above
  ``p_value_watch`` pass; *at or below* ``p_value_watch`` (0.05) watch; *at or below* ``p_value_fail`` (0.01)
  fail. The usual 5% and 1% test levels (common practice). A backtest's p-value is two-sided, from the normal, of
  the z under the one-factor model (``z_factor``: the loan-months of a calendar month share one economic factor,
  so a macro surprise of the month is not read as model failure); the z under independence is shown beside it.
- **AUC** (discrimination of the 12-month PD): *at or above* ``auc_watch`` pass; *below* ``auc_watch`` (0.70)
  watch; *below* ``auc_fail`` (0.60) fail; in Gini (2 AUC - 1) 0.40 and 0.20. 0.70 is where Hosmer, Lemeshow &
  Sturdivant (*Applied Logistic Regression*, 3rd ed., 2013, the section on the area under the ROC curve; cited
  from memory) start calling discrimination acceptable; 0.60 as the floor is common practice for retail PD models.
- **Share of ages outside** (model against Aalen-Johansen by vintage, cumulative incidence of each cause and, for
  the arrears-state model, each state's occupation): the share of (vintage, age) points where the model lies
  outside the 95% pointwise interval of the Aalen-Johansen estimate. Below ``ages_outside_watch`` pass; *at or
  above* ``ages_outside_watch`` (0.15) watch; *at or above* ``ages_outside_fail`` (0.30) fail. Our own rule, not
  common practice: a model that fits leaves about 5% of points outside, but the points of one vintage's curve are
  strongly dependent (a curve is a running sum), so the share scatters widely; three times the nominal 5% is
  watch and six times is fail. (On the simulated books of the tests the simulator's own hazard leaves 5% to 8%
  outside; a model fitted without the unemployment term before a downturn 16% to 20%, and one whose age effect
  runs on past the ages it was fitted on 34% to 40%.)

The verdict of an area (:data:`AREAS`) is the worst verdict of its items, ``expected drift`` left out (an area
whose every item is expected drift reads ``expected drift``).
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np
import pandas as pd
from scipy import stats

from ..errors import DataError

__all__ = [
    "AREAS", "EXPECTED_DRIFT", "FAIL", "PASS", "THRESHOLDS", "VERDICT_COLUMNS", "WATCH", "area_verdicts",
    "auc_verdict", "moves_with_calendar", "p_value_verdict", "psi_verdict", "rule_text",
    "share_outside_verdict", "two_sided_p_value", "verdict_table", "worst_verdict",
]  # fmt: skip

PASS, WATCH, FAIL = "pass", "watch", "fail"
EXPECTED_DRIFT = "expected drift"
"""The verdict of an input that moves with the calendar (:func:`moves_with_calendar`): not judged."""

_SEVERITY = {PASS: 0, WATCH: 1, FAIL: 2}

THRESHOLDS: dict[str, float] = {
    # PSI: customary in credit scoring (common practice)
    "psi_watch": 0.10,
    "psi_fail": 0.25,
    # p-values: the usual 5% and 1% test levels (common practice)
    "p_value_watch": 0.05,
    "p_value_fail": 0.01,
    # AUC: 0.70 acceptable discrimination (Hosmer, Lemeshow & Sturdivant 2013); 0.60 floor (common practice)
    "auc_watch": 0.70,
    "auc_fail": 0.60,
    # share of vintage-curve points outside the 95% interval: our own rule (see the module docstring)
    "ages_outside_watch": 0.15,
    "ages_outside_fail": 0.30,
}
"""The default levels of ``validation.thresholds``; the config's defaults are the same numbers."""

AREAS: dict[str, str] = {
    "discrimination": "Discrimination",
    "calibration": "Calibration",
    "backtest_default": "Backtest, default",
    "backtest_prepay": "Backtest, prepayment",
    "backtest_transitions": "Backtest, moves between arrears states",
    "stability": "Stability",
    "vintage_curves": "Vintage curves against Aalen-Johansen",
}
"""The areas of the pack that get an overall verdict, in the order they are shown, with their labels."""

VERDICT_COLUMNS = (
    "area", "item", "statistic", "value", "watch_threshold", "fail_threshold", "verdict", "sentence",
)  # fmt: skip
"""Columns of :func:`verdict_table`."""

STATISTIC_AUC = "AUC"
STATISTIC_HL = "Hosmer-Lemeshow p-value"
STATISTIC_BACKTEST = "p-value of the one-factor z"
STATISTIC_PSI = "PSI"
STATISTIC_OUTSIDE = "share of ages outside the 95% interval"


# --------------------------------------------------------------------------- the rules


def moves_with_calendar(name: str) -> bool:
    """Whether a model input changes between two windows by construction: a macro series (``macro:...``)
    or the loan's age (``age``, ``log_age``), which a book ageing from one window to the next shifts."""
    return name in ("age", "log_age") or name.startswith("macro:")


def _checked(value, what: str) -> float:
    v = float(value)
    if math.isnan(v):
        raise DataError(f"a verdict needs a number; the {what} is missing (NaN)")
    return v


def psi_verdict(value: float, variable: str | None = None, *, watch: float = 0.10, fail: float = 0.25) -> str:
    """Verdict of a PSI: below ``watch`` pass, at or above ``watch`` watch, at or above ``fail`` fail.

    Parameters
    ----------
    value : float
        The PSI.
    variable : str, optional
        The input's name: one that moves with the calendar (:func:`moves_with_calendar`) reads
        ``expected drift`` whatever its PSI.
    watch, fail : float, default 0.10 and 0.25
        The levels (common practice); ``watch <= fail``.
    """
    v = _checked(value, "PSI")
    if variable is not None and moves_with_calendar(variable):
        return EXPECTED_DRIFT
    return FAIL if v >= fail else WATCH if v >= watch else PASS


def p_value_verdict(p: float, *, watch: float = 0.05, fail: float = 0.01) -> str:
    """Verdict of a p-value: above ``watch`` pass, at or below ``watch`` watch, at or below ``fail`` fail.

    ``watch`` and ``fail`` default to the usual 5% and 1% levels (common practice); ``fail <= watch``.
    """
    v = _checked(p, "p-value")
    return FAIL if v <= fail else WATCH if v <= watch else PASS


def auc_verdict(auc: float, *, watch: float = 0.70, fail: float = 0.60) -> str:
    """Verdict of an AUC: at or above ``watch`` pass, below ``watch`` watch, below ``fail`` fail.

    ``watch`` and ``fail`` default to 0.70 and 0.60 (Gini 0.40 and 0.20; common practice); ``fail <= watch``.
    """
    v = _checked(auc, "AUC")
    return FAIL if v < fail else WATCH if v < watch else PASS


def share_outside_verdict(share: float, *, watch: float = 0.15, fail: float = 0.30) -> str:
    """Verdict of the share of vintage-curve points outside the 95% interval: below ``watch`` pass, at or above
    ``watch`` watch, at or above ``fail`` fail (our own rule; see the module docstring); ``watch <= fail``."""
    v = _checked(share, "share of ages outside")
    return FAIL if v >= fail else WATCH if v >= watch else PASS


def two_sided_p_value(z: float) -> float:
    """Two-sided p-value of a standard normal z: 2 (1 - Phi(|z|)); NaN stays NaN."""
    z = float(z)
    return float("nan") if math.isnan(z) else float(2.0 * stats.norm.sf(abs(z)))


def worst_verdict(verdicts) -> str:
    """The worst of ``verdicts`` (fail over watch over pass), ``expected drift`` left out; ``expected drift``
    when that is all there is.

    Raises
    ------
    DataError
        No verdict at all, or a word that is not a verdict.
    """
    words = list(verdicts)
    if not words:
        raise DataError("worst_verdict needs at least one verdict")
    unknown = sorted({w for w in words if w not in _SEVERITY and w != EXPECTED_DRIFT})
    if unknown:
        raise DataError(f"not verdicts: {unknown}; a verdict is one of {[*_SEVERITY, EXPECTED_DRIFT]}")
    judged = [w for w in words if w != EXPECTED_DRIFT]
    return max(judged, key=_SEVERITY.__getitem__) if judged else EXPECTED_DRIFT


def area_verdicts(table: pd.DataFrame) -> dict[str, str]:
    """The verdict of each area of a :func:`verdict_table`: the worst of its items (:func:`worst_verdict`).

    Areas follow the order of :data:`AREAS`; an area without items is absent.
    """
    order = {a: i for i, a in enumerate(AREAS)}
    areas = sorted(pd.unique(table["area"]), key=lambda a: (order.get(a, len(order)), a))
    return {a: worst_verdict(table.loc[table["area"] == a, "verdict"]) for a in areas}


def rule_text(statistic: str, watch: float, fail: float) -> str:
    """The rule of a statistic of :func:`verdict_table` in words, with the closed side of each threshold."""
    w, f = _level(watch), _level(fail)
    if statistic == STATISTIC_AUC:
        return f"AUC at or above {w} passes, below {w} is watch, below {f} fail"
    if statistic in (STATISTIC_HL, STATISTIC_BACKTEST):
        return f"a p-value above {w} passes, at or below {w} is watch, at or below {f} fail"
    if statistic == STATISTIC_PSI:
        return f"PSI below {w} passes, at or above {w} is watch, at or above {f} fail"
    if statistic == STATISTIC_OUTSIDE:
        return f"a share below {w} passes, at or above {w} is watch, at or above {f} fail"
    raise DataError(f"no verdict rule for the statistic {statistic!r}")


# --------------------------------------------------------------------------- the pack's verdicts


def _levels(thresholds) -> dict[str, float]:
    """The levels of ``thresholds`` (``None``: :data:`THRESHOLDS`; a mapping, or an object with those attributes
    such as the config's ``validation.thresholds``), missing ones at their defaults."""
    if thresholds is None:
        return dict(THRESHOLDS)
    if isinstance(thresholds, Mapping):
        unknown = sorted(set(thresholds) - set(THRESHOLDS))
        if unknown:
            raise DataError(f"unknown thresholds {unknown}; known: {list(THRESHOLDS)}")
        return {k: float(thresholds.get(k, d)) for k, d in THRESHOLDS.items()}
    return {k: float(getattr(thresholds, k, d)) for k, d in THRESHOLDS.items()}


def _level(x: float) -> str:
    return f"{x:.2f}" if round(x, 2) == x else f"{x:g}"


def _num(x, decimals: int = 4) -> str:
    return "n/a" if x is None or (isinstance(x, float) and math.isnan(x)) else f"{float(x):,.{decimals}f}"


def _p(p: float) -> str:
    return f"{p:.4f}" if p >= 1e-4 or p == 0 else f"{p:.1e}"


def _count(x) -> str:
    x = float(x)
    return f"{x:,.0f}" if x == round(x) else f"{x:,.1f}"


def _row(area, item, statistic, value, watch, fail, verdict, seen) -> dict:
    if verdict == EXPECTED_DRIFT:
        sentence = f"{seen}: {EXPECTED_DRIFT}, not judged (the input moves with the calendar)."
    else:
        sentence = f"{seen}: {verdict} ({rule_text(statistic, watch, fail)})."
    return {"area": area, "item": item, "statistic": statistic, "value": float(value), "watch_threshold": watch,
            "fail_threshold": fail, "verdict": verdict, "sentence": sentence}  # fmt: skip


def _backtest_p(actual, expected, z) -> float:
    """Two-sided p of ``z``; where the variance is 0 (every probability 0 or 1) the count is certain under the
    model: p 1 when it came true, 0 when it did not."""
    if z is None or math.isnan(float(z)):
        return 1.0 if math.isclose(float(actual), float(expected), abs_tol=1e-9) else 0.0
    return two_sided_p_value(z)


def _backtest_row(area, item, what, actual, expected, z, z_factor, t) -> dict:
    p = _backtest_p(actual, expected, z_factor)
    p_independent = _backtest_p(actual, expected, z)
    seen = (f"{what}: {_count(actual)} actual against {_count(expected)} expected, z {_num(z, 2)} "
            f"(p {_p(p_independent)} under independence), one-factor z {_num(z_factor, 2)}, p {_p(p)}")  # fmt: skip
    watch, fail = t["p_value_watch"], t["p_value_fail"]
    return _row(area, item, STATISTIC_BACKTEST, p, watch, fail, p_value_verdict(p, watch=watch, fail=fail), seen)


def _window(summary: dict) -> str:
    oot = summary.get("out_of_time") or {}
    return f"out of time, {oot['start']} to {oot['end']}" if oot else "out of time"


def verdict_table(summary: Mapping, tables: Mapping, thresholds=None) -> pd.DataFrame:
    """The verdict of every statistic of a validation pack, one row each, with a sentence saying what was seen.

    Parameters
    ----------
    summary : mapping
        The pack's summary (:class:`ValidationPack` ``summary``); read: ``discrimination`` (``auc``, ``gini``,
        ``ks``, ``n``, ``defaults``, ``auc_lo``, ``auc_hi``), ``calibration`` (``hl_p_value``, ``hl_statistic``,
        ``hl_df``, ``groups``, ``expected``, ``actual``, ``grouping``), ``backtest`` (per cause ``actual``,
        ``expected``, ``z_total``, ``z_total_factor``), ``incidence`` and ``states_by_vintage`` (per cause or
        state ``share_ages_outside``), ``out_of_time``, ``cohort_month``. Parts that are absent give no rows.
    tables : mapping of str to DataFrame
        The pack's tables; read: ``stability`` (``variable``, ``psi``) and ``backtest_transitions`` (``origin``,
        ``destination``, ``actual``, ``expected``, ``z``, ``z_factor``; the rows that stay are left out, their
        count being the state's months less the moves).
    thresholds : mapping or object, optional
        The levels (``validation.thresholds``); default :data:`THRESHOLDS`.

    Returns
    -------
    DataFrame
        Columns :data:`VERDICT_COLUMNS`: ``area`` (a key of :data:`AREAS`), ``item``, ``statistic``, ``value``,
        ``watch_threshold``, ``fail_threshold``, ``verdict`` (``pass``, ``watch``, ``fail`` or ``expected
        drift``) and ``sentence``, in the order of :data:`AREAS`. A statistic that is missing (NaN, e.g. a
        Hosmer-Lemeshow test with no degrees of freedom left) gets no row.
    """
    t = _levels(thresholds)
    rows = []
    disc = summary.get("discrimination")
    if disc and _present(disc.get("auc")):
        watch, fail = t["auc_watch"], t["auc_fail"]
        interval = (f" (95% interval {_num(disc['auc_lo'], 3)} to {_num(disc['auc_hi'], 3)})"
                    if _present(disc.get("auc_lo")) and _present(disc.get("auc_hi")) else "")  # fmt: skip
        seen = (f"Discrimination of the 12-month PD, loans alive at {summary.get('cohort_month', 'the cohort month')} "
                f"({_count(disc.get('n', 0))} loans, {_count(disc.get('defaults', 0))} defaults within 12 months): "
                f"AUC {_num(disc['auc'])}{interval}, Gini {_num(disc.get('gini'))}, KS {_num(disc.get('ks'))}")  # fmt: skip
        rows.append(_row("discrimination", "12-month PD", STATISTIC_AUC, disc["auc"], watch, fail,
                         auc_verdict(disc["auc"], watch=watch, fail=fail), seen))  # fmt: skip
    cal = summary.get("calibration")
    if cal and _present(cal.get("hl_p_value")):
        watch, fail = t["p_value_watch"], t["p_value_fail"]
        p = float(cal["hl_p_value"])
        seen = (f"Calibration of the 12-month PD over {cal.get('groups')} {cal.get('grouping', 'groups')}: "
                f"{_count(cal.get('actual', 0))} defaults against {_count(cal.get('expected', 0))} expected, "
                f"Hosmer-Lemeshow {_num(cal.get('hl_statistic'), 2)} on {cal.get('hl_df')} degrees of freedom, "
                f"p {_p(p)}")  # fmt: skip
        rows.append(_row("calibration", "12-month PD", STATISTIC_HL, p, watch, fail,
                         p_value_verdict(p, watch=watch, fail=fail), seen))  # fmt: skip
    backtest = summary.get("backtest") or {}
    for cause, label in (("default", "Default"), ("prepay", "Prepayment")):
        b = backtest.get(cause)
        if b:
            rows.append(_backtest_row(f"backtest_{cause}", "all loan-months", f"{label} backtest, {_window(summary)}",
                                      b["actual"], b["expected"], b.get("z_total"), b.get("z_total_factor"), t))  # fmt: skip
    moves = tables.get("backtest_transitions")
    if moves is not None and len(moves):
        for r in moves[moves["origin"] != moves["destination"]].itertuples(index=False):
            item = f"{r.origin} to {r.destination}"
            rows.append(_backtest_row("backtest_transitions", item, f"Move {item}, one month ahead, {_window(summary)}",
                                      r.actual, r.expected, r.z, r.z_factor, t))  # fmt: skip
    stab = tables.get("stability")
    if stab is not None and len(stab):
        watch, fail = t["psi_watch"], t["psi_fail"]
        for r in stab.itertuples(index=False):
            what = "the 12-month PD" if r.variable == "pd_12m" else str(r.variable)
            against = "the loans alive at the cohort month against the book now" if r.variable == "pd_12m" else \
                "the development window against the reporting month"
            seen = f"Stability of {what}: PSI {_num(r.psi)}, {against}"
            rows.append(_row("stability", str(r.variable), STATISTIC_PSI, r.psi, watch, fail,
                             psi_verdict(r.psi, str(r.variable), watch=watch, fail=fail), seen))  # fmt: skip
    watch, fail = t["ages_outside_watch"], t["ages_outside_fail"]
    names = {"default": "default", "prepay": "prepayment"}
    for key, kind in (("incidence", "cumulative incidence of"), ("states_by_vintage", "share of the vintage in")):
        part = summary.get(key) or {}
        for name, value in part.items():
            if not isinstance(value, Mapping) or not _present(value.get("share_ages_outside")):
                continue
            share = float(value["share_ages_outside"])
            item = f"{'incidence' if key == 'incidence' else 'state'} {name}"
            seen = (f"Model {kind} {names.get(name, name) if key == 'incidence' else name} by vintage against Aalen-Johansen ({part.get('vintages')} vintages): "
                    f"outside the 95% interval at {share:.1%} of ages")  # fmt: skip
            rows.append(_row("vintage_curves", item, STATISTIC_OUTSIDE, share, watch, fail,
                             share_outside_verdict(share, watch=watch, fail=fail), seen))  # fmt: skip
    table = pd.DataFrame(rows, columns=list(VERDICT_COLUMNS))
    order = {a: i for i, a in enumerate(AREAS)}
    table["_order"] = table["area"].map(order)
    return table.sort_values("_order", kind="stable").drop(columns="_order").reset_index(drop=True)


def _present(x) -> bool:
    return x is not None and not (isinstance(x, (float, np.floating)) and math.isnan(float(x)))
