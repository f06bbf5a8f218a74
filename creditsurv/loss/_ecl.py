"""Expected credit loss: EAD, LGD, discounting, scenario weighting and stages.

For scenario s and horizon H (months ahead)::

    ECL_s(H) = sum_{u=1..H} S_s(u-1) hD_s(u) * LGD_s(u) * EAD(u) * DF(u)

- EAD(u), the exposure at a default in month u (:func:`exposure_at_default`): a loan
  defaulting on days past due has missed its last L = ``loss.exposure.onset_months``
  instalments (3 for 90 days), so it owes the scheduled balance after its last paid
  instalment, B_on = B(u - L + 1) at the start of month u - L + 1, plus interest on it for
  the L unpaid months at the effective rate, plus ``loss.exposure.arrears_fee`` per missed
  instalment: EAD(u) = B_on (1 + r/12)^(L + a) + fee x L, a = 1 when
  ``loss.accrued_interest`` (one more month) else 0. A default on a status code alone misses
  ``onset_months_status`` instalments (0: EAD is the balance after the default month's
  payment). The two routes are mixed by the share of defaults on days past due
  (``loss.exposure.days_past_due_share``, by default that of the development window's
  defaults): expected loss = sum over routes of share x LGD(EAD) x EAD.
  This is the cash shortfall of IFRS 9 Appendix A ("credit loss": all contractual cash
  flows due less those expected, discounted at the original effective interest rate) and
  B5.5.28 (from memory): the contractual flows from the first missed instalment on are worth
  B_on at its start, so B_on (1 + r/12)^L at the end of the default month discounted from
  there is B_on discounted from the onset; the shortfall is dated from the onset.
  An onset before the reporting month (a loan already in arrears) takes today's balance.
- DF(u) = (1 + r/12)^(-u), r the loan's effective interest rate (its note
  rate), IFRS 9 5.5.17 and B5.5.44; 1 when ``loss.discount`` is ``none``.
- LGD: ``constant`` (per segment from ``loss.lgd.by_segment``, else
  ``loss.lgd.constant``) or ``collateral``: the property, worth its
  origination value moved by the scenario's regional house-price index, is
  sold ``months_to_recovery`` months after the default month for
  value x (1 - forced_sale_haircut - sale_costs); the proceeds are discounted
  back to the default month at r, and LGD = clip(1 - PV / EAD, floor, 1).
- 12-month ECL: H = min(12, remaining term); lifetime: H = remaining term.
- Probability weighting (IFRS 9 5.5.17): ECL = sum_s w_s ECL_s.

Stages (:func:`allocate_stages`):
stage 3 when in default at the reporting month (credit-impaired; IFRS 9
B5.5.37, the 90 days past due presumption enters through the default
definition): ECL = LGD x EAD, PD = 1, with EAD from the loan's own delinquency in the
panel (the balance of its last month under 30 days past due and the instalments missed from
then to the default's start; interest stops at default, common practice for credit-impaired
loans) and the sale ``months_to_recovery`` after the default began;
stage 2 at or above ``staging.dpd_backstop`` days past due (IFRS 9 5.5.11), on
a significant increase in credit risk (lifetime PD now against lifetime PD at
origination), on the watch list, or on probation after one of these (fewer than
``staging.probation_months`` months without a trigger); stage 1 otherwise.
Reported ECL: 12-month for stage 1 (IFRS 9 5.5.5), lifetime for stages 2 and 3
(IFRS 9 5.5.3).

The CECL basis (``accounting="cecl"``; ASC 326, paragraphs cited from memory): no
stages; the allowance of every loan is its probability-weighted lifetime expected
credit loss over the contractual term as the hazards shorten it by prepayment
(326-20-30-6), computed per loan by the same formula (a pool's loss is the sum of
its loans', 326-20-30-2 permits pooling); a loan in default carries LGD x EAD, as in
stage 3. The scenario paths reach it already extended by the forecast and reversion
periods (:func:`creditsurv.forecast.extend_paths`, 326-20-30-9). Discounting follows
``loss.discount``: at the effective interest rate for a discounted cash flow method
(326-20-30-4), DF = 1 otherwise, the CECL default (:func:`creditsurv.config.discount_method`).
``ecl_reported`` and ``allowance`` are both the allowance; ``stage``, ``stage_reason``,
``months_since_sicr``, ``pd_lifetime_origination`` and ``pd_lifetime_staging`` are empty.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import pandas as pd
import pyarrow as pa

from ..config import (
    Collateral,
    Exposure,
    Loss,
    ScenarioWeights,
    Staging,
    discount_method,
)
from ..errors import ProjectionError, problem_list
from ..forecast import (
    CHUNK_SIZE,
    WEIGHTED,
    ChunkProjection,
    MacroLookup,
    ProjectionResult,
    check_coverage,
    loan_list_text,
    origination_pd,
    project_loans,
    remaining_term,
    repeat_ids,
    scenario_column,
    scenario_weights,
)
from ..model import hpi_series_name

__all__ = [
    "MONTHS_IN_DEFAULT",
    "MONTHS_IN_ARREARS_AT_DEFAULT",
    "BALANCE_AT_ONSET",
    "exposure_at_default",
    "default_routes",
    "defaulted_exposure",
    "staging_scenario",
    "low_credit_risk",
    "months_to_sale",
    "discount_factors",
    "collateral_lgd",
    "allocate_stages",
    "Stages",
    "SICR_HISTORY",
    "STAGE_REASONS",
    "SICR_MULTIPLIERS",
    "sicr_sensitivity",
    "expected_credit_loss",
    "loans_in_default",
    "segment_summary",
    "EclResult",
    "STAGING_COLUMNS",
]


def discount_factors(note_rate, months_ahead, kind: str = "effective_interest_rate") -> np.ndarray:
    """DF(u) = (1 + r/12)^(-u) (IFRS 9 B5.5.44), or ones when ``kind`` is ``none``.

    ``note_rate`` (decimal a year) and ``months_ahead`` broadcast.
    """
    r = np.asarray(note_rate, dtype=float) / 12.0
    u = np.asarray(months_ahead, dtype=float)
    if kind == "none":
        return np.ones(np.broadcast_shapes(r.shape, u.shape))
    if kind != "effective_interest_rate":
        raise ProjectionError(f"loss.discount: unknown kind {kind!r}; use effective_interest_rate or none")
    return (1.0 + r) ** (-u)


def collateral_lgd(
    ead,
    property_value,
    hpi_origination,
    hpi_sale,
    note_rate,
    *,
    months_to_recovery: int,
    forced_sale_haircut: float,
    sale_costs: float,
    floor: float,
) -> np.ndarray:
    """LGD of a secured exposure: clip(1 - PV(recovery) / EAD, floor, 1).

    recovery = property_value x hpi_sale / hpi_origination x
    (1 - forced_sale_haircut - sale_costs), received ``months_to_recovery``
    months after default (a number, or one per loan) and discounted to the
    default month at r/12 a month. LGD is 1 where EAD <= 0 would make the
    ratio undefined (no exposure).
    """
    pv = discounted_recovery(
        property_value, hpi_origination, hpi_sale, note_rate, months_to_recovery=months_to_recovery,
        forced_sale_haircut=forced_sale_haircut, sale_costs=sale_costs,
    )  # fmt: skip
    return lgd_of_recovery(ead, pv, floor)


def discounted_recovery(
    property_value, hpi_origination, hpi_sale, note_rate, *, months_to_recovery, forced_sale_haircut: float, sale_costs: float
) -> np.ndarray:
    """PV(recovery) of :func:`collateral_lgd` at the default month; the arguments broadcast."""
    r = np.asarray(note_rate, dtype=float) / 12.0
    net = max(1.0 - forced_sale_haircut - sale_costs, 0.0)
    # the factors of a loan first (they broadcast against the months of hpi_sale), then one product per month
    per_index_point = np.asarray(property_value, float) / np.asarray(hpi_origination, float) * net
    per_index_point = per_index_point * (1.0 + r) ** (-np.asarray(months_to_recovery, dtype=float))
    return per_index_point * np.asarray(hpi_sale, float)


def lgd_of_recovery(ead, pv, floor: float) -> np.ndarray:
    """clip(1 - pv / EAD, floor, 1), and 1 where EAD <= 0 (see :func:`collateral_lgd`)."""
    ead = np.asarray(ead, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        lgd = np.where(ead > 0, 1.0 - pv / np.where(ead > 0, ead, 1.0), 1.0)
    return np.clip(lgd, floor, 1.0, out=lgd)


def loss_at_default(ead, pv, floor: float) -> np.ndarray:
    """LGD x EAD of :func:`lgd_of_recovery` for EAD >= 0, without a division: clip(EAD - pv, floor x EAD, EAD)
    (EAD x clip(1 - pv / EAD, floor, 1) with EAD > 0 taken inside; 0 at EAD = 0)."""
    ead = np.asarray(ead, dtype=float)
    return np.clip(ead - pv, floor * ead, ead)


def exposure_at_default(balance_at_onset, note_rate, missed, *, extra_month: bool = False, arrears_fee: float = 0.0):
    """EAD of a default after ``missed`` unpaid instalments: B_on (1 + r/12)^(missed + a) + fee x missed.

    ``balance_at_onset`` is the balance after the last paid instalment, ``note_rate`` the effective
    interest rate (decimal a year), a = 1 when ``extra_month``; the arguments broadcast. Interest
    compounds monthly at the effective rate, so the EAD discounted at that rate from the default month
    equals the onset balance discounted from the onset (IFRS 9 B5.5.44).
    """
    r = np.asarray(note_rate, dtype=float) / 12.0
    m = np.asarray(missed, dtype=float)
    return np.asarray(balance_at_onset, dtype=float) * (1.0 + r) ** (m + (1.0 if extra_month else 0.0)) + arrears_fee * m


def default_routes(exposure: Exposure, days_past_due_share: float) -> tuple[tuple[float, int], ...]:
    """The routes into default as ``(share, missed instalments)``: days past due, then status code alone.

    Routes with no share are left out.
    """
    share = float(days_past_due_share)
    if not 0.0 <= share <= 1.0:
        raise ProjectionError(f"loss.exposure.days_past_due_share: {share} is not a share in [0, 1]")
    routes = ((share, int(exposure.onset_months)), (1.0 - share, int(exposure.onset_months_status)))
    return tuple((w, m) for w, m in routes if w > 0)


MONTHS_IN_DEFAULT = "months_in_default"
"""Book column: months since the default a loan is in began (0 in its first month); empty when not in default."""

MONTHS_IN_ARREARS_AT_DEFAULT = "months_in_arrears_at_default"
"""Book column of a loan in default: months from its last month under 30 days past due to the default's start
(the instalments missed); empty when the panel has no such month."""

BALANCE_AT_ONSET = "balance_at_onset"
"""Book column of a loan in default: the balance of its last month under 30 days past due before the default."""


STAGE_REASONS = ("default", "cure_period", "backstop", "sicr_relative", "sicr_absolute", "watch_list", "probation")
"""The values of ``stage_reason``: stage 3 ``default`` or ``cure_period``; stage 2 the triggers that fired, in this
order and joined by ``+`` (``backstop+sicr_relative+sicr_absolute``), or ``probation``; empty for stage 1."""


class Stages(NamedTuple):
    """Each loan's stage, its reason and the SICR history the next month's run carries on."""

    stage: np.ndarray
    """int8: 1, 2 or 3."""
    reason: np.ndarray
    """str, one of the combinations of :data:`STAGE_REASONS` (empty for stage 1)."""
    months_since_sicr: np.ndarray
    """float: months since the loan last met the SICR test or the watch list (0: it meets one now); NaN when
    it has not in the known history."""


def _optional(values, n: int, fill) -> np.ndarray:
    return np.full(n, fill) if values is None else np.asarray(values)


def allocate_stages(
    pd_lifetime,
    pd_lifetime_origination,
    days_past_due,
    in_default,
    staging: Staging = Staging(),
    *,
    in_cure_period=None,
    months_since_arrears=None,
    months_since_sicr_before=None,
    watch_list=None,
    low_credit_risk=None,
) -> Stages:
    """Stage of each loan, the reason, and the months since its last SICR or watch-list trigger.

    - Stage 3 (credit-impaired, IFRS 9 B5.5.37): in default at the reporting month; the reason is
      ``cure_period`` when the loan meets no default condition now but has not yet completed the cure period,
      else ``default``.
    - Stage 2 on a trigger now: ``backstop`` (days past due at or above ``staging.dpd_backstop``,
      IFRS 9 5.5.11), ``sicr_relative`` and ``sicr_absolute`` (lifetime PD now against lifetime PD at
      origination, IFRS 9 5.5.3; combined by ``staging.sicr_rule``, and listed when the combination fires),
      ``watch_list``.
    - Stage 2 ``probation``: no trigger now, but one in the last ``staging.probation_months - 1`` months:
      a loan returns to stage 1 only after that many whole months without one. Arrears triggers come from
      ``months_since_arrears`` (months since the last month at or above the backstop or in default, from
      the panel; 0 now), SICR and watch-list triggers from ``months_since_sicr_before`` (the same count at
      the previous month-end, from the prior run or a loan-table column). NaN (or ``None`` for the whole
      array) means no trigger in the known history.
    - Stage 1 otherwise (12-month ECL, IFRS 9 5.5.5).

    Parameters
    ----------
    pd_lifetime, pd_lifetime_origination : array of float
    days_past_due : array of int
    in_default : array of bool
        Default definition met at the reporting month, or within its cure period.
    staging : config ``Staging``
    in_cure_period : array of bool, optional
        In default only because the cure period has not run out (the reason ``cure_period``).
    months_since_arrears, months_since_sicr_before : array of float, optional
    watch_list : array of bool, optional
    low_credit_risk : array of bool, optional
        Low credit risk at the reporting date (IFRS 9 5.5.10): the SICR test does not fire (nor count in the
        SICR history); the backstop and the watch list still do.

    Returns
    -------
    Stages
    """
    now = np.asarray(pd_lifetime, dtype=float)
    orig = np.asarray(pd_lifetime_origination, dtype=float)
    dpd = np.asarray(days_past_due)
    dflt = np.asarray(in_default, dtype=bool)
    n = len(dflt)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(orig > 0, now / np.where(orig > 0, orig, 1.0), np.where(now > 0, np.inf, 1.0))
    rel = ratio >= staging.sicr_relative
    absolute = (now - orig) >= staging.sicr_absolute
    sicr = (rel & absolute) if staging.sicr_rule == "both" else (rel | absolute)
    sicr &= ~_optional(low_credit_risk, n, False).astype(bool)
    watch = _optional(watch_list, n, False).astype(bool)
    triggers = {
        "backstop": dpd >= staging.dpd_backstop,
        "sicr_relative": sicr & rel,
        "sicr_absolute": sicr & absolute,
        "watch_list": watch,
    }
    triggered = np.zeros(n, dtype=bool)
    reason = np.full(n, "", dtype=object)
    for name, fired in triggers.items():
        fired = fired & ~dflt
        reason[fired] = np.where(triggered[fired], reason[fired] + "+" + name, name)
        triggered |= fired
    since_arrears = _optional(months_since_arrears, n, np.nan).astype(float)
    before = _optional(months_since_sicr_before, n, np.nan).astype(float)
    since_sicr = np.where((sicr | watch) & ~dflt, 0.0, before + 1.0)
    p = staging.probation_months

    def recent(months):
        return (months >= 1) & (months < p)  # NaN compares false: no trigger known

    probation = ~dflt & ~triggered & (recent(since_arrears) | recent(since_sicr))
    reason[probation] = "probation"
    cure = _optional(in_cure_period, n, False).astype(bool) & dflt
    reason[dflt] = np.where(cure[dflt], "cure_period", "default")
    stage = np.where(dflt, 3, np.where(triggered | probation, 2, 1)).astype(np.int8)
    return Stages(stage, reason, since_sicr)


_MAY_BE_EMPTY = ("loan_id", "pd_lifetime_origination", "months_since_arrears", MONTHS_IN_DEFAULT, "months_since_sicr")

STAGING_COLUMNS = ("stage", "stage_reason", "months_since_sicr", "pd_lifetime_origination", "pd_lifetime_staging")
"""The loan table's columns that serve staging only: empty on the CECL basis (the columns stay, so the tables of
both bases have the same columns)."""

SICR_MULTIPLIERS = (0.5, 1.0, 1.5, 2.0)
"""The multiples of ``staging.sicr_relative`` of :func:`sicr_sensitivity` (common practice for such a table)."""


def sicr_sensitivity(loans: pd.DataFrame, book: pd.DataFrame, staging: Staging = Staging(), multipliers=SICR_MULTIPLIERS) -> pd.DataFrame:
    """Stage 2 and reported ECL with the relative SICR threshold at multiples of its configured value.

    Every other rule stays as configured (absolute threshold, backstop, watch list, probation). The
    12-month and lifetime ECL of each loan do not depend on its stage, so only the horizon each
    loan reports moves.

    Parameters
    ----------
    loans : DataFrame
        The loan table of :class:`EclResult` (``loan_id``, ``stage``, ``pd_lifetime_staging`` (else
        ``pd_lifetime``), ``pd_lifetime_origination``, ``days_past_due``, ``ecl_12m``, ``ecl_lifetime``).
    book : DataFrame
        The book the stages were allocated on (its staging history columns and watch-list flag).

    Returns
    -------
    DataFrame
        One row per multiplier: ``multiplier``, ``sicr_relative``, ``stage_2_loans``,
        ``stage_2_share`` (of the loans not in default), ``stage_2_sicr_loans`` (stage 2 through the
        SICR test), ``ecl_reported``, ``ecl_change`` (against the configured threshold).
    """

    frame = book.sort_values("loan_id", kind="stable").reset_index(drop=True)
    table = loans.sort_values("loan_id", kind="stable").reset_index(drop=True)
    if not np.array_equal(frame["loan_id"].to_numpy(), table["loan_id"].to_numpy()):
        raise ProjectionError("sicr_sensitivity: the book and the loan table hold different loans")
    in_default = table["stage"].to_numpy() == 3
    history = _staging_history(frame, staging)
    rows = []
    for m in multipliers:
        changed = dataclasses.replace(staging, sicr_relative=staging.sicr_relative * float(m))
        now = table["pd_lifetime_staging"] if "pd_lifetime_staging" in table.columns else table["pd_lifetime"]
        stages = allocate_stages(
            now, table["pd_lifetime_origination"], table["days_past_due"], in_default, changed, **history,
            low_credit_risk=low_credit_risk(table["pd_12m"], staging) if "pd_12m" in table.columns else None,
        )
        stage2 = stages.stage == 2
        reported = np.where(stages.stage == 1, table["ecl_12m"], table["ecl_lifetime"])
        live = int((~in_default).sum())
        rows.append({
            "multiplier": float(m), "sicr_relative": changed.sicr_relative, "stage_2_loans": int(stage2.sum()),
            "stage_2_share": float(stage2.sum() / live) if live else float("nan"),
            "stage_2_sicr_loans": int((stage2 & pd.Series(stages.reason).str.contains("sicr").to_numpy()).sum()),
            "ecl_reported": float(reported.sum()),
        })  # fmt: skip
    out = pd.DataFrame(rows)
    base = table["ecl_reported"].sum()
    out["ecl_change"] = out["ecl_reported"] - base
    return out


SCENARIO_MEASURES = ("pd_12m", "pd_lifetime", "ecl_12m", "ecl_lifetime")
"""The per-scenario measures of a loan, in the order of the wide loan table's columns."""


