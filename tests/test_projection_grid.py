"""The projection's fast route against its general route.

A fitted model evaluates each term of its linear predictor at the grain its input varies at
(:meth:`creditsurv.model.FeatureSpec.grid_predictors`): once per age, per loan, per month, and only the
rest per loan-month. The reference is the general route, the full design matrix of every loan-month
times the coefficients (``FeatureSpec.design``), which a source without the fast route still takes;
the chain of a multi-state model is checked against :func:`creditsurv.forecast.markov_chain`.
Thread counts are checked to give the same bytes.
"""

from __future__ import annotations

import dataclasses
import os

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
from test_projection import AS_OF, WEIGHTS, _paths

from creditsurv.config import (
    Baseline,
    Collateral,
    Covariate,
    Lgd,
    Loss,
    ModelSpec,
    Staging,
)
from creditsurv.errors import ModelError
from creditsurv.forecast import (
    Curves,
    MixedCurves,
    chain_of_moves,
    markov_chain,
    origination_pd,
    panel_history_name,
    project_loans,
)
from creditsurv.loss import expected_credit_loss
from creditsurv.model import (
    FeatureSpec,
    HazardResults,
    InputGrid,
    MultiStateResults,
    can_fork,
    feature_spec,
)

COLLATERAL = Collateral(region_column="region", hpi_series="hpi_{region}", market_rate_series="mortgage_rate")


def _spec() -> FeatureSpec:
    """A learned spec with a term of every grain: age (spline, log age), loan (score, region, DTI bins, a held
    panel input), month (a lagged macro series), loan-month (current LTV, rate incentive, a reverting panel
    input) and interactions within and across grains."""
    model = ModelSpec(
        baseline=Baseline(kind="spline", knots=(4.0, 12.0, 24.0, 60.0), tail="hold"),
        covariates=(
            Covariate(name="score", column="credit_score", transform="standardise"),
            Covariate(name="region", column="region", kind="categorical", reference="North"),
            Covariate(name="dti_band", column="dti", kind="bins", bins=(0.3, 0.4)),
            Covariate(name="arrears", column="months_in_arrears", lag=1, before_first=0.0),
            Covariate(name="score_now", column="score_now", lag=2, before_first=650.0, projection="revert", revert_to=700.0,
                      revert_months=4, transform="standardise"),  # fmt: skip
            Covariate(name="unemployment", macro="unemployment_rate", lag=1),
            Covariate(name="ltv", column="current_ltv", floor=0.1, cap=2.0),
            Covariate(name="incentive", column="rate_incentive"),
            Covariate(name="la", column="log_age"),
        ),
        interactions=(("score", "ltv"), ("region", "score"), ("la", "unemployment")),
    )
    spec = feature_spec(model, COLLATERAL)
    learned = {
        "covariates": {
            "score": {"mean": 700.0, "sd": 50.0},
            "score_now": {"mean": 690.0, "sd": 60.0},
            "region": {"levels": ["North", "South"], "reference": "North"},
            "dti_band": {"levels": ["<0.3", "[0.3,0.4)", ">=0.4"], "reference": "<0.3"},
        },
        "supported_age": 240,
        "columns": [
            "intercept", "age_lin", "age_ns[1]", "age_ns[2]", "score", "region[South]", "dti_band[[0.3,0.4)]",
            "dti_band[>=0.4]", "arrears", "score_now", "unemployment", "ltv", "incentive", "la", "score:ltv",
            "region[South]:score", "la:unemployment",
        ],
    }  # fmt: skip
    return dataclasses.replace(spec, learned=learned)


def _model(spec: FeatureSpec, causes=("default", "prepay"), kind="multinomial", seed=0) -> HazardResults:
    """A model by hand: coefficients of a plausible size (monthly hazards around 0.1% to 2%)."""
    rng = np.random.default_rng(seed)
    names = spec.columns
    beta = rng.normal(0.0, 0.05, size=(len(names), len(causes)))
    beta[0] = [-6.0, -4.5, -3.0, -2.5][: len(causes)]
    beta[names.index("age_lin")] *= 0.02  # loan age in months
    beta[names.index("la:unemployment")] *= 0.1
    params = pd.DataFrame(beta, index=names, columns=list(causes))
    return HazardResults(
        params=params, bse=params.abs(), cov=np.eye(beta.size), loglik=0.0, aic=0.0, bic=0.0, n_rows=1, events={},
        iterations=1, converged=True, kind=kind, ridge=0.0, causes=tuple(causes), spec=spec, data_fingerprint="by hand",
    )  # fmt: skip


