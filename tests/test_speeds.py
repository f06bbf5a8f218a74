"""Tests of creditsurv.speeds: PSA / SDA curves, unit conversions, hazard sources.

References: the PSA and SDA standard curves as published formulas (written out
below from memory, independently of the module's vectorised form);
numpy-financial for the level-payment schedule inside the pool cash-flow loop.
"""

from __future__ import annotations

import numpy as np
import numpy_financial as npf
import pandas as pd
import pytest

from creditsurv.config import Exposure, Lgd, Loss, Staging
from creditsurv.errors import ProjectionError
from creditsurv.forecast import project_loans
from creditsurv.loss import expected_credit_loss
from creditsurv.model import (
    BenchmarkCurves,
    HazardTable,
    cdr_to_mdr,
    cpr_to_smm,
    equivalent_psa,
    equivalent_sda,
    mdr_to_cdr,
    psa_cpr,
    sda_cdr,
    smm_to_cpr,
    speeds_to_hazards,
)

AS_OF = 2024 * 12  # 2024-01


def _psa_written_out(age: int, multiple: float) -> float:
    # PSA standard (from memory): 100% PSA CPR = 0.2% in month 1, +0.2% a month to 6% at month 30, flat after
    cpr = 0.06 if age >= 30 else 0.002 * age
    return cpr * multiple / 100.0


def _sda_written_out(age: int, multiple: float) -> float:
    # SDA standard (from memory): 0.02% month 1, +0.02% a month to 0.60% at 30; flat to 60;
    # -0.0095% a month to 0.03% at 120; flat 0.03% after
    if age <= 30:
        cdr = 0.0002 * age
    elif age <= 60:
        cdr = 0.006
    elif age <= 120:
        cdr = 0.006 - 0.000095 * (age - 60)
    else:
        cdr = 0.0003
    return cdr * multiple / 100.0


@pytest.mark.parametrize("multiple", [50.0, 100.0, 165.0, 300.0])
def test_psa_cpr_and_smm_by_age_match_the_standard(multiple):
    ages = np.arange(1, 361)
    expected_cpr = np.array([_psa_written_out(a, multiple) for a in ages])
    np.testing.assert_allclose(psa_cpr(ages, multiple), expected_cpr, rtol=0, atol=1e-15)
    # SMM = 1 - (1 - CPR)^(1/12), the PSA standard's monthly conversion
    expected_smm = np.array([1 - (1 - c) ** (1 / 12) for c in expected_cpr])
    np.testing.assert_allclose(cpr_to_smm(psa_cpr(ages, multiple)), expected_smm, rtol=1e-11, atol=1e-16)
    assert psa_cpr(30, 100.0) == pytest.approx(0.06, abs=1e-15)
    assert psa_cpr(1, 100.0) == pytest.approx(0.002, abs=1e-15)


@pytest.mark.parametrize("multiple", [50.0, 100.0, 200.0, 400.0])
def test_sda_cdr_and_mdr_by_age_match_the_standard(multiple):
    ages = np.arange(1, 361)
    expected_cdr = np.array([_sda_written_out(a, multiple) for a in ages])
    np.testing.assert_allclose(sda_cdr(ages, multiple), expected_cdr, rtol=0, atol=1e-15)
    expected_mdr = np.array([1 - (1 - c) ** (1 / 12) for c in expected_cdr])
    np.testing.assert_allclose(cdr_to_mdr(sda_cdr(ages, multiple)), expected_mdr, rtol=1e-11, atol=1e-16)
    # the published anchor points of 100% SDA
    base = sda_cdr(np.array([1, 30, 60, 120, 200]), 100.0)
    np.testing.assert_allclose(base, [0.0002, 0.006, 0.006, 0.0003, 0.0003], rtol=0, atol=1e-15)