@dataclass
class EclResult:
    """Loan-level ECL, its per-scenario measures, the segment summary and the projection behind them.

    Attributes
    ----------
    loans : DataFrame
        One row per loan, sorted by loan_id: ``loan_id``, ``segment``,
        ``stage``, ``stage_reason``, ``days_past_due``, ``pd_12m``,
        ``pd_lifetime``, ``pd_lifetime_origination``, ``pd_lifetime_staging`` (today's lifetime PD the
        SICR test compared with it: one scenario's, or the weighted one against a stored origination PD;
        see :func:`staging_scenario`), ``balance``, ``ead``,
        ``lgd``, ``lgd_ecl``, ``ecl_12m``, ``ecl_lifetime``, ``ecl_reported``. The PD and
        ECL columns are probability weighted.  ``ead`` is the as-of exposure
        (for a loan in default, at its default); ``lgd`` the weighted LGD of a
        default in the reporting month (the stage 3 LGD; for a live loan only a
        reference point), ``lgd_ecl`` the LGD its reported ECL applies: reported
        ECL / sum over the horizon of weighted marginal PD x EAD x DF (equal to
        ``lgd`` in stage 3).
    by_scenario : DataFrame
        The tidy per-scenario measures: one row per loan and scenario
        (scenario by scenario in ``scenarios`` order, then ``weighted``; loans
        in ``loans`` order within each), columns ``loan_id``, ``scenario``,
        ``pd_12m``, ``pd_lifetime``, ``ecl_12m``, ``ecl_lifetime``. Stage 3
        rows carry PD = 1 and ECL = LGD x EAD in every scenario.
    segments : DataFrame
        See :func:`segment_summary`.
    projection : ProjectionResult
        Of the loans not in default.
    scenarios : tuple of str
    weights : ScenarioWeights
    accounting : {"ifrs9", "cecl"}
        The basis: on ``cecl`` the columns of :data:`STAGING_COLUMNS` are empty and ``ecl_reported`` (and
        ``allowance``) is the lifetime ECL of every loan.
    """

    loans: pd.DataFrame
    by_scenario: pd.DataFrame
    segments: pd.DataFrame
    projection: ProjectionResult
    scenarios: tuple[str, ...]
    weights: ScenarioWeights
    accounting: str = "ifrs9"

    def raise_for_non_finite(self) -> None:
        """Raise when a reported figure is NaN or infinite: such a total is never written as a result.

        The figures are every number of :meth:`loan_table` but the PD at origination (a loan in default may
        leave the configured column empty) and the staging history (empty: no trigger known), and the segment
        summary's numbers. On the CECL basis the staging columns (:data:`STAGING_COLUMNS`) are empty by design.

        Raises
        ------
        ProjectionError
            Naming each column with non-finite values and its loans (or segments).
        """
        problems = []
        table = self.loan_table()
        empty = _MAY_BE_EMPTY + (STAGING_COLUMNS if self.accounting == "cecl" else ())
        for col in table.columns:
            if col in empty or not pd.api.types.is_numeric_dtype(table[col]):
                continue
            bad = ~np.isfinite(table[col].to_numpy(dtype=float, na_value=np.nan))
            if bad.any():
                problems.append(f"{col}: not finite for {loan_list_text(table['loan_id'][bad])}")
        for col in self.segments.columns:
            if col in empty or col.startswith("pd_lifetime_origination") or not pd.api.types.is_numeric_dtype(self.segments[col]):
                continue
            bad = ~np.isfinite(self.segments[col].to_numpy(dtype=float, na_value=np.nan))
            if bad.any():
                problems.append(f"segment summary {col}: not finite in {int(bad.sum())} rows")
        if problems:
            raise ProjectionError(problem_list(problems, "the projected figures (nothing was written as a result)"))

    def loan_table(self) -> pd.DataFrame:
        """The loan table as written (``loan_ecl.parquet``): :attr:`loans`, then per scenario s
        the columns ``pd_12m_<s>``, ``pd_lifetime_<s>``, ``ecl_12m_<s>``, ``ecl_lifetime_<s>``."""
        table = self.loans.copy()
        ids = table["loan_id"].to_numpy()
        for s in self.scenarios:
            rows = self.by_scenario[self.by_scenario["scenario"] == s]
            if not np.array_equal(rows["loan_id"].to_numpy(), ids):
                rows = rows.set_index("loan_id").loc[ids].reset_index()
            for m in SCENARIO_MEASURES:
                table[f"{m}_{s}"] = rows[m].to_numpy()
        return table