class General:
    """The same source without its fast route: the projection then builds the full design of every loan-month."""

    def __init__(self, source):
        self._source = source

    def __getattr__(self, name):
        if name.startswith("grid_"):
            raise AttributeError(name)
        return getattr(self._source, name)


def _loans(n=40, seed=1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    age = rng.integers(0, 300, n)
    term = np.maximum(age + rng.integers(1, 120, n), rng.choice([180, 240, 360], n))
    frame = pd.DataFrame(
        {
            "loan_id": [f"L{i:03d}" for i in range(n)],
            "segment": rng.choice(["a", "b"], n),
            "age": age,
            "term": term,
            "note_rate": rng.uniform(0.01, 0.08, n),
            "original_balance": rng.uniform(1e5, 4e5, n),
            "property_value": rng.uniform(2e5, 6e5, n),
            "origination_idx": AS_OF - age,
            "region": rng.choice(["North", "South"], n),
            "credit_score": rng.uniform(580, 820, n),
            "dti": rng.uniform(0.1, 0.5, n),
        }
    )
    frame["balance"] = frame["original_balance"] * rng.uniform(0.05, 1.0, n)
    frame[panel_history_name("months_in_arrears", 0)] = rng.integers(0, 3, n).astype(float)
    frame[panel_history_name("score_now", 0)] = rng.uniform(600, 800, n)
    frame[panel_history_name("score_now", 1)] = rng.uniform(600, 800, n)
    return frame


def _projected(source, workers=1, chunk_size=7):
    tables = []
    result = project_loans(
        _loans(), source, _paths(), as_of_idx=AS_OF, weights=WEIGHTS, collateral=COLLATERAL, chunk_size=chunk_size,
        curve_writer=tables.append, workers=workers,
    )  # fmt: skip
    return result, pa.concat_tables(tables)


def test_terms_at_their_grains_equal_the_full_design_times_the_coefficients():
    spec = _spec()
    beta = _model(spec, causes=("default", "prepay", "other")).params.to_numpy()
    rng = np.random.default_rng(3)
    n, H = 9, 14
    grid = InputGrid(
        ages=rng.integers(1, 300, n)[:, None] + np.arange(1, H + 1)[None, :],
        loan={"credit_score": rng.uniform(580, 820, n), "region": rng.choice(np.array(["North", "South"], dtype=object), n),
              "dti": rng.uniform(0.1, 0.5, n), "panel:months_in_arrears:1": rng.integers(0, 3, n).astype(float)},
        month={"macro:unemployment_rate:1": rng.uniform(3, 9, H)},
        cell={"current_ltv": rng.uniform(0.0, 2.5, (n, H)), "rate_incentive": rng.uniform(-3, 2, (n, H)),
              "panel:score_now:2": rng.uniform(600, 800, (n, H))},
    )  # fmt: skip
    eta = spec.grid_predictors(beta, grid)
    # the general route: every loan-month's row of the full design
    cells = {"age": grid.ages.reshape(-1).astype(float)}
    cells |= {k: np.repeat(v, H) for k, v in grid.loan.items()}
    cells |= {k: np.tile(v, n) for k, v in grid.month.items()}
    cells |= {k: v.reshape(-1) for k, v in grid.cell.items()}
    X, _ = spec.design(cells)
    expected = (X @ beta).T.reshape(3, n, H)
    np.testing.assert_allclose(eta, expected, rtol=1e-12, atol=1e-13)
    # an input given as a loan part plus a month part (the note rate less the market rate): its term evaluated
    # per loan and per month when it is affine in it (the incentive; the standardised score_now), per cell
    # when not (LTV: floor and cap, and an interaction with the score)
    parts = {
        "rate_incentive": (rng.uniform(2, 7, n), -rng.uniform(3, 6, H)),
        "current_ltv": (rng.uniform(0.0, 1.5, n), rng.uniform(-0.2, 0.8, H)),
        "panel:score_now:2": (rng.uniform(600, 800, n), rng.uniform(-30, 30, H)),
    }
    split = dataclasses.replace(grid, cell={}, loan_plus_month=parts)
    cells |= {k: (a[:, None] + b[None, :]).reshape(-1) for k, (a, b) in parts.items()}
    X, _ = spec.design(cells)
    np.testing.assert_allclose(spec.grid_predictors(beta, split), (X @ beta).T.reshape(3, n, H), rtol=1e-12, atol=1e-13)


@pytest.mark.parametrize("kind", ["multinomial", "cause_specific"])
def test_the_fast_route_projects_what_the_general_route_projects(kind):
    model = _model(_spec(), kind=kind)
    fast, fast_rows = _projected(model)
    general, general_rows = _projected(General(model))
    pd.testing.assert_frame_equal(fast.loans, general.loans, check_exact=False, rtol=1e-12)
    # a year's conditional PD is a difference of two sums of cumulative PDs: equal to 1e-12 of their size
    pd.testing.assert_frame_equal(fast.term_structure, general.term_structure, check_exact=False, rtol=1e-12, atol=1e-13)
    for column in fast_rows.column_names:
        a, b = fast_rows[column].to_numpy(), general_rows[column].to_numpy()
        if a.dtype.kind == "f":
            np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-300, err_msg=column)
        else:
            assert (a == b).all(), column
    loans = _loans()
    np.testing.assert_allclose(
        origination_pd(loans, model, _paths()["base"], collateral=COLLATERAL),
        origination_pd(loans, General(model), _paths()["base"], collateral=COLLATERAL),
        rtol=1e-12,
    )


