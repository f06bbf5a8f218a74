"""Tests of creditsurv.features: the feature spec, its SQL and its numpy design."""

from __future__ import annotations

import copy
import json

import duckdb
import numpy as np
import pandas as pd
import pytest
from test_hazard import connect

from creditsurv.config import Baseline, Collateral, Covariate, ModelSpec
from creditsurv.errors import ConfigError, FeatureError
from creditsurv.model import FeatureSpec, feature_spec, natural_spline_basis
from creditsurv.months import format_month
from creditsurv.sql import quote_ident, quote_literal


@pytest.fixture(scope="module")
def book(engine_frames):
    return engine_frames(400, 3, "2022-12")


@pytest.fixture()
def con(book):
    c = connect(book)
    yield c
    c.close()


def _spec(*covariates, baseline=None, interactions=()):
    model = ModelSpec(baseline=baseline or Baseline(), covariates=tuple(covariates), interactions=interactions)
    return feature_spec(model, Collateral())


def _raw(con, spec, where="TRUE"):
    return con.sql(spec.raw_query(con, where)).df()


# --------------------------------------------------------------------------- quoting


def test_quote_helpers_double_inner_quotes():
    assert quote_ident('we"ird') == '"we""ird"'
    assert quote_literal("o'neil") == "'o''neil'"


def test_raw_query_quotes_odd_column_names(book):
    # A loan-table column whose name holds a double quote and a space must be read as data, not SQL.
    loans = book["loans"].rename(columns={"dti": 'debt "to" income'})
    con = connect({**book, "loans": loans})
    spec = _spec(Covariate(name="dti", column='debt "to" income')).learn(con)
    raw = _raw(con, spec)
    expected = loans.set_index("loan_id").loc[raw["loan_id"], 'debt "to" income'].to_numpy()
    np.testing.assert_array_equal(raw['debt "to" income'].to_numpy(), expected)


# --------------------------------------------------------------------------- raw inputs


def test_raw_inputs_match_direct_computation(con, book):
    spec = _spec(
        Covariate(name="u3", macro="unemployment_rate", lag=3),
        Covariate(name="ltv", column="current_ltv"),
        Covariate(name="inc", column="rate_incentive"),
        Covariate(name="score", column="credit_score"),
        Covariate(name="bal", column="balance", lag=1, before_first=-1.0),
    ).learn(con)
    raw = _raw(con, spec)
    lm = book["loan_months"].sort_values(["loan_id", "month_idx"]).reset_index(drop=True)
    np.testing.assert_array_equal(raw["loan_id"], lm["loan_id"])
    macro = book["macro"].set_index("month_idx")
    # Reference: pandas look-ups of the macro table at month - 3.
    np.testing.assert_allclose(raw["macro:unemployment_rate:3"], macro.loc[raw["month_idx"] - 3, "unemployment_rate"].to_numpy(), rtol=0, atol=0)
    loans = book["loans"].set_index("loan_id").loc[raw["loan_id"]]
    # Reference: the amortisation schedule rolled forward month by month (balance*(1+r) - payment).
    r = loans["note_rate"].to_numpy() / 12
    n = loans["term"].to_numpy()
    p0 = loans["original_balance"].to_numpy()
    pay = p0 * r / (1 - (1 + r) ** -n)
    bal = p0.copy()
    sched = np.empty_like(bal)
    k = raw["age"].to_numpy() - 1
    for step in range(int(k.max()) + 1):
        sched[k == step] = bal[k == step]
        bal = bal * (1 + r) - pay
    # A covariate of month t describes its start: the index and the market rate of the previous month-end
    # (collateral.hpi_lag and market_rate_lag, default 1), the index never before the valuation at origination.
    region = loans["region"].str.lower().to_numpy()
    hpi_months = np.maximum(raw["month_idx"].to_numpy() - 1, loans["origination_idx"].to_numpy())
    hpi_now = np.array([macro.loc[m, f"hpi_{g}"] for m, g in zip(hpi_months, region)])
    hpi_orig = np.array([macro.loc[m, f"hpi_{g}"] for m, g in zip(loans["origination_idx"], region)])
    ltv = sched / (loans["property_value"].to_numpy() * hpi_now / hpi_orig)
    np.testing.assert_allclose(raw["current_ltv"], ltv, rtol=1e-10)
    inc = 100 * loans["note_rate"].to_numpy() - macro.loc[raw["month_idx"] - 1, "mortgage_rate"].to_numpy()
    np.testing.assert_allclose(raw["rate_incentive"], inc, rtol=1e-12)
    # at the start of the first month after origination current LTV is the LTV at origination
    first = (raw["month_idx"].to_numpy() - 1 == loans["origination_idx"].to_numpy()) & (raw["age"].to_numpy() == 1)
    assert first.any()
    np.testing.assert_allclose(raw["current_ltv"][first], (loans["original_balance"] / loans["property_value"]).to_numpy()[first], rtol=1e-12)
    np.testing.assert_array_equal(raw["credit_score"], loans["credit_score"])
    # Reference: the panel's balance at the end of the month before, by pandas look-up; none before the first row
    panel = book["panel"].set_index(["loan_id", "month_idx"])["balance"]
    before = panel.reindex(list(zip(raw["loan_id"], raw["month_idx"] - 1))).fillna(-1.0).to_numpy()
    np.testing.assert_array_equal(raw["panel:balance:1"], before)
    assert (before == -1.0).any() and (before != -1.0).any()
    assert spec.required_inputs == ["age", "macro:unemployment_rate:3", "current_ltv", "rate_incentive", "credit_score", "panel:balance:1"]


