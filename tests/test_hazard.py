"""Tests of creditsurv.hazard: exact out-of-core fits of discrete-time competing-risk models.

Each check names its independent reference: statsmodels' GLM / MNLogit on the same design,
statsmodels' Kaplan-Meier (SurvfuncRight) and Aalen-Johansen (CumIncidenceRight) estimators,
or a direct scipy.optimize minimisation written here.
"""

from __future__ import annotations

import json

import duckdb
import numpy as np
import pytest
import statsmodels.api as sm
from scipy import optimize
from statsmodels.duration.survfunc import CumIncidenceRight, SurvfuncRight

from creditsurv.config import Baseline, Collateral, Covariate, ModelSpec
from creditsurv.demo import TRUE_COEFFICIENTS, LogitHazard
from creditsurv.engines import on_connection
from creditsurv.errors import (
    ConvergenceError,
    FewEventsWarning,
    ModelError,
    SeparationError,
    SingularDesignError,
)
from creditsurv.model import (
    FIT_GROUP_BLOCKS,
    HazardResults,
    can_fork,
    feature_spec,
    fit_hazard,
    fit_model,
    load_model,
)

# --------------------------------------------------------------------------- simulated books

# The demo simulator's hazard with defaults 60 times and prepayments 4 times as frequent as in the
# demo book, so that books of a thousand or a few thousand loans over two to four years hold enough
# events of each cause for the fits below.
_LIVELY = {cause: dict(terms) for cause, terms in TRUE_COEFFICIENTS.items()}
_LIVELY["default"]["intercept"] += np.log(60.0)
_LIVELY["prepay"]["intercept"] += np.log(4.0)
LIVELY = LogitHazard(_LIVELY)


def _default_only(covariates):
    """The lively hazard's default probability and no prepayment: a single-cause book."""
    h_default, _ = LIVELY(covariates)
    return h_default, np.zeros_like(h_default)


def _constant(covariates):
    """Known monthly hazards: default 1% and prepayment 3% in every month of every loan."""
    h_default, _ = LIVELY(covariates)
    return np.full_like(h_default, 0.01), np.full_like(h_default, 0.03)


def connect(book) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    for name, df in book.items():
        con.register(f"_df_{name}", df)
        con.execute(f"CREATE TABLE {name} AS SELECT * FROM _df_{name}")
        con.unregister(f"_df_{name}")
    return con


def _spec(con, *covariates, baseline=None, interactions=(), learn=True):
    model = ModelSpec(baseline=baseline or Baseline(), covariates=tuple(covariates), interactions=interactions)
    spec = feature_spec(model, Collateral())
    return spec.learn(con) if learn else spec


def _design(con, spec):
    raw = con.sql(spec.raw_query(con)).df()
    X, names = spec.design(raw)
    return X, names, raw["outcome"].to_numpy()


MIXED = (
    Covariate(name="score", column="credit_score", transform="standardise"),
    Covariate(name="u3", macro="unemployment_rate", lag=3),
    Covariate(name="region", column="region", kind="categorical"),
    Covariate(name="ltv", column="current_ltv"),
)


@pytest.fixture(scope="module")
def book(engine_frames):
    return engine_frames(3000, 11, "2021-01", hazard=LIVELY)


@pytest.fixture(scope="module")
def con(book):
    c = connect(book)
    yield c
    c.close()


@pytest.fixture(scope="module")
def small_con(engine_frames):
    c = connect(engine_frames(1000, 5, "2022-12", hazard=LIVELY))
    yield c
    c.close()


def _spline():
    return Baseline(kind="spline", knots=(3.0, 12.0, 24.0))


# --------------------------------------------------------------------------- against statsmodels