def _tidy(loan_ids: pd.Series, names: tuple[str, ...], measures: dict[str, np.ndarray]) -> pd.DataFrame:
    """One row per loan and scenario from ``(n_loans, n_scenarios)`` arrays, scenario by scenario."""
    n, k = len(loan_ids), len(names)
    # the measures written once into the frame's own block (a column per measure, scenario after scenario)
    block = np.empty((len(SCENARIO_MEASURES), k, n))
    for j, m in enumerate(SCENARIO_MEASURES):
        block[j] = measures[m].T
    out = pd.DataFrame(block.reshape(len(SCENARIO_MEASURES), k * n).T, columns=list(SCENARIO_MEASURES), copy=False)
    # the ids taken in their own array type (Arrow-backed strings are not rebuilt one by one)
    out.insert(0, "loan_id", loan_ids.array.take(np.tile(np.arange(n), k)))
    out.insert(1, "scenario", pd.Categorical.from_codes(np.repeat(np.arange(k), n), categories=list(names)))
    return out


def segment_summary(loans: pd.DataFrame) -> pd.DataFrame:
    """By ``segment`` and ``stage``: ``n_loans``, ``balance``, ``ead``, ``ecl``
    (reported), ``coverage_ratio`` = ecl / balance (NaN for zero balance).

    With no stages (the CECL basis: ``stage`` empty) one row per segment with ``stage`` empty; ``ecl`` is then
    the allowance and ``coverage_ratio`` the lifetime loss rate (allowance over the amortised cost basis, the
    balance)."""
    if len(loans) and loans["stage"].isna().all():
        g = loans.groupby(["segment"], sort=True, observed=True)
        out = g.agg(
            n_loans=("loan_id", "size"), balance=("balance", "sum"), ead=("ead", "sum"), ecl=("ecl_reported", "sum")
        ).reset_index()
        out.insert(1, "stage", pd.array([pd.NA] * len(out), dtype=loans["stage"].dtype))
        out["coverage_ratio"] = np.where(out["balance"] > 0, out["ecl"] / out["balance"].where(out["balance"] > 0, 1.0), np.nan)
        return out
    g = loans.groupby(["segment", "stage"], sort=True, observed=True)
    out = g.agg(
        n_loans=("loan_id", "size"), balance=("balance", "sum"), ead=("ead", "sum"), ecl=("ecl_reported", "sum")
    ).reset_index()
    out["coverage_ratio"] = np.where(out["balance"] > 0, out["ecl"] / out["balance"].where(out["balance"] > 0, 1.0), np.nan)
    return out


