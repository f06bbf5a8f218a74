"""Tests of creditsurv.loss: ECL by direct sums, LGD, discounting, stages, weighting.

References: hand-worked ECL written as plain loops with numpy-financial
balances; the collateral LGD formula worked by hand; IFRS 9 paragraphs
5.5.3, 5.5.5 (12-month vs lifetime), 5.5.11 (30 days past due backstop),
5.5.17 and B5.5.44 (probability weighting, discounting at the effective
interest rate), B5.5.37 (default definition, 90 days past due).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import numpy_financial as npf
import pandas as pd
import pyarrow as pa
import pytest

from creditsurv.config import Exposure, Lgd, Loss, Staging
from creditsurv.errors import ProjectionError
from creditsurv.forecast import WEIGHTED, origination_pd
from creditsurv.loss import (
    allocate_stages,
    collateral_lgd,
    discount_factors,
    expected_credit_loss,
    exposure_at_default,
    lgd_of_recovery,
    loss_at_default,
)
from creditsurv.model import HazardTable
from creditsurv.months import parse_month

AS_OF = parse_month("2024-12")
HD, HP = 0.01, 0.02


def _table_source():
    return HazardTable(pd.DataFrame({"age": np.arange(1, 61), "default": HD, "prepay": HP}))


def _flat_macro(first=parse_month("2015-01"), last=AS_OF + 120, hpi=None):
    idx = np.arange(first, last + 1)
    data = {"mortgage_rate": np.full(len(idx), 5.0)}
    data["hpi_north"] = hpi(idx) if hpi else np.full(len(idx), 100.0)
    return pd.DataFrame(data, index=pd.Index(idx, name="month_idx"))


def _small_book():
    return pd.DataFrame(
        {
            "loan_id": ["A", "B", "C"],
            "segment": ["prime", "prime", "subprime"],
            "age": [4, 10, 0],
            "term": [24, 30, 6],
            "note_rate": [0.06, 0.0, 0.12],
            "balance": [10_000.0, 4_000.0, 6_000.0],
            "original_balance": [12_000.0, 6_000.0, 6_000.0],
            "property_value": [20_000.0, 9_000.0, 7_000.0],
            "origination_idx": [AS_OF - 4, AS_OF - 10, AS_OF],
            "region": ["North"] * 3,
            "days_past_due": [0, 0, 0],
            "pd0": [0.2, 0.2, 0.2],
        }
    )


def _hand_ecl(balance, rate, rem, lgd, horizon, discount=True, accrued=False, missed=3, fee=0.0):
    """sum_{u<=H} S(u-1) hD LGD EAD(u) DF(u), written out month by month.

    A default in month u has missed ``missed`` instalments: EAD is the balance after the last one paid
    (month u - missed; today's balance when that is before now) with interest for the missed months
    (IFRS 9 Appendix A, cash shortfalls at the effective rate), plus ``fee`` per missed instalment.
    """
    r = rate / 12
    payment = -npf.pmt(r, rem, balance) if r > 0 else balance / rem
    after = [balance]  # after[k]: the balance after k more payments
    for _ in range(rem):
        after.append(after[-1] * (1 + r) - payment)
    s, total = 1.0, 0.0
    for u in range(1, min(horizon, rem) + 1):
        onset = after[max(u - missed, 0)]
        ead = onset * (1 + r) ** (missed + (1 if accrued else 0)) + fee * missed
        df = (1 + r) ** (-u) if discount else 1.0
        total += s * HD * lgd * ead * df
        s *= 1 - HD - HP
    return total


def _loss(**kw):
    return Loss(lgd=Lgd(kind="constant", constant=0.3, by_segment={"subprime": 0.5}, floor=0.0), **kw)


STAGING = Staging(pd_at_origination_column="pd0")


@pytest.mark.parametrize("accrued", [False, True])
def test_ecl_of_a_small_book_matches_a_direct_sum(accrued):
    book = _small_book()
    res = expected_credit_loss(
        book, _table_source(), {"base": _flat_macro()}, as_of_idx=AS_OF, loss=_loss(accrued_interest=accrued), staging=STAGING
    ).loan_table().set_index("loan_id")
    for lid, lgd in (("A", 0.3), ("B", 0.3), ("C", 0.5)):
        row = book.set_index("loan_id").loc[lid]
        rem = row.term - row.age
        life = _hand_ecl(row.balance, row.note_rate, rem, lgd, rem, accrued=accrued)
        m12 = _hand_ecl(row.balance, row.note_rate, rem, lgd, 12, accrued=accrued)
        assert res.loc[lid, "ecl_lifetime"] == pytest.approx(life, rel=1e-10)
        assert res.loc[lid, "ecl_12m"] == pytest.approx(m12, rel=1e-10)
        assert res.loc[lid, "ecl_lifetime_base"] == pytest.approx(life, rel=1e-10)
        assert res.loc[lid, "lgd"] == lgd
    # loan C has 6 months left: its 12-month horizon is its remaining life
    assert res.loc["C", "ecl_12m"] == pytest.approx(res.loc["C", "ecl_lifetime"], rel=1e-15)


def test_discount_none_and_eir_discount_factors():
    # B5.5.44: discount at the effective interest rate, monthly compounding of the annual note rate
    np.testing.assert_allclose(discount_factors(0.06, np.arange(1, 4)), 1.005 ** -np.arange(1, 4.0), rtol=1e-15)
    np.testing.assert_array_equal(discount_factors(0.06, np.arange(1, 4), "none"), np.ones(3))
    book = _small_book()
    res = expected_credit_loss(
        book, _table_source(), {"base": _flat_macro()}, as_of_idx=AS_OF, loss=_loss(discount="none"), staging=STAGING
    ).loan_table().set_index("loan_id")
    assert res.loc["A", "ecl_lifetime"] == pytest.approx(_hand_ecl(10_000.0, 0.06, 20, 0.3, 20, discount=False), rel=1e-10)


def test_collateral_lgd_by_hand():
    # value 200k moved by HPI 100 -> 90, sold for 1 - 25% - 6% of it, 18 months later, discounted at 6% / 12
    pv = 200_000 * 0.9 * 0.69 / 1.005**18
    got = collateral_lgd(170_000.0, 200_000.0, 100.0, 90.0, 0.06, months_to_recovery=18,
                         forced_sale_haircut=0.25, sale_costs=0.06, floor=0.05)
    assert got == pytest.approx(1 - pv / 170_000, rel=1e-14)
    floored = collateral_lgd(50_000.0, 200_000.0, 100.0, 90.0, 0.06, months_to_recovery=18,
                             forced_sale_haircut=0.25, sale_costs=0.06, floor=0.05)
    assert floored == 0.05
    assert collateral_lgd(0.0, 1.0, 1.0, 1.0, 0.0, months_to_recovery=0, forced_sale_haircut=0, sale_costs=0, floor=0) == 1.0


def test_collateral_lgd_in_the_schedule_uses_the_scenario_hpi_at_the_sale_month():
    hpi = lambda idx: 100.0 * 0.995 ** (idx - AS_OF)  # noqa: E731 - falling prices
    macro = _flat_macro(hpi=hpi)
    lgd_cfg = Lgd(kind="collateral", forced_sale_haircut=0.2, sale_costs=0.05, months_to_recovery=6, floor=0.02)
    tables = []
    book = _small_book()
    res = expected_credit_loss(
        book, _table_source(), {"base": macro}, as_of_idx=AS_OF, loss=Loss(lgd=lgd_cfg), staging=STAGING,
        schedule_writer=tables.append,
    )
    sched = pa.concat_tables(tables).to_pandas()
    a = sched[(sched.loan_id == "A") & (sched.scenario == "base")].set_index("month_ahead")
    u, r = 5, 0.06 / 12
    # three instalments missed by the default (months 3-5): the balance after two payments, with interest
    ead = -npf.fv(r, u - 3, npf.pmt(r, 20, 10_000.0), 10_000.0) * (1 + r) ** 3
    value = 20_000.0 * hpi(AS_OF + u + 6) / hpi(AS_OF - 4) * (1 - 0.25)
    expected = max(1 - value / (1 + r) ** 6 / ead, 0.02)
    assert a.loc[u, "ead"] == pytest.approx(ead, rel=1e-10)
    assert a.loc[u, "lgd"] == pytest.approx(expected, rel=1e-10)
    # the schedule sums to the lifetime ECL, and each row is marginal PD x LGD x EAD x DF
    total = sched.groupby(["loan_id", "scenario"], observed=True)["expected_loss"].sum()
    loans = res.loan_table().set_index("loan_id")
    for lid in "ABC":
        assert total[(lid, "base")] == pytest.approx(loans.loc[lid, "ecl_lifetime_base"], rel=1e-12)
    np.testing.assert_allclose(
        sched["expected_loss"], sched["marginal_pd"] * sched["lgd"] * sched["ead"] * sched["discount_factor"], rtol=1e-12
    )


def test_a_loan_past_its_term_with_a_balance_left_is_due_next_month():
    # Rule (README, loss): a loan at or past its contractual term that still owes a balance (balloon,
    # extension, arrears at maturity) is projected over one month, its whole balance due at the end of it.
    book = _small_book()
    book.loc[book.loan_id == "A", ["age", "term"]] = [26, 24]  # two months past its term, 10,000 left
    book.loc[book.loan_id == "B", "age"] = 30  # exactly at its term
    res = expected_credit_loss(
        book, _table_source(), {"base": _flat_macro()}, as_of_idx=AS_OF, loss=_loss(), staging=STAGING
    ).loan_table().set_index("loan_id")
    for lid, balance, rate in (("A", 10_000.0, 0.06), ("B", 4_000.0, 0.0)):
        # marginal PD of month 1 x LGD x EAD x DF(1); EAD: the balance with three missed months' interest
        expected = HD * 0.3 * balance * (1 + rate / 12) ** 3 * (1 + rate / 12) ** -1
        assert res.loc[lid, "pd_12m"] == pytest.approx(HD, rel=1e-12)
        assert res.loc[lid, "pd_lifetime"] == pytest.approx(HD, rel=1e-12)
        assert res.loc[lid, "ecl_12m"] == pytest.approx(expected, rel=1e-12)
        assert res.loc[lid, "ecl_lifetime"] == pytest.approx(expected, rel=1e-12)
    # its PD at origination (the SICR comparison) covers its last contractual month: one month's hazard too
    po = origination_pd(book.drop(columns="pd0"), _table_source(), _flat_macro())
    assert po["A"] == pytest.approx(HD, rel=1e-12) and po["B"] == pytest.approx(HD, rel=1e-12)


@pytest.mark.parametrize("months_in_default, to_sale", [(None, 18), (0, 18), (13, 5), (18, 0), (30, 0)])
def test_stage_3_sale_is_counted_from_the_default_date(months_in_default, to_sale):
    # The collateral is sold loss.lgd.months_to_recovery (18) months after the default began, not 18 months
    # after every reporting date: a loan 13 months in default is sold in 5 months, one in default longer
    # than 18 months at the reporting month. Recovery by hand: value moved by the index to the sale month,
    # less haircut and costs, discounted at the note rate over the months to the sale (IFRS 9 B5.5.44).
    hpi = lambda idx: 100.0 * 1.002 ** (idx - AS_OF)  # noqa: E731 - rising prices
    book = _small_book()
    book.loc[book.loan_id == "A", ["days_past_due", "property_value"]] = [90 + 30 * (months_in_default or 0), 12_000.0]
    if months_in_default is not None:
        book["months_in_default"] = [months_in_default, None, None]
    lgd_cfg = Lgd(kind="collateral", forced_sale_haircut=0.25, sale_costs=0.06, months_to_recovery=18, floor=0.0)
    res = expected_credit_loss(
        book, _table_source(), {"base": _flat_macro(hpi=hpi)}, as_of_idx=AS_OF, loss=Loss(lgd=lgd_cfg), staging=STAGING
    ).loan_table().set_index("loan_id")
    assert res.loc["A", "stage"] == 3
    recovery = 12_000.0 * hpi(AS_OF + to_sale) / hpi(AS_OF - 4) * 0.69 / (1 + 0.06 / 12) ** to_sale
    # no delinquency history in the book: today's balance and three missed months' interest
    ead = 10_000.0 * (1 + 0.06 / 12) ** 3
    assert res.loc["A", "lgd"] == pytest.approx(1 - recovery / ead, rel=1e-12)
    assert res.loc["A", "ecl_reported"] == pytest.approx(ead - recovery, rel=1e-12)


# --------------------------------------------------------------------------- exposure at default


def test_exposure_at_default_is_every_contractual_flow_still_owed():
    # IFRS 9 Appendix A, "credit loss" (from memory): the cash shortfall is every contractual cash flow due
    # less the flows expected, at the original effective interest rate. A loan defaulting on 90 days past
    # due has missed its last three instalments: at the end of the default month it owes those three,
    # each grown at the effective rate, and the scheduled balance after the default month's instalment
    # (numpy-financial's fv on both). That equals the balance after the last paid instalment grown three
    # months; discounted from the default month it is that balance discounted from the onset.
    B, r, n = 150_000.0, 0.048 / 12, 300
    payment = -npf.pmt(r, n, B)
    for u in (4, 17, 120):
        onset = -npf.fv(r, u - 3, -payment, B)  # after u - 3 payments
        owed = npf.fv(r, 3, -payment, 0.0) + -npf.fv(r, u, -payment, B)
        assert exposure_at_default(onset, 0.048, 3) == pytest.approx(owed, rel=1e-12)
        assert exposure_at_default(onset, 0.048, 3) * (1 + r) ** -u == pytest.approx(onset * (1 + r) ** -(u - 3), rel=1e-12)
    # a fee per missed instalment, and one more month's interest
    assert exposure_at_default(1_000.0, 0.12, 3, arrears_fee=25.0) == pytest.approx(1_000.0 * 1.01**3 + 75.0, rel=1e-15)
    assert exposure_at_default(1_000.0, 0.12, 3, extra_month=True) == pytest.approx(1_000.0 * 1.01**4, rel=1e-15)


@pytest.mark.parametrize("missed, fee", [(0, 0.0), (3, 0.0), (3, 40.0), (5, 10.0)])
def test_projected_ecl_takes_the_balance_at_the_onset_of_delinquency(missed, fee):
    # Against the month-by-month sum of _hand_ecl: a default in month u owes the balance after payment
    # u - missed (today's when that is before now) with the missed months' interest and fees. On main before
    # this rule EAD was the balance at the start of month u with no arrears interest (missed 3 then raised
    # this book's lifetime ECL by about 6%).
    book = _small_book()
    loss = _loss(exposure=Exposure(onset_months=missed, arrears_fee=fee))
    res = expected_credit_loss(
        book, _table_source(), {"base": _flat_macro()}, as_of_idx=AS_OF, loss=loss, staging=STAGING
    ).loan_table().set_index("loan_id")
    for lid, lgd in (("A", 0.3), ("B", 0.3), ("C", 0.5)):
        row = book.set_index("loan_id").loc[lid]
        rem = row.term - row.age
        life = _hand_ecl(row.balance, row.note_rate, rem, lgd, rem, missed=missed, fee=fee)
        assert res.loc[lid, "ecl_lifetime"] == pytest.approx(life, rel=1e-10)


def test_routes_into_default_are_mixed_by_their_share():
    # A quarter of defaults on a status code alone (no missed instalment), the rest on 90 days past due:
    # the expected loss is the share-weighted loss of the two, each with its own EAD and LGD.
    hpi = lambda idx: 100.0 * 0.99 ** (idx - AS_OF)  # noqa: E731 - falling prices: the collateral LGD bites
    lgd_cfg = Lgd(kind="collateral", forced_sale_haircut=0.25, sale_costs=0.06, months_to_recovery=6, floor=0.0)
    book = _small_book().assign(property_value=[12_000.0, 4_500.0, 7_000.0])

    def lifetime(**kw):
        loss = Loss(lgd=lgd_cfg, exposure=Exposure(onset_months=3, onset_months_status=0, **kw))
        out = expected_credit_loss(book, _table_source(), {"base": _flat_macro(hpi=hpi)}, as_of_idx=AS_OF, loss=loss, staging=STAGING)
        return out.loan_table()["ecl_lifetime"].to_numpy()

    mixed = lifetime(days_past_due_share=0.75)
    np.testing.assert_allclose(mixed, 0.75 * lifetime(days_past_due_share=1.0) + 0.25 * lifetime(days_past_due_share=0.0), rtol=1e-12)
    assert (lifetime(days_past_due_share=1.0) > lifetime(days_past_due_share=0.0)).all()


def test_stage_3_exposure_comes_from_the_loans_own_delinquency():
    # Loan A defaulted after five missed instalments from a balance of 10,200 (book columns from the panel);
    # loan B's panel has no month under 30 days past due before its default: today's balance, 3 missed.
    book = _small_book()
    book["days_past_due"] = [150, 120, 0]
    book["balance_at_onset"] = [10_200.0, None, None]
    book["months_in_arrears_at_default"] = [5, None, None]
    t = expected_credit_loss(
        book, _table_source(), {"base": _flat_macro()}, as_of_idx=AS_OF,
        loss=_loss(exposure=Exposure(arrears_fee=15.0)), staging=STAGING,
    ).loan_table().set_index("loan_id")
    assert t["stage"].tolist() == [3, 3, 1]
    assert t.loc["A", "ead"] == pytest.approx(10_200.0 * 1.005**5 + 75.0, rel=1e-14)
    assert t.loc["B", "ead"] == pytest.approx(4_000.0 + 45.0, rel=1e-14)  # note rate 0: no interest
    assert t.loc["A", "ecl_reported"] == pytest.approx(0.3 * t.loc["A", "ead"], rel=1e-14)
    assert t.loc["C", "ead"] == 6_000.0  # a live loan's exposure column is today's balance


def test_lgd_ecl_is_the_lgd_the_reported_ecl_applies():
    # The lgd column is the LGD of a default now (stage 3's); lgd_ecl is what the reported ECL applies:
    # sum u<=H S(u-1) hD LGD(u) EAD(u) DF(u) / sum S(u-1) hD EAD(u) DF(u), H = 12 in stage 1. Written out
    # month by month here with numpy-financial balances and the collateral formula by hand; on main before this
    # column there was no way to read it from the loan table.
    hpi = lambda idx: 100.0 * 0.99 ** (idx - AS_OF)  # noqa: E731 - falling prices: LGD rises with u
    lgd_cfg = Lgd(kind="collateral", forced_sale_haircut=0.25, sale_costs=0.06, months_to_recovery=6, floor=0.0)
    book = _small_book().assign(property_value=[12_000.0, 4_500.0, 7_000.0])
    t = expected_credit_loss(
        book, _table_source(), {"base": _flat_macro(hpi=hpi)}, as_of_idx=AS_OF, loss=Loss(lgd=lgd_cfg), staging=STAGING,
    ).loan_table().set_index("loan_id")
    r, n = 0.06 / 12, 20
    payment = -npf.pmt(r, n, 10_000.0)
    num = den = 0.0
    s_prev = 1.0
    for u in range(1, 13):
        ead = -npf.fv(r, max(u - 3, 0), -payment, 10_000.0) * (1 + r) ** 3
        recovery = 12_000.0 * hpi(AS_OF + u + 6) / hpi(AS_OF - 4) * 0.69 / (1 + r) ** 6
        lgd = max(1 - recovery / ead, 0.0)
        weight = s_prev * HD * ead * (1 + r) ** -u
        num, den = num + weight * lgd, den + weight
        s_prev *= 1 - HD - HP
    assert t.loc["A", "stage"] == 1
    assert t.loc["A", "lgd_ecl"] == pytest.approx(num / den, rel=1e-10)
    assert t.loc["A", "lgd_ecl"] != pytest.approx(t.loc["A", "lgd"], rel=1e-3)
    # with a constant LGD the two agree
    flat = expected_credit_loss(
        book, _table_source(), {"base": _flat_macro()}, as_of_idx=AS_OF, loss=_loss(), staging=STAGING
    ).loan_table()
    np.testing.assert_allclose(flat["lgd_ecl"], flat["lgd"], rtol=1e-12)


# --------------------------------------------------------------------------- stages


def test_thirty_days_past_due_is_stage_2_and_default_is_stage_3():
    # IFRS 9 5.5.11 backstop at 30 dpd; B5.5.37 default (90 dpd) -> credit-impaired, stage 3
    pd_now = np.array([0.01, 0.01, 0.01, 0.01])
    pd0 = np.array([0.01, 0.01, 0.01, 0.01])
    dpd = np.array([0, 29, 30, 95])
    stage, reason, _ = allocate_stages(pd_now, pd0, dpd, dpd >= 90, Staging())
    assert stage.tolist() == [1, 1, 2, 3]
    assert reason.tolist() == ["", "", "backstop", "default"]


@pytest.mark.parametrize(
    ("rule", "expected"),
    [("both", [2, 1, 1, 1, 2]), ("either", [2, 2, 2, 1, 2])],
)
def test_sicr_relative_and_absolute_thresholds(rule, expected):
    staging = Staging(sicr_relative=2.0, sicr_absolute=0.01, sicr_rule=rule)
    pd0 = np.array([0.010, 0.001, 0.100, 0.100, 0.0])
    now = np.array([0.025, 0.005, 0.120, 0.105, 0.02])
    # ratios 2.5, 5, 1.2, 1.05, inf; increases 0.015, 0.004, 0.02, 0.005, 0.02
    stage, reason, since = allocate_stages(now, pd0, np.zeros(5), np.zeros(5, bool), staging)
    assert stage.tolist() == expected
    # the reason names the thresholds that fired and count under the rule
    expected_reasons = {
        "both": ["sicr_relative+sicr_absolute", "", "", "", "sicr_relative+sicr_absolute"],
        "either": ["sicr_relative+sicr_absolute", "sicr_relative", "sicr_absolute", "", "sicr_relative+sicr_absolute"],
    }[rule]
    assert reason.tolist() == expected_reasons
    np.testing.assert_array_equal(since, np.where(stage == 2, 0.0, np.nan))
    # exactly at the thresholds counts (>=)
    s, _, _ = allocate_stages([0.02], [0.01], [0], [False], Staging(sicr_relative=2.0, sicr_absolute=0.01))
    assert s.tolist() == [2]


def test_each_stage_reason_on_hand_built_loans():
    # One loan per reason. PD at origination 1% for all; "now" 1% unless SICR is the point.
    staging = Staging(sicr_relative=2.0, sicr_absolute=0.01, dpd_backstop=30, probation_months=3)
    loans = {  # name: (pd now, dpd, in default, in cure period, months since arrears, SICR months before, watch list)
        "performing": (0.01, 0, False, False, np.nan, np.nan, False),
        "default": (1.0, 120, True, False, 0, np.nan, False),  # IFRS 9 B5.5.37: credit-impaired, stage 3
        "cure_period": (1.0, 0, True, True, 2, np.nan, False),  # no default condition now, cure not complete
        "backstop": (0.01, 45, False, False, 0, np.nan, False),  # IFRS 9 5.5.11: more than 30 days past due
        "sicr": (0.05, 0, False, False, np.nan, np.nan, False),  # IFRS 9 5.5.3: lifetime PD 5x, +4 points
        "watch_list": (0.01, 0, False, False, np.nan, np.nan, True),
        "arrears_probation": (0.01, 0, False, False, 1, np.nan, False),  # left the backstop last month
        "sicr_probation": (0.01, 0, False, False, np.nan, 1, False),  # SICR two months ago (1 at the last month-end)
        "probation_over": (0.01, 0, False, False, 3, 2, False),  # three whole months without a trigger
        "backstop_and_watch": (0.01, 30, False, False, 0, np.nan, True),
    }
    cols = list(zip(*loans.values()))
    stage, reason, since = allocate_stages(
        np.array(cols[0]), np.full(len(loans), 0.01), np.array(cols[1]), np.array(cols[2]), staging,
        in_cure_period=np.array(cols[3]), months_since_arrears=np.array(cols[4], float),
        months_since_sicr_before=np.array(cols[5], float), watch_list=np.array(cols[6]),
    )
    got = dict(zip(loans, zip(stage.tolist(), reason.tolist())))
    assert got == {
        "performing": (1, ""),  # IFRS 9 5.5.5: 12-month ECL
        "default": (3, "default"),
        "cure_period": (3, "cure_period"),
        "backstop": (2, "backstop"),
        "sicr": (2, "sicr_relative+sicr_absolute"),
        "watch_list": (2, "watch_list"),
        "arrears_probation": (2, "probation"),
        "sicr_probation": (2, "probation"),
        "probation_over": (1, ""),
        "backstop_and_watch": (2, "backstop+watch_list"),
    }
    # the SICR history carried to next month: 0 on a SICR or watch-list trigger, one more month otherwise
    assert dict(zip(loans, since.tolist()))["sicr_probation"] == 2.0
    assert dict(zip(loans, since.tolist()))["probation_over"] == 3.0
    assert dict(zip(loans, since.tolist()))["watch_list"] == 0.0
    assert np.isnan(dict(zip(loans, since.tolist()))["performing"])


def test_the_sicr_sensitivity_restages_the_loans_at_each_threshold():
    from creditsurv.loss import sicr_sensitivity

    # PD at origination 1% each; lifetime PD now 1.5%, 2.5%, 3.5%, 5%: ratios 1.5, 2.5, 3.5, 5 (all at least
    # 1 point up but the first). A fifth loan is on the backstop, a sixth in default.
    staging = Staging(sicr_relative=2.0, sicr_absolute=0.004)
    now = np.array([0.015, 0.025, 0.035, 0.05, 0.01, 1.0])
    loans = pd.DataFrame({
        "loan_id": list("abcdef"), "pd_lifetime": now, "pd_lifetime_origination": 0.01,
        "days_past_due": [0, 0, 0, 0, 45, 120], "ecl_12m": [10.0, 20, 30, 40, 50, 600], "ecl_lifetime": [100.0, 200, 300, 400, 500, 600],
    })  # fmt: skip
    stages = allocate_stages(now, loans["pd_lifetime_origination"], loans["days_past_due"], loans["days_past_due"] >= 90, staging)
    loans["stage"] = stages.stage
    loans["ecl_reported"] = np.where(stages.stage == 1, loans["ecl_12m"], loans["ecl_lifetime"])
    book = loans[["loan_id"]].copy()
    table = sicr_sensitivity(loans, book, staging).set_index("multiplier")
    # thresholds 1, 2, 3, 4: SICR for ratios at or above them (and 0.4 points up), plus the backstop loan
    assert table["sicr_relative"].tolist() == [1.0, 2.0, 3.0, 4.0]
    assert table["stage_2_loans"].tolist() == [5, 4, 3, 2]
    assert table["stage_2_sicr_loans"].tolist() == [4, 3, 2, 1]
    assert table.loc[1.0, "stage_2_share"] == pytest.approx(4 / 5)
    # at the configured threshold the run's own reported ECL; each loan leaving stage 2 reports its 12-month ECL
    assert table.loc[1.0, "ecl_reported"] == pytest.approx(loans["ecl_reported"].sum()) and table.loc[1.0, "ecl_change"] == 0
    assert table.loc[0.5, "ecl_change"] == pytest.approx(100 - 10)
    assert table.loc[2.0, "ecl_change"] == pytest.approx(-(200 - 20) - (300 - 30))  # b and c leave


@pytest.mark.parametrize("months", [0, 1, 3, 6])
def test_probation_holds_a_loan_in_stage_2_for_the_configured_months(months):
    # A loan 30 days past due in month 0 that pays from month 1 on: stage 2 while fewer than `months` whole
    # months have passed without a trigger (common practice: a few months of good behaviour, often 3;
    # the value is a policy choice of the lender, not a rule of IFRS 9).
    staging = Staging(probation_months=months)
    stages = []
    for month in range(0, 9):
        dpd = 30 if month == 0 else 0
        s, _, _ = allocate_stages([0.01], [0.01], [dpd], [False], staging, months_since_arrears=[float(month)])
        stages.append(int(s[0]))
    assert stages == [2] + [2] * max(months - 1, 0) + [1] * (8 - max(months - 1, 0))


def test_reported_ecl_is_12_month_for_stage_1_and_lifetime_for_stages_2_and_3():
    book = _small_book()
    book["days_past_due"] = [0, 30, 120]  # A stage 1, B backstop, C in default
    res = expected_credit_loss(
        book, _table_source(), {"base": _flat_macro()}, as_of_idx=AS_OF, loss=_loss(), staging=STAGING
    )
    t = res.loan_table().set_index("loan_id")
    assert t["stage"].tolist() == [1, 2, 3]
    assert t.loc["A", "ecl_reported"] == t.loc["A", "ecl_12m"]  # IFRS 9 5.5.5
    assert t.loc["B", "ecl_reported"] == t.loc["B", "ecl_lifetime"]  # IFRS 9 5.5.3
    assert t.loc["B", "ecl_lifetime"] > t.loc["B", "ecl_12m"]
    # stage 3: LGD x EAD, PD 1; with no delinquency history, EAD is today's balance and 3 missed months' interest
    ead = 6_000.0 * (1 + 0.12 / 12) ** 3
    assert t.loc["C", "ecl_reported"] == pytest.approx(0.5 * ead, rel=1e-15)
    assert t.loc["C", "pd_lifetime"] == 1.0
    # loans in default are not projected
    assert "C" not in set(res.projection.loans["loan_id"])
    seg = res.segments.set_index(["segment", "stage"])
    assert seg.loc[("subprime", 3), "ecl"] == pytest.approx(0.5 * ead)
    assert seg.loc[("subprime", 3), "coverage_ratio"] == pytest.approx(0.5 * ead / 6_000.0)
    assert seg["n_loans"].sum() == 3


def test_in_default_column_overrides_days_past_due():
    book = _small_book().assign(in_default=[False, True, False])
    t = expected_credit_loss(
        book, _table_source(), {"base": _flat_macro()}, as_of_idx=AS_OF, loss=_loss(), staging=STAGING
    ).loan_table().set_index("loan_id")
    assert t["stage"].tolist() == [1, 3, 1]


class _MacroSource:
    """Default hazard rising with the market rate (a stand-in for a fitted macro effect)."""

    required_inputs = ["macro:mortgage_rate:0", "age"]

    def hazards(self, raw):
        hd = 0.002 * raw["macro:mortgage_rate:0"]
        return hd, np.full_like(hd, 0.01)


def test_probability_weighting_of_scenarios():
    # IFRS 9 5.5.17: probability-weighted ECL = sum_s w_s ECL_s
    base, down = _flat_macro(), _flat_macro()
    down.loc[AS_OF + 1:, "mortgage_rate"] = 8.0
    book = _small_book()
    res = expected_credit_loss(
        book, _MacroSource(), {"base": base, "down": down}, as_of_idx=AS_OF, weights={"base": 0.7, "down": 0.3},
        loss=_loss(), staging=STAGING,
    )
    t = res.loan_table()
    for m in ("ecl_12m", "ecl_lifetime", "pd_12m", "pd_lifetime"):
        np.testing.assert_allclose(t[m], 0.7 * t[f"{m}_base"] + 0.3 * t[f"{m}_down"], rtol=1e-14)
    assert (t["ecl_lifetime_down"] > t["ecl_lifetime_base"]).all()
    # The tidy form holds the same numbers: one row per loan and scenario, weighted last.
    tidy = res.by_scenario.set_index(["scenario", "loan_id"])
    assert list(res.by_scenario["scenario"].cat.categories) == ["base", "down", "weighted"]
    for s in ("base", "down"):
        np.testing.assert_array_equal(tidy.loc[s, "ecl_lifetime"].to_numpy(), t[f"ecl_lifetime_{s}"].to_numpy())
    np.testing.assert_array_equal(tidy.loc["weighted", "pd_12m"].to_numpy(), t["pd_12m"].to_numpy())
    # direct sum for loan A under each scenario: hD = 0.002 x rate, hP = 0.01
    row = book.iloc[0]
    for s, rate in (("base", 5.0), ("down", 8.0)):
        hd, hp, r = 0.002 * rate, 0.01, 0.06 / 12
        payment = -npf.pmt(r, 20, row.balance)
        surv, total = 1.0, 0.0
        for u in range(1, 21):
            onset = -npf.fv(r, max(u - 3, 0), -payment, row.balance)  # after the last paid instalment
            total += surv * hd * 0.3 * onset * (1 + r) ** 3 * (1 + r) ** (-u)
            surv *= 1 - hd - hp
        assert t.loc[0, f"ecl_lifetime_{s}"] == pytest.approx(total, rel=1e-10)


def test_pd_at_origination_is_projected_when_no_column_is_given():
    book = _small_book()
    res = expected_credit_loss(
        book, _MacroSource(), {"base": _flat_macro()}, as_of_idx=AS_OF, loss=_loss(), staging=Staging()
    )
    po = origination_pd(book, _MacroSource(), _flat_macro())
    np.testing.assert_allclose(res.loans.set_index("loan_id")["pd_lifetime_origination"], po.loc[["A", "B", "C"]], rtol=1e-15)
    assert (res.loans["stage"] == 1).all()


def test_pd_at_origination_covers_the_same_remaining_life_as_today():
    # Constant hazards hD, hP: the origination view of default after age a, given
    # survival to a, is the closed form hD / (hD + hP) * (1 - (1 - hD - hP)^(T - a)),
    # the same as today's lifetime PD over the remaining T - a months (IFRS 9
    # B5.5.11 compares the risk of default over the same expected life).
    from creditsurv.model import HazardTable

    hd, hp = 0.003, 0.02
    source = HazardTable(pd.DataFrame({"age": [1], "default": [hd], "prepay": [hp]}))
    book = _small_book()
    po = origination_pd(book, source, _flat_macro())
    remaining = (book["term"] - book["age"]).to_numpy()
    expected = hd / (hd + hp) * (1 - (1 - hd - hp) ** remaining)
    np.testing.assert_allclose(po.loc[["A", "B", "C"]].to_numpy(), expected, rtol=1e-12)
    # Without an age column the whole term from origination is covered.
    full = origination_pd(book.drop(columns=["age"]), source, _flat_macro())
    np.testing.assert_allclose(full.loc[["A", "B", "C"]].to_numpy(), hd / (hd + hp) * (1 - (1 - hd - hp) ** book["term"].to_numpy()), rtol=1e-12)


def _spiking_macro():
    """Market rate 5% but 9% in loan A's origination month (AS_OF - 4)."""
    macro = _flat_macro()
    macro.loc[AS_OF - 4, "mortgage_rate"] = 9.0
    return macro


def _origination_view_by_hand(macro, o, term, age, months=24, hold=False):
    """Lifetime PD after ``age`` given survival to it, from origination month ``o``: the market rate moves
    from its value at o to its mean up to o over ``months`` (README, SICR), hD = 0.002 x rate, hP = 0.01."""
    history = macro.loc[:o, "mortgage_rate"]
    x0, mean = history.loc[o], history.mean()
    s, f, f_at_age, s_at_age = 1.0, 0.0, 0.0, 1.0
    for u in range(1, term + 1):
        rate = x0 if hold else x0 + (mean - x0) * min(u, months) / months
        hd = 0.002 * rate
        f += s * hd
        s *= 1 - hd - 0.01
        if u == age:
            f_at_age, s_at_age = f, s
    return (f - f_at_age) / s_at_age


def test_the_origination_view_reverts_from_the_origination_months_values():
    # Loan A was granted in a month of a 9% market rate: its origination view is one path from 9% back to the
    # history's mean up to then over 24 months (scenario_extension.months), not 9% for its whole life. On main
    # before this rule every series was held at its origination value.
    from creditsurv.config import ScenarioExtension

    book = _small_book()
    macro = _spiking_macro()
    po = origination_pd(book, _MacroSource(), macro)
    for lid, o, term, age in (("A", AS_OF - 4, 24, 4), ("B", AS_OF - 10, 30, 10), ("C", AS_OF, 6, 0)):
        assert po[lid] == pytest.approx(_origination_view_by_hand(macro, o, term, age), rel=1e-12), lid
    # a series listed in hold_last_series holds its origination value
    held = origination_pd(book, _MacroSource(), macro, extension=ScenarioExtension(hold_last_series=("mortgage_*",)))
    assert held["A"] == pytest.approx(_origination_view_by_hand(macro, AS_OF - 4, 24, 4, hold=True), rel=1e-12)
    assert held["A"] > po["A"]
    # a loan originated before the macro history starts reads its first month
    early = book.assign(origination_idx=[int(macro.index.min()) - 30, AS_OF - 10, AS_OF])
    at_first = book.assign(origination_idx=[int(macro.index.min()), AS_OF - 10, AS_OF])
    np.testing.assert_allclose(origination_pd(early, _MacroSource(), macro).to_numpy(), origination_pd(at_first, _MacroSource(), macro).to_numpy(), rtol=1e-15)


def test_the_sicr_test_compares_one_path_with_one_path():
    # Today's view in the SICR test is one scenario's lifetime PD (the first, or staging.sicr_scenario), like
    # the projected origination view; the weighted PD would mix a downside the origination view never saw.
    # Loan C was granted this month at 5%: baseline PD / origination PD is about 1, the weighted one about 1.3.
    base, down = _flat_macro(), _flat_macro()
    down.loc[AS_OF + 1:, "mortgage_rate"] = 8.0
    book = _small_book()
    staging = Staging(sicr_relative=1.2, sicr_absolute=0.0)

    def run(**kw):
        return expected_credit_loss(
            book, _MacroSource(), {"base": base, "down": down}, as_of_idx=AS_OF, weights={"base": 0.5, "down": 0.5},
            loss=_loss(), staging=dataclasses.replace(staging, **kw),
        ).loan_table().set_index("loan_id")

    t = run()
    assert t.loc["C", "pd_lifetime"] / t.loc["C", "pd_lifetime_origination"] > 1.2  # the weighted view would trigger
    np.testing.assert_array_equal(t["pd_lifetime_staging"], t["pd_lifetime_base"])
    assert t.loc["C", "stage"] == 1
    down_view = run(sicr_scenario="down")
    np.testing.assert_array_equal(down_view["pd_lifetime_staging"], down_view["pd_lifetime_down"])
    assert down_view.loc["C", "stage"] == 2
    # a stored PD at origination is compared with today's weighted PD
    stored = run(pd_at_origination_column="pd0")
    np.testing.assert_array_equal(stored["pd_lifetime_staging"], stored["pd_lifetime"])
    with pytest.raises(ProjectionError, match="staging.sicr_scenario: 'up'"):
        run(sicr_scenario="up")


def test_low_credit_risk_loans_are_exempt_from_the_sicr_test_only():
    # IFRS 9 5.5.10: an entity may assume credit risk has not increased significantly when the instrument has
    # low credit risk at the reporting date. The SICR test does not fire for such a loan; the 30 days past due
    # backstop (5.5.11) and the watch list still do. Without the exemption (main before it) both are stage 2.
    pd_now, pd0 = np.array([0.04, 0.04, 0.04, 0.04]), np.array([0.01, 0.01, 0.01, 0.01])
    dpd = np.array([0, 0, 30, 0])
    low = np.array([True, False, True, True])
    watch = np.array([False, False, False, True])
    got = allocate_stages(pd_now, pd0, dpd, np.zeros(4, bool), Staging(), watch_list=watch, low_credit_risk=low)
    assert got.stage.tolist() == [1, 2, 2, 2]
    assert got.reason.tolist() == ["", "sicr_relative+sicr_absolute", "backstop", "watch_list"]
    assert allocate_stages(pd_now, pd0, dpd, np.zeros(4, bool), Staging()).stage.tolist() == [2, 2, 2, 2]
    # through the ECL: a 12-month PD at or below staging.low_credit_risk_pd (weighted) exempts the loan
    book = _small_book().assign(pd0=[0.001, 0.001, 0.001])
    staging = Staging(pd_at_origination_column="pd0", sicr_relative=1.5, sicr_absolute=0.0)
    res = expected_credit_loss(book, _table_source(), {"base": _flat_macro()}, as_of_idx=AS_OF, loss=_loss(), staging=staging)
    t = res.loan_table().set_index("loan_id")
    assert (t["stage"] == 2).all()
    threshold = float(t["pd_12m"].min())  # the lowest 12-month PD: exactly that loan is low credit risk
    exempt = expected_credit_loss(
        book, _table_source(), {"base": _flat_macro()}, as_of_idx=AS_OF, loss=_loss(),
        staging=dataclasses.replace(staging, low_credit_risk_pd=threshold),
    ).loan_table().set_index("loan_id")
    assert (exempt["stage"] == np.where(t["pd_12m"] <= threshold, 1, 2)).all() and (exempt["stage"] == 1).sum() == 1


def test_staging_errors_are_clear():
    book = _small_book()
    with pytest.raises(ProjectionError, match="no column 'pd_orig'"):
        expected_credit_loss(book, _table_source(), {"base": _flat_macro()}, as_of_idx=AS_OF, loss=_loss(),
                             staging=Staging(pd_at_origination_column="pd_orig"))
    with pytest.raises(ProjectionError, match="days_past_due"):
        expected_credit_loss(book.drop(columns=["days_past_due"]), _table_source(), {"base": _flat_macro()},
                             as_of_idx=AS_OF, loss=_loss(), staging=STAGING)


def test_weighted_schedule_rows_keep_the_product_identity():
    base, down = _flat_macro(), _flat_macro()
    down.loc[AS_OF + 1:, "mortgage_rate"] = 8.0
    tables = []
    lgd_cfg = Lgd(kind="collateral", months_to_recovery=3, floor=0.0)
    down.loc[AS_OF + 1:, "hpi_north"] = 80.0
    res = expected_credit_loss(
        _small_book(), _MacroSource(), {"base": base, "down": down}, as_of_idx=AS_OF,
        weights={"base": 0.5, "down": 0.5}, loss=Loss(lgd=lgd_cfg), staging=STAGING, schedule_writer=tables.append,
    )
    s = pa.concat_tables(tables).to_pandas()
    w = s[s.scenario == WEIGHTED]
    np.testing.assert_allclose(w["expected_loss"], w["marginal_pd"] * w["lgd"] * w["ead"] * w["discount_factor"], rtol=1e-12)
    total = s.groupby(["loan_id", "scenario"], observed=True)["expected_loss"].sum()
    t = res.loan_table().set_index("loan_id")
    assert total[("A", WEIGHTED)] == pytest.approx(t.loc["A", "ecl_lifetime"], rel=1e-12)


def test_partitions_combined_from_their_sums_equal_the_whole_book():
    # Invariant: the ECL of a book does not depend on how an engine splits it. Per-loan
    # values are the same rows; the segment tables are built from pooled sums. The
    # partitions differ in their segments (the last has no 'subprime' loan) and their
    # horizons (its loans mature sooner), which the pooling must align.
    from creditsurv.loss import combine_partitions

    rng = np.random.default_rng(3)
    n = 90
    age = rng.integers(0, 40, n)
    term = age + rng.integers(1, 90, n)
    book = pd.DataFrame(
        {
            "loan_id": [f"L{i:03d}" for i in range(n)],
            "segment": np.where(np.arange(n) < 60, rng.choice(["prime", "subprime"], n), "prime"),
            "age": age,
            "term": np.where(np.arange(n) < 60, term, age + rng.integers(1, 20, n)),
            "note_rate": rng.uniform(0.0, 0.08, n).round(4),
            "balance": rng.uniform(1_000, 50_000, n).round(2),
            "original_balance": 60_000.0,
            "property_value": 90_000.0,
            "origination_idx": AS_OF - age,
            "region": "North",
            "days_past_due": rng.choice([0, 0, 0, 45], n),
            "pd0": 0.2,
            "score": rng.integers(550, 800, n),
        }
    )
    hazards = pd.DataFrame({"age": np.arange(1, 200), "default": np.linspace(0.002, 0.02, 199), "prepay": 0.015})
    paths = {"base": _flat_macro(last=AS_OF + 200), "down": _flat_macro(last=AS_OF + 200)}
    options = dict(
        as_of_idx=AS_OF, weights={"base": 0.7, "down": 0.3}, loss=_loss(), staging=STAGING,
        band_column="score", band_edges=(640.0, 720.0),
    )
    whole = expected_credit_loss(book, HazardTable(hazards), paths, **options)
    parts = [expected_credit_loss(book.iloc[a:b], HazardTable(hazards), paths, **options) for a, b in ((0, 30), (30, 60), (60, n))]
    combined = combine_partitions(parts)
    assert combine_partitions([whole]) is whole
    pd.testing.assert_frame_equal(combined.loan_table(), whole.loan_table())
    key = ["scenario", "loan_id"]
    pd.testing.assert_frame_equal(
        combined.by_scenario.sort_values(key, ignore_index=True), whole.by_scenario.sort_values(key, ignore_index=True)
    )
    pd.testing.assert_frame_equal(combined.segments, whole.segments, check_exact=False, rtol=1e-12)
    for name in ("term_structure", "speeds", "speed_multiples"):
        pd.testing.assert_frame_equal(
            getattr(combined.projection, name), getattr(whole.projection, name), check_exact=False, rtol=1e-10, atol=1e-15
        )


@pytest.mark.parametrize("floor", [0.0, 0.1])
def test_the_loss_at_default_is_the_clipped_lgd_times_the_ead(floor):
    # The chunks compute the loss at default without a division, clip(EAD - PV, floor x EAD, EAD); by hand it is
    # EAD x clip(1 - PV / EAD, floor, 1), the collateral LGD of the README (recovery shortfall, floored, at most
    # the whole exposure). Equal up to rounding, and exactly at the clips and at EAD = 0.
    rng = np.random.default_rng(11)
    ead = np.r_[rng.uniform(1e3, 5e5, 2000), 0.0, 1e5, 1e5]
    pv = np.r_[ead[:2000] * rng.uniform(0.0, 1.6, 2000), 5e4, 2e5, 0.0]  # shortfalls, recoveries above the EAD
    by_hand = ead * lgd_of_recovery(ead, pv, floor)
    np.testing.assert_allclose(loss_at_default(ead, pv, floor), by_hand, rtol=1e-13, atol=0)
    assert loss_at_default(ead, pv, floor)[2000] == 0.0  # no exposure, no loss
    assert loss_at_default(ead, pv, floor)[2001] == floor * 1e5  # the recovery covers the EAD: the floor
    assert loss_at_default(ead, pv, floor)[2002] == 1e5  # nothing recovered: the whole EAD
