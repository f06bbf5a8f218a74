"""Tests of creditsurv.projection: scenario paths, covariates, curves, chunking, errors.

References: closed forms of constant-hazard competing risks (geometric
survival, F_D = hD / (hD + hP) (1 - S)); numpy-financial for the level-payment
schedule; covariates recomputed by hand in plain Python loops.
"""

from __future__ import annotations

import numpy as np
import numpy_financial as npf
import pandas as pd
import pyarrow as pa
import pytest

from creditsurv.config import Collateral, Scenario, ScenarioWeights, config_from_dict
from creditsurv.errors import ConfigError, ModelError, ProjectionError
from creditsurv.forecast import (
    WEIGHTED,
    TableWriter,
    band_codes,
    band_labels,
    extend_path,
    load_scenario_paths,
    origination_pd,
    prepare_paths,
    project_loans,
    sort_with_bands,
)
from creditsurv.model import (
    BenchmarkCurves,
    HazardTable,
    scheduled_balance,
    scheduled_balance_sql,
)
from creditsurv.months import parse_month

AS_OF = parse_month("2024-12")
MONTHS = np.arange(parse_month("1994-01"), AS_OF + 1)


class LogitSource:
    """A tiny multinomial-logit hazard source on age, LTV, rate incentive, a lagged macro series and a score."""

    required_inputs = ["age", "log_age", "current_ltv", "rate_incentive", "macro:unemployment_rate:1", "credit_score"]

    def __init__(self):
        self.calls = []

    def hazards(self, raw):
        self.calls.append({k: np.array(v) for k, v in raw.items()})
        eta_d = -6.0 + 0.3 * raw["log_age"] + 2.0 * raw["current_ltv"] + 0.05 * raw["rate_incentive"] + 0.2 * raw[
            "macro:unemployment_rate:1"] - 0.004 * (raw["credit_score"] - 700)
        eta_p = -4.5 - 0.002 * raw["age"] - 0.5 * raw["current_ltv"] + 0.4 * raw["rate_incentive"]
        ed, ep = np.exp(eta_d), np.exp(eta_p)
        return ed / (1 + ed + ep), ep / (1 + ed + ep)


def _history():
    t = np.arange(len(MONTHS))
    return pd.DataFrame(
        {
            "unemployment_rate": 5.0 + np.sin(t / 7.0),
            "mortgage_rate": 4.0 + 0.01 * t,
            "hpi_north": 100.0 * 1.003**t,
            "hpi_south": 100.0 * 1.002**t,
        },
        index=pd.Index(MONTHS, name="month_idx"),
    )


def _scenario_frame(months_ahead=36, shock=0.0):
    idx = np.arange(AS_OF + 1, AS_OF + 1 + months_ahead)
    k = np.arange(1, months_ahead + 1)
    return pd.DataFrame(
        {
            "unemployment_rate": 4.0 + shock * np.minimum(k, 12) / 12,
            "mortgage_rate": 6.0 - 0.02 * k,
            "hpi_north": 150.0 * (1 - 0.1 * shock) * 1.001**k,
            "hpi_south": 120.0 * 1.0015**k,
        },
        index=pd.Index(idx, name="month_idx"),
    )


def _paths(until=AS_OF + 500):
    hist = _history()
    return {
        "base": extend_path(hist, _scenario_frame(), until, "revert_to_mean", 24, as_of_idx=AS_OF, name="base"),
        "down": extend_path(hist, _scenario_frame(shock=2.0), until, "hold_last", 24, as_of_idx=AS_OF, name="down"),
    }


WEIGHTS = {"base": 0.6, "down": 0.4}


def _loans():
    ages = np.array([0, 7, 13, 59, 200, 359, 100])
    return pd.DataFrame(
        {
            "loan_id": ["L07", "L01", "L03", "L02", "L05", "L04", "L06"],
            "segment": ["a", "b", "a", "b", "a", "b", "a"],
            "age": ages,
            "term": [360, 360, 240, 360, 360, 360, 180],
            "note_rate": [0.065, 0.035, 0.05, 0.04, 0.0, 0.07, 0.045],
            "original_balance": [3e5, 2e5, 1.5e5, 2.5e5, 1e5, 4e5, 1.2e5],
            "balance": [3e5, 1.97e5, 1.4e5, 2.1e5, 6e4, 1.5e3, 7e4],
            "property_value": [4e5, 2.5e5, 2e5, 3.5e5, 1.5e5, 5e5, 1.6e5],
            "origination_idx": AS_OF - ages,
            "region": ["North", "South", "North", "South", "North", "North", "South"],
            "credit_score": [720, 650, 780, 700, 690, 810, 600],
        }
    )


def _collect():
    tables = []
    return tables, tables.append


# --------------------------------------------------------------------------- closed forms and invariants