def test_derived_covariates_read_the_configured_lags(con, book):
    # A publication delay of three months for the index (clipped at origination: no index move before the
    # valuation) and the market rate of the month itself (lag 0), against pandas look-ups.
    model = ModelSpec(covariates=(Covariate(name="ltv", column="current_ltv"), Covariate(name="inc", column="rate_incentive")))
    spec = feature_spec(model, Collateral(hpi_lag=3, market_rate_lag=0)).learn(con)
    assert spec.derived_lags == {"hpi": 3, "market_rate": 0}
    raw = _raw(con, spec)
    macro = book["macro"].set_index("month_idx")
    loans = book["loans"].set_index("loan_id").loc[raw["loan_id"]]
    orig = loans["origination_idx"].to_numpy()
    region = loans["region"].str.lower().to_numpy()
    months = np.maximum(raw["month_idx"].to_numpy() - 3, orig)
    assert (months == orig).sum() > (raw["age"] == 1).sum()  # the clip is reached in the first months
    growth = np.array([macro.loc[m, f"hpi_{g}"] / macro.loc[o, f"hpi_{g}"] for m, o, g in zip(months, orig, region)])
    default_spec = _spec(Covariate(name="ltv", column="current_ltv")).learn(con)
    base = _raw(con, default_spec)  # lag 1: the ratio of the two LTVs is the ratio of the two index moves
    growth1 = np.array([
        macro.loc[m, f"hpi_{g}"] / macro.loc[o, f"hpi_{g}"]
        for m, o, g in zip(np.maximum(raw["month_idx"].to_numpy() - 1, orig), orig, region)
    ])  # fmt: skip
    np.testing.assert_allclose(raw["current_ltv"] * growth, base["current_ltv"] * growth1, rtol=1e-12)
    inc = 100 * loans["note_rate"].to_numpy() - macro.loc[raw["month_idx"], "mortgage_rate"].to_numpy()
    np.testing.assert_allclose(raw["rate_incentive"], inc, rtol=1e-12)


def test_the_supported_ages_are_learned_from_the_development_loan_months(con, book):
    # The last age with at least tail_min_loan_months development loan-months (pandas count of the risk set);
    # under tail: hold the projection reads it for every older month, under extrapolate nothing is capped.
    counts = book["loan_months"].groupby("age").size()
    for need in (50, 400):
        model = ModelSpec(baseline=Baseline(kind="spline", knots=(3.0, 12.0, 24.0), tail_min_loan_months=need))
        spec = feature_spec(model, Collateral()).learn(con)
        assert spec.learned["supported_age"] == counts[counts >= need].index.max()
        assert spec.age_cap == spec.learned["supported_age"]
        assert spec.with_tail("extrapolate").age_cap is None and spec.with_tail("extrapolate").learned == spec.learned
    assert counts.index.max() > spec.age_cap  # the book has older, thinner ages


def test_where_filter_and_params(con, book):
    spec = _spec(Covariate(name="score", column="credit_score"))
    first = int(book["loan_months"]["month_idx"].min()) + 12
    sql = spec.raw_query(con, "month_idx >= ?")
    raw = con.sql(sql, params=[first]).df()
    assert len(raw) == int((book["loan_months"]["month_idx"] >= first).sum())


# --------------------------------------------------------------------------- learning and serialisation


