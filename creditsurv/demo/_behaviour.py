"""Borrower behaviour: a book that moves between arrears states by a known multi-state model.

Each month a loan that is current, 30-59 or 60-89 days past due moves by a
multinomial logit per origin state (log-odds of each end state against staying)
to a transient state, into default (90 days past due) or out by prepayment. A
loan in default is cured (its arrears cleared, current again) or charged off
with fixed monthly probabilities, else stays in workout with 30 more days past
due. After a cure the loan carries ``previously_defaulted = 1``, which raises
its log-odds of the moves the model names.

A refreshed credit score, written to the panel as ``refreshed_score``, moves
every month: a random step, a drop on entering each arrears state and default,
and, while current, a partial return to the origination score. The model reads
the score at the end of the previous month; in the first month on book that is
the origination score (``credit_score`` of the loan table, the value a fit's
``before_first_column: credit_score`` gives it).

Everything that draws the book is in :meth:`ArrearsBehaviour.describe`, written
to ``true_parameters.json``.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping

import numpy as np
import pyarrow as pa

from ..errors import SimulationError
from ._simulate import (
    PANEL_SCHEMA,
    STATUSES,
    BookChunk,
    loan_table,
    month_dates,
    risk_covariates,
    scheduled_balance,
)

__all__ = ["ARREARS_COEFFICIENTS", "ArrearsBehaviour", "BEHAVIOUR_PANEL_SCHEMA", "arrears_behaviour"]

TRANSIENT = ("current", "30-59", "60-89")
END_STATES = (*TRANSIENT, "default", "prepaid")
STATE_DPD = (0, 30, 60)
"""Days past due at the end of a month spent in each transient state; default starts at 90."""
TERMS = ("intercept", "log_age", "refreshed_score", "current_ltv", "dti", "rate_incentive", "unemployment_rate",
         "previously_defaulted")  # fmt: skip

ARREARS_COEFFICIENTS = {
    "current": {
        "30-59": {"intercept": 1.5, "log_age": 0.3, "refreshed_score": -0.015, "current_ltv": 2.0, "dti": 2.0,
                  "unemployment_rate": 0.15, "previously_defaulted": 1.0},
        "prepaid": {"intercept": -8.0, "log_age": 0.8, "refreshed_score": 0.002, "current_ltv": -1.0, "dti": -0.5,
                    "rate_incentive": 0.5, "unemployment_rate": -0.05},
    },
    "30-59": {
        "current": {"intercept": -2.4, "refreshed_score": 0.005, "current_ltv": -1.0},
        "60-89": {"intercept": 2.9, "refreshed_score": -0.008, "current_ltv": 1.0, "unemployment_rate": 0.1,
                  "previously_defaulted": 0.8},
        "prepaid": {"intercept": -4.5},
    },
    "60-89": {
        "current": {"intercept": -3.9, "refreshed_score": 0.005},
        "30-59": {"intercept": -0.7},
        "default": {"intercept": 5.4, "refreshed_score": -0.01, "current_ltv": 1.5, "unemployment_rate": 0.1,
                    "previously_defaulted": 1.0},
        "prepaid": {"intercept": -3.4},
    },
}  # fmt: skip
"""The demo book's true multi-state model: origin state -> end state -> term -> log-odds against staying.