def test_constant_hazards_match_the_geometric_closed_forms():
    # closed form: S(n) = (1 - hD - hP)^n, F_D(n) = hD / (hD + hP) (1 - S(n))
    hd, hp = 0.004, 0.011
    table = pd.DataFrame({"age": np.arange(1, 400), "default": hd, "prepay": hp})
    loans = _loans()
    tables, sink = _collect()
    res = project_loans(loans, HazardTable(table), {"base": _history()}, as_of_idx=AS_OF, curve_writer=sink)
    curves = pa.concat_tables(tables).to_pandas()
    base = curves[curves["scenario"] == "base"]
    n = base["month_ahead"].to_numpy(float)
    s = (1 - hd - hp) ** n
    np.testing.assert_allclose(base["survival"], s, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(base["cumulative_pd"], hd / (hd + hp) * (1 - s), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(base["cumulative_prepay"], hp / (hd + hp) * (1 - s), rtol=1e-12, atol=1e-15)
    rem = (loans.set_index("loan_id")["term"] - loans.set_index("loan_id")["age"]).loc[res.loans["loan_id"]].to_numpy()
    s_life = (1 - hd - hp) ** rem
    np.testing.assert_allclose(res.loans["pd_lifetime_base"], hd / (hd + hp) * (1 - s_life), rtol=1e-12)
    s12 = (1 - hd - hp) ** np.minimum(12, rem)
    np.testing.assert_allclose(res.loans["pd_12m_base"], hd / (hd + hp) * (1 - s12), rtol=1e-12)


def test_conditional_pd_of_a_year_keeps_its_digits_when_survival_is_small():
    # closed form (geometric series, hand computation): with constant hazards the PD of a
    # year given survival to its start is hD (1 + q + ... + q^11) = hD (1 - q^12) / (1 - q),
    # q = 1 - hD - hP, whatever the year. With hP = 0.3 survival is ~1e-19 by year 6, where
    # F(12y) - F(12(y-1)) keeps no correct digit.
    hd, hp = 1e-4, 0.3
    q = 1 - hd - hp
    table = pd.DataFrame({"age": np.arange(1, 400), "default": hd, "prepay": hp})
    tables, sink = _collect()
    project_loans(_loans(), HazardTable(table), {"base": _history()}, as_of_idx=AS_OF, term_writer=sink)
    t = pa.concat_tables(tables).to_pandas()
    full = t[(t["loan_id"] == "L07") & (t["scenario"] == "base")]  # 360 months ahead: 30 whole years
    assert len(full) == 30 and full["survival"].min() < 1e-50
    np.testing.assert_allclose(full["conditional_pd"], hd * (1 - q**12) / (1 - q), rtol=1e-12)


def test_survival_plus_incidences_is_one_and_survival_never_rises():
    tables, sink = _collect()
    project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS, curve_writer=sink)
    c = pa.concat_tables(tables).to_pandas()
    np.testing.assert_allclose(c["survival"] + c["cumulative_pd"] + c["cumulative_prepay"], 1.0, rtol=0, atol=1e-12)
    assert (c.groupby(["loan_id", "scenario"])["survival"].diff().dropna() <= 1e-15).all()
    assert set(c["scenario"]) == {"base", "down", WEIGHTED}


def test_rows_are_sorted_by_loan_scenario_month_and_cover_each_loans_life():
    tables, sink = _collect()
    loans = _loans()
    project_loans(loans, LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS, chunk_size=3, curve_writer=sink)
    c = pa.concat_tables(tables).to_pandas()
    order = {"base": 0, "down": 1, WEIGHTED: 2}
    key = list(zip(c["loan_id"], c["scenario"].astype(str).map(order), c["month_ahead"]))
    assert key == sorted(key)
    sizes = c.groupby(["loan_id", "scenario"], observed=True).size().unstack()
    rem = loans.set_index("loan_id").eval("term - age")
    for s in order:
        np.testing.assert_array_equal(sizes[s].sort_index().to_numpy(), rem.sort_index().to_numpy())


def test_chunk_size_does_not_change_results():
    a, b = _collect(), _collect()
    r1 = project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS, chunk_size=1, curve_writer=a[1])
    r2 = project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS, chunk_size=1000, curve_writer=b[1])
    pd.testing.assert_frame_equal(r1.loans, r2.loans, check_exact=False, rtol=1e-14)
    pd.testing.assert_frame_equal(r1.term_structure, r2.term_structure, check_exact=False, rtol=1e-12)
    pd.testing.assert_frame_equal(r1.speeds, r2.speeds, check_exact=False, rtol=1e-12)
    assert pa.concat_tables(a[0]).equals(pa.concat_tables(b[0]))


def test_weighted_curves_are_the_weighted_sums_of_scenario_curves():
    # IFRS 9 5.5.17: probability weighting, linear in probabilities
    tables, sink = _collect()
    res = project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS, curve_writer=sink)
    c = pa.concat_tables(tables).to_pandas()
    c["scenario"] = c["scenario"].astype(str)
    wide = c.pivot_table(index=["loan_id", "month_ahead"], columns="scenario", values=["survival", "cumulative_pd", "marginal_pd"])
    for col in ("survival", "cumulative_pd", "marginal_pd"):
        np.testing.assert_allclose(wide[(col, WEIGHTED)], 0.6 * wide[(col, "base")] + 0.4 * wide[(col, "down")], rtol=1e-13)
    L = res.loans
    np.testing.assert_allclose(L["pd_lifetime_weighted"], 0.6 * L["pd_lifetime_base"] + 0.4 * L["pd_lifetime_down"], rtol=1e-14)
    # the downside scenario (higher unemployment, lower house prices) raises PDs in this source
    assert (L["pd_lifetime_down"] >= L["pd_lifetime_base"]).all()


def test_inputs_are_not_modified():
    loans = _loans()
    before = loans.copy()
    paths = _paths()
    copies = {k: v.copy() for k, v in paths.items()}
    project_loans(loans, LogitSource(), paths, as_of_idx=AS_OF, weights=WEIGHTS)
    pd.testing.assert_frame_equal(loans, before)
    for k in paths:
        pd.testing.assert_frame_equal(paths[k], copies[k])


# --------------------------------------------------------------------------- amortisation and covariates


@pytest.mark.parametrize(("b0", "rate", "n"), [(200_000.0, 0.045, 360), (55_000.0, 0.12, 61), (1_000.0, 1e-3, 12)])
def test_scheduled_balance_matches_numpy_financial(b0, rate, n):
    # reference: numpy_financial.pmt / ppmt / fv (payments at period end)
    r = rate / 12
    k = np.arange(0, n + 1)
    pmt = npf.pmt(r, n, b0)  # negative: paid out
    expected = -npf.fv(r, k, pmt, b0)
    got = scheduled_balance(b0, rate, n, k)
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-6)
    principal = -npf.ppmt(r, np.arange(1, n + 1), n, b0)
    np.testing.assert_allclose(got[:-1] - got[1:], principal, rtol=1e-8, atol=1e-6)
    assert got[-1] == pytest.approx(0.0, abs=1e-6)