def test_any_number_of_threads_gives_the_same_bytes():
    model = _model(_spec())
    one, one_rows = _projected(model, workers=1)
    for threads in (2, 3):  # the same chunks: another chunk size adds the pooled sums in another order
        again, again_rows = _projected(model, workers=threads)
        pd.testing.assert_frame_equal(one.loans, again.loans, check_exact=True)
        pd.testing.assert_frame_equal(one.term_structure, again.term_structure, check_exact=True)
        pd.testing.assert_frame_equal(one.speeds, again.speeds, check_exact=True)
        assert one_rows.equals(again_rows)


def _multi_state() -> MultiStateResults:
    """Three arrears states; from current the move to 60-89 never happens (left out, probability 0)."""
    spec = _spec()
    moves = {"current": ("30-59", "default", "prepaid"), "30-59": ("current", "60-89", "default", "prepaid"),
             "60-89": ("current", "30-59", "default", "prepaid")}  # fmt: skip
    origins = {o: _model(spec, causes=c, seed=k) for k, (o, c) in enumerate(moves.items())}
    transitions = pd.DataFrame(
        [(o, d, 100, "full", len(spec.columns)) for o, c in moves.items() for d in c],
        columns=["origin", "destination", "loan_months", "design", "parameters"],
    )
    return MultiStateResults(
        labels=tuple(moves), origins=origins, references={o: o for o in moves}, transitions=transitions, spec=spec
    )


def test_the_multi_state_fast_route_projects_what_the_general_route_projects():
    model = _multi_state()
    loans = _loans().assign(arrears_state=np.random.default_rng(5).integers(0, 3, 40))
    out = {}
    for name, source in (("fast", model), ("general", General(model))):
        states = []
        result = project_loans(
            loans, source, _paths(), as_of_idx=AS_OF, weights=WEIGHTS, collateral=COLLATERAL, chunk_size=7,
            on_chunk=lambda ch: states.append(ch.arrears_states["base"].copy()),
        )  # fmt: skip
        out[name] = result, states
    pd.testing.assert_frame_equal(out["fast"][0].loans, out["general"][0].loans, check_exact=False, rtol=1e-12)
    for a, b in zip(out["fast"][1], out["general"][1]):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-300)