def test_learned_constants_and_json_round_trip(con, book):
    spec = _spec(
        Covariate(name="score", column="credit_score", transform="standardise", floor=600),
        Covariate(name="region", column="region", kind="categorical", reference="South"),
        Covariate(name="dti_band", column="dti", kind="bins", bins=(0.2, 0.35)),
        Covariate(name="la", column="log_age"),
        interactions=(("score", "region"),),
    ).learn(con)
    raw = _raw(con, spec)
    # Reference: numpy mean and sample sd of the floored values over the risk set.
    x = np.maximum(raw["credit_score"].to_numpy(dtype=float), 600)
    st = spec.learned["covariates"]["score"]
    assert st["mean"] == pytest.approx(x.mean(), rel=1e-12)
    assert st["sd"] == pytest.approx(x.std(ddof=1), rel=1e-12)
    lv = spec.learned["covariates"]["region"]
    assert lv["levels"] == sorted(book["loans"]["region"].unique()) and lv["reference"] == "South"
    assert spec.learned["covariates"]["dti_band"]["levels"] == ["<0.2", "[0.2,0.35)", ">=0.35"]
    text = json.dumps(spec.to_dict(), sort_keys=True)
    again = FeatureSpec.from_dict(json.loads(text))
    X1, n1 = spec.design(raw)
    X2, n2 = again.design(raw)
    assert n1 == n2 and np.array_equal(X1, X2)
    assert "score:region[East]" in n1 and "region[South]" not in n1


def test_design_columns_and_inputs_untouched(con):
    spec = _spec(
        Covariate(name="score", column="credit_score", transform="log", cap=800),
        Covariate(name="region", column="region", kind="categorical"),
        baseline=Baseline(kind="age_bands", edges=(3, 6, 12)),
    ).learn(con)
    raw = {k: v.copy() for k, v in {"age": np.array([1, 3, 5, 6, 12, 40]), "credit_score": np.array([600, 700, 810, 650, 700, 700]),
                                      "region": np.array(["North", "Central", "East", "West", "South", "North"], dtype=object)}.items()}
    before = copy.deepcopy(raw)
    X, names = spec.design(raw)
    for k in raw:
        np.testing.assert_array_equal(raw[k], before[k])
    assert names[:4] == ["intercept", "age_band[3-5]", "age_band[6-11]", "age_band[12+]"]
    np.testing.assert_array_equal(X[:, 1:4], [[0, 0, 0], [1, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1], [0, 0, 1]])
    np.testing.assert_allclose(X[:, names.index("score")], np.log([600, 700, 800, 650, 700, 700]))
    np.testing.assert_array_equal(X[:, names.index("region[North]")], [1, 0, 0, 0, 0, 1])
    assert X.dtype == np.float64 and X.shape == (6, len(names))


def test_age_indicators_share_last(con):
    spec = _spec(baseline=Baseline(kind="age_indicators", max_age=5)).learn(con)
    X, names = spec.design({"age": np.array([1, 2, 5, 9])})
    assert names == ["intercept", "age[2]", "age[3]", "age[4]", "age[5]"]
    np.testing.assert_array_equal(X[:, 1:], [[0, 0, 0, 0], [1, 0, 0, 0], [0, 0, 0, 1], [0, 0, 0, 1]])


# --------------------------------------------------------------------------- natural cubic spline


KNOTS = (3.0, 8.0, 15.0, 24.0, 30.0)


def test_spline_linear_beyond_boundary_knots():
    # Reference: definition of a natural spline (zero second derivative outside the boundary knots).
    x = np.r_[np.arange(-20.0, 3.01, 1.0), np.arange(30.0, 80.0, 1.0)]
    B = natural_spline_basis(x, KNOTS)
    lo, hi = B[x <= 3.0], B[x >= 30.0]
    np.testing.assert_allclose(np.diff(lo, 2, axis=0), 0.0, atol=1e-9)
    np.testing.assert_allclose(np.diff(hi, 2, axis=0), 0.0, atol=1e-9)
    # ...and it is not linear inside.
    inside = natural_spline_basis(np.arange(3.0, 31.0), KNOTS)
    assert np.abs(np.diff(inside[:, 1:], 2, axis=0)).max() > 1e-4


def test_spline_reproduces_linear_functions_exactly():
    x = np.arange(1.0, 60.0)
    D = np.column_stack([np.ones_like(x), natural_spline_basis(x, KNOTS)])
    y = 2.5 - 0.37 * x
    coef, *_ = np.linalg.lstsq(D, y, rcond=None)
    np.testing.assert_allclose(D @ coef, y, atol=1e-10)