def test_scheduled_balance_at_zero_rate_is_straight_line():
    np.testing.assert_allclose(scheduled_balance(1200.0, 0.0, 12, np.arange(13)), 1200.0 - 100.0 * np.arange(13))


@pytest.mark.parametrize(("b0", "rate", "n"), [(200_000.0, 0.045, 360), (55_000.0, 0.12, 61), (1_200.0, 0.0, 12)])
def test_the_sql_and_numpy_forms_of_the_schedule_agree(b0, rate, n):
    # History (SQL in the feature spec) and projection (NumPy) compute current LTV from the
    # same rule; both are checked against numpy_financial above, here against each other.
    import duckdb

    k = np.arange(0, n + 1)
    sql = scheduled_balance_sql("b0", "rate", "n", "k")
    with duckdb.connect() as con:
        got = con.execute(
            f"SELECT {sql} AS bal FROM (SELECT $b0::DOUBLE AS b0, $rate::DOUBLE AS rate, $n::INTEGER AS n, "
            "unnest(range(0, $n + 1)) AS k) ORDER BY k",
            {"b0": b0, "rate": rate, "n": n},
        ).fetchnumpy()["bal"]
    np.testing.assert_allclose(got, scheduled_balance(b0, rate, n, k), rtol=1e-10, atol=1e-8)


def test_covariates_of_each_future_month_are_built_as_documented():
    src = LogitSource()
    loans = _loans()
    paths = {"base": _paths()["base"]}
    project_loans(loans, src, paths, as_of_idx=AS_OF, chunk_size=100, keep_order=True)  # the loans in loan_id order
    raw = src.calls[0]
    p = paths["base"]
    ordered = loans.sort_values("loan_id").reset_index(drop=True)
    pos = 0
    for row in ordered.itertuples():
        rem = row.term - row.age
        r = row.note_rate / 12
        pay = -npf.pmt(r, rem, row.balance) if r > 0 else row.balance / rem
        bal = row.balance
        hpi = f"hpi_{row.region.lower()}"
        for u in range(1, rem + 1):
            month = AS_OF + u
            # the start of month u: the index and the market rate of the previous month-end (the default lags)
            value = row.property_value * p.loc[max(month - 1, row.origination_idx), hpi] / p.loc[row.origination_idx, hpi]
            assert raw["age"][pos] == row.age + u
            assert raw["log_age"][pos] == pytest.approx(np.log(row.age + u), rel=1e-15)
            assert raw["current_ltv"][pos] == pytest.approx(bal / value, rel=1e-9, abs=1e-12)
            assert raw["rate_incentive"][pos] == pytest.approx(100 * row.note_rate - p.loc[month - 1, "mortgage_rate"], rel=1e-12)
            assert raw["macro:unemployment_rate:1"][pos] == p.loc[month - 1, "unemployment_rate"]
            assert raw["credit_score"][pos] == row.credit_score
            bal = bal * (1 + r) - pay  # start balance of the next month
            pos += 1
    assert pos == len(raw["age"])


def test_a_source_projects_with_the_lags_it_was_fitted_with():
    # A model fitted with a three-month index delay and the month's own market rate reads the same months in
    # its projection, whatever the config's defaults.
    src = LogitSource()
    src.derived_lags = {"hpi": 3, "market_rate": 0}
    loans = _loans()
    p = _paths()["base"]
    project_loans(loans, src, {"base": p}, as_of_idx=AS_OF, chunk_size=100, keep_order=True)
    raw = src.calls[0]
    row = loans.sort_values("loan_id").iloc[0]
    r = row.note_rate / 12
    rem = row.term - row.age
    pay = -npf.pmt(r, rem, row.balance)
    hpi = f"hpi_{row.region.lower()}"
    bal = row.balance
    for u in range(1, 4):
        month = AS_OF + u
        value = row.property_value * p.loc[max(month - 3, row.origination_idx), hpi] / p.loc[row.origination_idx, hpi]
        assert raw["current_ltv"][u - 1] == pytest.approx(bal / value, rel=1e-9)
        assert raw["rate_incentive"][u - 1] == pytest.approx(100 * row.note_rate - p.loc[month, "mortgage_rate"], rel=1e-12)
        bal = bal * (1 + r) - pay


def test_a_source_with_an_age_cap_is_projected_at_the_cap_beyond_it():
    # The age-tail rule hold: months older than the last supported age read that age (and its log).
    src = LogitSource()
    src.age_cap = 20
    loans = _loans()
    paths = {"base": _paths()["base"]}
    project_loans(loans, src, paths, as_of_idx=AS_OF, chunk_size=100)
    raw = src.calls[0]
    plain = LogitSource()
    project_loans(loans, plain, paths, as_of_idx=AS_OF, chunk_size=100)
    true_age = plain.calls[0]["age"]
    assert true_age.max() > 20
    np.testing.assert_array_equal(raw["age"], np.minimum(true_age, 20))
    np.testing.assert_allclose(raw["log_age"], np.log(np.minimum(true_age, 20)), rtol=1e-15)