def test_the_chain_of_the_moves_that_happen_is_the_full_chain():
    # the reference: markov_chain over the full (T, n, H, S) array, the moves left out as zeros
    rng = np.random.default_rng(7)
    T, S, n, H = 3, 5, 6, 11
    P = rng.uniform(0.0, 1.0, size=(T, n, H, S))
    P[0, :, :, 2] = 0.0  # current never moves to 60-89
    P /= P.sum(axis=3, keepdims=True)
    start = rng.integers(0, T, n)
    moves = {(j, s): P[j, :, :, s].copy() for j in range(T) for s in range(S) if not (j == 0 and s == 2)}
    fast, full = chain_of_moves(moves, start, S), markov_chain(P, start)
    assert np.array_equal(fast.transient, full.transient) and np.array_equal(fast.entered, full.entered)


def test_hazards_summing_above_one_on_the_fast_route_name_the_loans():
    # two cause-specific logits of +10: each hazard near 1, their sum near 2; the first chunk (7 loans) is named
    model = _model(_spec(), kind="cause_specific")
    model.params.loc["intercept"] = 10.0
    with pytest.raises(ModelError, match=r"summing above 1 for 7 loans \(L000, L001"):
        _projected(model)


def test_chunks_of_similar_remaining_term_give_what_chunks_in_loan_order_give():
    # without writers the chunks group loans by remaining term; each loan's numbers do not depend on its chunk
    model = _model(_spec())
    runs = {}
    for keep in (True, False):
        runs[keep] = project_loans(
            _loans(), model, _paths(), as_of_idx=AS_OF, weights=WEIGHTS, collateral=COLLATERAL, chunk_size=7, keep_order=keep
        )
    pd.testing.assert_frame_equal(runs[True].loans, runs[False].loans, check_exact=True)
    # the pooled sums add the same numbers in another order
    pd.testing.assert_frame_equal(runs[True].term_structure, runs[False].term_structure, check_exact=False, rtol=1e-12, atol=1e-13)
    pd.testing.assert_frame_equal(runs[True].speeds, runs[False].speeds, check_exact=False, rtol=1e-12)


def test_a_multi_state_model_whose_moves_are_not_probabilities_is_refused():
    model = _multi_state()
    model.origins["30-59"].params.loc["intercept", "60-89"] = np.nan
    loans = _loans().assign(arrears_state=1)
    with pytest.raises(ModelError, match="not finite"):
        project_loans(loans, model, _paths(), as_of_idx=AS_OF, weights=WEIGHTS, collateral=COLLATERAL, chunk_size=7)


needs_fork = pytest.mark.skipif(not can_fork(), reason="worker processes are forked, which this platform cannot do")


def _pids(source, workers, **kw):
    """A projection without writers, and the processes that computed its chunks (one loan a chunk: 40 chunks make
    5 blocks of pooled sums, enough for two workers)."""
    pids = []
    result = project_loans(
        _loans(), source, _paths(), as_of_idx=AS_OF, weights=WEIGHTS, collateral=COLLATERAL, chunk_size=1,
        prepare=lambda ch: os.getpid(), on_prepared=lambda rows, pid: pids.append(pid), workers=workers, **kw,
    )  # fmt: skip
    return result, set(pids)


@needs_fork
@pytest.mark.parametrize("kind", ["multinomial", "multi_state"])
def test_chunks_in_worker_processes_give_the_bytes_of_one_thread(kind):
    model = _multi_state() if kind == "multi_state" else _model(_spec())
    one, one_pids = _pids(model, 1)
    two, two_pids = _pids(model, 2)
    assert one_pids == {os.getpid()}
    assert len(two_pids) == 2 and os.getpid() not in two_pids  # the chunks did run in two other processes
    for name in ("loans", "term_structure", "speeds", "speed_multiples"):
        pd.testing.assert_frame_equal(getattr(one, name), getattr(two, name), check_exact=True)
    threads, pids = _pids(model, 2, processes=False)
    assert pids == {os.getpid()}
    pd.testing.assert_frame_equal(threads.term_structure, two.term_structure, check_exact=True)
    loans = _loans()
    base = _paths()["base"]
    pd.testing.assert_series_equal(
        origination_pd(loans, model, base, collateral=COLLATERAL, chunk_size=3, workers=1),
        origination_pd(loans, model, base, collateral=COLLATERAL, chunk_size=3, workers=2),
        check_exact=True,
    )