def test_cause_specific_matches_statsmodels_glm(con):
    spec = _spec(con, *MIXED, baseline=_spline(), interactions=(("score", "ltv"),))
    X, names, y = _design(con, spec)
    refs = {}
    for cause, code in (("default", 1), ("prepay", 2)):
        # Reference: statsmodels GLM binomial (IRLS) on every row and the same design, the cause as the response
        # (the other cause's month is a month without this cause).
        refs[cause] = sm.GLM((y == code).astype(float), X, family=sm.families.Binomial()).fit(tol=1e-12)
    for batch_size in (250_000, 1000):
        res = fit_hazard(on_connection(con), spec, kind="cause_specific", batch_size=batch_size)
        assert res.params.index.to_list() == names and res.converged
        for cause, ref in refs.items():
            np.testing.assert_allclose(res.params[cause], ref.params, rtol=1e-6)
            np.testing.assert_allclose(res.bse[cause], ref.bse, rtol=1e-6)
        assert res.loglik == pytest.approx(refs["default"].llf + refs["prepay"].llf, rel=1e-10)
        # The two logits share no parameters: the covariance is block diagonal.
        p = len(names)
        assert not res.cov[:p, p:].any()


def test_multinomial_matches_statsmodels_mnlogit(con):
    spec = _spec(con, *MIXED, baseline=_spline())
    X, names, y = _design(con, spec)
    # Reference: statsmodels MNLogit (Newton) with 'continue' (0) as the base outcome.
    ref = sm.MNLogit(y, X).fit(method="newton", maxiter=100, tol=1e-12, disp=0)
    for batch_size in (250_000, 1000):
        res = fit_hazard(on_connection(con), spec, kind="multinomial", batch_size=batch_size)
        np.testing.assert_allclose(res.params[["default", "prepay"]].to_numpy(), ref.params, rtol=1e-6)
        np.testing.assert_allclose(res.bse[["default", "prepay"]].to_numpy(), ref.bse, rtol=1e-6)
        assert res.loglik == pytest.approx(ref.llf, rel=1e-10)
        # Full covariance, cause-major, against MNLogit's (same parameter order).
        np.testing.assert_allclose(res.cov, np.asarray(ref.cov_params()), rtol=1e-6, atol=1e-12)
        assert res.aic == pytest.approx(ref.aic, rel=1e-10)
        assert res.bic == pytest.approx(ref.bic, rel=1e-10)


def test_tiny_batches_out_of_core(small_con):
    # batch_size 7: every read and every Newton pass goes through thousands of 7-row batches.
    spec = _spec(small_con, Covariate(name="score", column="credit_score", transform="standardise"),
                 Covariate(name="region", column="region", kind="categorical"), baseline=Baseline(kind="age_bands", edges=(6, 12)))
    X, names, y = _design(small_con, spec)
    for kind in ("multinomial", "cause_specific"):
        res = fit_hazard(on_connection(small_con), spec, kind=kind, batch_size=7, collapse=False)
        assert res.n_stored_rows == len(y)
        if kind == "multinomial":
            # Reference: statsmodels MNLogit on the full in-memory design.
            ref = sm.MNLogit(y, X).fit(method="newton", maxiter=100, tol=1e-12, disp=0)
            np.testing.assert_allclose(res.params.to_numpy(), ref.params, rtol=1e-6)
            np.testing.assert_allclose(res.bse.to_numpy(), ref.bse, rtol=1e-6)
        else:
            for cause, code in (("default", 1), ("prepay", 2)):
                # Reference: statsmodels GLM binomial on every row, the cause as the response.
                ref = sm.GLM((y == code).astype(float), X, family=sm.families.Binomial()).fit(tol=1e-12)
                np.testing.assert_allclose(res.params[cause], ref.params, rtol=1e-6)
                np.testing.assert_allclose(res.bse[cause], ref.bse, rtol=1e-6)


# --------------------------------------------------------------------------- non-parametric anchors


def _times(con):
    last = con.sql("SELECT loan_id, max(age) AS t, arg_max(outcome, age) AS status FROM loan_months GROUP BY loan_id ORDER BY loan_id").df()
    return last["t"].to_numpy(dtype=float), last["status"].to_numpy(dtype=int)