def test_origination_pd_reads_one_path_from_the_origination_month():
    # With every series held (rule hold_last) the path is the origination month's value from then on: a
    # lag-1 input reads month o in the first month on book (its start) and the held value after it.
    from creditsurv.config import ScenarioExtension

    src = LogitSource()
    loans = _loans().drop(columns="age")  # the whole life from origination (the next test starts at the age)
    hist = _history()
    po = origination_pd(loans, src, hist, chunk_size=3, extension=ScenarioExtension(rule="hold_last"), workers=1)
    assert list(po.index) == sorted(loans["loan_id"])
    raw = src.calls[0]
    # loans are projected by origination month: the first call holds the first month's first loans
    ordered = loans.sort_values(["origination_idx", "loan_id"]).reset_index(drop=True)
    ordered = ordered[ordered["origination_idx"] == ordered["origination_idx"].iloc[0]].iloc[:3]
    counts = ordered["term"].to_numpy()
    orig = np.repeat(ordered["origination_idx"].to_numpy(), counts)
    np.testing.assert_array_equal(raw["macro:unemployment_rate:1"], hist["unemployment_rate"].loc[orig].to_numpy())
    np.testing.assert_allclose(raw["rate_incentive"], 100 * np.repeat(ordered["note_rate"].to_numpy(), counts) - hist["mortgage_rate"].loc[orig].to_numpy())
    first = ordered.iloc[0]
    assert raw["age"][0] == 1
    assert raw["current_ltv"][0] == pytest.approx(first["original_balance"] / first["property_value"], rel=1e-12)
    assert ((po > 0) & (po < 1)).all()


def test_origination_pd_from_the_age_equals_the_whole_life_view_conditioned_on_survival():
    # The origination view of default after age a given survival to it (IFRS 9 B5.5.11: the same remaining life
    # as today's PD) is computed by starting each loan's projection at a. Here it is rebuilt by hand from the
    # whole life from origination: one loan a chunk, the source's inputs of each month recorded, its hazards
    # recomputed and chained in plain Python from month a + 1 on.
    loans = _loans()
    hist = _history()
    recorder = LogitSource()
    origination_pd(loans.drop(columns="age"), recorder, hist, chunk_size=1, workers=1)
    ordered = loans.sort_values(["origination_idx", "term", "loan_id"]).reset_index(drop=True)
    assert len(recorder.calls) == len(ordered)
    expected, ratio = {}, {}
    for row, raw in zip(ordered.itertuples(), recorder.calls):
        hd, hp = LogitSource().hazards(raw)
        assert len(hd) == row.term
        a = min(row.age, row.term - 1)  # at or past its term: its last contractual month
        f = f_a = 0.0
        s = s_a = 1.0
        cond, s_cond = 0.0, 1.0
        for u in range(row.term):  # month u + 1 of the loan's life
            f += s * hd[u]
            s *= 1.0 - hd[u] - hp[u]
            if u + 1 == a:
                f_a, s_a = f, s
            if u >= a:
                cond += s_cond * hd[u]
                s_cond *= 1.0 - hd[u] - hp[u]
        expected[row.loan_id] = cond
        ratio[row.loan_id] = ((f - f_a) / s_a, s_a)
    po = origination_pd(loans, LogitSource(), hist, chunk_size=2, workers=1)
    np.testing.assert_allclose(po.to_numpy(), pd.Series(expected).loc[po.index].to_numpy(), rtol=1e-12)
    assert (po > 0).all() and (po < 1).all()
    # the same as (F(T) - F(a)) / S(a) where S(a) keeps that difference's digits; loan L04 reaches its last
    # month with S(a) of about 6e-15, where the difference of two cumulative PDs near 0.98 has no digit left
    for loan_id, (value, s_a) in ratio.items():
        if s_a > 1e-3:
            assert po[loan_id] == pytest.approx(value, rel=1e-12), loan_id
    assert ratio["L04"][1] < 1e-14 and abs(ratio["L04"][0] / po["L04"] - 1) > 0.1


# --------------------------------------------------------------------------- segment tables


def test_term_structure_matches_per_loan_annual_rows_with_carry_past_maturity():
    tables, sink = _collect()
    loans = _loans()
    res = project_loans(loans, LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS, term_writer=sink)
    t = pa.concat_tables(tables).to_pandas()
    t["scenario"] = t["scenario"].astype(str)
    ts = res.term_structure
    row = ts[(ts.segment == "b") & (ts.scenario == "down")].set_index("year_ahead")
    seg_b = loans.loc[loans.segment == "b", ["loan_id", "balance"]]
    years = int(row.index.max())
    F = np.zeros((len(seg_b), years + 1))
    S = np.ones((len(seg_b), years + 1))
    for i, lid in enumerate(seg_b["loan_id"]):
        g = t[(t.loan_id == lid) & (t.scenario == "down")].set_index("year_ahead")
        for y in range(1, years + 1):
            src = g.loc[min(y, g.index.max())]  # past maturity: hold the maturity values
            F[i, y], S[i, y] = src["cumulative_pd"], src["survival"]
    w = seg_b["balance"].to_numpy()
    for y in (1, 2, 5, years):
        assert row.loc[y, "cumulative_pd_count"] == pytest.approx(F[:, y].mean(), rel=1e-12)
        assert row.loc[y, "cumulative_pd_balance"] == pytest.approx((w * F[:, y]).sum() / w.sum(), rel=1e-12)
        cond = (F[:, y].sum() - F[:, y - 1].sum()) / S[:, y - 1].sum()
        assert row.loc[y, "conditional_pd_count"] == pytest.approx(cond, rel=1e-10, abs=1e-15)
    # per-loan conditional PD: (F(12y) - F(12(y-1))) / S(12(y-1)), here where survival is not small
    g = t[(t.loan_id == "L02") & (t.scenario == "base")].set_index("year_ahead")
    assert g.loc[3, "conditional_pd"] == pytest.approx((g.loc[3, "cumulative_pd"] - g.loc[2, "cumulative_pd"]) / g.loc[2, "survival"], rel=1e-12)