class _EclAccumulator:
    """Consumes projection chunks: per-loan ECL by scenario, ECL schedule rows."""

    def __init__(self, n, scenarios, weights, loss: Loss, routes, lookups, region_column, hpi_names, as_of_idx, writer):
        self.scenarios = scenarios
        self.routes = routes
        self.weights = weights
        self.loss = loss
        self.lookups = lookups
        self.region_column = region_column
        self.hpi_names = hpi_names
        self.as_of_idx = as_of_idx
        self.writer = writer
        self.ecl_12m = {s: np.zeros(n) for s in (*scenarios, WEIGHTED)}
        self.ecl_life = {s: np.zeros(n) for s in (*scenarios, WEIGHTED)}
        # probability-weighted sum of marginal PD x EAD x DF: the exposure the ECL's LGD applies to
        self.exposure_12m = np.zeros(n)
        self.exposure_life = np.zeros(n)

    def _loss_at_default(self, s, ch: ChunkProjection, exposures, ead, columns: dict) -> tuple[np.ndarray, np.ndarray | float]:
        """The loss at default (n, H) under scenario ``s``, mixed over the routes: sum share x LGD(EAD) x EAD; and the
        LGD where no route has exposure (the constant, or 1). The recovery is the same for every route."""
        lgd = self.loss.lgd
        if lgd.kind == "constant":
            per = np.array([lgd.by_segment.get(x, lgd.constant) for x in columns["segment"]], dtype=float)[:, None]
            return per * ead, per
        lk = self.lookups[s]
        codes, names, orig = columns["region_code"], columns["hpi_names"], columns["origination_idx"]
        hpi_sale = lk.get_by_row(names, codes, ch.calendar_month + lgd.months_to_recovery)
        hpi_orig = lk.get_by_row(names, codes, orig)
        pv = discounted_recovery(
            columns["property_value"][:, None], hpi_orig[:, None], hpi_sale, ch.note_rate[:, None],
            months_to_recovery=lgd.months_to_recovery, forced_sale_haircut=lgd.forced_sale_haircut, sale_costs=lgd.sale_costs,
        )  # fmt: skip
        return sum(share * loss_at_default(e, pv, lgd.floor) for share, e in exposures), 1.0

    def _columns(self, ch: ChunkProjection) -> dict:
        """The loan columns the LGD reads, the chunk's rows of :meth:`book_columns`."""
        return {k: v[ch.rows] if isinstance(v, np.ndarray) else v for k, v in self.columns.items()}

    def book_columns(self, live: pd.DataFrame) -> None:
        """Take the loan columns the LGD reads out of the live book once (rows in the projection's order)."""
        if self.loss.lgd.kind == "constant":
            self.columns = {"segment": live["segment"].astype(str).to_numpy()}
            return
        codes, regions = pd.factorize(live[self.region_column])
        if (codes < 0).any():
            raise ProjectionError(f"loans: no {self.region_column!r} for {loan_list_text(live['loan_id'][codes < 0])}")
        self.columns = {
            "region_code": codes,
            "hpi_names": [self.hpi_names[r] for r in regions],
            "origination_idx": live["origination_idx"].to_numpy(dtype=np.int64),
            "property_value": live["property_value"].to_numpy(float),
        }

    def _exposures(self, ch: ChunkProjection) -> list[tuple[float, np.ndarray]]:
        """Per route, its share and EAD(u) (n, H): the balance after the last paid instalment, u - L + 1."""
        n, H = ch.mask.shape
        # column k: the scheduled balance at the start of month k + 1 (0 after the last instalment)
        after = np.concatenate([ch.balance_start, ch.balance_end[:, -1:]], axis=1)
        r = ch.note_rate[:, None]
        out = []
        for share, missed in self.routes:
            # an onset before the reporting month (already in arrears) takes today's balance
            col = np.maximum(np.arange(1, H + 1) - missed, 0)
            ead = exposure_at_default(
                after[:, col], r, missed, extra_month=self.loss.accrued_interest, arrears_fee=self.loss.exposure.arrears_fee
            )
            out.append((share, np.where(ch.mask, ead, 0.0)))
        return out

    def prepare(self, ch: ChunkProjection) -> dict:
        """The chunk's ECL by scenario and its schedule rows: a pure function of the chunk (any thread)."""
        n, H = ch.mask.shape
        u = np.arange(1, H + 1)
        r = ch.note_rate[:, None]
        exposures = self._exposures(ch)
        ead = sum(share * e for share, e in exposures)
        df = discount_factors(r, u[None, :], self.loss.discount)
        df = np.broadcast_to(df, (n, H))
        h12 = min(12, H)
        el, lgds = {}, {}
        columns = self._columns(ch)
        rows = self.writer is not None  # the schedule's rows need the (n, H) arrays of every scenario and weighted
        out = {"ecl_12m": {}, "ecl_life": {}}
        for s in self.scenarios:
            # the loss at default, mixed over the routes; the LGD of the schedule is that / EAD
            at_default, no_exposure = self._loss_at_default(s, ch, exposures, ead, columns)
            if rows:
                with np.errstate(invalid="ignore", divide="ignore"):
                    lgds[s] = np.where(ead > 0, at_default / np.where(ead > 0, ead, 1.0), no_exposure)
            el[s] = ch.marginal_pd[s] * at_default * df
            out["ecl_12m"][s] = el[s][:, :h12].sum(axis=1)
            out["ecl_life"][s] = el[s].sum(axis=1)
        # the weighted ECL is linear in the scenarios' (IFRS 9 5.5.17)
        for key in ("ecl_12m", "ecl_life"):
            out[key][WEIGHTED] = sum(self.weights[s] * out[key][s] for s in self.scenarios)
        mpd_w = ch.marginal_pd[WEIGHTED]
        exposed = mpd_w * ead * df
        out["exposure_12m"] = exposed[:, :h12].sum(axis=1)
        out["exposure_life"] = exposed.sum(axis=1)
        if rows:
            el[WEIGHTED] = sum(self.weights[s] * el[s] for s in self.scenarios)
            num = sum(self.weights[s] * ch.marginal_pd[s] * lgds[s] for s in self.scenarios)
            plain = sum(self.weights[s] * lgds[s] for s in self.scenarios)
            with np.errstate(invalid="ignore", divide="ignore"):
                lgds[WEIGHTED] = np.where(mpd_w > 0, num / np.where(mpd_w > 0, mpd_w, 1.0), plain)
            names = (*self.scenarios, WEIGHTED)
            K = len(names)
            m3 = np.broadcast_to(ch.mask[:, None, :], (n, K, H))
            counts = ch.mask.sum(axis=1)

            def stack(d):
                return np.stack([np.broadcast_to(d[s], (n, H)) for s in names], axis=1)[m3]

            out["schedule"] = pa.table(
                {
                    "loan_id": repeat_ids(ch.loan_id, counts * K),
                    "scenario": scenario_column(
                        names, np.broadcast_to(np.arange(K, dtype=np.int32)[None, :, None], (n, K, H))[m3]
                    ),
                    "month_ahead": np.broadcast_to(u.astype(np.int32)[None, None, :], (n, K, H))[m3],
                    "ead": stack({s: ead for s in names}),
                    "lgd": stack(lgds),
                    "marginal_pd": stack(ch.marginal_pd),
                    "discount_factor": stack({s: df for s in names}),
                    "expected_loss": stack(el),
                }
            )
        return out

    def take(self, rows, done: dict) -> None:
        """Store one chunk's :meth:`prepare` results (loans ``rows`` of the live book) and write its schedule rows."""
        for s in done["ecl_life"]:
            self.ecl_12m[s][rows] = done["ecl_12m"][s]
            self.ecl_life[s][rows] = done["ecl_life"][s]
        self.exposure_12m[rows] = done["exposure_12m"]
        self.exposure_life[rows] = done["exposure_life"]
        if self.writer is not None:
            self.writer(done["schedule"])


