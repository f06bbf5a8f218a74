"""Synthetic mortgage book with a known true hazard.

The book belongs to Quillfield Home Loans, a fictional lender. Loans are drawn
with realistic borrower and collateral facts, then each month a live loan
defaults, prepays or continues according to a multinomial-logit hazard whose
coefficients are written out in ``true_parameters.json``. Because the truth is
known, the fitted model, the projections and the expected credit loss can be
checked against it.

Layout of a written book (see :func:`write_demo_book`)::

    loans.parquet            one row per loan
    panel.parquet            one row per loan per month on book
    macro_history.csv        monthly macro series up to the cutoff
    scenarios/baseline.csv   60 months after the cutoff, same columns
    scenarios/upside.csv
    scenarios/downside.csv
    scenarios/weights.csv    scenario,weight,file (file relative to scenarios/)
    true_parameters.json     everything needed to recompute the true hazard

Mechanics of one loan (age t = months since the origination month):

- the hazards of month t use covariates known at the start of month t (the
  macro values of month t-1, the previous month-end);
- no default before age ``DEFAULT_MIN_AGE`` (3; the ``default_min_age``
  argument) and no prepayment in the month the loan reaches its term;
- a default at age t is 90 days past due at t, preceded by 30 and 60 days past
  due at t-2 and t-1; the loan then stays in workout for W months (W uniform
  on 1..12) and its last row is ``charged_off`` with balance 0;
- a prepayment or maturity closes the loan with balance 0;
- short delinquencies that cure are added as noise; they do not change the
  hazards and never touch the months just before a default.
"""

from __future__ import annotations

import dataclasses
import json
import os
from collections.abc import Callable, Iterator, Mapping
from pathlib import Path
from typing import NamedTuple

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..errors import SimulationError
from ..months import format_month, parse_month

__all__ = [
    "BookChunk",
    "LogitHazard",
    "PSAHazard",
    "SimulatedBook",
    "TRUE_COEFFICIENTS",
    "book_truth",
    "loan_table",
    "make_macro",
    "month_dates",
    "psa_hazard",
    "risk_covariates",
    "scheduled_balance",
    "simulate_book",
    "simulate_small_book",
    "true_hazard",
    "write_demo_book",
]

LENDER = "Quillfield Home Loans (fictional)"
CAUSES = ("default", "prepay")
COVARIATES = (
    "log_age",
    "age",
    "credit_score",
    "current_ltv",
    "dti",
    "rate_incentive",
    "unemployment_rate",
)
TRUE_COEFFICIENTS = {
    "default": {
        "intercept": -4.5,
        "log_age": 1.2,
        "age": -0.03,
        "credit_score": -0.012,
        "current_ltv": 2.5,
        "dti": 2.0,
        "rate_incentive": 0.05,
        "unemployment_rate": 0.18,
    },
    "prepay": {
        "intercept": -7.4,
        "log_age": 0.8,
        "age": -0.01,
        "credit_score": 0.002,
        "current_ltv": -1.0,
        "dti": -0.5,
        "rate_incentive": 0.5,
        "unemployment_rate": -0.05,
    },
}
COVARIATE_FORMULAS = {
    "age": "loan age t in months: month index minus origination month index (age 1 = month after origination)",
    "log_age": "natural log of age",
    "credit_score": "credit_score from loans.parquet (static)",
    "current_ltv": (
        "scheduled balance after t-1 level payments (original_balance at t=1) divided by "
        "property_value * hpi_<region>(month t-1, the previous month-end) / hpi_<region>(origination month), "
        "HPI from macro_history.csv"
    ),
    "dti": "dti from loans.parquet (static, decimal)",
    "rate_incentive": "note_rate - mortgage_rate(month t-1), percentage points, mortgage_rate from macro_history.csv",
    "unemployment_rate": "unemployment_rate(month t-1) from macro_history.csv, percent",
}
SCHEDULED_BALANCE_FORMULA = (
    "B(k) = P * ((1+r)^n - (1+r)^k) / ((1+r)^n - 1), P = original_balance, "
    "r = note_rate/1200, n = term_months, k = payments made"
)

DEFAULT_MIN_AGE = 3
WORKOUT_MONTHS = (1, 12)
NOISE_START_PROB = 0.004
NOISE_SECOND_MONTH_PROB = 0.15

REGIONS = ("North", "South", "East", "West", "Central")
REGION_SHARES = (0.20, 0.25, 0.20, 0.20, 0.15)
REGION_PRICE = (250_000.0, 320_000.0, 380_000.0, 450_000.0, 280_000.0)
CHANNELS = ("retail", "broker")
BROKER_SHARE = 0.35
TERMS = (360, 300, 240, 180, 120, 60)
TERM_SHARES = (0.55, 0.10, 0.10, 0.14, 0.06, 0.05)
STATUSES = ("current", "delinquent", "default", "charged_off", "paid_off", "matured")

MACRO_START = "2015-01"
SCENARIO_MONTHS = 60
SCENARIO_WEIGHTS = {"baseline": 0.5, "upside": 0.2, "downside": 0.3}
HPI_COLUMNS = tuple(f"hpi_{r.lower()}" for r in REGIONS)
MACRO_COLUMNS = ("month", "unemployment_rate", "mortgage_rate", *HPI_COLUMNS)
OUTPUT_FILES = (
    "loans.parquet",
    "panel.parquet",
    "macro_history.csv",
    "scenarios/baseline.csv",
    "scenarios/upside.csv",
    "scenarios/downside.csv",
    "scenarios/weights.csv",
    "true_parameters.json",
)

