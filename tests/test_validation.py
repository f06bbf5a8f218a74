"""Tests for creditsurv.validation.

Each check names its independent reference beside it: scikit-learn, scipy and
statsmodels functions called here, or a hand computation written out in the test.
"""

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from sklearn.metrics import roc_auc_score
from statsmodels.duration.survfunc import CumIncidenceRight, SurvfuncRight
from statsmodels.stats.proportion import proportion_confint

from creditsurv import validation as v
from creditsurv.errors import DataError

# --------------------------------------------------------------------------- intervals


@pytest.mark.parametrize("level", [0.90, 0.95, 0.99])
def test_jeffreys_interval_matches_statsmodels_inside_the_edges(level):
    # Reference: statsmodels proportion_confint(method="jeffreys") for 0 < k < n.
    n = np.array([10, 50, 200, 1000, 7])
    k = np.array([3, 1, 17, 999, 6])
    lo, hi = v.binomial_interval(k, n, level=level)
    ref_lo, ref_hi = proportion_confint(k, n, alpha=1 - level, method="jeffreys")
    np.testing.assert_allclose(lo, ref_lo, rtol=0, atol=1e-12)
    np.testing.assert_allclose(hi, ref_hi, rtol=0, atol=1e-12)


def test_jeffreys_edge_rule_and_empty_groups():
    # Reference: Brown, Cai & DasGupta (2001) edge rule -- lower bound 0 at k = 0,
    # upper bound 1 at k = n; the other bound is the plain Beta quantile (statsmodels).
    lo, hi = v.binomial_interval([0, 20, 0], [20, 20, 0])
    ref_lo, ref_hi = proportion_confint(np.array([0, 20]), np.array([20, 20]), alpha=0.05, method="jeffreys")
    assert lo[0] == 0.0 and hi[1] == 1.0
    np.testing.assert_allclose([hi[0], lo[1]], [ref_hi[0], ref_lo[1]], atol=1e-12)
    assert np.isnan(lo[2]) and np.isnan(hi[2])


def test_wilson_interval_matches_statsmodels():
    # Reference: statsmodels proportion_confint(method="wilson"), edges included.
    n = np.array([10, 50, 200, 1000, 7, 30])
    k = np.array([0, 1, 17, 999, 7, 15])
    lo, hi = v.binomial_interval(k, n, method="wilson")
    ref_lo, ref_hi = proportion_confint(k, n, alpha=0.05, method="wilson")
    np.testing.assert_allclose(lo, ref_lo, atol=1e-12)
    np.testing.assert_allclose(hi, ref_hi, atol=1e-12)


def test_scalar_interval_returns_floats_and_bad_input_is_named():
    lo, hi = v.binomial_interval(3, 10)
    assert isinstance(lo, float) and isinstance(hi, float) and lo < 0.3 < hi
    with pytest.raises(DataError, match="0 <= k <= n"):
        v.binomial_interval(11, 10)
    with pytest.raises(DataError, match="jeffreys"):
        v.binomial_interval(1, 10, method="exact")


# --------------------------------------------------------------------------- discrimination


@pytest.fixture
def scored_book():
    rng = np.random.default_rng(11)
    n = 3000
    x = rng.normal(size=n)
    y = (rng.random(n) < 1 / (1 + np.exp(3 - 0.8 * x))).astype(int)
    score = np.round(x, 1)  # coarse rounding gives many ties
    return score, y


def test_auc_gini_ks_match_sklearn_and_scipy_with_ties(scored_book):
    score, y = scored_book
    before = score.copy()
    res = v.discrimination(score, y, bootstrap=0)
    # Reference: sklearn.metrics.roc_auc_score (ties count one half).
    auc = roc_auc_score(y, score)
    assert res["auc"] == pytest.approx(auc, abs=1e-12)
    assert res["gini"] == pytest.approx(2 * auc - 1, abs=1e-12)
    # Reference: scipy.stats.ks_2samp statistic, defaulters vs non-defaulters.
    ks = stats.ks_2samp(score[y == 1], score[y == 0]).statistic
    assert res["ks"] == pytest.approx(ks, abs=1e-12)
    assert res["n"] == len(y) and res["defaults"] == int(y.sum())
    assert np.isnan(res["auc_lo"]) and res["bootstrap"] == 0
    np.testing.assert_array_equal(score, before)  # input untouched