def _pd_at_origination(
    frame, in_default, staging, source, first_path, *, chunk_size, collateral: Collateral, extension, workers
) -> np.ndarray:
    """Lifetime PD at origination per loan: the configured column, or projected with the origination month's information."""
    if staging.pd_at_origination_column:
        col = staging.pd_at_origination_column
        if col not in frame.columns:
            raise ProjectionError(f"staging.pd_at_origination_column: loans have no column {col!r}")
        pd_orig = frame[col].to_numpy(dtype=float)
        bad = ~((pd_orig >= 0) & (pd_orig <= 1))
        # a loan in default may leave the column empty: its stage does not read it
        if (bad & ~in_default).any():
            raise ProjectionError(f"loans: {col!r} is not a probability in [0, 1] for {loan_list_text(frame['loan_id'][bad & ~in_default])}")
        return pd_orig
    # every loan, those in default too: the origination view does not depend on today's state
    if not len(frame):
        return np.zeros(0)
    return origination_pd(
        frame, source, first_path, extension=extension, chunk_size=chunk_size, collateral=collateral, workers=workers
    ).to_numpy()


def low_credit_risk(pd_12m, staging: Staging) -> np.ndarray | None:
    """Which loans are low credit risk at the reporting date (IFRS 9 5.5.10): probability-weighted 12-month PD at
    or below ``staging.low_credit_risk_pd``; ``None`` when the exemption is not configured."""
    if staging.low_credit_risk_pd is None:
        return None
    return np.asarray(pd_12m, dtype=float) <= float(staging.low_credit_risk_pd)