def test_spline_spans_the_same_space_as_patsy_cr():
    patsy = pytest.importorskip("patsy")
    # Reference: patsy's cr() (a natural cubic regression spline parameterised by its values at the
    # knots). Different basis, same column space: least-squares fitted values must agree.
    x = np.linspace(3.0, 30.0, 200)
    y = np.sin(x / 4.0) + 0.01 * x**2
    P = np.asarray(patsy.dmatrix("cr(x, knots=(8, 15, 24), lower_bound=3, upper_bound=30) - 1", {"x": x}))
    D = np.column_stack([np.ones_like(x), natural_spline_basis(x, KNOTS)])
    fit_p = P @ np.linalg.lstsq(P, y, rcond=None)[0]
    fit_d = D @ np.linalg.lstsq(D, y, rcond=None)[0]
    np.testing.assert_allclose(fit_d, fit_p, atol=1e-9)


# --------------------------------------------------------------------------- errors


def test_unknown_column_names_closest_match(con):
    with pytest.raises(FeatureError, match=r"covariate 'score': unknown column 'credit_scor'; did you mean 'credit_score'\?"):
        _spec(Covariate(name="score", column="credit_scor")).learn(con)


def test_unknown_macro_series(con):
    with pytest.raises(FeatureError, match=r"unknown macro series 'unemployment'.*did you mean 'unemployment_rate'"):
        _spec(Covariate(name="u", macro="unemployment")).learn(con)


def test_unknown_reference_level_lists_levels(con):
    with pytest.raises(FeatureError, match=r"covariate 'region': reference level 'nord' is not a level \(levels: Central, East, North, South, West\); did you mean 'North'"):
        _spec(Covariate(name="region", column="region", kind="categorical", reference="nord")).learn(con)


def test_bad_bin_reference_is_a_config_error_when_the_config_is_read(panel_clean_book, panel_config_factory):
    # Visible in the YAML, so raised when the config is read, not at the fit.
    model = {"covariates": [{"name": "d", "column": "dti", "kind": "bins", "bins": [0.2, 0.3], "reference": "0.2"}]}
    with pytest.raises(ConfigError) as info:
        panel_config_factory(*panel_clean_book, model=model)
    assert (
        "model.covariates[0]: covariate 'd': reference '0.2' is not a bin label (labels: <0.2, [0.2,0.3), >=0.3); "
        "did you mean '<0.2'?" in str(info.value)
    )


def test_unknown_level_at_design_time(con):
    spec = _spec(Covariate(name="region", column="region", kind="categorical")).learn(con)
    with pytest.raises(FeatureError, match=r"covariate 'region': level\(s\) \['mars'\] were not seen in training"):
        spec.design({"age": np.array([1, 2]), "region": np.array(["North", "mars"], dtype=object)})


def test_spline_knots_outside_ages(con):
    with pytest.raises(FeatureError, match=r"spline knots \['60'\] lie outside the ages in the data \(1 to 24\)"):
        _spec(baseline=Baseline(kind="spline", knots=(3.0, 12.0, 60.0))).learn(con)


def test_macro_lag_past_history(con, book):
    # Macro history cut to start 3 months before the first loan-month: lag 6 runs past its start.
    first_needed = int(book["loan_months"]["month_idx"].min()) - 6
    con.execute("DELETE FROM macro WHERE month_idx < ?", [first_needed + 3])
    with pytest.raises(
        FeatureError,
        match=rf"covariate 'u6': macro series 'unemployment_rate' at lag 6 runs past the start of the macro history: "
        rf"first month needed {format_month(first_needed)}, first available {format_month(first_needed + 3)}",
    ):
        _spec(Covariate(name="u6", macro="unemployment_rate", lag=6)).learn(con)


def test_log_of_non_positive_values(con):
    dpd = {"name": "ls", "column": "days_past_due", "lag": 1, "before_first": 0.0, "transform": "log"}
    with pytest.raises(FeatureError, match=r"covariate 'ls': log of non-positive values in \d+ rows"):
        _spec(Covariate(**dpd)).learn(con)
    spec = _spec(Covariate(**dpd, floor=1.0)).learn(con)
    spec_nofloor = FeatureSpec.from_dict({**spec.to_dict(), "covariates": [{**spec.covariates[0], "floor": None}]})
    with pytest.raises(FeatureError, match=r"covariate 'ls': log of non-positive values in 1 rows"):
        spec_nofloor.design({"age": np.array([1, 2]), "panel:days_past_due:1": np.array([0, 30])})


def test_all_problems_in_one_error(con):
    with pytest.raises(FeatureError) as info:
        _spec(Covariate(name="a", column="nope"), Covariate(name="b", macro="nada")).learn(con)
    assert "'a': unknown column 'nope'" in str(info.value) and "'b': unknown macro series 'nada'" in str(info.value)


def test_design_needs_learning():
    spec = _spec(Covariate(name="score", column="credit_score"))
    with pytest.raises(FeatureError, match="has not been learned"):
        spec.design(pd.DataFrame({"age": [1], "credit_score": [700]}))