def test_bootstrap_interval_is_deterministic_and_covers_the_estimate(scored_book):
    score, y = scored_book
    a = v.discrimination(score, y, bootstrap=200, seed=7)
    b = v.discrimination(score, y, bootstrap=200, seed=7)
    c = v.discrimination(score, y, bootstrap=200, seed=8)
    assert a == b
    assert a["auc_lo"] != c["auc_lo"]
    assert a["auc_lo"] < a["auc"] < a["auc_hi"]
    assert a["gini_lo"] < a["gini"] < a["gini_hi"]
    assert a["bootstrap"] == 200
    # Percentile bootstrap is roughly +/- 1.96 sd of AUC; the Hanley-McNeil
    # standard error (Radiology 1982) gives the expected width.
    A, n1, n0 = a["auc"], a["defaults"], a["n"] - a["defaults"]
    q1, q2 = A / (2 - A), 2 * A**2 / (1 + A)
    se = np.sqrt((A * (1 - A) + (n1 - 1) * (q1 - A**2) + (n0 - 1) * (q2 - A**2)) / (n1 * n0))
    assert 0.6 < (a["auc_hi"] - a["auc_lo"]) / (2 * 1.96 * se) < 1.5


def test_discrimination_needs_both_classes():
    with pytest.raises(DataError, match="both defaulters and non-defaulters"):
        v.discrimination([0.1, 0.2], [0, 0])
    with pytest.raises(DataError, match="0 or 1"):
        v.discrimination([0.1, 0.2], [0, 2])


# --------------------------------------------------------------------------- 12-month cohort


def test_twelve_month_cohort_handles_each_case():
    # Hand-built loans alive at month 100; window is months 101..112.
    outcomes = pd.DataFrame(
        {
            "loan_id": ["def_in", "def_after", "prepaid", "matured", "censored", "alive", "def_m112", "cens_m112"],
            "event": ["default", "default", "prepay", "maturity", None, None, "default", None],
            "event_month_idx": [105, 118, 103, 110, np.nan, np.nan, 112, np.nan],
            "last_month_idx": [105, 118, 103, 110, 106, 130, 112, 112],
            "censor_reason": ["", "", "", "", "left the data", "", "", "window ended"],
        }
    )
    out = v.twelve_month_cohort(outcomes, 100)
    got = dict(zip(out["loan_id"], out["default_12m"].astype(int)))
    # Expected by hand: default within 101..112 -> 1; default at 118 -> 0;
    # prepaid / matured within the window -> 0; alive past 112 -> 0;
    # observed through 112 with no event -> 0; censored at 106 -> left out.
    assert got == {"def_in": 1, "def_after": 0, "prepaid": 0, "matured": 0, "alive": 0, "def_m112": 1, "cens_m112": 0}
    kept = v.twelve_month_cohort(outcomes, 100, keep_censored=True)
    row = kept.set_index("loan_id").loc["censored"]
    assert row["basis"] == "censored" and pd.isna(row["default_12m"])
    assert list(kept.set_index("loan_id").loc[["prepaid", "def_after"], "basis"]) == ["prepay", "survived"]


def test_twelve_month_cohort_accepts_codes_and_rejects_dead_loans():
    outcomes = pd.DataFrame(
        {
            "loan_id": [1, 2, 3],
            "event": [1, 2, 0],
            "event_month_idx": [5, 7, np.nan],
            "last_month_idx": [5, 7, 20],
            "censor_reason": ["", "", ""],
        }
    )
    out = v.twelve_month_cohort(outcomes, 0)
    assert list(out["default_12m"].astype(int)) == [1, 0, 0]
    with pytest.raises(DataError, match="at or before start_idx"):
        v.twelve_month_cohort(outcomes, 5)
    with pytest.raises(DataError, match="lacks columns"):
        v.twelve_month_cohort(outcomes.drop(columns="censor_reason"), 0)