def staging_scenario(staging: Staging, scenarios: Sequence[str]) -> str:
    """The scenario whose lifetime PD the SICR test compares with the PD at origination.

    With a stored PD at origination (``staging.pd_at_origination_column``) the probability-weighted PD
    (``weighted``); else one path, like the projected origination view: ``staging.sicr_scenario``, by
    default the first scenario.
    """
    if staging.pd_at_origination_column:
        return WEIGHTED
    name = staging.sicr_scenario or scenarios[0]
    if name not in scenarios:
        raise ProjectionError(f"staging.sicr_scenario: {name!r} is not one of the scenarios {list(scenarios)}")
    return name


def _optional_column(frame, column: str) -> np.ndarray:
    return frame[column].to_numpy(dtype=float, na_value=np.nan) if column in frame.columns else np.full(len(frame), np.nan)


def _staging_history(frame, staging: Staging) -> dict:
    """The book's columns that :func:`allocate_stages` reads besides PDs and days past due, when present."""
    out = {
        "months_since_arrears": _optional_column(frame, "months_since_arrears"),
        "months_since_sicr_before": _optional_column(frame, SICR_HISTORY),
    }
    if "in_cure_period" in frame.columns:
        out["in_cure_period"] = frame["in_cure_period"].to_numpy(dtype=bool)
    col = staging.watch_list_column
    if col is not None:
        if col not in frame.columns:
            raise ProjectionError(f"staging.watch_list_column: loans have no column {col!r}")
        flag = frame[col]
        if flag.isna().any():
            raise ProjectionError(f"loans: {col!r} (staging.watch_list_column) is empty for {loan_list_text(frame['loan_id'][flag.isna()])}")
        out["watch_list"] = flag.to_numpy(dtype=bool)
    return out


SICR_HISTORY = "months_since_sicr_before"
"""Book column: months since the loan last met the SICR test or the watch list, at the previous month-end."""


def months_to_sale(frame: pd.DataFrame, months_to_recovery: int) -> np.ndarray:
    """Months from the reporting month to the sale of the collateral of a loan in default now.

    The sale is ``loss.lgd.months_to_recovery`` months after the default began, so a loan that has been
    in default for m months is sold ``months_to_recovery - m`` months from now; a loan in default for longer
    is taken as sold at the reporting month (0). Without ``months_in_default`` (or where it is empty) the
    default is taken to begin at the reporting month.
    """
    if MONTHS_IN_DEFAULT not in frame.columns:
        return np.full(len(frame), int(months_to_recovery), dtype=np.int64)
    elapsed = frame[MONTHS_IN_DEFAULT].fillna(0).to_numpy(dtype=np.int64)
    return np.maximum(int(months_to_recovery) - elapsed, 0)


def _lgd_at_reporting_month(frame, ead0, rate, lookup, lgd_cfg, region_column, hpi_names, as_of_idx) -> np.ndarray:
    """LGD of the loans in default at the reporting month (the stage-3 basis) under one scenario's house prices:
    the sale :func:`months_to_sale` from now, discounted to now."""
    n = len(frame)
    if lgd_cfg.kind == "constant":
        return np.array([lgd_cfg.by_segment.get(str(x), lgd_cfg.constant) for x in frame["segment"]], dtype=float)
    hs, ho = np.empty(n), np.empty(n)
    reg = frame[region_column].to_numpy()
    orig = frame["origination_idx"].to_numpy(dtype=np.int64)
    to_sale = months_to_sale(frame, lgd_cfg.months_to_recovery)
    for region, name in hpi_names.items():
        rows = reg == region
        hs[rows] = lookup.get(name, as_of_idx + to_sale[rows])
        ho[rows] = lookup.get(name, orig[rows])
    return collateral_lgd(
        ead0, frame["property_value"].to_numpy(float), ho, hs, rate,
        months_to_recovery=to_sale, forced_sale_haircut=lgd_cfg.forced_sale_haircut,
        sale_costs=lgd_cfg.sale_costs, floor=lgd_cfg.floor,
    )


def _book_frame(loans: pd.DataFrame, segment_column: str, default_days_past_due) -> tuple[pd.DataFrame, np.ndarray]:
    """The book sorted by loan id with a ``segment`` column, and which loans are in default at the reporting month."""
    if segment_column not in loans.columns:
        raise ProjectionError(f"loans: no segment column {segment_column!r}; have {list(loans.columns)}")
    if "days_past_due" not in loans.columns:
        raise ProjectionError(f"loans: no days_past_due column (needed for staging); have {list(loans.columns)}")
    frame = loans.sort_values("loan_id", kind="stable").reset_index(drop=True)
    if segment_column != "segment":
        frame = frame.assign(segment=frame[segment_column])
    return frame, loans_in_default(frame, default_days_past_due)


def loans_in_default(loans: pd.DataFrame, default_days_past_due: int | None = 90) -> np.ndarray:
    """Which loans of a book are in default at the reporting month, the loans the ECL does not project.

    The book's ``in_default`` column when it has one, else ``days_past_due`` at or above
    ``default_days_past_due``. The same on either accounting basis (stage 3 under IFRS 9).

    Returns
    -------
    numpy.ndarray of bool
        In the book's row order.
    """
    if "in_default" in loans.columns:
        return loans["in_default"].to_numpy(dtype=bool)
    if default_days_past_due is not None:
        return loans["days_past_due"].to_numpy() >= default_days_past_due
    raise ProjectionError("loans: no in_default column and no days-past-due default threshold")


def _house_price_series(frame, in_default, lookups, lgd_cfg, collateral: Collateral, as_of_idx) -> dict:
    """Region to house-price series of the collateral LGD, after checking every scenario covers the months it reads."""
    region_column = collateral.region_column
    need = ["property_value", "origination_idx", region_column]
    missing = [c for c in need if c not in frame.columns]
    if missing:
        raise ProjectionError(f"loans: collateral LGD needs column(s) {missing}")
    codes, regions = pd.factorize(frame[region_column])  # the regions in order of appearance, as pd.unique
    hpi_names = {r: hpi_series_name(collateral.hpi_series, r) for r in regions}
    live = ~in_default
    needs = {}
    ends = as_of_idx + remaining_term(frame["age"].to_numpy(), frame["term"].to_numpy()) + lgd_cfg.months_to_recovery
    to_sale = as_of_idx + months_to_sale(frame, lgd_cfg.months_to_recovery)
    origination = frame["origination_idx"].to_numpy()
    for code, (region, name) in enumerate(hpi_names.items()):
        rows = codes == code
        months = [np.unique(origination[rows]), np.unique(to_sale[rows])]
        if (rows & live).any():
            months.append(np.arange(as_of_idx + 1, int(ends[rows & live].max()) + 1))
        needs.setdefault(name, []).extend(months)
    check_coverage(lookups, {k: np.unique(np.concatenate([np.asarray(m) for m in v])) for k, v in needs.items()})
    return hpi_names