def test_age_indicators_reproduce_kaplan_meier(engine_frames):
    # Defaults from age 1 and no prepayment, so that every age 1..18 has default events.
    con = connect(engine_frames(3000, 2, "2023-06", hazard=_default_only, default_min_age=1))
    spec = _spec(con, baseline=Baseline(kind="age_indicators"))
    res = fit_hazard(on_connection(con), spec, causes=("default",), collapse=False)
    ages = np.arange(1, 19)
    h_def, h_pre = res.predict_hazards({"age": ages})
    assert not h_pre.any()
    surv = np.cumprod(1 - h_def)
    t, status = _times(con)
    # Reference: statsmodels Kaplan-Meier; its grid is the distinct event times.
    km = SurvfuncRight(t, status)
    np.testing.assert_allclose(surv[km.surv_times.astype(int) - 1], km.surv_prob, rtol=0, atol=1e-8)
    assert len(km.surv_times) == 18


def test_age_indicators_reproduce_aalen_johansen(engine_frames):
    con = connect(engine_frames(3000, 2, "2023-06", hazard=LIVELY, default_min_age=1))
    spec = _spec(con, baseline=Baseline(kind="age_indicators"))
    t, status = _times(con)
    # Reference: statsmodels Aalen-Johansen; its grid is every distinct observed time (events and
    # censorings), and a loan censored at t is at risk at t, as a loan-month with outcome 0 is.
    aj = CumIncidenceRight(t, status)
    km_all = SurvfuncRight(t, (status > 0).astype(int))
    for collapse in (True, False):
        res = fit_hazard(on_connection(con), spec, kind="multinomial", collapse=collapse)
        h1, h2 = res.predict_hazards({"age": aj.times})
        surv = np.cumprod(1 - h1 - h2)
        before = np.r_[1.0, surv[:-1]]
        np.testing.assert_allclose(np.cumsum(before * h1), aj.cinc[0], rtol=0, atol=1e-8)
        np.testing.assert_allclose(np.cumsum(before * h2), aj.cinc[1], rtol=0, atol=1e-8)
        np.testing.assert_allclose(surv[km_all.surv_times.astype(int) - 1], km_all.surv_prob, rtol=0, atol=1e-8)
        # Invariant: survival plus the cumulative incidence of every cause is 1.
        np.testing.assert_allclose(surv + np.cumsum(before * h1) + np.cumsum(before * h2), 1.0, atol=1e-12)


def test_both_kinds_combine_into_the_aalen_johansen_curves_on_a_book_with_known_hazards(engine_frames):
    # Monthly hazards of 1% (default) and 3% (prepayment) in every month. The projection combines the two
    # fitted hazards as S(u) = S(u-1) (1 - h_d - h_p), so each must be the cause's probability among all the
    # loans at risk: with one indicator per age, both kinds must give back the Aalen-Johansen estimate
    # (reference: statsmodels CumIncidenceRight) and the same 12-month PD. A cause-specific logit that left
    # out the other cause's months would give h_d / (1 - h_p), about 1.031%, and a 12-month PD about 3% too high.
    con = connect(engine_frames(4000, 3, "2023-06", hazard=_constant, default_min_age=1))
    con.execute("DELETE FROM loan_months WHERE age > 12")  # the first year: every age holds events of both causes
    spec = _spec(con, baseline=Baseline(kind="age_indicators"))
    t, status = _times(con)
    aj = CumIncidenceRight(t, status)
    assert list(aj.times) == list(range(1, 13))
    pd_12m = {}
    for kind in ("multinomial", "cause_specific"):
        res = fit_hazard(on_connection(con), spec, kind=kind)
        h1, h2 = res.predict_hazards({"age": aj.times})
        before = np.r_[1.0, np.cumprod(1 - h1 - h2)[:-1]]
        np.testing.assert_allclose(np.cumsum(before * h1), aj.cinc[0], rtol=0, atol=1e-8)
        np.testing.assert_allclose(np.cumsum(before * h2), aj.cinc[1], rtol=0, atol=1e-8)
        pd_12m[kind] = np.cumsum(before * h1)[11]
    assert pd_12m["cause_specific"] == pytest.approx(pd_12m["multinomial"], rel=1e-9)
    # against the truth, sum_u 0.96^(u-1) 0.01 over 12 months, within 4 of the estimate's standard errors
    truth = 0.01 * (1 - 0.96**12) / 0.04
    assert abs(pd_12m["multinomial"] - truth) < 4 * aj.cinc_se[0][11]