@needs_fork
def test_the_ecl_in_worker_processes_is_the_ecl_of_one_thread():
    loans = _loans().assign(days_past_due=0)
    # the staging projects each loan's PD at origination: origination_pd runs in the workers too
    kwargs = dict(
        as_of_idx=AS_OF, weights=WEIGHTS, collateral=COLLATERAL, chunk_size=1, default_days_past_due=90,
        loss=Loss(lgd=Lgd(kind="constant", constant=0.3, floor=0.0)), staging=Staging(),
    )  # fmt: skip
    one = expected_credit_loss(loans, _model(_spec()), _paths(), workers=1, **kwargs)
    two = expected_credit_loss(loans, _model(_spec()), _paths(), workers=2, **kwargs)
    pd.testing.assert_frame_equal(one.loan_table(), two.loan_table(), check_exact=True)
    assert one.loan_table()["ecl_lifetime"].gt(0).all()


@needs_fork
def test_an_error_in_a_worker_process_reaches_the_caller():
    model = _model(_spec(), kind="cause_specific")
    model.params.loc["intercept"] = 10.0
    with pytest.raises(ModelError, match=r"summing above 1 for 1 loan \(L\d+\) in months"):  # the chunk of one loan
        _pids(model, 2)


def test_the_origination_pd_does_not_depend_on_the_order_of_the_loans():
    # a book in loan id order takes the fast sort and puts the values back by row; any other order is sorted
    model, base = _model(_spec()), _paths()["base"]
    loans = _loans()
    in_order = origination_pd(loans, model, base, collateral=COLLATERAL, chunk_size=3, workers=1)
    shuffled = origination_pd(loans.sample(frac=1.0, random_state=7), model, base, collateral=COLLATERAL, chunk_size=3, workers=1)
    assert list(in_order.index) == sorted(loans["loan_id"])
    pd.testing.assert_series_equal(in_order, shuffled, check_exact=True)


def test_weighted_curves_mixed_when_read_are_the_mix_by_hand_and_free_the_chunk():
    # The weighted curves (IFRS 9 5.5.17: probability-weighted, linear in the scenarios' probabilities) are mixed
    # when first read, whole or by columns; either way each value is w_a x a + w_b x b + w_c x c in that order.
    import gc
    import weakref

    rng = np.random.default_rng(3)
    weights = {"a": 0.5, "b": 0.2, "c": 0.3}
    curves = {s: Curves.from_hazards(rng.uniform(0, 0.01, (6, 40)), rng.uniform(0, 0.03, (6, 40))) for s in weights}
    cols = [11, 23, 39]
    for field in ("survival", "cum_default", "cum_prepay", "marginal_default"):
        by_hand = 0.5 * getattr(curves["a"], field)
        by_hand += 0.2 * getattr(curves["b"], field)
        by_hand += 0.3 * getattr(curves["c"], field)
        mixed = MixedCurves(curves, weights)
        np.testing.assert_array_equal(mixed.columns(field, cols), by_hand[:, cols])
        np.testing.assert_array_equal(getattr(mixed, field), by_hand)
        np.testing.assert_array_equal(mixed.columns(field, cols), by_hand[:, cols])  # now from the whole mix
    with pytest.raises(AttributeError):
        MixedCurves(curves, weights).not_a_curve
    # a chunk's arrays are freed as soon as the chunk is done with, without waiting for the cycle collector (the
    # weighted curves once held the dict that held them: every chunk's arrays stayed alive until a collection,
    # and each new chunk took fresh memory)
    probes = []

    def consumer(ch):
        assert all(probe() is None for probe in probes[:-1])  # every chunk before the one just done with
        probes.append(weakref.ref(ch.marginal_pd["base"]))
        ch.marginal_pd["weighted"]  # mixed when read

    gc.disable()
    try:
        project_loans(
            _loans(), _model(_spec()), _paths(), as_of_idx=AS_OF, weights=WEIGHTS, collateral=COLLATERAL, chunk_size=4,
            on_chunk=consumer, workers=1,
        )  # fmt: skip
    finally:
        gc.enable()
    assert len(probes) == 10