# --------------------------------------------------------------------------- calibration


@pytest.fixture
def pd_book():
    rng = np.random.default_rng(3)
    n = 1000
    p = rng.beta(1.2, 30, size=n)
    y = (rng.random(n) < p * 1.3).astype(int)  # mildly under-predicted
    return p, y


def test_hosmer_lemeshow_matches_hand_computation(pd_book):
    p, y = pd_book
    table, summary = v.calibration(p, y, groups=10)
    # Reference: deciles by sorted position (no ties, n divisible by 10), then
    # HL = sum (O - E)^2 / (E (1 - E/n)) and scipy.stats.chi2 on 8 df.
    order = np.argsort(p)
    O, E, N = [], [], []
    for idx in np.array_split(order, 10):
        O.append(y[idx].sum())
        E.append(p[idx].sum())
        N.append(len(idx))
    O, E, N = map(np.asarray, (O, E, N))
    hl = np.sum((O - E) ** 2 / (E * (1 - E / N)))
    np.testing.assert_array_equal(table["n"], N)
    np.testing.assert_array_equal(table["actual"], O)
    np.testing.assert_allclose(table["expected"], E, rtol=1e-12)
    assert summary["hl_statistic"] == pytest.approx(hl, rel=1e-12)
    assert summary["hl_df"] == 8 and summary["hl_sample"] == "development"
    assert summary["hl_p_value"] == pytest.approx(stats.chi2.sf(hl, 8), rel=1e-10)
    # on an external sample no parameter came from these outcomes: groups degrees of freedom, not groups - 2
    # (Hosmer, Lemeshow & Sturdivant 2013, Applied Logistic Regression, external validation; from memory)
    _, external = v.calibration(p, y, groups=10, sample="external")
    assert external["hl_statistic"] == summary["hl_statistic"] and external["hl_df"] == 10
    assert external["hl_p_value"] == pytest.approx(stats.chi2.sf(hl, 10), rel=1e-10)
    with pytest.raises(DataError, match="sample must be one of"):
        v.calibration(p, y, sample="holdout")
    assert summary["actual"] == y.sum() and summary["expected"] == pytest.approx(p.sum())
    assert table.index.name == "group" and list(table.index) == list(range(1, 11))


def test_binomial_test_p_values_and_intervals_per_group(pd_book):
    p, y = pd_book
    table, _ = v.calibration(p, y, groups=5)
    for _, row in table.iterrows():
        # Reference: scipy.stats.binomtest (exact, two-sided) at the mean PD.
        ref = stats.binomtest(int(row["actual"]), int(row["n"]), row["pd_mean"]).pvalue
        assert row["p_value"] == pytest.approx(ref, rel=1e-12)
        # Reference: statsmodels Jeffreys interval.
        lo, hi = proportion_confint(int(row["actual"]), int(row["n"]), method="jeffreys")
        assert row["observed_lo"] == pytest.approx(lo, abs=1e-12)
        assert row["observed_hi"] == pytest.approx(hi, abs=1e-12)


def test_calibration_by_grade_and_tie_handling(pd_book):
    p, y = pd_book
    grade = np.where(p < 0.02, "A", np.where(p < 0.05, "B", "C"))
    table, summary = v.calibration(p, y, grade=grade)
    # Reference: pandas groupby counts.
    ref = pd.DataFrame({"g": grade, "y": y, "p": p}).groupby("g").agg(n=("y", "size"), a=("y", "sum"), e=("p", "sum"))
    np.testing.assert_array_equal(table["n"], ref["n"])
    np.testing.assert_array_equal(table["actual"], ref["a"])
    assert table.index.name == "grade" and summary["groups"] == 3 and summary["hl_df"] == 1
    # Tied PDs share a group and the grouping ignores input order.
    tied = np.repeat([0.01, 0.02, 0.05, 0.10], 25)
    yy = np.zeros(100, dtype=int)
    yy[::9] = 1
    t1, _ = v.calibration(tied, yy, groups=10)
    perm = np.random.default_rng(0).permutation(100)
    t2, _ = v.calibration(tied[perm], yy[perm], groups=10)
    assert len(t1) == 4 and (t1["pd_min"] == t1["pd_max"]).all()
    pd.testing.assert_frame_equal(t1, t2)