# --------------------------------------------------------------------------- ridge


def test_ridge_matches_direct_minimisation(small_con):
    spec = _spec(small_con, Covariate(name="score", column="credit_score", transform="standardise"),
                 Covariate(name="region", column="region", kind="categorical"), baseline=_spline())
    lam = 25.0
    res = fit_hazard(on_connection(small_con), spec, ridge=lam)
    X, names, y = _design(small_con, spec)
    p = X.shape[1]
    Y = np.column_stack([y == 1, y == 2]).astype(float)
    pen = np.r_[0.0, np.ones(p - 1)]

    # Reference: the penalised multinomial negative log-likelihood written out and minimised by scipy.
    def objective(b):
        B = b.reshape(2, p)
        eta = X @ B.T
        lse = np.logaddexp(0.0, np.logaddexp(eta[:, 0], eta[:, 1]))
        P = np.exp(eta - lse[:, None])
        f = -np.sum((eta * Y).sum(axis=1) - lse) + 0.5 * lam * np.sum(pen * B**2)
        grad = -((Y - P).T @ X) + lam * pen * B
        return f, grad.ravel()

    ref = optimize.minimize(objective, np.zeros(2 * p), jac=True, method="BFGS", options={"gtol": 1e-9, "maxiter": 5000})
    np.testing.assert_allclose(res.params.to_numpy().T.ravel(), ref.x, rtol=1e-5, atol=1e-7)
    assert res.ridge == lam
    # Shrinkage: penalised slopes are smaller than unpenalised ones in norm.
    plain = fit_hazard(on_connection(small_con), spec)
    assert np.linalg.norm(res.params.iloc[1:]) < np.linalg.norm(plain.params.iloc[1:])


# --------------------------------------------------------------------------- invariants


def test_refit_is_identical_and_inputs_untouched(small_con):
    before = small_con.execute("SELECT count(*), sum(hash(loan_id, month_idx, outcome)) FROM loan_months").fetchone()
    spec = _spec(small_con, *MIXED, baseline=_spline())
    spec_dict = json.dumps(spec.to_dict(), sort_keys=True)
    a = fit_hazard(on_connection(small_con), spec, batch_size=300)
    b = fit_hazard(on_connection(small_con), spec, batch_size=300)
    assert a.params.equals(b.params) and a.bse.equals(b.bse) and a.loglik == b.loglik
    assert a.data_fingerprint == b.data_fingerprint
    c = fit_hazard(on_connection(small_con), spec, batch_size=77)
    assert c.data_fingerprint == a.data_fingerprint  # the fingerprint does not depend on batching
    np.testing.assert_allclose(c.params, a.params, rtol=1e-10)
    assert json.dumps(spec.to_dict(), sort_keys=True) == spec_dict
    assert small_con.execute("SELECT count(*), sum(hash(loan_id, month_idx, outcome)) FROM loan_months").fetchone() == before


