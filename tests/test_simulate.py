"""Tests of the synthetic book simulator (creditsurv.simulate)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from creditsurv.demo import (
    DEFAULT_MIN_AGE,
    OUTPUT_FILES,
    arrears_behaviour,
    make_macro,
    psa_hazard,
    scheduled_balance,
    simulate_book,
    simulate_small_book,
    write_demo_book,
)
from creditsurv.errors import SimulationError

DEMO = Path(__file__).resolve().parents[1] / "data_demo"


def _month_index(dates) -> np.ndarray:
    dates = pd.DatetimeIndex(pd.to_datetime(dates))
    return np.asarray(dates.year * 12 + dates.month - 1)


@pytest.fixture(scope="module")
def truth(competing_demo_book):
    return json.loads((competing_demo_book / "true_parameters.json").read_text())


@pytest.fixture(scope="module")
def demo(truth, competing_demo_book):
    """The demo-sized book of the competing-risk hazard joined to its loans (the shipped demo book moves through
    arrears states: tests/test_behaviour.py)."""
    loans = pq.read_table(competing_demo_book / "loans.parquet").to_pandas(date_as_object=False)
    panel = pq.read_table(competing_demo_book / "panel.parquet").to_pandas(date_as_object=False)
    panel["month_index"] = _month_index(panel["month"])
    loans["orig_index"] = _month_index(loans["origination_month"])
    panel = panel.merge(loans, on="loan_id", how="left", validate="many_to_one")
    return panel, loans


@pytest.fixture(scope="module")
def outcomes(demo):
    """First event per loan: kind in {default, prepay, matured, censored} and its age."""
    panel, _ = demo
    first_default = panel["status"].eq("default") & panel["days_past_due"].eq(90)
    closing = panel["status"].isin(["paid_off", "matured"])
    event = panel.loc[first_default | closing, ["loan_id", "age", "status"]]
    event = event.sort_values(["loan_id", "age"]).drop_duplicates("loan_id")
    last = panel.groupby("loan_id")["age"].max().rename("last_age").reset_index()
    out = last.merge(event, on="loan_id", how="left")
    out["kind"] = out["status"].map({"default": "default", "paid_off": "prepay", "matured": "matured"})
    out["kind"] = out["kind"].fillna("censored")
    out["event_age"] = out["age"].fillna(out["last_age"]).astype(int)
    return out[["loan_id", "kind", "event_age", "last_age"]]


# --------------------------------------------------------------------------- determinism


def test_same_seed_gives_same_book_and_other_seed_differs():
    a = simulate_small_book(600, 11, chunk_size=250)
    b = simulate_small_book(600, 11, chunk_size=250)
    c = simulate_small_book(600, 12, chunk_size=250)
    pd.testing.assert_frame_equal(a.panel, b.panel)
    pd.testing.assert_frame_equal(a.loans, b.loans)
    pd.testing.assert_frame_equal(a.macro, b.macro)
    assert a.truth == b.truth
    assert not a.loans.equals(c.loans)
    assert not a.macro.equals(c.macro)
    # ids run on across chunks
    assert a.loans["loan_id"].tolist() == [f"QL{i:07d}" for i in range(1, 601)]


def test_regeneration_of_shipped_demo_book(tmp_path):
    # Regeneration check: the shipped data_demo/ must be exactly what the code writes (make-demo-data's default).
    book = json.loads((DEMO / "true_parameters.json").read_text())["book"]
    out = tmp_path / "book"
    write_demo_book(out, book["n_loans"], book["seed"], chunk_size=book["chunk_size"], hazard=arrears_behaviour())
    for name in OUTPUT_FILES:
        if name.endswith(".parquet"):
            assert pq.read_table(out / name).equals(pq.read_table(DEMO / name)), name
        else:
            assert (out / name).read_bytes() == (DEMO / name).read_bytes(), name


# --------------------------------------------------------------------------- hazards


def _true_hazards(rows: pd.DataFrame, macro: pd.DataFrame, truth: dict):
    """Recompute the true monthly hazards from the truth record, written out independently."""
    macro = macro.assign(month_index=_month_index(macro["month"] + "-01")).set_index("month_index")
    at_month = macro.loc[rows["month_index"]]
    at_orig = macro.loc[rows["orig_index"]]
    hpi_col = "hpi_" + rows["region"].str.lower()
    hpi_columns = [c for c in macro.columns if c.startswith("hpi_")]
    which = pd.Index(hpi_columns).get_indexer(hpi_col)
    everyone = np.arange(len(rows))
    hpi_now = at_month[hpi_columns].to_numpy(float)[everyone, which]
    hpi_orig = at_orig[hpi_columns].to_numpy(float)[everyone, which]

    # annuity: payment then balance after k payments, B_k = P(1+r)^k - A((1+r)^k - 1)/r
    r = rows["note_rate"].to_numpy() / 1200
    n = rows["term_months"].to_numpy()
    p = rows["original_balance"].to_numpy()
    k = rows["age"].to_numpy() - 1
    payment = p * r / (1 - (1 + r) ** -n)
    balance_prev = p * (1 + r) ** k - payment * ((1 + r) ** k - 1) / r

    age = rows["age"].to_numpy().astype(float)
    x = {
        "intercept": np.ones(len(rows)),
        "log_age": np.log(age),
        "age": age,
        "credit_score": rows["credit_score"].to_numpy(float),
        "current_ltv": balance_prev / (rows["property_value"].to_numpy() * hpi_now / hpi_orig),
        "dti": rows["dti"].to_numpy(),
        "rate_incentive": rows["note_rate"].to_numpy() - at_month["mortgage_rate"].to_numpy(),
        "unemployment_rate": at_month["unemployment_rate"].to_numpy(),
    }
    coef = truth["hazard"]["coefficients"]
    exp_eta = {c: np.exp(sum(coef[c][t] * x[t] for t in truth["hazard"]["terms"])) for c in coef}
    total = 1 + exp_eta["default"] + exp_eta["prepay"]
    h_default = exp_eta["default"] / total
    h_prepay = exp_eta["prepay"] / total
    h_default[age < truth["mechanics"]["default_min_age"]] = 0.0
    h_prepay[age == n] = 0.0
    return h_default, h_prepay


@pytest.mark.parametrize("grouping", ["age_band", "calendar_year"])
def test_event_rates_match_true_hazard(demo, outcomes, truth, grouping):
    panel, _ = demo
    rows = panel.merge(outcomes, on="loan_id")
    rows = rows[rows["age"] <= rows["event_age"]].reset_index(drop=True)
    macro = pd.read_csv(DEMO / "macro_history.csv", dtype={"month": str})
    h_default, h_prepay = _true_hazards(rows, macro, truth)
    at_event = rows["age"].eq(rows["event_age"])
    frame = pd.DataFrame(
        {
            "default": (at_event & rows["kind"].eq("default")).astype(int),
            "prepay": (at_event & rows["kind"].eq("prepay")).astype(int),
            "p_default": h_default,
            "p_prepay": h_prepay,
            "v_default": h_default * (1 - h_default),
            "v_prepay": h_prepay * (1 - h_prepay),
        }
    )
    if grouping == "age_band":
        key = pd.cut(rows["age"], [0, 2, 12, 24, 36, 60, 120], labels=False)
    else:
        key = rows["month"].dt.year
    sums = frame.groupby(key.to_numpy()).sum()
    # Poisson-binomial: mean sum p, variance sum p(1 - p)
    for cause in ("default", "prepay"):
        observed, expected, variance = sums[cause], sums[f"p_{cause}"], sums[f"v_{cause}"]
        z = (observed - expected) / np.sqrt(variance.where(variance > 0, 1.0))
        assert (z.abs() < 4).all(), pd.DataFrame({"observed": observed, "expected": expected, "z": z})
        total_z = (observed.sum() - expected.sum()) / np.sqrt(variance.sum())
        assert abs(total_z) < 4
    if grouping == "age_band":
        assert sums["default"].iloc[0] == 0 and sums["p_default"].iloc[0] == 0  # ages 1-2


def test_psa_hazard_values():
    hazard = psa_hazard(1.5)
    age = np.array([1, 15, 30, 31, 200], dtype=float)
    h_default, smm = hazard({"age": age})
    cpr = 1.5 * np.array([0.002, 0.030, 0.060, 0.060, 0.060])  # PSA 100%: 0.2% a month to 6% at 30
    np.testing.assert_allclose(smm, 1 - (1 - cpr) ** (1 / 12), rtol=1e-12)
    np.testing.assert_array_equal(h_default, 0.0)
    with pytest.raises(SimulationError, match="PSA multiple"):
        psa_hazard(-1)


def test_psa_book_prepays_at_psa_speed():
    book = simulate_small_book(3000, 5, hazard=psa_hazard(1.5))
    assert not book.panel["status"].isin(["default", "charged_off"]).any()
    assert book.truth["hazard"] == {
        "kind": "psa",
        "multiple": 1.5,
        "formula": "CPR = multiple * 0.002 * min(age, 30); SMM = 1 - (1 - CPR)^(1/12); default 0",
    }
    panel = book.panel.merge(book.loans[["loan_id", "term_months"]], on="loan_id")
    at_risk = panel[~panel["status"].eq("matured")]
    smm = 1 - (1 - 1.5 * 0.002 * np.minimum(at_risk["age"], 30)) ** (1 / 12)
    observed = at_risk["status"].eq("paid_off").sum()
    assert abs(observed - smm.sum()) < 4 * np.sqrt((smm * (1 - smm)).sum())


def test_default_min_age_moves_the_first_possible_default():
    # A default-only hazard of 5% a month: with default_min_age 1 loans default at ages 1 and 2, the
    # demo's default (3) has none there; the truth record states the age used.
    def hazard(covariates):
        return np.full(np.shape(covariates["age"]), 0.05), np.zeros(np.shape(covariates["age"]))

    kw = {"first_origination": "2024-01"}
    early = simulate_small_book(2000, 9, hazard=hazard, default_min_age=1, **kw)
    demo_rule = simulate_small_book(2000, 9, hazard=hazard, **kw)
    for book, min_age in ((early, 1), (demo_rule, DEFAULT_MIN_AGE)):
        first_default = book.panel[book.panel["days_past_due"].ge(90)].groupby("loan_id")["age"].min()
        assert first_default.min() == min_age
        assert book.truth["mechanics"]["default_min_age"] == min_age
    # Loans at risk at age 1 default there at about the 5% hazard (binomial, 4 standard errors).
    n_at_age_1 = early.panel["age"].eq(1).sum()
    defaults_at_1 = early.panel["age"].eq(1) & early.panel["days_past_due"].ge(90)
    assert abs(defaults_at_1.sum() - 0.05 * n_at_age_1) < 4 * np.sqrt(0.05 * 0.95 * n_at_age_1)


# --------------------------------------------------------------------------- mechanics


def test_rows_are_contiguous_sorted_and_aged_from_origination(demo, truth):
    panel, loans = demo
    assert panel["loan_id"].is_monotonic_increasing
    first_age = panel.groupby("loan_id")["age"].transform("min")
    assert (first_age == 1).all()
    step = panel.groupby("loan_id")["age"].diff().dropna()
    assert (step == 1).all()
    assert (panel["month_index"] - panel["orig_index"] == panel["age"]).all()
    assert panel["month_index"].max() <= _month_index([truth["book"]["cutoff"] + "-01"])[0]
    assert set(loans["loan_id"]) == set(panel["loan_id"])
    assert loans["loan_id"].is_unique


def test_defaults_are_preceded_by_30_and_60_days_past_due(demo, outcomes):
    panel, _ = demo
    defaults = outcomes[outcomes["kind"] == "default"]
    assert len(defaults) > 100
    assert (defaults["event_age"] >= 3).all()
    lookup = panel.set_index(["loan_id", "age"])[["days_past_due", "status"]]
    for lag, dpd, status in [(2, 30, "delinquent"), (1, 60, "delinquent"), (0, 90, "default")]:
        rows = lookup.loc[list(zip(defaults["loan_id"], defaults["event_age"] - lag))]
        assert (rows["days_past_due"] == dpd).all()
        assert (rows["status"] == status).all()
    # the month before the run-up is clean: noise delinquency never touches it
    early = defaults[defaults["event_age"] >= 4]
    rows = lookup.loc[list(zip(early["loan_id"], early["event_age"] - 3))]
    assert (rows["days_past_due"] == 0).all()


def test_closing_rows_end_the_loan_with_zero_balance(demo, outcomes, truth):
    panel, _ = demo
    closing = panel["status"].isin(["charged_off", "paid_off", "matured"])
    assert (panel.loc[closing, "balance"] == 0.0).all()
    assert (panel.loc[~closing, "balance"] > 0).all()
    last_age = panel.groupby("loan_id")["age"].transform("max")
    assert (panel.loc[closing, "age"] == last_age[closing]).all()  # nothing after a close
    assert panel.loc[closing, "loan_id"].is_unique

    # a loan is closed or observed up to the cutoff
    last = panel[panel["age"] == last_age]
    cutoff = _month_index([truth["book"]["cutoff"] + "-01"])[0]
    open_at_end = ~last["status"].isin(["charged_off", "paid_off", "matured"])
    assert (last.loc[open_at_end, "month_index"] == cutoff).all()

    matured = panel[panel["status"] == "matured"]
    assert len(matured) > 0
    assert (matured["age"] == matured["term_months"]).all()
    # workout: 1 to 12 months from default to charge-off, dpd rising by 30 a month
    charged = panel[panel["status"] == "charged_off"].merge(outcomes, on="loan_id")
    workout = charged["age"] - charged["event_age"]
    assert workout.between(1, 12).all()
    assert (charged["days_past_due"] == 90 + 30 * workout).all()
    in_workout = panel[panel["status"] == "default"].merge(outcomes, on="loan_id")
    assert (in_workout["days_past_due"] == 90 + 30 * (in_workout["age"] - in_workout["event_age"])).all()


def test_noise_delinquency_cures(demo, outcomes):
    panel, _ = demo
    loan_kind = panel["loan_id"].map(outcomes.set_index("loan_id")["kind"])
    noise = panel[panel["status"].eq("delinquent") & loan_kind.ne("default")]
    rate = len(noise) / len(panel)
    assert 0.002 < rate < 0.008
    assert set(noise["days_past_due"]) == {30, 60}


def test_balances_follow_the_annuity_schedule(demo):
    npf = pytest.importorskip("numpy_financial")  # published reference implementation
    panel, loans = demo
    for loan_id in loans["loan_id"].iloc[[0, 7, 100, 4242, 19999]]:
        rows = panel[panel["loan_id"] == loan_id]
        first = rows.iloc[0]
        r, n, p = first["note_rate"] / 1200, first["term_months"], first["original_balance"]
        paid = (rows["age"] - rows["days_past_due"] // 30).to_numpy()
        payment = npf.pmt(r, n, -p)
        expected = -npf.fv(r, paid, -payment, p)
        np.testing.assert_allclose(scheduled_balance(p, r * 1200, n, paid), expected, rtol=1e-9, atol=1e-6)
        is_open = ~rows["status"].isin(["charged_off", "paid_off", "matured"]).to_numpy()
        np.testing.assert_allclose(rows["balance"].to_numpy()[is_open], expected[is_open], atol=0.0051)


def test_loan_table_is_realistic(demo):
    _, loans = demo
    assert set(loans["term_months"]) == {60, 120, 180, 240, 300, 360}
    assert set(loans["region"]) == {"North", "South", "East", "West", "Central"}
    assert set(loans["channel"]) == {"retail", "broker"}
    assert loans["credit_score"].between(580, 820).all()
    assert loans["dti"].between(0.10, 0.50).all()
    assert loans["orig_ltv"].between(0.5, 0.97).all()
    np.testing.assert_allclose(loans["orig_ltv"], loans["original_balance"] / loans["property_value"])
    assert str(loans["term_months"].dtype) == "int32"
    assert str(loans["credit_score"].dtype) == "int32"
    # better scores pay lower spreads
    assert np.corrcoef(loans["credit_score"], loans["note_rate"])[0, 1] < 0


# --------------------------------------------------------------------------- macro


def test_macro_history_and_scenarios():
    history, scenarios, weights = make_macro(3)
    assert history["month"].iloc[0] == "2015-01" and history["month"].iloc[-1] == "2024-12"
    hpi = [c for c in history if c.startswith("hpi_")]
    assert (history.loc[0, hpi] == 100.0).all()
    year = history["month"].str[:4].astype(int)
    assert 8.5 < history.loc[year == 2020, "unemployment_rate"].max() < 9.5
    assert history.loc[year == 2021, "mortgage_rate"].min() < 3.2
    assert history.loc[year.isin([2022, 2023]), "mortgage_rate"].max() > 6.3
    assert weights == {"baseline": 0.5, "upside": 0.2, "downside": 0.3}
    for frame in scenarios.values():
        assert list(frame.columns) == list(history.columns)
        assert frame["month"].iloc[0] == "2025-01" and len(frame) == 60
    down, up = scenarios["downside"], scenarios["upside"]
    assert down["unemployment_rate"].max() > up["unemployment_rate"].max()
    fall = down[hpi].min() / history[hpi].iloc[-1]
    assert 0.84 < fall.mean() < 0.92


# --------------------------------------------------------------------------- writing


def test_write_refuses_to_overwrite(tmp_path):
    out = tmp_path / "book"
    summary = write_demo_book(out, 200, 1, chunk_size=64)
    assert summary["loans"] == 200
    assert sum(summary["events"].values()) == 200
    assert pq.ParquetFile(out / "panel.parquet").num_row_groups == 4  # one per chunk
    before = (out / "loans.parquet").read_bytes()
    with pytest.raises(SimulationError, match="never overwrites"):
        write_demo_book(out, 200, 2)
    assert (out / "loans.parquet").read_bytes() == before

    other = tmp_path / "partial"
    (other / "scenarios").mkdir(parents=True)
    (other / "scenarios" / "weights.csv").write_text("mine\n")
    with pytest.raises(SimulationError, match="scenarios/weights.csv"):
        write_demo_book(other, 10, 1)
    assert (other / "scenarios" / "weights.csv").read_text() == "mine\n"
    assert not (other / "loans.parquet").exists()


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"n_loans": 0}, "n_loans"),
        ({"chunk_size": 0}, "chunk_size"),
        ({"cutoff": "2024-13"}, "cutoff"),
        ({"last_origination": "2025-01"}, "last_origination < cutoff"),
        ({"default_min_age": 0}, "default_min_age must be a positive integer"),
    ],
)
def test_bad_arguments_raise(kwargs, message):
    args = {"n_loans": 10, "seed": 1, **kwargs}
    with pytest.raises(SimulationError, match=message):
        simulate_book(**args)


def test_bad_hazard_is_reported():
    with pytest.raises(SimulationError, match="hazard must return"):
        simulate_small_book(20, 1, hazard=lambda x: (x["age"] * 0 + 0.7, x["age"] * 0 + 0.7))