def _live_measures(n: int, live_rows, names, proj: ProjectionResult, acc: _EclAccumulator) -> dict[str, np.ndarray]:
    """Per measure, an ``(n_loans, n_scenarios)`` array filled for the projected loans; other rows PD 1, ECL 0."""
    pl = proj.loans  # sorted by loan_id like the live loans
    measures = {m: np.ones((n, len(names))) if m.startswith("pd") else np.zeros((n, len(names))) for m in SCENARIO_MEASURES}
    for k, s in enumerate(names):
        measures["pd_12m"][live_rows, k] = pl[f"pd_12m_{s}"].to_numpy()
        measures["pd_lifetime"][live_rows, k] = pl[f"pd_lifetime_{s}"].to_numpy()
        measures["ecl_12m"][live_rows, k] = acc.ecl_12m[s]
        measures["ecl_lifetime"][live_rows, k] = acc.ecl_life[s]
    return measures


def defaulted_exposure(frame: pd.DataFrame, loss: Loss) -> np.ndarray:
    """EAD of loans in default from their own delinquency (:func:`exposure_at_default`).

    The balance of the last month under 30 days past due before the default and the instalments missed from
    then to the default's start (book columns :data:`BALANCE_AT_ONSET`, :data:`MONTHS_IN_ARREARS_AT_DEFAULT`);
    where the panel has no such month, today's balance and ``loss.exposure.onset_months``.
    """
    balance = frame["balance"].to_numpy(dtype=float)
    onset = _optional_column(frame, BALANCE_AT_ONSET)
    missed = _optional_column(frame, MONTHS_IN_ARREARS_AT_DEFAULT)
    known = np.isfinite(onset) & np.isfinite(missed)
    return exposure_at_default(
        np.where(known, onset, balance), frame["note_rate"].to_numpy(dtype=float),
        np.where(known, missed, loss.exposure.onset_months), extra_month=loss.accrued_interest,
        arrears_fee=loss.exposure.arrears_fee,
    )  # fmt: skip


def _reporting_month_loss(
    frame, in_default, loss: Loss, lookups, region_column, hpi_names, as_of_idx, w
) -> tuple[np.ndarray, dict]:
    """Exposure at the reporting month (for loans in default, at their default) and, per scenario (then
    weighted), the LGD of a default then: the stage 3 basis."""
    balance = frame["balance"].to_numpy(dtype=float)
    rate = frame["note_rate"].to_numpy(dtype=float)
    ead0 = balance * (1.0 + rate / 12.0) if loss.accrued_interest else balance
    if in_default.any():
        ead0 = np.where(in_default, defaulted_exposure(frame, loss), ead0)
    lgd0 = {
        s: _lgd_at_reporting_month(frame, ead0, rate, lookups[s], loss.lgd, region_column, hpi_names, as_of_idx)
        for s in w
    }
    lgd0[WEIGHTED] = sum(w[s] * lgd0[s] for s in w)
    return ead0, lgd0


def _ecl_weighted_lgd(reported, twelve_months, live_rows, acc: _EclAccumulator, lgd_now, in_default) -> np.ndarray:
    """The LGD the reported ECL applies: reported ECL over the probability-weighted sum of marginal PD x EAD x DF
    over the same horizon (12 months where ``twelve_months``, stage 1; the remaining life else); for a loan in
    default, its LGD now. A loan with no expected default over the horizon takes its LGD now."""
    out = np.asarray(lgd_now, dtype=float).copy()
    exposure = np.where(twelve_months[live_rows], acc.exposure_12m, acc.exposure_life)
    with np.errstate(invalid="ignore", divide="ignore"):
        out[live_rows] = np.where(exposure > 0, reported[live_rows] / np.where(exposure > 0, exposure, 1.0), out[live_rows])
    out[in_default] = np.asarray(lgd_now, dtype=float)[in_default]
    return out


def _fill_defaulted_and_weighted(measures, in_default, ead0, lgd0, names, w) -> None:
    """Stage 3 rows get ECL = LGD x EAD at the reporting month in every scenario; then the weighted column
    is sum_s w_s x (IFRS 9 5.5.17), recomputed so that it includes them."""
    for k, s in enumerate(names):
        loss3 = lgd0[s] * ead0
        measures["ecl_12m"][in_default, k] = loss3[in_default]
        measures["ecl_lifetime"][in_default, k] = loss3[in_default]
    weighted = len(names) - 1
    for m in ("ecl_12m", "ecl_lifetime", "pd_12m", "pd_lifetime"):
        measures[m][:, weighted] = sum(w[s] * measures[m][:, k] for k, s in enumerate(names[:-1]))