def test_threads_and_batch_size_leave_the_saved_model_byte_identical(small_con, tmp_path):
    # Blocks of 150 rows, so that the sums of several blocks are computed in parallel and added: 69 blocks in
    # groups of FIT_GROUP_BLOCKS, enough for two worker processes where the platform can fork.
    import resource

    spec = _spec(small_con, *MIXED, baseline=_spline(), interactions=(("score", "region"), ("score", "ltv")))
    X, names, y = _design(small_con, spec)
    threads = small_con.execute("SELECT current_setting('threads')").fetchone()[0]
    saved, children_cpu = {}, {}
    try:
        for n_threads, batch_size in ((1, 250_000), (2, 250_000), (2, 333)):
            small_con.execute(f"SET threads = {n_threads}")
            before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_utime
            res = fit_hazard(on_connection(small_con), spec, batch_size=batch_size, block_rows=150)
            children_cpu[n_threads, batch_size] = resource.getrusage(resource.RUSAGE_CHILDREN).ru_utime - before
            saved[n_threads, batch_size] = res.save(tmp_path / f"model-{n_threads}-{batch_size}.json").read_bytes()
    finally:
        small_con.execute(f"SET threads = {threads}")
    assert res.n_stored_rows == len(y) > 2 * 2 * FIT_GROUP_BLOCKS * 150
    # The same bytes with one thread or two, and with any batch size (what `creditsurv reproduce` compares).
    assert saved[1, 250_000] == saved[2, 250_000] == saved[2, 333]
    assert children_cpu[1, 250_000] == 0
    if can_fork():  # the Newton passes of the two-thread fits ran in worker processes
        assert children_cpu[2, 250_000] > 0 and children_cpu[2, 333] > 0
    # Reference: statsmodels MNLogit (Newton) on the full in-memory design.
    ref = sm.MNLogit(y, X).fit(method="newton", maxiter=100, tol=1e-12, disp=0)
    np.testing.assert_allclose(res.params.to_numpy(), ref.params, rtol=1e-6)
    np.testing.assert_allclose(res.bse.to_numpy(), ref.bse, rtol=1e-6)


def test_repeated_rows_equal_doubled_counts(small_con, tmp_path):
    spec = _spec(small_con, Covariate(name="region", column="region", kind="categorical"),
                 Covariate(name="score_band", column="credit_score", kind="bins", bins=(640.0, 720.0)),
                 baseline=Baseline(kind="age_bands", edges=(6, 12)))
    rows = fit_hazard(on_connection(small_con), spec, collapse=False)
    patterns = fit_hazard(on_connection(small_con), spec)  # fully discrete: collapsed to pattern counts
    assert patterns.collapsed and patterns.n_stored_rows < rows.n_stored_rows
    assert patterns.n_rows == rows.n_rows and patterns.events == rows.events
    np.testing.assert_allclose(patterns.params, rows.params, rtol=1e-9)
    np.testing.assert_allclose(patterns.bse, rows.bse, rtol=1e-9)
    assert patterns.loglik == pytest.approx(rows.loglik, rel=1e-12)
    # Every row twice (row path) equals doubled counts: same estimates, loglik x2, se / sqrt(2).
    dup = duckdb.connect()
    for t in ("panel", "loans", "macro"):
        dup.register(f"_{t}", small_con.sql(f"SELECT * FROM {t}").df())
        dup.execute(f"CREATE TABLE {t} AS SELECT * FROM _{t}")
    dup.register("_lm", small_con.sql("SELECT * FROM loan_months").df())
    dup.execute("CREATE TABLE loan_months AS SELECT * FROM _lm UNION ALL SELECT * FROM _lm")
    twice = fit_hazard(on_connection(dup), spec, collapse=False)
    assert twice.n_rows == 2 * rows.n_rows
    np.testing.assert_allclose(twice.params, rows.params, rtol=1e-9)
    np.testing.assert_allclose(twice.bse * np.sqrt(2), rows.bse, rtol=1e-9)
    assert twice.loglik == pytest.approx(2 * rows.loglik, rel=1e-12)


def test_save_load_round_trip(small_con, tmp_path):
    spec = _spec(small_con, *MIXED, baseline=_spline(), interactions=(("score", "region"),))
    res = fit_hazard(on_connection(small_con), spec)
    path = res.save(tmp_path / "model.json")
    text = path.read_text()
    data = json.loads(text)
    assert text == json.dumps(data, indent=2, sort_keys=True) + "\n"
    assert data["format"] == "creditsurv.hazard_model" and data["kind"] == "multinomial"
    assert set(data) >= {"terms", "coefficients", "std_errors", "covariance", "fit", "features", "creditsurv_version"}
    back = load_model(path)
    raw = small_con.sql(spec.raw_query(small_con)).df()
    for a, b in zip(res.predict_hazards(raw), back.predict_hazards(raw)):
        assert np.array_equal(a, b)
    assert back.to_dict() == res.to_dict()
    assert back.required_inputs == ["age", "credit_score", "macro:unemployment_rate:3", "region", "current_ltv"]
    assert all(np.array_equal(a, b) for a, b in zip(back.hazards(raw), res.predict_hazards(raw)))
    assert back.params.equals(res.params) and np.array_equal(back.cov, res.cov)