def test_band_groups_follow_the_edges():
    res = project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS,
                        band_column="credit_score", band_edges=(680, 760))
    got = dict(zip(res.loans["loan_id"], res.loans["band"]))
    low, mid, high = "(-inf, 680)", "[680, 760)", "[760, inf)"
    assert got == {"L01": low, "L02": mid, "L03": high, "L04": high, "L05": mid, "L06": low, "L07": mid}
    assert set(res.term_structure["band"]) == {low, mid, high}


def test_a_score_on_an_edge_lands_in_the_band_that_starts_there():
    # the documented rule (band_labels): bands are closed on the left, [a, b)
    edges = (640, 700, 760)
    labels = band_labels(edges)
    assert labels == ["(-inf, 640)", "[640, 700)", "[700, 760)", "[760, inf)"]
    scores = np.array([639.999, 640.0, 699.0, 700.0, 760.0, 759.5, 900.0, 300.0])
    got = [labels[c] for c in band_codes(scores, edges)]
    assert got == ["(-inf, 640)", "[640, 700)", "[640, 700)", "[700, 760)", "[760, inf)", "[700, 760)", "[760, inf)", "(-inf, 640)"]
    loans = _loans().assign(credit_score=[640.0, 700.0, 760.0, 639.0, 700.0, 760.0, 641.0])
    res = project_loans(loans, LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS,
                        band_column="credit_score", band_edges=edges)
    expected = dict(zip(loans["loan_id"], ["[640, 700)", "[700, 760)", "[760, inf)", "(-inf, 640)", "[700, 760)", "[760, inf)", "[640, 700)"]))
    assert dict(zip(res.loans["loan_id"], res.loans["band"])) == expected


def test_bands_sort_in_numeric_order_not_as_text():
    # as text "(-inf, 640)" < "[640, 700)" < "[700, 760)" < "[760, inf)" happens to hold, but
    # "[1000, inf)" sorts before "[640, 700)" as text: the sort must read the edges
    labels = band_labels((640, 1000))
    frame = pd.DataFrame({"band": [labels[2], labels[0], labels[1], labels[2]], "x": [1, 2, 3, 4]})
    out = sort_with_bands(frame, ["band"])
    assert list(out["band"]) == [labels[0], labels[1], labels[2], labels[2]]
    assert list(out["x"]) == [2, 3, 1, 4]
    assert sorted(labels, key=str) != labels  # the case a text sort gets wrong


def test_table_writer_writes_one_parquet_file(tmp_path):
    path = tmp_path / "curves.parquet"
    with TableWriter(path) as w:
        project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS, chunk_size=2, curve_writer=w)
    back = pd.read_parquet(path)
    assert len(back) == w.rows == 3 * int(_loans().eval("term - age").sum())


# --------------------------------------------------------------------------- scenario paths


def _write_scenarios(tmp_path, frames: dict, suffix=".csv"):
    out = []
    for name, frame in frames.items():
        path = tmp_path / f"{name}{suffix}"
        if suffix == ".csv":
            frame.to_csv(path, index=False)
        else:
            frame.to_parquet(path, index=False)
        out.append(Scenario(name=name, weight=1 / len(frames), path=path))
    return out


def _text_frame(frame):
    f = frame.reset_index()
    f.insert(0, "month", [f"{m // 12:04d}-{m % 12 + 1:02d}" for m in f.pop("month_idx")])
    return f


def test_load_scenario_paths_reads_csv_and_parquet(tmp_path):
    base = _text_frame(_scenario_frame())
    down = _text_frame(_scenario_frame(shock=1.0))
    down["month"] = pd.to_datetime(down["month"])
    sc = _write_scenarios(tmp_path, {"base": base}) + _write_scenarios(tmp_path, {"down": down}, ".parquet")
    paths = load_scenario_paths(sc, _history())
    assert list(paths) == ["base", "down"]
    pd.testing.assert_frame_equal(paths["base"], _scenario_frame(), check_exact=False, rtol=1e-12)
    assert paths["down"].index[0] == AS_OF + 1


def test_load_scenario_paths_names_every_problem(tmp_path):
    gap = _text_frame(_scenario_frame()).drop(index=[4, 5])
    noseries = _text_frame(_scenario_frame()).drop(columns=["hpi_south"])
    dup = pd.concat([_text_frame(_scenario_frame()), _text_frame(_scenario_frame()).iloc[[3]]])
    bad = _text_frame(_scenario_frame()).astype({"mortgage_rate": object})
    bad.loc[2, "mortgage_rate"] = "abc"
    sc = _write_scenarios(tmp_path, {"gap": gap, "noseries": noseries, "dup": dup, "bad": bad})
    with pytest.raises(ProjectionError) as err:
        load_scenario_paths(sc, _history(), required_series=["house_starts"])
    text = str(err.value)
    assert "scenario 'gap'" in text and "gap.csv" in text and "missing months inside the path: 2025-05..2025-06" in text
    assert "scenario 'noseries'" in text and "'hpi_south'" in text and "'house_starts'" in text
    assert "scenario 'dup'" in text and "duplicate months 2025-04" in text
    assert "scenario 'bad'" in text and "'mortgage_rate'" in text and "2025-03" in text and "abc" in text


def test_scenario_weights_must_sum_to_one_in_the_config(tmp_path):
    data = {
        "as_of": "2024-12",
        "inputs": {"panel": {"path": "panel.parquet"}, "loans": {"path": "loans.parquet"}},
        "windows": {"development": {"start": "2016-01", "end": "2023-12"}},
        "scenarios": [
            {"name": "base", "weight": 0.5, "path": "base.csv"},
            {"name": "down", "weight": 0.3, "path": "down.csv"},
        ],
    }
    with pytest.raises(ConfigError, match=r"scenario weights must sum to 1, got 0\.8 \(base=0\.5, down=0\.3\)"):
        config_from_dict(data, tmp_path)