def expected_credit_loss(
    loans: pd.DataFrame,
    source,
    paths: Mapping[str, pd.DataFrame],
    *,
    as_of_idx: int,
    weights: ScenarioWeights | Mapping[str, float] | None = None,
    loss: Loss = Loss(),
    staging: Staging = Staging(),
    default_days_past_due: int | None = 90,
    chunk_size: int = CHUNK_SIZE,
    collateral: Collateral = Collateral(),
    segment_column: str = "segment",
    band_column: str | None = None,
    band_edges: Sequence[float] = (),
    days_past_due_share: float | None = None,
    extension=None,
    accounting: str = "ifrs9",
    schedule_writer: Callable[[pa.Table], None] | None = None,
    curve_writer: Callable[[pa.Table], None] | None = None,
    term_writer: Callable[[pa.Table], None] | None = None,
    on_chunk: Callable[[ChunkProjection], None] | None = None,
    progress: Callable[[int, int], None] | None = None,
    workers: int | None = None,
) -> EclResult:
    """Stage every loan and compute its 12-month, lifetime and reported ECL (on the CECL basis: no stages, the
    lifetime ECL of every loan is its allowance).

    Parameters
    ----------
    loans : DataFrame
        As for :func:`creditsurv.forecast.project_loans`, plus
        ``days_past_due`` and optionally ``in_default`` (bool; else in default
        when days_past_due >= ``default_days_past_due``); ``original_balance``
        and ``origination_idx`` when the PD at origination is projected;
        ``property_value``, ``origination_idx`` and the region column for the
        collateral LGD.  Loans in default are not projected (stage 3).
    source, paths, as_of_idx, weights, chunk_size, collateral, segment_column,
    band_column, band_edges, curve_writer,
    term_writer
        Passed to :func:`~creditsurv.forecast.project_loans`.  For the
        collateral LGD the paths must reach ``months_to_recovery`` months past
        the last maturity.
    loss, staging : config ``Loss`` and ``Staging``
    default_days_past_due : int or None
        Default definition when there is no ``in_default`` column.
    extension : config ``ScenarioExtension``, optional
        The reversion of the origination view's macro path
        (:func:`~creditsurv.forecast.origination_path`); default 24 months.
    days_past_due_share : float, optional
        Share of defaults on days past due (the rest on a status code alone) for the projected EAD;
        default ``loss.exposure.days_past_due_share``, else 1 with a days-past-due definition and 0 without.
    accounting : {"ifrs9", "cecl"}, default "ifrs9"
        The basis. ``ifrs9``: stages, the reported ECL at each stage's horizon. ``cecl`` (ASC 326): no stages
        and no PD at origination (``staging`` is not read); the reported ECL, and the ``allowance``, is the
        lifetime ECL of every loan. An empty ``loss.discount`` takes the basis's default
        (:func:`creditsurv.config.discount_method`).
    schedule_writer : callable(pyarrow.Table), optional
        ECL schedule, chunk by chunk: ``loan_id``, ``scenario``,
        ``month_ahead``, ``ead``, ``lgd``, ``marginal_pd``,
        ``discount_factor``, ``expected_loss`` (sorted like the curves; the
        ``weighted`` row's lgd is the marginal-PD-weighted mean LGD, so that
        expected_loss = marginal_pd x lgd x ead x discount_factor holds there too).
    on_chunk : callable(ChunkProjection), optional
        A further consumer of each chunk's projection (a loan-level cut of the curves), after the ECL's own.
    progress : callable(done, total), optional
        Called after each chunk with the loans projected so far.
    workers : int, optional
        Threads or processes of the projection (default: one per available core); every result is the same for
        any number. Without a writer or ``on_chunk`` the chunks run in worker processes where the platform can
        fork (see :func:`~creditsurv.forecast.project_loans`).

    Returns
    -------
    EclResult
    """
    if accounting not in ("ifrs9", "cecl"):
        raise ProjectionError(f"accounting: unknown basis {accounting!r}; use ifrs9 or cecl")
    cecl = accounting == "cecl"
    loss = dataclasses.replace(loss, discount=discount_method(loss.discount, accounting))
    scenarios = tuple(paths)
    frame, in_default = _book_frame(loans, segment_column, default_days_past_due)
    dpd = frame["days_past_due"].to_numpy()
    lgd_cfg = loss.lgd
    lookups = {s: MacroLookup(p) for s, p in paths.items()}
    hpi_names = {}
    if lgd_cfg.kind == "collateral":
        hpi_names = _house_price_series(frame, in_default, lookups, lgd_cfg, collateral, as_of_idx)

    live_rows = np.flatnonzero(~in_default)
    live = frame.iloc[live_rows]
    w = scenario_weights(scenarios, weights)
    if days_past_due_share is None:
        days_past_due_share = loss.exposure.days_past_due_share
    if days_past_due_share is None:
        days_past_due_share = 1.0 if default_days_past_due is not None else 0.0
    routes = default_routes(loss.exposure, days_past_due_share)
    acc = _EclAccumulator(
        len(live), scenarios, w, loss, routes, lookups, collateral.region_column, hpi_names, as_of_idx, schedule_writer
    )
    acc.book_columns(live)
    done = [0]

    def each_chunk(rows, prepared):
        acc.take(rows, prepared)
        done[0] += len(prepared["exposure_life"])
        if progress is not None:
            progress(done[0], len(live))

    # the schedule's rows are the size of the chunk's arrays: they stay in this process (threads)
    proj = project_loans(
        live, source, paths, as_of_idx=as_of_idx, weights=w, chunk_size=chunk_size, collateral=collateral, segment_column="segment",
        band_column=band_column, band_edges=band_edges, curve_writer=curve_writer, term_writer=term_writer,
        on_chunk=on_chunk, prepare=acc.prepare, on_prepared=each_chunk, keep_order=schedule_writer is not None,
        workers=workers, processes=schedule_writer is None,
    )
    names = (*scenarios, WEIGHTED)
    measures = _live_measures(len(frame), live_rows, names, proj, acc)
    weighted = len(names) - 1
    n = len(frame)

    if cecl:
        # ASC 326: no stages; nothing of the staging is computed (no PD at origination), its columns stay empty
        stage = pd.array(np.full(n, None), dtype="Int8")
        stages = Stages(stage, pd.array(np.full(n, None, dtype=object), dtype="string"), np.full(n, np.nan))
        pd_orig, pd_staging = np.full(n, np.nan), np.full(n, np.nan)
        twelve_months = np.zeros(n, dtype=bool)
    else:
        pd_orig = _pd_at_origination(
            frame, in_default, staging, source, paths[scenarios[0]],
            chunk_size=chunk_size, collateral=collateral, extension=extension, workers=workers,
        )  # fmt: skip
        pd_staging = measures["pd_lifetime"][:, names.index(staging_scenario(staging, scenarios))].copy()
        stages = allocate_stages(
            pd_staging, pd_orig, dpd, in_default, staging, **_staging_history(frame, staging),
            low_credit_risk=low_credit_risk(measures["pd_12m"][:, weighted], staging),
        )
        stage = stages.stage
        twelve_months = stage == 1  # IFRS 9 5.5.5 (stage 1: 12-month), 5.5.3 (2, 3: lifetime)

    ead0, lgd0 = _reporting_month_loss(frame, in_default, loss, lookups, collateral.region_column, hpi_names, as_of_idx, w)
    _fill_defaulted_and_weighted(measures, in_default, ead0, lgd0, names, w)
    ecl_12m, ecl_life = measures["ecl_12m"][:, weighted].copy(), measures["ecl_lifetime"][:, weighted].copy()
    # CECL: the allowance is the lifetime ECL of every loan (ASC 326-20-30-6: over the contractual term, prepayments
    # considered, which the competing-risk hazards do)
    reported = np.where(twelve_months, ecl_12m, ecl_life)
    lgd_ecl = _ecl_weighted_lgd(reported, twelve_months, live_rows, acc, lgd0[WEIGHTED], in_default)
    table = pd.DataFrame(
        {
            "loan_id": frame["loan_id"].to_numpy(),
            "segment": frame["segment"].to_numpy(),
            "stage": stage,
            "stage_reason": stages.reason,
            "days_past_due": dpd,
            "months_since_arrears": _optional_column(frame, "months_since_arrears"),
            "months_in_default": _optional_column(frame, MONTHS_IN_DEFAULT),
            "months_since_sicr": stages.months_since_sicr,
            "pd_12m": measures["pd_12m"][:, weighted].copy(),
            "pd_lifetime": measures["pd_lifetime"][:, weighted].copy(),
            "pd_lifetime_origination": pd_orig,
            "pd_lifetime_staging": pd_staging,
            "balance": frame["balance"].to_numpy(dtype=float),
            "ead": ead0,
            "lgd": lgd0[WEIGHTED],
            "lgd_ecl": lgd_ecl,
            "ecl_12m": ecl_12m,
            "ecl_lifetime": ecl_life,
            "ecl_reported": reported,
            # the loss allowance: the reported ECL on either basis (a column of both, so their tables match)
            "allowance": reported.copy(),
        }
    )
    return EclResult(
        loans=table, by_scenario=_tidy(table["loan_id"], names, measures), segments=segment_summary(table),
        projection=proj, scenarios=scenarios, weights=w, accounting=accounting,
    )  # fmt: skip