def test_summary_table(small_con):
    res = fit_hazard(on_connection(small_con), _spec(small_con, MIXED[0], baseline=_spline()))
    s = res.summary()
    assert list(s.columns) == ["cause", "term", "estimate", "std_error", "z", "p_value", "ci_lo", "ci_hi"]
    assert len(s) == 2 * len(res.params)
    row = s[(s.cause == "default") & (s.term == "score")].iloc[0]
    assert row.z == pytest.approx(row.estimate / row.std_error)
    assert row.ci_lo == pytest.approx(row.estimate - 1.959963984540054 * row.std_error)
    assert res.events["default"] + res.events["prepay"] <= res.n_rows


# --------------------------------------------------------------------------- diagnostics


def test_separation_names_the_level(small_con):
    # Loans of one channel never default: the level has no default events.
    con = duckdb.connect()
    for t in ("panel", "macro"):
        con.register(f"_{t}", small_con.sql(f"SELECT * FROM {t}").df())
        con.execute(f"CREATE TABLE {t} AS SELECT * FROM _{t}")
    loans = small_con.sql("SELECT * FROM loans").df()
    lm = small_con.sql("SELECT * FROM loan_months").df()
    lm["outcome"] = lm["outcome"].astype(int)
    loans.loc[loans.index[:40], "channel"] = "online"
    online = set(loans.loc[loans.index[:40], "loan_id"])
    lm.loc[lm.loan_id.isin(online) & (lm.outcome == 1), "outcome"] = 0
    lm["outcome"] = lm["outcome"].astype(np.int8)
    con.register("_loans", loans)
    con.execute("CREATE TABLE loans AS SELECT * FROM _loans")
    con.register("_lm", lm)
    con.execute("CREATE TABLE loan_months AS SELECT * FROM _lm")
    spec = _spec(con, Covariate(name="channel", column="channel", kind="categorical"), baseline=Baseline(kind="none"))
    with pytest.raises(SeparationError, match=r"column 'channel\[online\]' has no default events \([\d,]+ loan-months\).*ridge > 0"):
        fit_hazard(on_connection(con), spec)
    # A ridge penalty keeps the estimate finite: no error.
    assert fit_hazard(on_connection(con), spec, ridge=1.0).converged


def test_separation_of_a_reference_level_is_named(small_con):
    # No default before age 3 (the first payment falls due at age 1): the
    # reference age band [1-2] has no default events, so the intercept would run
    # to minus infinity. The check must name the reference level, not only
    # indicator columns.
    con = duckdb.connect()
    for t in ("panel", "macro", "loans"):
        con.register(f"_{t}", small_con.sql(f"SELECT * FROM {t}").df())
        con.execute(f"CREATE TABLE {t} AS SELECT * FROM _{t}")
    lm = small_con.sql("SELECT * FROM loan_months").df()
    lm.loc[(lm.age < 3) & (lm.outcome == 1), "outcome"] = 0
    lm["outcome"] = lm["outcome"].astype(np.int8)
    con.register("_lm", lm)
    con.execute("CREATE TABLE loan_months AS SELECT * FROM _lm")
    spec = _spec(con, baseline=Baseline(kind="age_bands", edges=(3, 12, 24)))
    with pytest.raises(SeparationError, match=r"reference level 'age_band\[1-2\]' of 'age_band' has no default events"):
        fit_hazard(on_connection(con), spec)


def test_singular_design_names_columns(small_con):
    spec = _spec(small_con, Covariate(name="score", column="credit_score"),
                 Covariate(name="score_again", column="credit_score", transform="none", floor=0.0), baseline=_spline())
    with pytest.raises(SingularDesignError, match=r"columns 'score(_again)?', 'score(_again)?' are collinear"):
        fit_hazard(on_connection(small_con), spec)