def test_projection_weights_given_as_a_plain_mapping_are_checked_at_its_entry():
    # The same rule and words as the config's (creditsurv.config.weight_problems).
    with pytest.raises(ConfigError, match=r"scenario weights must sum to 1, got 0\.9 \(base=0\.5, down=0\.4\)"):
        project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF, weights={"base": 0.5, "down": 0.4})
    with pytest.raises(ConfigError, match="give the probability weights"):
        project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF)
    with pytest.raises(ConfigError, match=r"no weight for \['down'\]"):
        project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF, weights=ScenarioWeights({"base": 1.0}))


def test_checked_weights_are_trusted_downstream(monkeypatch):
    # A run's weights are checked once, when built; the stages do not build (and so check) them again.
    checked = ScenarioWeights({"base": 0.6, "down": 0.4})

    def check_again(self, *args, **kwargs):
        raise AssertionError("weights checked a second time")

    monkeypatch.setattr(ScenarioWeights, "__init__", check_again)
    result = project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF, weights=checked)
    assert dict(result.weights) == {"base": 0.6, "down": 0.4}
    with pytest.raises(AssertionError, match="second time"):  # the patch is live: a plain mapping is checked
        project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF, weights={"base": 0.6, "down": 0.4})


def test_extend_path_hold_last_and_revert_to_mean_at_known_months():
    hist = _history()
    path = _scenario_frame(months_ahead=12)
    last = AS_OF + 12
    held = extend_path(hist, path, last + 40, "hold_last", as_of_idx=AS_OF)
    assert held.loc[last + 1, "mortgage_rate"] == path.loc[last, "mortgage_rate"]
    assert held.loc[last + 40, "hpi_north"] == path.loc[last, "hpi_north"]
    rev = extend_path(hist, path, last + 40, "revert_to_mean", months=10, long_run={"mortgage_rate": 5.0}, as_of_idx=AS_OF)
    x_t = path.loc[last, "mortgage_rate"]  # 5.76
    # linear: x(T+k) = x(T) + (L - x(T)) k / 10, then flat at L
    assert rev.loc[last + 1, "mortgage_rate"] == pytest.approx(x_t + (5.0 - x_t) * 0.1, rel=1e-14)
    assert rev.loc[last + 5, "mortgage_rate"] == pytest.approx((x_t + 5.0) / 2, rel=1e-14)
    assert rev.loc[last + 10, "mortgage_rate"] == pytest.approx(5.0, rel=1e-14)
    assert rev.loc[last + 40, "mortgage_rate"] == pytest.approx(5.0, rel=1e-14)
    # default long-run value: the history's mean up to the as-of month
    u_t = path.loc[last, "unemployment_rate"]
    mean_u = hist["unemployment_rate"].mean()
    assert rev.loc[last + 3, "unemployment_rate"] == pytest.approx(u_t + (mean_u - u_t) * 0.3, rel=1e-13)
    # history up to the as-of month, then the path
    assert rev.loc[AS_OF, "hpi_south"] == hist.loc[AS_OF, "hpi_south"]
    assert rev.loc[AS_OF + 1, "hpi_south"] == path.loc[AS_OF + 1, "hpi_south"]
    assert not rev.isna().any().any()
    assert list(rev.index) == list(range(MONTHS[0], last + 41))


def test_extend_path_holds_listed_series_whatever_the_rule():
    # A trending index reverted to its history mean would be a price fall: listed
    # series (shell patterns) hold their last value; the rest revert.
    hist = _history()
    path = _scenario_frame(months_ahead=12)
    last = AS_OF + 12
    out = extend_path(hist, path, last + 30, "revert_to_mean", months=10, as_of_idx=AS_OF, hold_last_series=["hpi_*"])
    assert out.loc[last + 30, "hpi_north"] == path.loc[last, "hpi_north"]
    assert out.loc[last + 30, "hpi_south"] == path.loc[last, "hpi_south"]
    assert out.loc[last + 30, "mortgage_rate"] == pytest.approx(hist["mortgage_rate"].mean(), rel=1e-13)


def test_extend_path_bridges_from_history_or_says_which_months_are_missing():
    hist = _history()
    path = _scenario_frame(months_ahead=12)  # starts at 2025-01
    as_of = AS_OF - 5  # the history has the months up to 2024-12
    out = extend_path(hist, path, AS_OF + 20, "hold_last", as_of_idx=as_of)
    assert out.loc[AS_OF - 4, "mortgage_rate"] == hist.loc[AS_OF - 4, "mortgage_rate"]
    assert out.loc[AS_OF, "mortgage_rate"] == hist.loc[AS_OF, "mortgage_rate"]
    assert out.loc[AS_OF + 1, "mortgage_rate"] == path.loc[AS_OF + 1, "mortgage_rate"]
    path = path.iloc[3:]  # starts at 2025-04: 2025-01..2025-03 are in neither
    with pytest.raises(ProjectionError, match=r"scenario 'x'.*2025-01\.\.2025-03"):
        extend_path(hist, path, AS_OF + 20, "hold_last", as_of_idx=AS_OF, name="x")


def test_prepare_paths_loads_and_extends(tmp_path):
    sc = _write_scenarios(tmp_path, {"base": _text_frame(_scenario_frame())})
    out = prepare_paths(sc, _history(), as_of_idx=AS_OF, until_idx=AS_OF + 100, required_series=["unemployment_rate"])
    assert out["base"].index[-1] == AS_OF + 100 and not out["base"].isna().any().any()


# --------------------------------------------------------------------------- loan and coverage errors


