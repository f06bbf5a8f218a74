"""Tests of creditsurv.model's multi-state fit: one multinomial logit per arrears state.

Independent references: statsmodels' ``MNLogit`` on the same rows, the empirical transition
shares counted here with pandas (the non-parametric Markov estimate, Aalen & Johansen 1978),
a direct scipy.optimize maximisation of the constrained likelihood written here, and the known
parameters of the book simulated below.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import optimize

from creditsurv.config import config_from_dict
from creditsurv.data import raise_for_errors
from creditsurv.engines import label_events, open_panel, run_checks
from creditsurv.errors import ModelError
from creditsurv.model import (
    MultiStateResults,
    feature_spec,
    fit_hazard,
    fit_multi_state,
    hazard_source,
    load_model,
)

LABELS = ("current", "30-59", "60-89")
STATES = [*LABELS, "default", "prepaid"]
START = 2018 * 12  # 2018-01: first origination month
AS_OF = 2022 * 12 - 1  # 2021-12

# The true model: from each state, log-odds against staying of each end state = intercept + score effect
# + an effect of loan age above 12 months. A move missing here never happens (current to 60-89).
TRUE = {
    "current": {"30-59": (-3.6, -0.5, 0.2), "default": (-7.0, -0.6, 0.0), "prepaid": (-4.4, 0.3, 0.4)},
    "30-59": {"current": (-0.4, 0.4, 0.0), "60-89": (-1.2, -0.4, 0.1), "default": (-4.0, -0.3, 0.0), "prepaid": (-4.0, 0.0, 0.0)},
    "60-89": {"current": (-1.0, 0.3, 0.0), "30-59": (-1.4, 0.0, 0.0), "default": (-0.3, -0.5, 0.2), "prepaid": (-2.8, 0.0, 0.0)},
}
DPD = {"current": 0, "30-59": 35, "60-89": 65, "default": 95}


def _month(idx: int) -> str:
    return f"{idx // 12:04d}-{idx % 12 + 1:02d}"


def simulate(n_loans: int, seed: int, true=TRUE, starts_current=True, cure=None):
    """A book moving between arrears states by the multinomial logits of ``true``; panel and loan table.

    With ``cure = (probability, shift)`` a loan in default returns to current with that probability each
    month, and ever after its log-odds of default from every state are ``shift`` higher (the true
    coefficient of ``previously_defaulted``).
    """
    rng = np.random.default_rng(seed)
    orig = rng.integers(START, AS_OF - 6, size=n_loans)
    score = rng.normal(0.0, 1.0, size=n_loans)
    state = np.zeros(n_loans, dtype=np.int64)  # index into STATES
    alive = np.ones(n_loans, dtype=bool)
    defaulted = np.zeros(n_loans, dtype=bool)
    rows = []
    for age in range(1, AS_OF - START + 1):
        on = alive & (orig + age <= AS_OF)
        if not on.any():
            break
        new_state = state.copy()
        if cure is not None:
            in_default = np.flatnonzero(on & (state == STATES.index("default")))
            new_state[in_default[rng.random(in_default.size) < cure[0]]] = 0
        for j, origin in enumerate(LABELS):
            idx = np.flatnonzero(on & (state == j))
            if idx.size == 0:
                continue
            eta = np.zeros((idx.size, len(STATES)))
            for dest, (a, b, c) in true[origin].items():
                eta[:, STATES.index(dest)] = a + b * score[idx] + c * (age > 12)
                if cure is not None and dest == "default":
                    eta[:, STATES.index(dest)] += cure[1] * defaulted[idx]
            eta[:, [k for k, s in enumerate(STATES) if s not in true[origin] and s != origin]] = -np.inf
            p = np.exp(eta - eta.max(axis=1, keepdims=True))
            p /= p.sum(axis=1, keepdims=True)
            u = rng.random(idx.size)[:, None]
            new_state[idx] = (u > np.cumsum(p, axis=1)).sum(axis=1)
        idx = np.flatnonzero(on)
        end = new_state[idx]
        name = np.array(STATES, dtype=object)[end]
        rows.append(
            pd.DataFrame(
                {
                    "loan_id": idx,
                    "month_idx": orig[idx] + age,
                    "age": age,
                    "balance": np.where(name == "prepaid", 0.0, 100_000.0 - 100.0 * age),
                    "days_past_due": [DPD.get(s, 0) for s in name],
                }
            )
        )
        state = new_state
        defaulted |= state == STATES.index("default")
        alive &= state != STATES.index("prepaid") if cure is not None else ~np.isin(state, [STATES.index("default"), STATES.index("prepaid")])
    panel = pd.concat(rows, ignore_index=True).sort_values(["loan_id", "month_idx"])
    panel["month"] = [_month(int(m)) for m in panel.pop("month_idx")]
    panel["loan_id"] = [f"L{i:06d}" for i in panel["loan_id"]]
    loans = pd.DataFrame(
        {
            "loan_id": [f"L{i:06d}" for i in range(n_loans)],
            "origination_month": [_month(int(m)) for m in orig],
            "original_balance": 100_000.0,
            "note_rate": 4.0,
            "term": 360,
            "credit_score": score,
        }
    )
    return panel, loans[loans["loan_id"].isin(panel["loan_id"])]


def _config(folder, panel, loans, **model):
    panel.to_parquet(folder / "panel.parquet", index=False)
    loans.to_parquet(folder / "loans.parquet", index=False)
    data = {
        "as_of": _month(AS_OF),
        "windows": {"development": {"start": _month(START), "end": _month(AS_OF)}},
        "inputs": {"panel": {"path": "panel.parquet"}, "loans": {"path": "loans.parquet"}},
        "default_definition": {"days_past_due": 90},
        "model": {
            "kind": "multi_state",
            "baseline": {"kind": "age_bands", "edges": [13]},
            "covariates": [{"name": "score", "column": "credit_score"}],
            **model,
        },
    }
    return config_from_dict(data, base_dir=folder)


@pytest.fixture(scope="module")
def book(tmp_path_factory):
    folder = tmp_path_factory.mktemp("arrears_book")
    panel, loans = simulate(10_000, seed=20)
    return folder, panel, loans


def _opened(cfg):
    engine = open_panel(cfg)
    raise_for_errors(run_checks(engine))
    label_events(engine)
    return engine


def _fit(engine, cfg, **overrides):
    spec = feature_spec(cfg.model, cfg.collateral).learn(engine.con)
    options = {"limits": {"min_events_per_parameter": 0}, "min_transition_events": 0, **overrides}
    return fit_multi_state(engine, spec, LABELS, **options)


@pytest.fixture(scope="module")
def opened(book):
    """The book opened, checked and labelled once, with the config of one score covariate."""
    folder, panel, loans = book
    cfg = _config(folder, panel, loans)
    with _opened(cfg) as engine:
        yield cfg, engine


@pytest.fixture(scope="module")
def opened_plain(book, tmp_path_factory):
    """The same book with no covariates (age bands alone)."""
    _, panel, loans = book
    cfg = _config(tmp_path_factory.mktemp("plain"), panel, loans, covariates=[])
    with _opened(cfg) as engine:
        yield cfg, engine


@pytest.fixture(scope="module")
def fitted(opened):
    cfg, engine = opened
    model = _fit(engine, cfg)
    raw = {j: engine.frame(model.spec.raw_query(engine.con, origin_state=j)) for j in range(len(LABELS))}
    return model, raw


def test_each_origin_state_equals_statsmodels_mnlogit_on_the_same_rows(fitted):
    # statsmodels MNLogit, the multinomial logit's maximum likelihood, on each origin state's months
    model, raw = fitted
    for j, origin in enumerate(LABELS):
        part = model.origins[origin]
        X, _ = model.spec.design(raw[j])
        y = raw[j]["outcome"].to_numpy()
        assert part.n_rows == len(y) and sorted(np.unique(y)) == [0, *sorted(set(np.unique(y)) - {0})]
        ref = sm.MNLogit(y, X).fit(method="newton", disp=False, tol=1e-12, maxiter=100)
        # MNLogit's columns follow the sorted outcome codes above 0; the fit keeps them in the same order
        np.testing.assert_allclose(part.params.to_numpy(), ref.params, rtol=1e-6, atol=1e-9, err_msg=origin)
        np.testing.assert_allclose(part.bse.to_numpy(), ref.bse, rtol=1e-6, err_msg=origin)
        np.testing.assert_allclose(part.loglik, ref.llf, rtol=1e-10)


def test_the_fit_recovers_the_simulated_parameters(fitted):
    # The book was drawn from TRUE: every estimated coefficient within 4 standard errors of its true value.
    model, _ = fitted
    seen = 0
    for origin, moves in TRUE.items():
        part = model.origins[origin]
        for dest, (a, b, c) in moves.items():
            if dest == model.references[origin]:
                continue
            truth = {"intercept": a, "score": b, "age_band[13+]": c}
            for term, value in truth.items():
                est, se = part.params.loc[term, dest], part.bse.loc[term, dest]
                assert abs(est - value) < 4 * se, (origin, dest, term, est, se, value)
                seen += 1
    assert seen == 3 * 11  # every move of TRUE: each state's loans stay put often enough to be the reference


def test_moves_never_seen_are_fixed_at_zero_and_rows_sum_to_one(fitted):
    model, raw = fitted
    fits = model.transitions.set_index(["origin", "destination"])
    assert fits.loc[("current", "60-89"), "design"] == "none" and fits.loc[("current", "60-89"), "loan_months"] == 0
    for j, origin in enumerate(LABELS):
        P = model.transition_probabilities(raw[j], origin)
        assert P.shape == (len(raw[j]), 5)
        np.testing.assert_allclose(P.sum(axis=1), 1.0, rtol=0, atol=1e-12)
        assert (P >= 0).all()
    P = model.transition_probabilities(raw[0], "current")
    assert (P[:, STATES.index("60-89")] == 0).all()


def test_no_covariates_give_the_empirical_transition_shares(opened_plain):
    # With the age bands alone every move's fit is saturated: the model's probabilities are the observed
    # shares of each end state among the months starting in each state, band by band (the
    # non-parametric Markov estimate; Aalen & Johansen 1978), counted here straight from loan_months.
    cfg, engine = opened_plain
    model = _fit(engine, cfg)
    months = engine.frame("SELECT origin_state, destination, age FROM loan_months WHERE origin_state IS NOT NULL")
    for j, origin in enumerate(LABELS):
        rows = months[months["origin_state"] == j]
        for band, ages in (("young", rows["age"] <= 12), ("old", rows["age"] > 12)):
            sub = rows[ages]
            d = sub["destination"].to_numpy().astype(np.int64)
            end = np.select([d == 0, d == 1, d == 2], [j, 3, 4], default=d - 3)
            observed = np.bincount(end, minlength=5) / len(sub)
            age = np.array([6 if band == "young" else 24])
            got = model.transition_probabilities({"age": age, "log_age": np.log(age)}, origin)[0]
            np.testing.assert_allclose(got, observed, rtol=1e-9, atol=1e-13, err_msg=f"{origin} {band}")


def test_one_state_is_the_competing_risk_model(book, tmp_path):
    # With no arrears states the multi-state model's one logit is the multinomial competing-risk model.
    _, panel, loans = book
    data_cfg = _config(tmp_path, panel, loans)
    cfg = config_from_dict({**_as_dict(data_cfg), "arrears": {"starts": []}}, base_dir=tmp_path)
    with _opened(cfg) as engine:
        spec = feature_spec(cfg.model, cfg.collateral).learn(engine.con)
        multi = fit_multi_state(engine, spec, ("current",))
        competing = fit_hazard(engine, spec, kind="multinomial")
    part = multi.origins["current"]
    assert part.causes == ("default", "prepaid") and competing.causes == ("default", "prepay")
    np.testing.assert_allclose(part.params.to_numpy(), competing.params.to_numpy(), rtol=1e-12, atol=0)
    np.testing.assert_allclose(part.bse.to_numpy(), competing.bse.to_numpy(), rtol=1e-12, atol=0)
    assert part.loglik == pytest.approx(competing.loglik, rel=1e-14)
    # and the chain of its one state projects the same loan PDs as the competing-risk hazards
    from creditsurv.forecast import project_loans

    book_now = pd.DataFrame(
        {
            "loan_id": ["a", "b", "c"], "segment": "all", "age": [3, 30, 11], "term": [360, 120, 60],
            "note_rate": 0.04, "balance": 1e5, "credit_score": [-1.0, 0.0, 2.0], "arrears_state": 0,
        }
    )
    history = pd.DataFrame({"x": np.zeros(400)}, index=pd.Index(np.arange(AS_OF - 100, AS_OF + 300), name="month_idx"))
    a = project_loans(book_now, multi, {"base": history}, as_of_idx=AS_OF).loans
    b = project_loans(book_now, competing, {"base": history}, as_of_idx=AS_OF).loans
    for col in ("pd_12m_base", "pd_lifetime_base"):
        np.testing.assert_allclose(a[col], b[col], rtol=1e-12, atol=0, err_msg=col)


def _as_dict(cfg):
    from creditsurv.config import config_to_dict

    return config_to_dict(cfg)


def _constrained_mle(X, y, codes, free):
    """The multinomial likelihood with some coefficients held at zero, maximised by scipy (BFGS)."""
    K, p = free.shape
    idx = np.flatnonzero(free.ravel())
    Y = (y[:, None] == np.asarray(codes)[None, :]).astype(float)

    def negloglik(theta):
        beta = np.zeros(K * p)
        beta[idx] = theta
        eta = X @ beta.reshape(K, p).T
        full = np.column_stack([np.zeros(len(y)), eta])
        lse = np.logaddexp.reduce(full, axis=1)
        return -(np.sum(Y * eta) - lse.sum())

    res = optimize.minimize(negloglik, np.zeros(idx.size), method="BFGS", options={"gtol": 1e-9, "maxiter": 5000})
    beta = np.zeros(K * p)
    beta[idx] = res.x
    return beta.reshape(K, p)


def test_rare_moves_get_a_reduced_design_and_the_constrained_maximum(opened):
    # Moves seen fewer than min_transition_events times keep intercept and age baseline only: the fit is
    # the maximum of the likelihood with the other coefficients at zero (scipy.optimize on the same rows).
    cfg, engine = opened
    counts = engine.frame("SELECT origin_state, destination, count(*) AS n FROM loan_months GROUP BY ALL")
    n = {(int(o), int(d)): int(k) for o, d, k in counts.itertuples(index=False) if o == o}
    limit = n[(1, 2)] + 1  # prepaid from 30-59 falls below it; default, 60-89 and cure from 30-59 do not
    assert min(n[(1, 1)], n[(1, 3)], n[(1, 5)]) > limit
    model = _fit(engine, cfg, min_transition_events=limit)
    raw = engine.frame(model.spec.raw_query(engine.con, origin_state=1))
    fits = model.transitions.set_index(["origin", "destination"])
    assert fits.loc[("30-59", "prepaid"), "design"] == "baseline" and fits.loc[("30-59", "prepaid"), "parameters"] == 2
    assert fits.loc[("30-59", "default"), "design"] == "full"
    part = model.origins["30-59"]
    assert part.fixed_terms == {"prepaid": ["score"]}
    assert part.params.loc["score", "prepaid"] == 0.0 and part.bse.loc["score", "prepaid"] == 0.0
    assert "score" not in set(part.summary().query("cause == 'prepaid'")["term"])
    X, _ = model.spec.design(raw)
    free = np.array([[c not in part.fixed_terms.get(cause, []) for c in part.params.index] for cause in part.causes])
    codes = {"default": 1, "prepaid": 2, "current": 3, "60-89": 5}
    want = _constrained_mle(X, raw["outcome"].to_numpy(), [codes[c] for c in part.causes], free)
    np.testing.assert_allclose(part.params.to_numpy().T, want, rtol=1e-5, atol=1e-6)


def test_saved_model_reads_back_with_the_same_probabilities(fitted, tmp_path):
    model, raw = fitted
    path = model.save(tmp_path / "model.json")
    again = load_model(path)
    assert isinstance(again, MultiStateResults)
    assert again.references == model.references and again.labels == model.labels
    pd.testing.assert_frame_equal(again.transitions, model.transitions)
    for j, origin in enumerate(LABELS):
        np.testing.assert_array_equal(again.transition_probabilities(raw[j], origin), model.transition_probabilities(raw[j], origin))
    assert again.save(tmp_path / "again.json").read_bytes() == path.read_bytes()


def test_a_state_no_month_starts_in_is_an_error(book, tmp_path):
    _, panel, loans = book
    cfg = _config(tmp_path, panel, loans)
    cfg = config_from_dict({**_as_dict(cfg), "arrears": {"starts": [30, 60, 80]}}, base_dir=tmp_path)
    with _opened(cfg) as engine, pytest.raises(ModelError, match=r"no loan-months start in arrears state '80-89'"):
        hazard_source(cfg, engine)


# --------------------------------------------------------------------------- projection: the Markov chain


def test_projection_is_the_aalen_johansen_product_of_the_empirical_matrices(opened_plain):
    # No covariates and age bands: the fitted model's transition matrices are the empirical ones of each band,
    # so a loan's projected PD must be the product of those matrices month after month (the Aalen-Johansen
    # estimator of a Markov multi-state model, Aalen & Johansen 1978), computed here with numpy alone.
    from creditsurv.forecast import project_loans

    cfg, engine = opened_plain
    model = _fit(engine, cfg)
    months = engine.frame("SELECT origin_state, destination, age FROM loan_months WHERE origin_state IS NOT NULL")
    empirical = {}
    for band, ages in (("young", months["age"] <= 12), ("old", months["age"] > 12)):
        M = np.zeros((5, 5))
        for j in range(3):
            d = months.loc[ages & (months["origin_state"] == j), "destination"].to_numpy().astype(np.int64)
            end = np.select([d == 0, d == 1, d == 2], [j, 3, 4], default=d - 3)
            M[j] = np.bincount(end, minlength=5) / len(d)
        M[3, 3] = M[4, 4] = 1.0
        empirical[band] = M
    book_now = pd.DataFrame(
        {
            "loan_id": ["a", "b", "c", "d"], "segment": "all", "age": [3, 3, 20, 11], "term": [60, 60, 60, 40],
            "note_rate": 0.04, "balance": 1e5, "arrears_state": [0, 2, 1, 1],
        }
    )
    history = pd.DataFrame({"x": np.zeros(200)}, index=pd.Index(np.arange(AS_OF - 100, AS_OF + 100), name="month_idx"))
    curves = []
    project_loans(book_now, model, {"base": history}, as_of_idx=AS_OF, curve_writer=curves.append)
    table = pd.concat([c.to_pandas() for c in curves])
    table = table[table["scenario"] == "base"]
    for row in book_now.itertuples():
        pi = np.zeros(5)
        pi[row.arrears_state] = 1.0
        got = table[table["loan_id"] == row.loan_id].sort_values("month_ahead")
        for u, (cum_pd, survival, cum_prepay) in enumerate(got[["cumulative_pd", "survival", "cumulative_prepay"]].to_numpy(), 1):
            pi = pi @ empirical["young" if row.age + u <= 12 else "old"]
            np.testing.assert_allclose([cum_pd, survival, cum_prepay], [pi[3], pi[:3].sum(), pi[4]], rtol=1e-9, atol=1e-15)
    # from arrears the 12-month PD is many times that from current
    pd12 = table[table["month_ahead"] == 12].set_index("loan_id")["cumulative_pd"]
    assert pd12["b"] > 5 * pd12["a"]


def test_days_past_due_at_the_previous_month_end_is_a_trustworthy_predictor(opened):
    # At the outcome's own month days past due reveal the outcome (refused, tests/test_features.py); at the previous
    # month-end they are what the lender knows at the start of the month. The competing-risk fit keeps every
    # trust limit (fit_hazard raises otherwise), arrears raise the default hazard, and a loan 60 days past due at
    # the reporting month projects a far higher 12-month PD than a current one.
    from creditsurv.config import Covariate, ModelSpec
    from creditsurv.forecast import project_loans, with_panel_history

    cfg, engine = opened
    dpd = Covariate(name="dpd", column="days_past_due", lag=1, before_first=0.0)
    spec = feature_spec(ModelSpec(baseline=cfg.model.baseline, covariates=(*cfg.model.covariates, dpd)), cfg.collateral)
    model = fit_hazard(engine, spec.learn(engine.con), kind="multinomial")
    assert model.params.loc["dpd", "default"] > 0 and model.bse.loc["dpd", "default"] < 0.05
    now = pd.DataFrame(
        {"loan_id": ["cur", "late"], "segment": "all", "age": [20, 20], "term": 360, "note_rate": 0.04, "balance": 1e5, "credit_score": 0.0}
    )
    history = pd.DataFrame({"loan_id": ["cur", "late"], "month_idx": AS_OF, "days_past_due": [0.0, 65.0]})
    paths = {"base": pd.DataFrame({"x": np.zeros(400)}, index=pd.Index(np.arange(AS_OF - 100, AS_OF + 300), name="month_idx"))}
    pd12 = project_loans(with_panel_history(now, history, model, AS_OF), model, paths, as_of_idx=AS_OF).loans.set_index("loan_id")["pd_12m_base"]
    assert pd12["late"] > 3 * pd12["cur"]


def test_spells_after_a_cure_are_fitted_with_the_previously_defaulted_flag(tmp_path):
    # Defaulted loans return to current with probability 0.5 a month; afterwards their log-odds of default are
    # 1.0 higher. Labelled with a cure period of 3 months, the post-cure spells enter the fit flagged, and the
    # flag's coefficient is recovered; the fit equals statsmodels' MNLogit on the same rows.
    from creditsurv.forecast import project_loans

    panel, loans = simulate(10_000, seed=31, cure=(0.5, 1.0))
    cfg = _config(tmp_path, panel, loans, covariates=[{"name": "score", "column": "credit_score"},
                                                      {"name": "prior", "column": "previously_defaulted"}])
    cfg = dataclasses.replace(cfg, default_definition=dataclasses.replace(cfg.default_definition, cure_months=3))
    with _opened(cfg) as engine:
        flagged = engine.frame("SELECT sum(previously_defaulted) AS n, count(DISTINCT loan_id) FILTER "
                               "(WHERE previously_defaulted = 1) AS loans FROM loan_months")
        # the product's limits: a move with few events gets a smaller design (60-89 to prepaid has none flagged)
        model = _fit(engine, cfg, limits=None, min_transition_events=50)
        raw = engine.frame(model.spec.raw_query(engine.con, origin_state=0))
    assert flagged["loans"].iloc[0] > 300 and flagged["n"].iloc[0] > 5_000
    current = model.origins["current"]
    est, se = current.params.loc["prior", "default"], current.bse.loc["prior", "default"]
    assert abs(est - 1.0) < 4 * se and se < 0.4, (est, se)
    # statsmodels MNLogit on the same rows of the current state, post-cure spells included (1e-6)
    X, _ = model.spec.design(raw)
    ref = sm.MNLogit(raw["outcome"].to_numpy(), X).fit(method="newton", disp=False, tol=1e-12, maxiter=100)
    np.testing.assert_allclose(current.params.to_numpy(), ref.params, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(current.bse.to_numpy(), ref.bse, rtol=1e-6)
    # a cured loan projects a higher PD than one never in default, all else equal
    book = pd.DataFrame({"loan_id": ["never", "cured"], "segment": "all", "age": 30, "term": 360, "note_rate": 0.04,
                         "balance": 9e4, "credit_score": 0.0, "arrears_state": 0, "previously_defaulted": [0, 1]})
    paths = {"base": pd.DataFrame({"x": np.zeros(500)}, index=pd.Index(np.arange(AS_OF - 100, AS_OF + 400), name="month_idx"))}
    pd12 = project_loans(book, model, paths, as_of_idx=AS_OF).loans.set_index("loan_id")["pd_12m_base"]
    # against the true model's 12-month PD from current at age 30, score 0: the chain of TRUE's matrices in numpy
    for loan, flag in (("never", 0.0), ("cured", 1.0)):
        P = np.zeros((len(STATES), len(STATES)))
        P[3, 3] = P[4, 4] = 1.0  # absorbing: default, prepaid
        for j, origin in enumerate(LABELS):
            eta = np.full(len(STATES), -np.inf)
            eta[j] = 0.0
            for dest, (a, _b, c) in TRUE[origin].items():
                eta[STATES.index(dest)] = a + c + (1.0 * flag if dest == "default" else 0.0)
            P[j] = np.exp(eta) / np.exp(eta).sum()
        truth = np.linalg.matrix_power(P, 12)[0, 3]
        assert pd12[loan] == pytest.approx(truth, rel=0.1), loan  # measured: 0.3% and 3.8% off
    assert pd12["cured"] > 1.3 * pd12["never"]