# --------------------------------------------------------------------------- stability


def test_psi_of_identical_samples_is_zero():
    x = np.random.default_rng(1).normal(size=2000)
    value, table = v.psi(x, x.copy())
    assert value == 0.0
    assert len(table) == 10 and table["expected_n"].sum() == 2000
    assert v.psi_verdict(value) == "pass"


def test_psi_of_a_known_shift_matches_hand_formula():
    rng = np.random.default_rng(2)
    e = rng.normal(size=5000)
    a = rng.normal(0.3, 1.1, size=4000)
    value, table = v.psi(e, a, bins=10)
    # Reference: the same quantile edges, right-closed bins via pandas.cut,
    # PSI = sum (a - e) ln(a / e).
    edges = np.r_[-np.inf, np.quantile(e, np.arange(1, 10) / 10), np.inf]
    se = pd.Series(pd.cut(e, edges)).value_counts(sort=False).to_numpy() / len(e)
    sa = pd.Series(pd.cut(a, edges)).value_counts(sort=False).to_numpy() / len(a)
    ref = np.sum((sa - se) * np.log(sa / se))
    assert value == pytest.approx(ref, rel=1e-12)
    np.testing.assert_allclose(table["actual_share"], sa, rtol=1e-12)
    assert value > 0.05


def test_psi_categorical_with_an_empty_level_uses_the_floor():
    e = np.array(["A"] * 50 + ["B"] * 30 + ["C"] * 20)
    a = np.array(["A"] * 60 + ["B"] * 40)
    value, table = v.psi(e, a, categorical=True)
    # Reference: hand formula; level C is absent from `actual`, so its share is floored at 1e-6.
    se = np.array([0.5, 0.3, 0.2])
    sa = np.array([0.6, 0.4, 1e-6])
    assert value == pytest.approx(np.sum((sa - se) * np.log(sa / se)), rel=1e-12)
    assert list(table["bin"]) == ["A", "B", "C"]


def test_psi_missing_values_get_their_own_bin():
    e = np.r_[np.arange(100.0), [np.nan] * 10]
    a = np.r_[np.arange(100.0), [np.nan] * 30]
    value, table = v.psi(e, a, bins=4)
    assert table["bin"].iloc[-1] == "missing" and list(table["actual_n"])[-1] == 30
    assert value > 0


# --------------------------------------------------------------------------- backtest


def _simulated_months(rng, groups, size):
    hd = rng.uniform(0.005, 0.03, size=groups * size)
    hp = rng.uniform(0.01, 0.04, size=groups * size)
    u = rng.random(groups * size)
    outcome = np.where(u < hd, 1, np.where(u < hd + hp, 2, 0))
    month = np.repeat(np.arange(groups), size)
    return pd.DataFrame({"month": month, "h_default": hd, "h_prepay": hp, "outcome": outcome})


def test_backtest_columns_and_sums_by_hand():
    frame = pd.DataFrame(
        {
            "month": [1, 1, 1, 2, 2],
            "age_band": ["a", "a", "b", "a", "a"],
            "h_default": [0.1, 0.2, 0.3, 0.05, 0.05],
            "h_prepay": [0.2, 0.2, 0.1, 0.1, 0.3],
            "outcome": [1, 0, 2, 0, 2],
        }
    )
    before = frame.copy()
    out = v.backtest(frame, ["month", "age_band"])
    pd.testing.assert_frame_equal(frame, before)  # input untouched
    assert list(out.columns) == [
        "month", "age_band", "cause", "n", "expected", "actual",
        "predicted_rate", "observed_rate", "observed_lo", "observed_hi", "outside", "z", "z_factor",
    ]
    row = out[(out["month"] == 1) & (out["age_band"] == "a") & (out["cause"] == "default")].iloc[0]
    # Hand computation: n 2, expected 0.3, actual 1, variance 0.1*0.9 + 0.2*0.8.
    assert row["n"] == 2 and row["actual"] == 1
    assert row["expected"] == pytest.approx(0.3)
    assert row["z"] == pytest.approx((1 - 0.3) / np.sqrt(0.09 + 0.16))
    assert list(out["cause"][:2]) == ["default", "prepay"]