def test_loans_at_or_past_maturity_are_projected_over_one_month():
    # The rule for a balance left at or after the term: due at the end of the next month (one month projected).
    loans = _loans()
    loans.loc[0, "age"] = loans.loc[0, "term"]
    loans.loc[2, "age"] = loans.loc[2, "term"] + 5
    res = project_loans(loans, LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS)
    out = res.loans.set_index("loan_id")
    for i in (0, 2):
        lid = loans.loc[i, "loan_id"]
        assert out.loc[lid, "remaining_term"] == 1
        assert out.loc[lid, "pd_lifetime_weighted"] == pytest.approx(out.loc[lid, "pd_12m_weighted"], rel=1e-15)
        assert 0 < out.loc[lid, "pd_12m_weighted"] < 1


def test_negative_note_rates_are_named():
    loans = pd.concat([_loans()] * 1, ignore_index=True)
    extra = pd.DataFrame([_loans().iloc[0]] * 6)
    extra["loan_id"] = [f"N{i}" for i in range(6)]
    extra["note_rate"] = -0.01
    loans = pd.concat([loans, extra], ignore_index=True)
    with pytest.raises(ProjectionError, match=r"negative note rate for 6 loans \(N0, N1, N2, N3, N4, \.\.\.\)"):
        project_loans(loans, LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS)


def test_a_path_that_does_not_cover_the_projection_is_named():
    paths = _paths(until=AS_OF + 100)
    with pytest.raises(ProjectionError, match=r"scenario 'base': series 'mortgage_rate' has no value in months 2033-05\.\."):
        project_loans(_loans(), LogitSource(), paths, as_of_idx=AS_OF, weights=WEIGHTS)
    paths = _paths()
    paths["down"] = paths["down"].drop(columns=["hpi_south"])
    with pytest.raises(ProjectionError, match=r"scenario 'down': series 'hpi_south' is not in the path"):
        project_loans(_loans(), LogitSource(), paths, as_of_idx=AS_OF, weights=WEIGHTS)