LOANS_SCHEMA = pa.schema(
    [
        ("loan_id", pa.string()),
        ("origination_month", pa.date32()),
        ("original_balance", pa.float64()),
        ("note_rate", pa.float64()),
        ("term_months", pa.int32()),
        ("property_value", pa.float64()),
        ("orig_ltv", pa.float64()),
        ("region", pa.string()),
        ("credit_score", pa.int32()),
        ("dti", pa.float64()),
        ("channel", pa.string()),
    ]
)
PANEL_SCHEMA = pa.schema(
    [
        ("loan_id", pa.string()),
        ("month", pa.date32()),
        ("age", pa.int32()),
        ("balance", pa.float64()),
        ("days_past_due", pa.int32()),
        ("status", pa.string()),
    ]
)


# --------------------------------------------------------------------------- hazards


@dataclasses.dataclass(frozen=True)
class LogitHazard:
    """Multinomial-logit monthly hazard of default and prepayment.

    ``eta_k = intercept_k + sum_j coef_kj * x_j`` and
    ``h_k = exp(eta_k) / (1 + exp(eta_default) + exp(eta_prepay))``.

    Parameters
    ----------
    coefficients : mapping
        ``{"default": {term: value}, "prepay": {term: value}}`` with the terms
        ``intercept`` and every name in ``COVARIATES``, in raw covariate units.
    """

    coefficients: Mapping[str, Mapping[str, float]]

    def __call__(self, covariates: Mapping[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
        exp_eta = []
        for cause in CAUSES:
            coef = self.coefficients[cause]
            eta = np.full(np.shape(covariates["age"]), coef["intercept"], dtype=float)
            for name in COVARIATES:
                eta += coef[name] * np.asarray(covariates[name], dtype=float)
            exp_eta.append(np.exp(eta))
        denominator = 1.0 + exp_eta[0] + exp_eta[1]
        return exp_eta[0] / denominator, exp_eta[1] / denominator

    def describe(self) -> dict:
        """Return the hazard as plain data for ``true_parameters.json``."""
        return {
            "kind": "multinomial_logit",
            "causes": list(CAUSES),
            "terms": ["intercept", *COVARIATES],
            "coefficients": {c: dict(self.coefficients[c]) for c in CAUSES},
            "formula": (
                "eta_k = intercept_k + sum_j coef_kj * x_j; "
                "h_k = exp(eta_k) / (1 + exp(eta_default) + exp(eta_prepay))"
            ),
            "covariates": dict(COVARIATE_FORMULAS),
        }


@dataclasses.dataclass(frozen=True)
class PSAHazard:
    """Prepayment only, at a multiple of the PSA benchmark by loan age.

    PSA 100% is a CPR of 0.2% at age 1 rising by 0.2% a month to 6% at age 30
    and flat after; ``SMM = 1 - (1 - CPR) ** (1/12)``. The default hazard is 0.

    Parameters
    ----------
    multiple : float
        PSA speed as a multiple, 1.5 for 150% PSA.
    """

    multiple: float

    def __post_init__(self):
        if not (self.multiple > 0 and 0.06 * self.multiple < 1):
            raise SimulationError(
                f"PSA multiple must be positive and below {1 / 0.06:.2f} (CPR under 100%), "
                f"got {self.multiple!r}"
            )

    def __call__(self, covariates: Mapping[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
        age = np.asarray(covariates["age"], dtype=float)
        cpr = self.multiple * 0.002 * np.minimum(age, 30.0)
        smm = 1.0 - (1.0 - cpr) ** (1.0 / 12.0)
        return np.zeros_like(smm), smm

    def describe(self) -> dict:
        return {
            "kind": "psa",
            "multiple": self.multiple,
            "formula": "CPR = multiple * 0.002 * min(age, 30); SMM = 1 - (1 - CPR)^(1/12); default 0",
        }


true_hazard = LogitHazard(TRUE_COEFFICIENTS)
"""The hazard of the demo book."""


def psa_hazard(multiple: float) -> PSAHazard:
    """Return a prepayment-only hazard at ``multiple`` times PSA (1.5 = 150% PSA)."""
    return PSAHazard(float(multiple))


def _describe_hazard(hazard) -> dict:
    if hasattr(hazard, "describe"):
        return hazard.describe()
    return {"kind": "custom", "name": getattr(hazard, "__qualname__", type(hazard).__qualname__)}


# --------------------------------------------------------------------------- macro


def _round4(values: np.ndarray) -> np.ndarray:
    # Round through text so the values equal what the CSV files read back.
    return np.array([float(f"{v:.4f}") for v in np.asarray(values, dtype=float)])


def _path(months: np.ndarray, anchors: dict[str, float]) -> np.ndarray:
    x = [parse_month(m) for m in anchors]
    return np.interp(months, x, list(anchors.values()))


_UNEMPLOYMENT = {
    "2015-01": 5.6, "2016-06": 5.0, "2018-01": 4.6, "2019-12": 4.5, "2020-03": 4.7,
    "2020-05": 9.0, "2020-09": 8.2, "2021-03": 6.6, "2021-09": 5.3, "2022-03": 4.5,
    "2022-12": 4.0, "2024-12": 4.3,
}  # fmt: skip
_MORTGAGE_RATE = {
    "2015-01": 4.0, "2015-12": 4.0, "2016-08": 3.5, "2018-11": 4.9, "2019-09": 3.7,
    "2020-06": 3.2, "2021-01": 2.9, "2021-09": 3.0, "2022-01": 3.4, "2022-06": 5.4,
    "2022-11": 6.6, "2023-10": 6.9, "2024-01": 6.5, "2024-09": 6.1, "2024-12": 6.5,
}  # fmt: skip
_HPI_GROWTH = {"2015-01": 0.0040, "2021-06": 0.0090, "2022-07": 0.0010, "2024-12": 0.0030}
_HPI_DIP_SHAPE = {"2020-02": 0.0, "2020-12": -1.0, "2022-06": 0.0}
_HPI_DIP_DEPTH = (0.06, 0.12, 0.09, 0.16, 0.05)
_HPI_TREND_SHIFT = (-0.0005, 0.0003, 0.0, 0.0006, -0.0008)
_DOWNSIDE_HPI_DEPTH = (0.8, 1.1, 1.0, 1.3, 0.8)


def make_macro(seed: int, *, cutoff: str = "2024-12"):
    """Return macro history, forward scenarios and scenario weights.

    The history runs from 2015-01 to ``cutoff`` with a downturn around 2020
    (unemployment up to about 9%, regional house-price dips of different
    depth) and a rate cycle (rates near 3% in 2021, near 6.5-7% in 2022-23).
    Values are rounded to 4 decimals, as written to CSV.

    Parameters
    ----------
    seed : int
        Seed; the macro noise uses the stream ``default_rng([seed, 999_999])``.
    cutoff : str, default "2024-12"
        Last month of history, ``YYYY-MM``.

    Returns
    -------
    history : pandas.DataFrame
        Columns ``month`` (``YYYY-MM`` text), ``unemployment_rate`` (percent),
        ``mortgage_rate`` (percent), ``hpi_north`` ... ``hpi_central``
        (index, 100 at the first month).
    scenarios : dict of str to pandas.DataFrame
        ``baseline``, ``upside``, ``downside``: same columns, the 60 months
        after ``cutoff``.
    weights : dict of str to float
        Scenario weights, summing to 1.
    """
    rng = np.random.default_rng([seed, 999_999])
    start, end = parse_month(MACRO_START), parse_month(cutoff)
    months = np.arange(start, end + 1)
    n = len(months)
    history = {"month": [format_month(m) for m in months]}
    history["unemployment_rate"] = _path(months, _UNEMPLOYMENT) + rng.normal(0, 0.05, n)
    history["mortgage_rate"] = _path(months, _MORTGAGE_RATE) + rng.normal(0, 0.04, n)
    growth = _path(months, _HPI_GROWTH)
    dip = _path(months, _HPI_DIP_SHAPE)
    for col, depth, shift in zip(HPI_COLUMNS, _HPI_DIP_DEPTH, _HPI_TREND_SHIFT):
        log_hpi = np.cumsum(growth + shift + rng.normal(0, 0.0015, n)) + depth * dip
        history[col] = 100.0 * np.exp(log_hpi - log_hpi[0])
    history = pd.DataFrame(history)

    last = history.iloc[-1]
    horizon = np.arange(1, SCENARIO_MONTHS + 1)
    future = [format_month(end + h) for h in horizon]
    u0, r0 = last["unemployment_rate"], last["mortgage_rate"]
    paths = {
        "baseline": (
            np.interp(horizon, [0, 24, 60], [u0, 4.6, 4.6]),
            np.interp(horizon, [0, 12, 36, 60], [r0, 6.0, 5.5, 5.5]),
            lambda depth: 0.0025 * horizon,
        ),
        "upside": (
            np.interp(horizon, [0, 18, 60], [u0, 3.6, 3.8]),
            np.interp(horizon, [0, 12, 36, 60], [r0, 5.6, 5.0, 5.0]),
            lambda depth: 0.0045 * horizon,
        ),
        "downside": (
            np.interp(horizon, [0, 12, 24, 60], [u0, 8.5, 7.5, 5.5]),
            np.interp(horizon, [0, 9, 36, 60], [r0, 7.8, 7.0, 6.5]),
            lambda depth: np.interp(
                horizon, [0, 18, 60], [0.0, np.log(0.88) * depth, np.log(0.88) * depth + 0.004 * 42]
            ),
        ),
    }
    scenarios = {}
    for name, (unemployment, rate, hpi_change) in paths.items():
        frame = {"month": future, "unemployment_rate": unemployment, "mortgage_rate": rate}
        for col, depth in zip(HPI_COLUMNS, _DOWNSIDE_HPI_DEPTH):
            frame[col] = last[col] * np.exp(hpi_change(depth))
        scenarios[name] = pd.DataFrame(frame)

    for frame in (history, *scenarios.values()):
        for col in MACRO_COLUMNS[1:]:
            frame[col] = _round4(frame[col].to_numpy())
    return history, scenarios, dict(SCENARIO_WEIGHTS)


# --------------------------------------------------------------------------- loans


def scheduled_balance(principal, note_rate, term, payments):
    """Level-payment scheduled balance after ``payments`` monthly payments.

    ``B(k) = P ((1+r)^n - (1+r)^k) / ((1+r)^n - 1)`` with ``r = note_rate/1200``;
    ``B(0) = P`` and ``B(n) = 0``. Arrays broadcast; ``payments`` is clipped to
    ``0..term``.
    """
    growth = 1.0 + np.asarray(note_rate, dtype=float) / 1200.0
    k = np.clip(payments, 0, term)
    full = growth ** np.asarray(term, dtype=float)
    return principal * (full - growth ** np.asarray(k, dtype=float)) / (full - 1.0)


class _Macro(NamedTuple):
    start: int  # month index of row 0
    unemployment: np.ndarray
    mortgage_rate: np.ndarray
    hpi: np.ndarray  # (region, month)

    @classmethod
    def from_frame(cls, history: pd.DataFrame) -> _Macro:
        return cls(
            parse_month(history["month"].iloc[0]),
            history["unemployment_rate"].to_numpy(float),
            history["mortgage_rate"].to_numpy(float),
            history[list(HPI_COLUMNS)].to_numpy(float).T,
        )


class BookChunk(NamedTuple):
    """One chunk of a simulated book: ``loans`` and ``panel`` as Arrow tables."""

    index: int
    loans: pa.Table
    panel: pa.Table


def month_dates(months: np.ndarray) -> pa.Array:
    """Month indices as Arrow dates (the first of each month): the panel's and loan table's month columns."""
    days = (np.asarray(months) - 1970 * 12).astype("datetime64[M]").astype("datetime64[D]")
    return pa.array(days.astype(np.int32), type=pa.date32())


def _draw_loans(rng, n, orig_months, volume, macro: _Macro) -> dict[str, np.ndarray]:
    orig = rng.choice(orig_months, size=n, p=volume)
    region = rng.choice(len(REGIONS), size=n, p=REGION_SHARES)
    broker = rng.random(n) < BROKER_SHARE
    term = rng.choice(TERMS, size=n, p=TERM_SHARES)
    score = np.clip(np.rint(rng.normal(740, 45, n)), 580, 820).astype(np.int32)
    dti = np.round(0.10 + 0.40 * rng.beta(2.5, 3.5, n), 4)
    ltv = 0.505 + 0.465 * rng.beta(3.0, 1.6, n)
    price_level = macro.hpi[region, orig - macro.start] / 100.0
    value = np.round(np.take(REGION_PRICE, region) * price_level * rng.lognormal(0, 0.3, n), -3)
    balance = np.floor(value * ltv / 100) * 100  # whole hundreds, LTV kept in 0.50..0.97
    # Note rate: market rate plus a spread that falls with credit score.
    spread = 0.3 + 0.005 * (740 - score) + 0.2 * broker - 0.3 * (term <= 180) + rng.normal(0, 0.15, n)
    note_rate = np.maximum(np.rint(8 * (macro.mortgage_rate[orig - macro.start] + spread)) / 8, 1.5)
    return {
        "orig": orig,
        "region": region,
        "broker": broker,
        "term": term.astype(np.int32),
        "credit_score": score,
        "dti": dti,
        "property_value": value,
        "original_balance": balance,
        "note_rate": note_rate,
    }


def _simulate_chunk(
    k: int, first_number: int, n: int, *, seed, cutoff, orig_months, volume, macro: _Macro, hazard, default_min_age
) -> BookChunk:
    """Simulate loans ``first_number .. first_number + n - 1`` with stream ``[seed, k]``.

    The random draws come in a fixed order (loans, events, workout lengths,
    delinquency noise), so a seed and chunk size give the same book.
    """
    rng = np.random.default_rng([seed, k])
    loan = _draw_loans(rng, n, orig_months, volume, macro)
    risk = _RiskRows.of(loan, cutoff)
    if hasattr(hazard, "chunk"):  # a model of arrears behaviour walks the loans through its states itself
        return hazard.chunk(k, first_number, rng, loan, risk, macro)
    h_default, h_prepay = _checked_hazards(hazard, risk_covariates(loan, risk, macro), risk.total)
    h_default = np.where(risk.age < default_min_age, 0.0, h_default)
    h_prepay = np.where(risk.age == loan["term"][risk.row_loan], 0.0, h_prepay)
    kind, t_event = _first_events(rng, h_default, h_prepay, loan, risk)
    workout = rng.integers(WORKOUT_MONTHS[0], WORKOUT_MONTHS[1] + 1, size=n)
    noise_dpd = _noise_delinquency(rng, kind, t_event, risk)
    return _chunk_tables(k, first_number, loan, risk, kind, t_event, workout, noise_dpd)


@dataclasses.dataclass(frozen=True)
class _RiskRows:
    """Every loan-month a chunk's loans could be at risk (to term or the cutoff), loan by loan."""

    cutoff_age: np.ndarray  # per loan: age at the cutoff
    a_max: np.ndarray  # per loan: months at risk if no event
    starts: np.ndarray  # per loan: first row
    row_loan: np.ndarray  # per row: loan position
    age: np.ndarray  # per row: age 1, 2, ...

    @property
    def total(self) -> int:
        return len(self.row_loan)

    @classmethod
    def of(cls, loan: dict, cutoff: int) -> _RiskRows:
        cutoff_age = cutoff - loan["orig"]
        a_max = np.minimum(loan["term"], cutoff_age)
        starts = np.concatenate([[0], np.cumsum(a_max)[:-1]])
        total = int(a_max.sum())
        row_loan = np.repeat(np.arange(len(a_max)), a_max)
        age = np.arange(total) - starts[row_loan] + 1
        return cls(cutoff_age, a_max, starts, row_loan, age)


def risk_covariates(loan: dict, risk, macro) -> dict[str, np.ndarray]:
    """The covariates of every loan-month at risk, as the hazard receives them (see :func:`simulate_book`)."""
    orig, term, row_loan, age = loan["orig"], loan["term"], risk.row_loan, risk.age
    # covariates of month t describe its start: the macro values of the previous month-end (month t-1, at
    # the earliest the origination month itself)
    month_pos = orig[row_loan] + age - 1 - macro.start
    region = loan["region"][row_loan]
    house_growth = macro.hpi[region, month_pos] / macro.hpi[region, orig[row_loan] - macro.start]
    prev_balance = scheduled_balance(
        loan["original_balance"][row_loan], loan["note_rate"][row_loan], term[row_loan], age - 1
    )
    return {
        "age": age.astype(float),
        "log_age": np.log(age),
        "credit_score": loan["credit_score"][row_loan].astype(float),
        "current_ltv": prev_balance / (loan["property_value"][row_loan] * house_growth),
        "dti": loan["dti"][row_loan],
        "rate_incentive": loan["note_rate"][row_loan] - macro.mortgage_rate[month_pos],
        "unemployment_rate": macro.unemployment[month_pos],
        "term_months": term[row_loan].astype(float),
    }


def _checked_hazards(hazard, covariates, total: int) -> tuple[np.ndarray, np.ndarray]:
    h_default, h_prepay = (np.asarray(h, dtype=float) for h in hazard(covariates))
    if (
        h_default.shape != (total,)
        or h_prepay.shape != (total,)
        or not np.all(np.isfinite(h_default) & np.isfinite(h_prepay))
        or np.any(h_default < 0)
        or np.any(h_prepay < 0)
        or np.any(h_default + h_prepay > 1)
    ):
        raise SimulationError(
            "hazard must return two arrays of monthly probabilities, one per loan-month, "
            "each >= 0 and summing to at most 1"
        )
    return h_default, h_prepay


def _first_events(rng, h_default, h_prepay, loan: dict, risk: _RiskRows) -> tuple[np.ndarray, np.ndarray]:
    """One draw per loan-month; per loan the first event and its age.

    ``kind`` is 0 censored, 1 default, 2 prepay, 3 matured; a censored loan's
    ``t_event`` is its age at the cutoff.
    """
    total, age, term_row = risk.total, risk.age, loan["term"][risk.row_loan]
    draw = rng.random(total)
    is_default = draw < h_default
    is_prepay = ~is_default & (draw < h_default + h_prepay)
    is_matured = ~is_default & (age == term_row)
    event_row = np.where(is_default | is_prepay | is_matured, np.arange(total), total)
    first = np.minimum.reduceat(event_row, risk.starts)
    has_event = first < total
    first = np.minimum(first, total - 1)
    kind = np.select(
        [~has_event, is_default[first], is_prepay[first]], [0, 1, 2], default=3
    ).astype(np.int8)
    t_event = np.where(has_event, age[first], risk.cutoff_age)
    return kind, t_event


def _noise_delinquency(rng, kind, t_event, risk: _RiskRows) -> np.ndarray:
    """Days past due of short delinquencies that cure, per loan-month at risk.

    They start at a current month, last 1 or 2 months, end before the loan
    closes and at least 3 months before a default, with a cured month between
    two episodes.
    """
    total, row_loan, age = risk.total, risk.row_loan, risk.age
    noise_start = rng.random(total) < NOISE_START_PROB
    two_months = rng.random(total) < NOISE_SECOND_MONTH_PROB
    limit = np.select([kind == 0, kind == 1], [risk.cutoff_age, t_event - 4], default=t_event - 1)
    valid = noise_start & (age + two_months <= limit[row_loan])
    earlier = np.zeros(total, dtype=bool)
    for lag in (1, 2):  # keep a cured month between two episodes
        earlier[lag:] |= valid[:-lag] & (row_loan[lag:] == row_loan[:-lag])
    valid &= ~earlier
    noise_dpd = np.zeros(total, dtype=np.int32)
    noise_dpd[valid] = 30
    noise_dpd[np.flatnonzero(valid & two_months) + 1] = 60
    return noise_dpd


def _chunk_tables(k, first_number, loan: dict, risk: _RiskRows, kind, t_event, workout, noise_dpd) -> BookChunk:
    """The loan table and the panel rows (to the event, then the default workout, cut at the cutoff)."""
    n, term, total = len(kind), loan["term"], risk.total
    n_rows = np.where(kind == 1, np.minimum(t_event + workout, risk.cutoff_age), t_event)
    out_loan = np.repeat(np.arange(n), n_rows)
    out_starts = np.concatenate([[0], np.cumsum(n_rows)[:-1]])
    out_age = np.arange(len(out_loan)) - out_starts[out_loan] + 1
    in_risk_rows = out_age <= risk.a_max[out_loan]
    noise = np.where(in_risk_rows, noise_dpd[np.minimum(risk.starts[out_loan] + out_age - 1, total - 1)], 0)
    te, kd = t_event[out_loan], kind[out_loan]
    default_path = (kd == 1) & (out_age >= te - 2)
    dpd = np.where(default_path, 30 * (out_age - te + 3), noise).astype(np.int32)
    status = np.select(
        [
            (kd == 1) & (out_age == te + workout[out_loan]),
            (kd == 2) & (out_age == te),
            (kd == 3) & (out_age == te),
            (kd == 1) & (out_age >= te),
            dpd > 0,
        ],
        [3, 4, 5, 2, 1],
        default=0,
    )
    closed = status >= 3
    # A delinquent or defaulted loan's balance stays at its last paid scheduled balance.
    balance = scheduled_balance(
        loan["original_balance"][out_loan],
        loan["note_rate"][out_loan],
        term[out_loan],
        out_age - dpd // 30,
    )
    balance = np.where(closed, 0.0, np.round(balance, 2))

    loans, loan_ids = loan_table(first_number, loan)
    panel = pa.table(
        {
            "loan_id": loan_ids.take(pa.array(out_loan)),
            "month": month_dates(loan["orig"][out_loan] + out_age),
            "age": out_age.astype(np.int32),
            "balance": balance,
            "days_past_due": dpd,
            "status": pa.array(STATUSES).take(pa.array(status.astype(np.int8))),
        },
        schema=PANEL_SCHEMA,
    )
    return BookChunk(k, loans, panel)


def loan_table(first_number: int, loan: dict) -> tuple[pa.Table, pa.Array]:
    """The chunk's loan table and its loan ids (``QL0000001`` ...)."""
    term = loan["term"]
    numbers = np.arange(first_number, first_number + len(term))
    loan_ids = pa.array(np.char.add("QL", np.char.zfill(numbers.astype(str), 7)), type=pa.string())
    loans = pa.table(
        {
            "loan_id": loan_ids,
            "origination_month": month_dates(loan["orig"]),
            "original_balance": loan["original_balance"],
            "note_rate": loan["note_rate"],
            "term_months": term,
            "property_value": loan["property_value"],
            "orig_ltv": loan["original_balance"] / loan["property_value"],
            "region": pa.array(REGIONS).take(pa.array(loan["region"])),
            "credit_score": loan["credit_score"],
            "dti": loan["dti"],
            "channel": pa.array(CHANNELS).take(pa.array(loan["broker"].astype(np.int8))),
        },
        schema=LOANS_SCHEMA,
    )
    return loans, loan_ids


# --------------------------------------------------------------------------- books


def _origination_volume(orig_months: np.ndarray, macro: _Macro) -> np.ndarray:
    # More loans when rates are low, a spring peak, slow growth of the lender.
    rate = macro.mortgage_rate[orig_months - macro.start]
    season = 1.0 + 0.2 * np.sin(2 * np.pi * ((orig_months % 12) - 2) / 12)
    weight = np.exp(-0.35 * (rate - 4.0)) * season * (1.0 + 0.004 * (orig_months - orig_months[0]))
    return weight / weight.sum()


def simulate_book(
    n_loans: int,
    seed: int,
    *,
    cutoff: str = "2024-12",
    first_origination: str = "2016-01",
    last_origination: str = "2024-09",
    hazard: Callable | None = None,
    chunk_size: int = 25_000,
    default_min_age: int = DEFAULT_MIN_AGE,
) -> Iterator[BookChunk]:
    """Simulate a book chunk by chunk.

    Parameters
    ----------
    n_loans : int
        Number of loans, 1 to 9,999,999 (ids ``QL0000001`` ...).
    seed : int
        Seed. Chunk ``k`` uses ``default_rng([seed, k])``; the same seed and
        chunk size give the same book.
    cutoff : str, default "2024-12"
        Last observed month; loans alive then are censored.
    first_origination, last_origination : str
        Range of origination months, ``YYYY-MM``, from 2015-02 and before ``cutoff``.
    hazard : callable, optional
        ``hazard(covariates) -> (h_default, h_prepay)``, monthly probabilities
        per loan-month. ``covariates`` maps ``age``, ``log_age``,
        ``credit_score``, ``current_ltv``, ``dti``, ``rate_incentive``,
        ``unemployment_rate`` and ``term_months`` to float arrays. The
        simulator then sets the default hazard to 0 below ``default_min_age``
        and the prepayment hazard to 0 at the term. Default :data:`true_hazard`.
        A hazard that returns zeros for prepayment gives a single-cause book.
    chunk_size : int, default 25_000
        Loans per chunk; memory is bounded by one chunk.
    default_min_age : int, default :data:`DEFAULT_MIN_AGE` (3)
        First age at which a loan can default. At 1, a default in the first
        month is 90 days past due at once (its delinquent months fall before
        origination); tests of the age baseline use it to have defaults at
        every age.

    Returns
    -------
    iterator of BookChunk
        ``loans`` and ``panel`` Arrow tables per chunk, in ``loan_id`` order.
    """
    settings = _check_book_args(n_loans, seed, cutoff, first_origination, last_origination, chunk_size, default_min_age)
    history, _, _ = make_macro(seed, cutoff=cutoff)
    macro = _Macro.from_frame(history)
    orig_months = np.arange(settings["first"], settings["last"] + 1)
    volume = _origination_volume(orig_months, macro)
    hazard = true_hazard if hazard is None else hazard

    def chunks():
        for k, first_number in enumerate(range(1, n_loans + 1, chunk_size)):
            yield _simulate_chunk(
                k,
                first_number,
                min(chunk_size, n_loans + 1 - first_number),
                seed=seed,
                cutoff=settings["cutoff"],
                orig_months=orig_months,
                volume=volume,
                macro=macro,
                hazard=hazard,
                default_min_age=int(default_min_age),
            )

    return chunks()


def _check_book_args(n_loans, seed, cutoff, first_origination, last_origination, chunk_size, default_min_age) -> dict:
    problems = []
    if not isinstance(default_min_age, (int, np.integer)) or default_min_age < 1:
        problems.append(f"default_min_age must be a positive integer, got {default_min_age!r}")
    if not isinstance(n_loans, (int, np.integer)) or not 1 <= n_loans <= 9_999_999:
        problems.append(f"n_loans must be an integer from 1 to 9,999,999, got {n_loans!r}")
    if not isinstance(seed, (int, np.integer)) or seed < 0:
        problems.append(f"seed must be a non-negative integer, got {seed!r}")
    if not isinstance(chunk_size, (int, np.integer)) or chunk_size < 1:
        problems.append(f"chunk_size must be a positive integer, got {chunk_size!r}")
    months = {}
    for name, value in [("cutoff", cutoff), ("first_origination", first_origination),
                        ("last_origination", last_origination)]:  # fmt: skip
        try:
            months[name] = parse_month(value)
        except ValueError as exc:
            problems.append(f"{name}: {exc}")
    if len(months) == 3:
        if months["first_origination"] <= parse_month(MACRO_START):
            problems.append(f"first_origination must be after {MACRO_START} (start of macro history)")
        if not months["first_origination"] <= months["last_origination"] < months["cutoff"]:
            problems.append("need first_origination <= last_origination < cutoff")
    if problems:
        raise SimulationError("; ".join(problems))
    return {
        "cutoff": months["cutoff"],
        "first": months["first_origination"],
        "last": months["last_origination"],
    }


def book_truth(
    n_loans, seed, *, cutoff="2024-12", first_origination="2016-01", last_origination="2024-09",
    hazard=None, chunk_size=25_000, default_min_age=DEFAULT_MIN_AGE,
) -> dict:  # fmt: skip
    """Return the record written to ``true_parameters.json``."""
    return {
        "lender": LENDER,
        "book": {
            "seed": int(seed),
            "n_loans": int(n_loans),
            "chunk_size": int(chunk_size),
            "cutoff": format_month(parse_month(cutoff)),
            "first_origination": format_month(parse_month(first_origination)),
            "last_origination": format_month(parse_month(last_origination)),
            "random_streams": "loans of chunk k: numpy default_rng([seed, k]); macro: default_rng([seed, 999999])",
        },
        "hazard": _describe_hazard(true_hazard if hazard is None else hazard),
        "scheduled_balance": SCHEDULED_BALANCE_FORMULA,
        "mechanics": {
            "default_min_age": int(default_min_age),
            "prepay_at_maturity": False,
            "hazard_timing": "covariates of month t are known at the start of month t; one draw per live loan-month",
            "default_definition": "90 days past due; 30 at t-2 and 60 at t-1 (status delinquent), 90 at t (status default)",
            "workout_months": {"min": WORKOUT_MONTHS[0], "max": WORKOUT_MONTHS[1], "distribution": "uniform integer"},
            "workout": "days_past_due +30 a month, status default; last row charged_off, balance 0; cut at cutoff",
            "delinquent_balance": "scheduled balance after age - days_past_due/30 payments",
            "maturity": "at age == term_months the loan closes as matured unless it defaults that month",
            "delinquency_noise": {
                "monthly_start_probability": NOISE_START_PROB,
                "second_month_probability": NOISE_SECOND_MONTH_PROB,
                "pattern": "30 dpd (or 30 then 60) then current; not in the last 3 months before a default, "
                "nor on a closing month, one cured month between episodes; no effect on hazards",
            },
        },
        "loan_attributes": {
            "regions": dict(zip(REGIONS, REGION_SHARES)),
            "channels": {"retail": 1 - BROKER_SHARE, "broker": BROKER_SHARE},
            "terms": {str(t): s for t, s in zip(TERMS, TERM_SHARES)},
            "credit_score": "round(normal(740, 45)) clipped to 580..820",
            "dti": "round(0.10 + 0.40 * beta(2.5, 3.5), 4)",
            "orig_ltv": "original_balance / property_value; balance = floor to 100 of property_value * "
            "(0.505 + 0.465 * beta(3.0, 1.6))",
            "note_rate": "nearest 1/8 of market mortgage_rate + 0.3 + 0.005*(740 - score) + 0.2*broker "
            "- 0.3*(term <= 180) + normal(0, 0.15); at least 1.5",
        },
        "scenario_weights": dict(SCENARIO_WEIGHTS),
    }


@dataclasses.dataclass(frozen=True)
class SimulatedBook:
    """An in-memory simulated book.

    Attributes
    ----------
    panel, loans : pandas.DataFrame
        As in ``panel.parquet`` and ``loans.parquet``; date columns are
        ``datetime64[ms]`` (first of month).
    macro : pandas.DataFrame
        Macro history (``month`` as ``YYYY-MM`` text).
    scenarios : dict of str to pandas.DataFrame
    weights : dict of str to float
    truth : dict
        The content of ``true_parameters.json``.
    """

    panel: pd.DataFrame
    loans: pd.DataFrame
    macro: pd.DataFrame
    scenarios: dict
    weights: dict
    truth: dict


def simulate_small_book(n_loans: int, seed: int, hazard: Callable | None = None, **kw) -> SimulatedBook:
    """Simulate a whole book in memory (for tests and examples).

    Parameters are those of :func:`simulate_book`.
    """
    chunks = list(simulate_book(n_loans, seed, hazard=hazard, **kw))
    history, scenarios, weights = make_macro(seed, cutoff=kw.get("cutoff", "2024-12"))
    return SimulatedBook(
        panel=pa.concat_tables(c.panel for c in chunks).to_pandas(date_as_object=False),
        loans=pa.concat_tables(c.loans for c in chunks).to_pandas(date_as_object=False),
        macro=history,
        scenarios=scenarios,
        weights=weights,
        truth=book_truth(n_loans, seed, hazard=hazard, **kw),
    )


# --------------------------------------------------------------------------- writing


def _csv_text(frame: pd.DataFrame) -> str:
    return frame.to_csv(index=False, float_format="%.4f", lineterminator="\n")


def _text_files(seed: int, cutoff: str, truth: dict) -> dict[str, str]:
    """The book's text files by relative path: macro history, scenarios, their weights, the truth record."""
    history, scenarios, weights = make_macro(seed, cutoff=cutoff)
    texts = {"macro_history.csv": _csv_text(history)}
    for name, frame in scenarios.items():
        texts[f"scenarios/{name}.csv"] = _csv_text(frame)
    texts["scenarios/weights.csv"] = _csv_text(
        pd.DataFrame(
            {
                "scenario": list(weights),
                "weight": list(weights.values()),
                "file": [f"{name}.csv" for name in weights],
            }
        )
    )
    texts["true_parameters.json"] = json.dumps(truth, sort_keys=True, indent=2) + "\n"
    return texts


def write_demo_book(
    out_dir,
    n_loans: int,
    seed: int,
    *,
    chunk_size: int = 25_000,
    cutoff: str = "2024-12",
    first_origination: str = "2016-01",
    last_origination: str = "2024-09",
    hazard=None,
    default_min_age: int = DEFAULT_MIN_AGE,
) -> dict:
    """Write a simulated book to ``out_dir``, chunk by chunk.

    ``hazard`` replaces the true multinomial-logit hazard (see
    :func:`simulate_book`), e.g. ``psa_hazard(1.5)``.

    Parquet files get one row group per chunk (zstd); memory stays bounded by
    one chunk. Files are written under temporary names and renamed into place
    at the end, so a failed write leaves none of the final files.

    Parameters
    ----------
    out_dir : str or path
        Folder, created if missing. Must not already hold any output file.
    n_loans, seed, chunk_size, cutoff, first_origination, last_origination, default_min_age
        As in :func:`simulate_book`.

    Returns
    -------
    dict
        ``files`` (relative path -> bytes), ``loans``, ``rows`` (panel rows),
        ``events`` (loans by outcome: default, prepay, matured, censored) and
        ``charged_off`` (loans whose workout ended inside the window).

    Raises
    ------
    SimulationError
        If an output file already exists, or the arguments are invalid.
    """
    out = Path(out_dir)
    existing = [f for f in OUTPUT_FILES if (out / f).exists()]
    if existing:
        raise SimulationError(
            f"{out} already holds {', '.join(existing)}; the simulator never overwrites files. "
            "Choose an empty folder or remove them first"
        )
    book_kw = {
        "cutoff": cutoff,
        "first_origination": first_origination,
        "last_origination": last_origination,
        "default_min_age": default_min_age,
    }
    chunks = simulate_book(n_loans, seed, chunk_size=chunk_size, hazard=hazard, **book_kw)
    (out / "scenarios").mkdir(parents=True, exist_ok=True)
    temp = {f: out / f"{f}.tmp-{os.getpid()}" for f in OUTPUT_FILES}
    events = dict.fromkeys(["default", "prepay", "matured", "censored"], 0)
    rows = charged_off = 0
    try:
        with (
            pq.ParquetWriter(temp["loans.parquet"], LOANS_SCHEMA, compression="zstd") as loan_writer,
            pq.ParquetWriter(temp["panel.parquet"], getattr(hazard, "panel_schema", PANEL_SCHEMA), compression="zstd") as panel_writer,
        ):
            for chunk in chunks:
                loan_writer.write_table(chunk.loans, row_group_size=max(chunk.loans.num_rows, 1))
                panel_writer.write_table(chunk.panel, row_group_size=max(chunk.panel.num_rows, 1))
                rows += chunk.panel.num_rows
                for kind, n in _count_outcomes(chunk.panel).items():
                    events[kind] += n
                charged_off += _count_status(chunk.panel, "charged_off")

        truth = book_truth(n_loans, seed, chunk_size=chunk_size, hazard=hazard, **book_kw)
        for name, text in _text_files(seed, cutoff, truth).items():
            temp[name].write_bytes(text.encode("utf-8"))
        for name in OUTPUT_FILES:
            os.replace(temp[name], out / name)
    finally:
        for path in temp.values():
            path.unlink(missing_ok=True)
    return {
        "files": {f: (out / f).stat().st_size for f in OUTPUT_FILES},
        "loans": int(n_loans),
        "rows": int(rows),
        "events": events,
        "charged_off": int(charged_off),
    }


def _count_status(panel: pa.Table, status: str) -> int:
    return int(pc.sum(pc.equal(panel["status"], status)).as_py() or 0)


def _count_outcomes(panel: pa.Table) -> dict[str, int]:
    status = panel["status"].to_numpy(zero_copy_only=False)
    dpd = panel["days_past_due"].to_numpy()
    default = int(np.sum((status == "default") & (dpd == 90)))
    prepay = int(np.sum(status == "paid_off"))
    matured = int(np.sum(status == "matured"))
    n_loans = len(pc.unique(panel["loan_id"]))
    return {
        "default": default,
        "prepay": prepay,
        "matured": matured,
        "censored": n_loans - default - prepay - matured,
    }