def test_backtest_coverage_when_the_hazards_are_right():
    rng = np.random.default_rng(2024)
    frame = _simulated_months(rng, groups=200, size=2000)
    out = v.backtest(frame, "month")
    # Reference: by construction the predicted hazards are the true ones, so the
    # 95% interval should miss about 5% of the 200 groups per cause.
    for cause in ("default", "prepay"):
        share = out.loc[out["cause"] == cause, "outside"].mean()
        assert 0.01 <= share <= 0.12, (cause, share)
        z = out.loc[out["cause"] == cause, "z"]
        assert abs(z.mean()) < 0.25 and 0.8 < z.std() < 1.2
    # Halved default hazards: nearly every group should be flagged.
    wrong = frame.assign(h_default=frame["h_default"] / 2)
    share = v.backtest(wrong, "month").query("cause == 'default'")["outside"].mean()
    assert share > 0.8


def test_backtest_reports_bad_input():
    frame = pd.DataFrame({"month": [1], "h_default": [0.1], "h_prepay": [0.1], "outcome": [3]})
    with pytest.raises(DataError, match="0, 1 or 2"):
        v.backtest(frame, "month")
    with pytest.raises(DataError, match=r"lacks columns \['vintage'\]"):
        v.backtest(frame, "vintage")


def test_age_band_labels_follow_the_feature_convention():
    ages = pd.Series([1, 11, 12, 23, 24, 59, 60, 200], index=list("abcdefgh"))
    bands = v.age_band(ages, [12, 24, 60])
    assert list(bands) == ["1-11", "1-11", "12-23", "12-23", "24-59", "24-59", "60+", "60+"]
    assert list(bands.index) == list("abcdefgh") and bands.cat.ordered


# --------------------------------------------------------------------------- coefficients


def test_coefficient_changes():
    cur = pd.DataFrame(
        {"cause": ["default", "default", "prepay"], "term": ["intercept", "ltv", "intercept"],
         "estimate": [-4.0, 1.5, -3.0], "std_error": [0.1, 0.2, 0.1]}
    )
    pri = pd.DataFrame(
        {"cause": ["default", "default", "prepay"], "term": ["intercept", "fico", "intercept"],
         "estimate": [-4.2, -0.01, -3.0], "std_error": [0.1, 0.002, 0.05]}
    )
    out = v.coefficient_changes(cur, pri)
    assert list(zip(out["term"], out["present"])) == [
        ("intercept", "both"), ("ltv", "current only"), ("intercept", "both"), ("fico", "prior only")
    ]
    assert out.loc[0, "change"] == pytest.approx(0.2)
    assert out.loc[0, "change_in_se"] == pytest.approx(2.0)
    assert np.isnan(out.loc[1, "change"]) and np.isnan(out.loc[3, "change_in_se"])


# --------------------------------------------------------------------------- Aalen-Johansen


def _competing_sample(rng, n=400):
    t_def = rng.geometric(0.02, size=n)
    t_pre = rng.geometric(0.05, size=n)
    t_cen = rng.integers(1, 40, size=n)
    time = np.minimum.reduce([t_def, t_pre, t_cen])
    event = np.where(time == t_cen, 0, np.where(time == t_def, 1, 2))
    return time, event