Terms left out are 0; an end state left out is never reached from that origin (current never moves
straight to 60-89 or default; 30-59 never defaults)."""

BEHAVIOUR_PANEL_SCHEMA = PANEL_SCHEMA.append(pa.field("refreshed_score", pa.int32()))


@dataclasses.dataclass(frozen=True)
class ArrearsBehaviour:
    """The true arrears behaviour of a simulated book (pass it as the simulator's ``hazard``).

    Parameters
    ----------
    coefficients : mapping
        Origin state -> end state -> term -> coefficient (terms of :data:`TERMS`, raw units).
    cure_probability, charge_off_probability : float
        Monthly probabilities that a loan in default is cured (current again) or charged off.
    score_step : float
        Standard deviation of the refreshed score's monthly random step, points.
    score_drop : mapping
        Points the score falls on entering ``30-59``, ``60-89`` and ``default``.
    score_return : float
        Share of the gap to the origination score closed in each month ending current.
    """

    coefficients: Mapping[str, Mapping[str, Mapping[str, float]]] = dataclasses.field(
        default_factory=lambda: ARREARS_COEFFICIENTS
    )
    cure_probability: float = 0.06
    charge_off_probability: float = 0.10
    score_step: float = 4.0
    score_drop: Mapping[str, float] = dataclasses.field(
        default_factory=lambda: {"30-59": 30.0, "60-89": 20.0, "default": 50.0}
    )
    score_return: float = 0.03

    def __post_init__(self):
        problems = []
        for origin, moves in self.coefficients.items():
            if origin not in TRANSIENT:
                problems.append(f"origin state {origin!r} is not one of {TRANSIENT}")
            for end, terms in moves.items():
                if end not in END_STATES or end == origin:
                    problems.append(f"{origin} -> {end}: not an end state other than staying")
                unknown = set(terms) - set(TERMS)
                if unknown:
                    problems.append(f"{origin} -> {end}: unknown terms {sorted(unknown)}; terms are {TERMS}")
        p, q = self.cure_probability, self.charge_off_probability
        if not (0 <= p and 0 <= q and p + q <= 1):
            problems.append("cure and charge-off probabilities must be in [0, 1] and sum to at most 1")
        if problems:
            raise SimulationError("; ".join(problems))

    @property
    def panel_schema(self) -> pa.Schema:
        """The panel's columns: the simulator's, and the refreshed score."""
        return BEHAVIOUR_PANEL_SCHEMA

    # ----------------------------------------------------------------- the model

    def transition_probabilities(self, origin: str, x: Mapping[str, np.ndarray]) -> np.ndarray:
        """Probabilities (n, 5) of ending the month in each of :data:`END_STATES`, from ``origin``."""
        n = len(next(iter(x.values())))
        eta = np.full((n, len(END_STATES)), -np.inf)
        eta[:, END_STATES.index(origin)] = 0.0
        for end, terms in self.coefficients.get(origin, {}).items():
            value = np.full(n, float(terms.get("intercept", 0.0)))
            for term, coef in terms.items():
                if term != "intercept":
                    value += coef * np.asarray(x[term], dtype=float)
            eta[:, END_STATES.index(end)] = value
        eta -= eta.max(axis=1, keepdims=True)
        p = np.exp(eta)
        return p / p.sum(axis=1, keepdims=True)

    def describe(self) -> dict:
        return {
            "kind": "arrears_states",
            "states": list(END_STATES),
            "days_past_due": {**dict(zip(TRANSIENT, STATE_DPD)), "default": "90, then +30 a month in workout"},
            "terms": list(TERMS),
            "coefficients": {o: {e: dict(t) for e, t in m.items()} for o, m in self.coefficients.items()},
            "formula": (
                "from origin state j, eta_jk = sum of the terms' coefficients x values for each end state k the "
                "model names (0 for staying, k unreachable otherwise); P_jk = exp(eta_jk) / sum_m exp(eta_jm)"
            ),
            "covariates": {
                "log_age": "natural log of loan age t (age 1 = month after origination)",
                "refreshed_score": "refreshed_score at the end of month t-1 (panel); credit_score at age 1",
                "current_ltv": "as in the competing-risk book: scheduled balance after t-1 payments over the "
                "property value moved by the region's house-price index to month t-1 (the previous month-end)",
                "dti": "dti from loans.parquet",
                "rate_incentive": "note_rate - mortgage_rate(month t-1)",
                "unemployment_rate": "unemployment_rate(month t-1)",
                "previously_defaulted": "1 from the month after a cure on",
            },
            "default": {
                "cure_probability": self.cure_probability,
                "charge_off_probability": self.charge_off_probability,
                "workout": "days_past_due +30 a month, status default; a cure sets days past due to 0 (current); "
                "a charge-off is the last row (status charged_off, balance 0)",
            },
            "refreshed_score": {
                "start": "credit_score of loans.parquet at origination",
                "monthly_step_sd": self.score_step,
                "drop_on_entering": dict(self.score_drop),
                "return_when_current": f"{self.score_return} of the gap to the origination score a month",
                "rounding": "whole points, clipped to 300..850",
            },
            "maturity": "a loan that ends its last contractual month in a transient state matures (balance 0)",
            "balance": "scheduled balance after age - days_past_due/30 payments (0 at closure)",
        }

    # ----------------------------------------------------------------- the book

    def chunk(self, k: int, first_number: int, rng, loan: dict, risk, macro) -> BookChunk:
        """Walk the chunk's loans month by month through the states; the loan table and the panel."""
        cov = risk_covariates(loan, risk, macro)
        n = len(loan["orig"])
        cutoff_age, term = risk.cutoff_age, loan["term"]
        state = np.zeros(n, dtype=np.int64)  # index into END_STATES; prepaid (4) and charged off (5) are closed
        closed = 5
        dpd = np.zeros(n, dtype=np.int64)
        score = loan["credit_score"].astype(float)
        origin_score = score.copy()
        flag = np.zeros(n, dtype=float)  # previously_defaulted
        rows = []
        for age in range(1, int(cutoff_age.max()) + 1):
            on = (state < 4) & (age <= cutoff_age)
            if not on.any():
                break
            status = np.zeros(n, dtype=np.int64)  # index into STATUSES
            new = state.copy()
            entered = np.zeros(n, dtype=bool)
            prev_score = score.copy()  # the end of the previous month; at age 1 the origination score
            for j, origin in enumerate(TRANSIENT):
                idx = np.flatnonzero(on & (state == j))
                if idx.size == 0:
                    continue
                at = risk.starts[idx] + age - 1
                x = {name: cov[name][at] for name in ("log_age", "current_ltv", "dti", "rate_incentive", "unemployment_rate")}
                x["refreshed_score"] = prev_score[idx]
                x["previously_defaulted"] = flag[idx]
                p = self.transition_probabilities(origin, x)
                end = (rng.random(idx.size)[:, None] > np.cumsum(p, axis=1)).sum(axis=1)
                new[idx] = np.minimum(end, len(END_STATES) - 1)
                entered[idx] = new[idx] != j
            workout = np.flatnonzero(on & (state == 3))
            u = rng.random(workout.size)
            cured = workout[u < self.cure_probability]
            gone = workout[(u >= self.cure_probability) & (u < self.cure_probability + self.charge_off_probability)]
            new[cured] = 0
            flag[cured] = 1.0
            dpd = np.where(new < 3, np.take(STATE_DPD, np.minimum(new, 2)), dpd)
            dpd[on & (new == 3)] = np.where(state[on & (new == 3)] == 3, dpd[on & (new == 3)] + 30, 90)
            status[on & (new == 1) | on & (new == 2)] = STATUSES.index("delinquent")
            status[on & (new == 3)] = STATUSES.index("default")
            status[on & (new == 4)] = STATUSES.index("paid_off")
            matured = on & (new < 3) & (age == term)
            status[matured] = STATUSES.index("matured")
            status[gone] = STATUSES.index("charged_off")
            # the refreshed score at the month's end
            step = rng.normal(0.0, self.score_step, n)
            drop = np.zeros(n)
            for name, points in self.score_drop.items():
                drop[on & entered & (new == END_STATES.index(name))] = points
            back = np.where(on & (new == 0), self.score_return * (origin_score - score), 0.0)
            score = np.where(on, np.clip(np.rint(score + step - drop + back), 300, 850), score)
            live = np.flatnonzero(on)
            ends = (new[live] == 4) | matured[live] | np.isin(live, gone)
            balance = scheduled_balance(
                loan["original_balance"][live], loan["note_rate"][live], term[live],
                np.maximum(np.minimum(age, term[live]) - dpd[live] // 30, 0),
            )  # fmt: skip
            rows.append((live, np.full(live.size, age), dpd[live], status[live],
                         np.where(ends, 0.0, np.round(balance, 2)), score[live]))  # fmt: skip
            new[gone] = closed
            new[matured] = closed
            state = new
        return _tables(k, first_number, loan, rows)


def _tables(k: int, first_number: int, loan: dict, rows: list) -> BookChunk:
    live, age, dpd, status, balance, score = (np.concatenate(c) for c in zip(*rows))
    order = np.lexsort((age, live))
    live, age, dpd, status, balance, score = (a[order] for a in (live, age, dpd, status, balance, score))
    loans, loan_ids = loan_table(first_number, loan)
    panel = pa.table(
        {
            "loan_id": loan_ids.take(pa.array(live)),
            "month": month_dates(loan["orig"][live] + age),
            "age": age.astype(np.int32),
            "balance": balance.astype(float),
            "days_past_due": dpd.astype(np.int32),
            "status": pa.array(STATUSES).take(pa.array(status.astype(np.int8))),
            "refreshed_score": score.astype(np.int32),
        },
        schema=BEHAVIOUR_PANEL_SCHEMA,
    )
    return BookChunk(k, loans, panel)


def arrears_behaviour(**changes) -> ArrearsBehaviour:
    """The demo book's arrears behaviour, with any field changed (``cure_probability=0.1``, ...)."""
    return ArrearsBehaviour(**changes)