def test_missing_values_named(con):
    con.execute("UPDATE loans SET credit_score = NULL WHERE loan_id IN (SELECT loan_id FROM loans LIMIT 3)")
    with pytest.raises(FeatureError, match=r"covariate 'score': \d+ rows have no value for 'credit_score'"):
        _spec(Covariate(name="score", column="credit_score")).learn(con)


def test_duckdb_is_the_engine():
    assert duckdb.__version__


# --------------------------------------------------------------------------- panel columns: the previous month-end


def _panel_book(tmp_path):
    """Two loans with days past due by hand; b defaults (90 at month end) in its fourth month."""
    from creditsurv.config import config_from_dict
    from creditsurv.engines import label_events, open_panel

    rows = [("a", 1, 0), ("a", 2, 30), ("a", 3, 0), ("a", 4, 0), ("b", 1, 0), ("b", 2, 30), ("b", 3, 60), ("b", 4, 90)]
    panel = pd.DataFrame(
        {
            "loan_id": [r[0] for r in rows], "month": [format_month(2023 * 12 + r[1]) for r in rows], "age": [r[1] for r in rows],
            "balance": 1000.0, "days_past_due": [r[2] for r in rows],
        }
    )
    loans = pd.DataFrame({"loan_id": ["a", "b"], "origination_month": "2023-01", "original_balance": 1000.0, "note_rate": 5.0, "term": 360,
                          "dpd_at_origination": [5.0, 15.0]})  # fmt: skip
    panel.to_parquet(tmp_path / "panel.parquet", index=False)
    loans.to_parquet(tmp_path / "loans.parquet", index=False)
    cfg = config_from_dict(
        {
            "as_of": "2023-05", "windows": {"development": {"start": "2023-01", "end": "2023-05"}},
            "inputs": {"panel": {"path": "panel.parquet"}, "loans": {"path": "loans.parquet"}},
        },
        base_dir=tmp_path,
    )
    engine = open_panel(cfg)
    label_events(engine)
    return engine


def test_a_panel_covariate_is_the_previous_month_end_value(tmp_path):
    # The month-end days past due of month t describe the end of t; month t's covariate is the value at the end
    # of t - 1 (lag 1), and a loan's first month takes before_first (a new loan is current: 0 days past due).
    with _panel_book(tmp_path) as engine:
        spec = _spec(Covariate(name="dpd", column="days_past_due", lag=1, before_first=0.0)).learn(engine.con)
        raw = engine.frame(spec.raw_query(engine.con))
    assert raw["panel:days_past_due:1"].tolist() == [0, 0, 30, 0, 0, 0, 30, 60]
    # the default month's own 90 days past due never enters: its covariate is the 60 of the month before
    assert raw.loc[raw["outcome"] == 1, "panel:days_past_due:1"].tolist() == [60]


def test_a_loan_column_gives_each_loan_its_first_months_value(tmp_path):
    # before_first_column: a loan's own value where it has no previous month-end (a refreshed score starts at the
    # origination score); here each loan's first month reads its dpd_at_origination.
    with _panel_book(tmp_path) as engine:
        cov = Covariate(name="dpd", column="days_past_due", lag=1, before_first_column="dpd_at_origination")
        spec = _spec(cov).learn(engine.con)
        raw = engine.frame(spec.raw_query(engine.con))
        assert raw["panel:days_past_due:1"].tolist() == [5, 0, 30, 0, 15, 0, 30, 60]
        bad = Covariate(name="dpd", column="days_past_due", lag=1, before_first_column="dpd_at_orig")
        with pytest.raises(FeatureError, match=r"before_first_column: unknown loan-table column 'dpd_at_orig'.*dpd_at_origination"):
            _spec(bad).learn(engine.con)


def test_a_same_month_panel_covariate_is_refused(tmp_path):
    with _panel_book(tmp_path) as engine:
        with pytest.raises(FeatureError, match=r"covariate 'dpd': 'days_past_due' is a panel column, a month-end value: .* lag: 1"):
            _spec(Covariate(name="dpd", column="days_past_due")).learn(engine.con)
        with pytest.raises(FeatureError, match=r"covariate 'r': lag applies to macro series and panel columns; 'note_rate' is not a panel column"):
            _spec(Covariate(name="r", column="note_rate", lag=1)).learn(engine.con)
        # without before_first a loan's first month has no previous month-end: named, with the fix
        with pytest.raises(FeatureError, match=r"covariate 'dpd': 2 rows have no value .* set before_first"):
            _spec(Covariate(name="dpd", column="days_past_due", lag=1)).learn(engine.con)