def test_aalen_johansen_matches_statsmodels_cumincidence():
    time, event = _competing_sample(np.random.default_rng(5))
    aj = v.aalen_johansen(time, event)
    # Reference: statsmodels CumIncidenceRight, at its (unique observed) times.
    ref = CumIncidenceRight(time, event)
    at = aj.loc[ref.times]
    for k in (1, 2):
        np.testing.assert_allclose(at[f"cif_{k}"], ref.cinc[k - 1], rtol=0, atol=1e-10)
        se_ref = np.asarray(ref.cinc_se[k - 1])
        ok = np.isfinite(se_ref)
        np.testing.assert_allclose(at[f"cif_{k}_se"].to_numpy()[ok], se_ref[ok], rtol=1e-8, atol=1e-12)
    # Invariants: survival never rises; survival + all cumulative incidences = 1.
    assert (np.diff(aj["survival"]) <= 1e-15).all()
    np.testing.assert_allclose(aj["survival"] + aj["cif_1"] + aj["cif_2"], 1.0, atol=1e-12)
    assert aj.index.name == "time" and aj["n_risk"].iloc[0] == len(time)


def test_aalen_johansen_one_cause_survival_matches_kaplan_meier():
    time, event = _competing_sample(np.random.default_rng(6))
    status = (event > 0).astype(int)
    aj = v.aalen_johansen(time, status, causes=(1,))
    # Reference: statsmodels SurvfuncRight (Kaplan-Meier with Greenwood SE).
    ref = SurvfuncRight(time, status)
    at = aj.loc[ref.surv_times]
    np.testing.assert_allclose(at["survival"], ref.surv_prob, atol=1e-10)
    np.testing.assert_allclose(at["survival_se"], ref.surv_prob_se, rtol=1e-8)
    np.testing.assert_allclose(aj["cif_1"], 1 - aj["survival"], atol=1e-12)


def test_aalen_johansen_left_truncation_matches_kaplan_meier_with_entry():
    rng = np.random.default_rng(8)
    time, event = _competing_sample(rng, n=600)
    entry = rng.integers(0, 6, size=len(time))
    keep = entry < time
    time, event, entry = time[keep], event[keep], entry[keep]
    status = (event > 0).astype(int)
    aj = v.aalen_johansen(time, status, causes=(1,), entry=entry)
    # Reference: statsmodels SurvfuncRight with entry (not at risk on or before entry).
    ref = SurvfuncRight(time, status, entry=entry)
    np.testing.assert_allclose(aj.loc[ref.surv_times, "survival"], ref.surv_prob, atol=1e-10)


def test_model_vs_nonparametric_by_vintage():
    rng = np.random.default_rng(9)
    t1, e1 = _competing_sample(rng, n=500)
    t2, e2 = _competing_sample(rng, n=300)
    time, event = np.r_[t1, t2], np.r_[e1, e2]
    vintage = np.array(["2019-01"] * 500 + ["2019-02"] * 300)
    # A model curve of the right shape: F_1(t) = sum_u S(u-1) h_1 with constant
    # hazards h_1 = 0.02, h_2 = 0.05 (the table is checked, not the fit).
    ages = np.arange(1, 61)
    s_prev = (1 - 0.02 - 0.05) ** (ages - 1)
    truth = np.cumsum(s_prev * 0.02)
    out = v.model_vs_nonparametric(truth, time, event, vintage)
    assert list(out.columns) == [
        "vintage", "age", "model", "observed", "observed_se", "observed_lo", "observed_hi",
        "difference", "outside", "n_risk",
    ]
    assert list(out["vintage"].unique()) == ["2019-01", "2019-02"]
    first = out[out["vintage"] == "2019-01"]
    aj = v.aalen_johansen(t1, e1)
    np.testing.assert_allclose(first["observed"], aj.loc[first["age"], "cif_1"])
    np.testing.assert_allclose(first["difference"], first["model"] - first["observed"])
    assert first["age"].iloc[0] == 1 and first["age"].iloc[-1] == t1.max()
    # Same curves in a DataFrame by vintage give the same table.
    curves = pd.DataFrame({"2019-01": truth, "2019-02": truth}, index=pd.Index(ages, name="age"))
    pd.testing.assert_frame_equal(v.model_vs_nonparametric(curves, time, event, vintage), out)


# --------------------------------------------------------------------------- Aalen-Johansen for arrears states


def _loan_months_of(time, event):
    """Loan-month rows (age, origin 0, end) of lifetimes with one transient state: stay, then the event or censoring."""
    age = np.concatenate([np.arange(1, t + 1) for t in time])
    last = np.cumsum(time) - 1
    end = np.zeros(len(age), dtype=np.int64)
    end[last] = event
    return age, np.zeros(len(age), dtype=np.int64), end