def test_non_convergence_reports_the_iterations(small_con):
    spec = _spec(small_con, *MIXED, baseline=_spline())
    with pytest.raises(ConvergenceError) as info:
        fit_hazard(on_connection(small_con), spec, max_iter=2)
    text = str(info.value)
    assert "no convergence in 2 iterations" in text and "max|step|" in text and "ridge" in text and "max_iter" in text
    assert len(info.value.iteration_log) == 3


def test_few_events_warning(small_con):
    con = small_con
    spec = _spec(con, *MIXED, baseline=_spline())
    # The book's first 12 months of history: too few defaults for 10 parameters.
    before = con.execute("SELECT min(month_idx) + 12 FROM loan_months").fetchone()[0]
    n_def = con.execute("SELECT count(*) FROM loan_months WHERE outcome = 1 AND month_idx < ?", [before]).fetchone()[0]
    # The limit lowered explicitly: the fit goes on and warns below 10 per parameter.
    with pytest.warns(FewEventsWarning, match=r"events for 10 parameters") as rec:
        fit_hazard(on_connection(con), spec, where_sql="month_idx < ?", params=[before], limits={"min_events_per_parameter": 0})
    texts = [str(r.message) for r in rec]
    assert any(t.startswith(f"default: {n_def:,} events for 10 parameters") and "fewer than 10" in t for t in texts)
    assert all(r.filename == __file__ for r in rec)  # stacklevel points at the caller
    assert n_def < 100


def test_too_few_events_stop_the_fit(small_con):
    con = small_con
    spec = _spec(con, *MIXED, baseline=_spline())
    before = con.execute("SELECT min(month_idx) + 12 FROM loan_months").fetchone()[0]
    n_def = con.execute("SELECT count(*) FROM loan_months WHERE outcome = 1 AND month_idx < ?", [before]).fetchone()[0]
    assert n_def < 5 * 10  # below the default limit, 5 per parameter (common practice), for 10 parameters
    with pytest.raises(ModelError, match=rf"default: {n_def:,} events for 10 parameters .* at least 5 per parameter"):
        fit_hazard(on_connection(con), spec, where_sql="month_idx < ?", params=[before])


def test_absurd_coefficients_stop_the_fit(small_con):
    # A limit no fitted spline coefficient keeps (|beta| x sd of its column <= 1e-6) shows the rule at work.
    spec = _spec(small_con, *MIXED, baseline=_spline())
    with pytest.raises(ModelError, match=r"problems? with the fitted coefficients"):
        fit_hazard(on_connection(small_con), spec, limits={"max_scaled_coefficient": 1e-6})
    # The default limits keep a sound fit of the same book.
    res = fit_hazard(on_connection(small_con), spec)
    assert res.record().get("limits_loosened") is None
    loose = fit_hazard(on_connection(small_con), spec, limits={"max_scaled_std_error": 50.0})
    assert loose.record()["limits_loosened"] == {"max_scaled_std_error": 50.0}


def test_a_saved_model_keeps_the_limits_it_was_fitted_under(small_con, tmp_path):
    # A model fitted with loosened limits says so again when a later run loads it (model.path).
    spec = _spec(small_con, *MIXED, baseline=_spline())
    loose = fit_hazard(on_connection(small_con), spec, limits={"max_scaled_std_error": 50.0})
    back = load_model(loose.save(tmp_path / "loose.json"))
    assert back.record()["limits_loosened"] == {"max_scaled_std_error": 50.0}


def test_fit_model_from_config_section(small_con):
    model = ModelSpec(kind="cause_specific", baseline=_spline(), covariates=MIXED[:1], ridge=0.5)
    res = fit_model(on_connection(small_con), model, Collateral())
    assert isinstance(res, HazardResults) and res.kind == "cause_specific" and res.ridge == 0.5
    direct = fit_hazard(on_connection(small_con), _spec(small_con, MIXED[0], baseline=_spline()), kind="cause_specific", ridge=0.5)
    assert res.params.equals(direct.params)