def test_unknown_inputs_and_bad_hazards_are_reported():
    class Unknown:
        required_inputs = ["age", "no_such_column", "macro:x"]

        def hazards(self, raw):  # pragma: no cover - never reached
            raise AssertionError

    with pytest.raises(ProjectionError, match=r"'no_such_column'.*\n.*'macro:x'"):
        project_loans(_loans(), Unknown(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS)

    class Broken:
        required_inputs = ["age"]

        def hazards(self, raw):
            return np.full(len(raw["age"]), 0.7), np.full(len(raw["age"]), 0.7)

    with pytest.raises(ModelError, match=r"summing above 1 for \d+ loans .* in months "):
        project_loans(_loans(), Broken(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS)

    class Infinite:
        required_inputs = ["age"]

        def hazards(self, raw):
            return np.full(len(raw["age"]), np.inf), np.zeros(len(raw["age"]))

    with pytest.raises(ModelError, match=r"not finite"):
        project_loans(_loans(), Infinite(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS)


def test_benchmark_source_needs_no_macro():
    loans = _loans().drop(columns=["region", "property_value"])
    res = project_loans(loans, BenchmarkCurves(100, 100), {"only": _history()}, as_of_idx=AS_OF)
    assert res.weights == {"only": 1.0}
    assert (res.loans["pd_lifetime_only"] == res.loans["pd_lifetime_weighted"]).all()


def test_derived_inputs_need_their_collateral_settings():
    with pytest.raises(ProjectionError, match="collateral.hpi_series"):
        project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS, collateral=Collateral(hpi_series=None))
    with pytest.raises(ProjectionError, match="collateral.market_rate_series"):
        project_loans(_loans(), LogitSource(), _paths(), as_of_idx=AS_OF, weights=WEIGHTS, collateral=Collateral(market_rate_series=None))


# --------------------------------------------------------------------------- panel covariates at a lag


class _PanelSource:
    """Records the raw inputs it is given: a months-in-arrears count at lag 1 and a refreshed score at lag 2."""

    required_inputs = ["age", "panel:months_in_arrears:1", "panel:score_now:2"]
    panel_rules = [
        {"key": "panel:months_in_arrears:1", "column": "months_in_arrears", "lag": 1, "before_first": 0.0, "projection": "hold"},
        {"key": "panel:score_now:2", "column": "score_now", "lag": 2, "before_first": 650.0, "projection": "revert",
         "revert_to": 700.0, "revert_months": 4},
    ]  # fmt: skip

    def __init__(self):
        self.calls = []

    def hazards(self, raw):
        self.calls.append({k: np.array(v) for k, v in raw.items()})
        n = len(raw["age"])
        return np.full(n, 0.001), np.full(n, 0.01)


def test_panel_covariates_read_history_then_follow_their_projection_rule():
    from creditsurv.forecast import with_panel_history

    loans = pd.DataFrame({"loan_id": ["a", "b"], "segment": "x", "age": [10, 20], "term": [20, 30], "note_rate": 0.05, "balance": 1e5})
    # the panel's last months: month-end values at as_of - 1 and as_of (loan b has no row at as_of - 1)
    history = pd.DataFrame(
        {"loan_id": ["a", "a", "b"], "month_idx": [AS_OF - 1, AS_OF, AS_OF], "months_in_arrears": [2.0, 3.0, 0.0], "score_now": [610.0, 620.0, 780.0]}
    )
    source = _PanelSource()
    frame = with_panel_history(loans, history, source, AS_OF)
    project_loans(frame, source, {"base": _history()}, as_of_idx=AS_OF)
    (raw,) = source.calls
    arrears = raw["panel:months_in_arrears:1"][:10]  # loan a, months 1 ... 10 ahead
    score = raw["panel:score_now:2"][:10]
    # Month u reads the end of month u - lag. Lag 1: month 1 is the reporting month's value (3), then held.
    assert arrears.tolist() == [3.0] * 10
    # Lag 2: month 1 reads as_of - 1 (610), month 2 as_of (620), then 620 moves to 700 over 4 months.
    np.testing.assert_allclose(score, [610, 620, 640, 660, 680, 700, 700, 700, 700, 700], rtol=1e-15)
    # loan b has no row at as_of - 1: it takes the value a loan starts with (before_first)
    np.testing.assert_allclose(raw["panel:score_now:2"][10:13], [650, 780, 760], rtol=1e-15)


def test_a_loan_column_fills_missing_history_and_the_origination_view():
    from creditsurv.forecast import origination_pd, with_panel_history

    source = _PanelSource()
    rules = [dict(r, before_first=None, before_first_column=c) for r, c in zip(source.panel_rules, ("arrears0", "score0"))]
    source.panel_rules = rules
    loans = pd.DataFrame({"loan_id": ["a", "b"], "segment": "x", "age": [10, 20], "term": [20, 30], "note_rate": 0.05,
                          "balance": 1e5, "arrears0": [0.0, 1.0], "score0": [690.0, 720.0]})  # fmt: skip
    history = pd.DataFrame({"loan_id": ["a", "a"], "month_idx": [AS_OF - 1, AS_OF], "months_in_arrears": [2.0, 3.0],
                            "score_now": [610.0, 620.0]})  # fmt: skip
    project_loans(with_panel_history(loans, history, source, AS_OF), source, {"base": _history()}, as_of_idx=AS_OF)
    (raw,) = source.calls
    # loan b has no panel rows at all: its own columns stand in (1 month in arrears; score 720 at both lags)
    np.testing.assert_allclose(raw["panel:months_in_arrears:1"][10:12], [1.0, 1.0], rtol=0)
    np.testing.assert_allclose(raw["panel:score_now:2"][10:12], [720.0, 720.0], rtol=0)
    # the origination view starts every loan at its own column's value
    source.calls.clear()
    orig = loans.assign(original_balance=1e5, origination_idx=AS_OF - 10)
    origination_pd(orig, source, _history())
    (raw,) = source.calls
    first = raw["age"] == 1
    np.testing.assert_allclose(raw["panel:score_now:2"][first], [690.0, 720.0], rtol=0)


def test_a_loan_without_recent_panel_values_is_named():
    from creditsurv.forecast import with_panel_history

    source = _PanelSource()
    source.panel_rules = [dict(source.panel_rules[0], before_first=None), source.panel_rules[1]]
    loans = pd.DataFrame({"loan_id": ["a"], "segment": "x", "age": [10], "term": [20], "note_rate": 0.05, "balance": 1e5})
    history = pd.DataFrame({"loan_id": ["z"], "month_idx": [AS_OF], "months_in_arrears": [1.0], "score_now": [700.0]})
    with pytest.raises(ProjectionError, match=r"panel column 'months_in_arrears': no value in the last 1 month\(s\) for 1 loan \(a\)"):
        project_loans(with_panel_history(loans, history, source, AS_OF), source, {"base": _history()}, as_of_idx=AS_OF)


def test_speed_curves_end_at_the_last_age_with_loans():
    # ages with no loan exposed have no rate: the pooled curve stops there instead of dropping to zero
    from creditsurv.forecast import segment_speeds

    speeds = pd.DataFrame({
        "segment": "A", "band": "all", "scenario": WEIGHTED, "loan_age": [1, 2, 3, 4],
        "default_exposure": [100.0, 90.0, 0.0, 0.0], "defaulted": [1.0, 0.9, 0.0, 0.0],
        "prepay_exposure": [99.0, 89.0, 80.0, 0.0], "prepaid": [2.0, 1.8, 1.6, 0.0],
    })  # fmt: skip
    by_age, _ = segment_speeds(speeds)
    assert by_age["age"].tolist() == [1, 2, 3]
    assert by_age["mdr"].iloc[:2].tolist() == pytest.approx([0.01, 0.01], rel=1e-12)  # defaulted / exposure
    assert np.isnan(by_age["mdr"].iloc[2])  # nothing exposed to default at age 3: no rate, not 0
    assert by_age["smm"].iloc[2] == pytest.approx(1.6 / 80.0, rel=1e-12)


def test_origination_path_is_the_history_then_a_straight_line_to_the_mean_known_then():
    # Worked by hand: after month o each series moves from its value at o to the mean of its history up to o
    # in a straight line over 12 months, then stays; house-price series hold their value at o.
    from creditsurv.config import ScenarioExtension
    from creditsurv.forecast import origination_path

    hist = _history()
    o = int(hist.index[40])
    path = origination_path(hist, o, o + 30, ScenarioExtension(months=12, hold_last_series=("hpi_*",)))
    assert path.index[0] == hist.index[0] - 1 and path.index[-1] == o + 30
    pd.testing.assert_frame_equal(path.loc[hist.index[0] : o], hist.loc[: o], check_names=False)
    for col in ("unemployment_rate", "mortgage_rate"):
        at_o, mean = hist.loc[o, col], hist.loc[:o, col].mean()
        k = np.arange(1, 31)
        np.testing.assert_allclose(path.loc[o + 1 :, col], at_o + (mean - at_o) * np.minimum(k, 12) / 12, rtol=1e-14)
    assert (path.loc[o + 1 :, "hpi_north"] == hist.loc[o, "hpi_north"]).all()
    # an origination month before the history takes the history's first month, before and after it
    early = origination_path(hist, int(hist.index[0]) - 5, int(hist.index[0]) + 3, ScenarioExtension(rule="hold_last"))
    assert (early.to_numpy() == hist.iloc[0].to_numpy()[None, :]).all()