def test_state_occupation_with_one_transient_state_matches_statsmodels():
    time, event = _competing_sample(np.random.default_rng(11))
    age, origin, end = _loan_months_of(time, event)
    out = v.aalen_johansen_states(age, origin, end, n_transient=1, n_states=3)
    # Reference: statsmodels SurvfuncRight (Kaplan-Meier, Greenwood SE) and CumIncidenceRight (Aalen-Johansen,
    # delta-method SE of Marubini & Valsecchi): with one transient state the Greenwood-type variance of the state
    # occupation is both of them.
    km = SurvfuncRight(time, (event > 0).astype(int))
    np.testing.assert_allclose(out.loc[km.surv_times, "p_0"], km.surv_prob, rtol=0, atol=1e-12)
    np.testing.assert_allclose(out.loc[km.surv_times, "p_0_se"], km.surv_prob_se, rtol=1e-9)
    ci = CumIncidenceRight(time, event)
    for k in (1, 2):
        np.testing.assert_allclose(out.loc[ci.times, f"p_{k}"], ci.cinc[k - 1], rtol=0, atol=1e-12)
        se = np.asarray(ci.cinc_se[k - 1])
        ok = np.isfinite(se)
        np.testing.assert_allclose(out.loc[ci.times, f"p_{k}_se"].to_numpy()[ok], se[ok], rtol=1e-8, atol=1e-14)
    assert out["n_risk"].iloc[0] == len(time)


def test_state_occupation_without_censoring_is_the_share_of_loans_in_each_state():
    # Every loan followed from its first month to age 20 (or absorption): the product of the empirical transition
    # matrices must give back the plain share of loans in each state at each age, and its standard error the
    # binomial sqrt(p (1 - p) / n) (the definition of a proportion's variance).
    rng = np.random.default_rng(12)
    P = np.array([[0.90, 0.05, 0.00, 0.01, 0.04], [0.30, 0.50, 0.15, 0.02, 0.03], [0.10, 0.20, 0.50, 0.15, 0.05]])
    n, A, T = 500, 20, 3
    state = np.zeros((n, A + 1), dtype=np.int64)
    rows = []
    for a in range(1, A + 1):
        moving = state[:, a - 1] < T
        u = rng.random(n)
        nxt = (u[:, None] > np.cumsum(P[np.minimum(state[:, a - 1], T - 1)], axis=1)).sum(axis=1)
        state[:, a] = np.where(moving, nxt, state[:, a - 1])
        rows.append(np.column_stack([np.full(moving.sum(), a), state[moving, a - 1], state[moving, a]]))
    r = np.concatenate(rows)
    out = v.aalen_johansen_states(r[:, 0], r[:, 1], r[:, 2], n_transient=T, n_states=5)
    share = np.stack([(state[:, 1:] == k).mean(axis=0) for k in range(5)], axis=1)
    got = out[[f"p_{k}" for k in range(5)]].to_numpy()
    np.testing.assert_allclose(got, share, rtol=0, atol=1e-12)
    np.testing.assert_allclose(out[[f"p_{k}_se" for k in range(5)]].to_numpy(), np.sqrt(share * (1 - share) / n), atol=1e-12)
    np.testing.assert_allclose(got.sum(axis=1), 1.0, atol=1e-12)
    # aggregated rows (with counts) give the same estimate as one row per loan-month
    cells, count = np.unique(r, axis=0, return_counts=True)
    agg = v.aalen_johansen_states(cells[:, 0], cells[:, 1], cells[:, 2], count, n_transient=T, n_states=5)
    pd.testing.assert_frame_equal(agg, out)


def test_state_occupation_names_bad_input():
    with pytest.raises(DataError, match="origin must be a transient state code 0..2"):
        v.aalen_johansen_states([1, 2], [0, 3], [0, 0], n_transient=3, n_states=5)
    with pytest.raises(DataError, match="end must be a state code 0..4"):
        v.aalen_johansen_states([1, 2], [0, 1], [0, 5], n_transient=3, n_states=5)
    with pytest.raises(DataError, match="age must hold whole months from 1"):
        v.aalen_johansen_states([0, 2], [0, 1], [0, 1], n_transient=3, n_states=5)