def test_conversions_round_trip_and_match_the_annualisation():
    # CPR = 1 - (1 - SMM)^12 (closed form), and its inverse
    smm = np.array([0.0, 0.001, 0.005, 0.02, 0.5])
    np.testing.assert_allclose(smm_to_cpr(smm), 1 - (1 - smm) ** 12, rtol=1e-15)
    np.testing.assert_allclose(cpr_to_smm(smm_to_cpr(smm)), smm, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(cdr_to_mdr(mdr_to_cdr(smm)), smm, rtol=1e-12, atol=1e-15)
    assert smm_to_cpr(0.005143) == pytest.approx(0.06, abs=1e-5)  # 6% CPR is about 0.514% SMM


def test_equivalent_multiples_recover_the_generating_multiple():
    ages = np.arange(1, 200)
    assert equivalent_psa(ages, psa_cpr(ages, 173.0)) == pytest.approx(173.0, rel=1e-12)
    assert equivalent_sda(ages, sda_cdr(ages, 45.0), np.linspace(1, 2, len(ages))) == pytest.approx(45.0, rel=1e-12)


def test_equivalent_psa_is_weighted_least_squares_in_cpr_units():
    # reference: numpy.linalg.lstsq on the sqrt(w)-scaled one-column system
    rng = np.random.default_rng(7)
    ages = np.arange(1, 120)
    cpr = psa_cpr(ages, 120.0) + rng.normal(0, 0.005, len(ages))
    w = rng.uniform(0.5, 3.0, len(ages))
    x = psa_cpr(ages, 100.0)
    sw = np.sqrt(w)
    m, *_ = np.linalg.lstsq((sw * x)[:, None], sw * cpr, rcond=None)
    assert equivalent_psa(ages, cpr, w) == pytest.approx(100.0 * m[0], rel=1e-10)


def test_benchmark_hazards_follow_the_cash_flow_convention():
    ages = np.arange(1, 300, dtype=float)
    hd, hp = BenchmarkCurves(psa=150, sda=200).hazards({"age": ages})
    mdr = cdr_to_mdr(sda_cdr(ages, 200))
    smm = cpr_to_smm(psa_cpr(ages, 150))
    np.testing.assert_allclose(hd, mdr, rtol=1e-15)
    np.testing.assert_allclose(hp, smm * (1 - mdr), rtol=1e-15)
    # continuing = (1 - MDR)(1 - SMM): prepayment applies to what survives defaults
    np.testing.assert_allclose(1 - hd - hp, (1 - mdr) * (1 - smm), rtol=1e-14)
    np.testing.assert_array_equal(speeds_to_hazards(mdr, smm)[1], hp)


def _pool_cumulative_default(b0, rate, n, age0, psa, sda):
    """The standard's pool cash flows, month by month (PSA/SDA conventions, from memory).

    defaults = MDR x beginning performing balance; scheduled principal of the
    surviving balance from numpy_financial.ppmt-equivalent level payment;
    prepayments = SMM x (balance - defaults - scheduled principal).
    """
    r = rate / 12
    perf = b0
    defaulted = 0.0
    for t in range(1, n + 1):
        age = age0 + t
        mdr = 1 - (1 - _sda_written_out(age, sda)) ** (1 / 12)
        smm = 1 - (1 - _psa_written_out(age, psa)) ** (1 / 12)
        defaults = mdr * perf
        surviving = perf - defaults
        remaining = n - t + 1
        sched = -npf.ppmt(r, 1, remaining, surviving)  # first-period principal of a fresh level-payment loan
        prepay = smm * (surviving - sched)
        perf = surviving - sched - prepay
        defaulted += defaults
    return defaulted / b0


@pytest.mark.parametrize(("age0", "term", "psa", "sda"), [(0, 360, 100.0, 100.0), (0, 360, 250.0, 300.0), (20, 240, 150.0, 60.0)])
def test_pool_run_reproduces_the_standard_cumulative_default(age0, term, psa, sda):
    b0, rate = 250_000.0, 0.055
    expected = _pool_cumulative_default(b0, rate, term - age0, age0, psa, sda)
    loans = pd.DataFrame(
        {
            "loan_id": ["P1"], "segment": ["pool"], "age": [age0], "term": [term], "note_rate": [rate],
            "balance": [b0], "days_past_due": [0],
        }
    )
    macro = pd.DataFrame({"x": [0.0]}, index=pd.Index([AS_OF], name="month_idx"))
    # expected defaulted balance sum S(u-1) hD(u) EAD(u): ECL with LGD 1, no discounting. The standard's
    # defaulted balance is the month's beginning balance; with one missed instalment our EAD is that balance
    # with the month's interest, the same in every month, so the ratio is (1 + r/12) times the standard's
    loss = Loss(lgd=Lgd(kind="constant", constant=1.0, floor=0.0), discount="none", exposure=Exposure(onset_months=1))
    loans = loans.assign(pd0=0.01)
    res = expected_credit_loss(
        loans, BenchmarkCurves(psa, sda), {"base": macro}, as_of_idx=AS_OF, loss=loss,
        staging=Staging(pd_at_origination_column="pd0"),
    )
    assert res.loans["ecl_lifetime"].iloc[0] / b0 == pytest.approx(expected * (1 + rate / 12), rel=1e-10)


def test_pool_speeds_recover_the_benchmark_multiples():
    ages = np.array([0, 5, 30, 61, 100])
    loans = pd.DataFrame(
        {
            "loan_id": [f"L{i}" for i in range(5)], "segment": ["s"] * 5, "age": ages, "term": [360] * 5,
            "note_rate": [0.04, 0.05, 0.06, 0.03, 0.0], "balance": [1e5, 2e5, 1.5e5, 9e4, 5e4],
        }
    )
    macro = pd.DataFrame({"x": [0.0]}, index=pd.Index([AS_OF], name="month_idx"))
    res = project_loans(loans, BenchmarkCurves(psa=180, sda=70), {"base": macro}, as_of_idx=AS_OF)
    sp = res.speeds[res.speeds["scenario"] == "base"]
    # at a loan's last month its balance after scheduled principal is 0: nothing is exposed to prepayment
    okp = sp["prepay_exposure"] > 0
    assert sp.loc[~okp, "loan_age"].tolist() == [360]
    np.testing.assert_allclose(sp.loc[okp, "cpr"], psa_cpr(sp.loc[okp, "loan_age"].to_numpy(), 180), rtol=1e-9, atol=1e-15)
    ok = sp["default_exposure"] > 0
    np.testing.assert_allclose(sp.loc[ok, "cdr"], sda_cdr(sp.loc[ok, "loan_age"].to_numpy(), 70), rtol=1e-9, atol=1e-15)
    m = res.speed_multiples.set_index("scenario")
    assert m.loc["base", "psa"] == pytest.approx(180.0, rel=1e-9)
    assert m.loc["base", "sda"] == pytest.approx(70.0, rel=1e-9)


def test_hazard_table_looks_up_by_age_and_holds_the_last_row():
    table = pd.DataFrame({"age": [1, 2, 3], "default": [0.01, 0.02, 0.03], "prepay": [0.1, 0.2, 0.3]})
    hd, hp = HazardTable(table).hazards({"age": np.array([1, 3, 2, 10, 0])})
    np.testing.assert_array_equal(hd, [0.01, 0.03, 0.02, 0.03, 0.01])
    np.testing.assert_array_equal(hp, [0.1, 0.3, 0.2, 0.3, 0.1])


def test_hazard_table_rejects_gaps_and_non_probabilities():
    with pytest.raises(ProjectionError, match="consecutive"):
        HazardTable(pd.DataFrame({"age": [1, 3], "default": [0.0, 0.0], "prepay": [0.0, 0.0]}))
    with pytest.raises(ProjectionError, match="ages \\[2\\]"):
        HazardTable(pd.DataFrame({"age": [1, 2], "default": [0.0, 0.7], "prepay": [0.0, 0.5]}))
    with pytest.raises(ProjectionError, match="missing column"):
        HazardTable(pd.DataFrame({"age": [1], "default": [0.0]}))