# --------------------------------------------------------------------------- one-factor backtest


@pytest.mark.parametrize("p", [0.0003, 0.004, 0.05])
def test_one_factor_variance_against_the_bivariate_normal_and_simulation(p):
    # Vasicek's one-factor model (Vasicek 2002; BCBS Working Paper 14, 2005; from memory): two exposures both
    # default with probability Phi_2(c, c; rho), c = Phi^-1(p). Reference: scipy's bivariate normal CDF.
    from scipy import stats as st

    rho, n = 0.15, 5_000
    c = st.norm.ppf(p)
    p2 = st.multivariate_normal(mean=[0, 0], cov=[[1, rho], [rho, 1]], abseps=1e-13, releps=1e-10).cdf([c, c])
    expected = n * p * (1 - p) + n * (n - 1) * (p2 - p * p)
    assert v.one_factor_variance(n, p, rho) == pytest.approx(expected, rel=1e-5)
    assert v.one_factor_variance(n, p, 0.0) == pytest.approx(n * p * (1 - p), rel=1e-15)  # independence: binomial
    # Simulation: draw the factor, then the count given it (binomial); 100,000 draws, seeded.
    rng = np.random.default_rng(7)
    z = rng.standard_normal(100_000)
    counts = rng.binomial(n, st.norm.cdf((c - np.sqrt(rho) * z) / np.sqrt(1 - rho)))
    assert counts.var() == pytest.approx(v.one_factor_variance(n, p, rho), rel=0.05)


def test_backtest_z_factor_shrinks_a_common_surprise():
    # One month where every loan-month's default probability was 0.5% but 1.5% defaulted: z under independence
    # is about 14 (a model failure), the one-factor z about 1.4 (a bad month, as a macro shock gives).
    n = 10_000
    frame = pd.DataFrame({"month": "2023-01", "h_default": np.full(n, 0.005), "h_prepay": 0.01,
                          "outcome": np.r_[np.ones(150), np.zeros(n - 150)].astype(int)})  # fmt: skip
    t = v.backtest(frame, by="month", asset_correlation=0.15).set_index("cause")
    var = v.one_factor_variance(n, 0.005, 0.15)
    assert t.loc["default", "z"] == pytest.approx(100 / np.sqrt(n * 0.005 * 0.995), rel=1e-12)
    assert t.loc["default", "z_factor"] == pytest.approx(100 / np.sqrt(var), rel=1e-12)
    assert t.loc["default", "z"] > 10 and abs(t.loc["default", "z_factor"]) < 2
    same = v.backtest(frame, by="month", asset_correlation=0.0)
    np.testing.assert_allclose(same["z_factor"], same["z"], rtol=1e-12)


def test_backtest_z_factor_draws_the_factor_once_per_period():
    # Two months of 5,000 loan-months each: with a month column the one-factor variance of the pair is the
    # sum of each month's (independent draws); without it the 10,000 loan-months share one draw.
    n = 5_000
    frame = pd.DataFrame({"month": np.repeat(["2023-01", "2023-02"], n), "band": "all", "h_default": 0.004,
                          "h_prepay": 0.01, "outcome": np.r_[np.ones(60), np.zeros(2 * n - 60)].astype(int)})  # fmt: skip
    t = v.backtest(frame, by="band").set_index("cause")
    monthly = 2 * v.one_factor_variance(n, 0.004, v.ASSET_CORRELATION)
    assert t.loc["default", "z_factor"] == pytest.approx(20 / np.sqrt(monthly), rel=1e-9)
    pooled = v.backtest(frame.drop(columns="month"), by="band").set_index("cause")
    assert pooled.loc["default", "z_factor"] == pytest.approx(20 / np.sqrt(v.one_factor_variance(2 * n, 0.004, 0.15)), rel=1e-9)
