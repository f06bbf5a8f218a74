"""The validation pack on a simulated book: tables, references and the backtest's power.

Each check names its independent reference: scikit-learn's ``roc_auc_score``,
statsmodels' ``CumIncidenceRight``, counts taken straight from the labelled
panel with SQL written here, the simulator's own data-generating hazard, or
the likelihood equations of the fit.
"""

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import demo_config_data
from scipy import stats
from sklearn.metrics import roc_auc_score
from statsmodels.duration.survfunc import CumIncidenceRight

from creditsurv import pipeline
from creditsurv.config import load_config
from creditsurv.demo import DEFAULT_MIN_AGE, true_hazard
from creditsurv.errors import FewEventsWarning
from creditsurv.model import BenchmarkCurves, hazard_source, with_age_tail
from creditsurv.months import parse_month
from creditsurv.validation import (
    PACK_COLUMNS,
    ValidationPack,
    input_stability,
    moves_with_calendar,
    psi,
    validation_pack,
)

ROOT = Path(__file__).resolve().parents[1]
DOWNTURN = {"development": {"start": "2016-01", "end": "2019-12"}, "out_of_time": {"start": "2020-01", "end": "2021-12"}}
NO_UNEMPLOYMENT = [
    {"name": "credit_score", "column": "credit_score", "transform": "standardise"},
    {"name": "current_ltv", "column": "current_ltv", "floor": 0.1, "cap": 2.0},
    {"name": "dti", "column": "dti"},
    {"name": "rate_incentive", "column": "rate_incentive"},
]


class TrueHazard:
    """The simulator's data-generating hazard, as a projection hazard source.

    ``simulate.true_hazard`` with the simulator's two rules: no default before
    age ``DEFAULT_MIN_AGE`` and no prepayment in the month a loan reaches its term.
    """

    required_inputs = ["age", "credit_score", "current_ltv", "dti", "rate_incentive", "macro:unemployment_rate:0", "term"]

    def hazards(self, raw):
        age = np.asarray(raw["age"], dtype=float)
        hd, hp = true_hazard(
            {
                "age": age,
                "log_age": np.log(age),
                "credit_score": raw["credit_score"],
                "current_ltv": raw["current_ltv"],
                "dti": raw["dti"],
                "rate_incentive": raw["rate_incentive"],
                "unemployment_rate": raw["macro:unemployment_rate:0"],
            }
        )
        hd = np.where(age < DEFAULT_MIN_AGE, 0.0, hd)
        hp = np.where(age == np.asarray(raw["term"], dtype=float), 0.0, hp)
        return hd, hp


def _config(book: Path, tmp: Path, *, model=None, **top):
    """configs/demo.yaml pointed at ``book`` (as tests/test_pipeline.py does), with overrides."""
    data = demo_config_data(book, tmp / "reports")
    data["model"].update(model or {})
    data.update(top)
    path = tmp / f"config_{len(list(tmp.glob('config_*.yaml')))}.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return load_config(path)


@pytest.fixture(scope="session")
def book(simulated_book):
    """The shared simulated book (conftest): enough events for the backtest to have power."""
    return simulated_book


@pytest.fixture(scope="module")
def opened(book, tmp_path_factory):
    """The demo config on the book, its checked and labelled panel, and the fitted demo model."""
    tmp = tmp_path_factory.mktemp("pack")
    cfg = _config(book, tmp)
    panel, _ = pipeline.open_checked(cfg)
    model = hazard_source(cfg, panel, temp_dir=tmp)
    yield cfg, panel, model, tmp
    panel.close()


@pytest.fixture(scope="module")
def demo_pack(opened):
    cfg, panel, model, _ = opened
    current = np.random.default_rng(11).beta(1.2, 200.0, size=3000)
    return validation_pack(cfg, panel, model, current_pd_12m=current), current


@pytest.fixture(scope="module")
def downturn_packs(opened, book):
    """Development 2016-01..2019-12, out-of-time 2020-01..2021-12 (the unemployment spike).

    ``truth``: the simulator's own hazard. ``misspecified``: refitted on the
    pre-downturn window without the unemployment covariate.
    """
    _, panel, _, tmp = opened
    cfg_true = _config(book, tmp, windows=DOWNTURN)
    # Ages reach 47 months by 2019-12: the spline's last knot moves inside them.
    model = {"covariates": NO_UNEMPLOYMENT, "baseline": {"kind": "spline", "knots": [4, 12, 24, 40]}}
    cfg_mis = _config(book, tmp, windows=DOWNTURN, model=model)
    # Few defaults before the downturn: the fit says so.
    with pytest.warns(FewEventsWarning, match="default"):
        misspecified = hazard_source(cfg_mis, panel, temp_dir=tmp)
    return {
        "truth": validation_pack(cfg_true, panel, TrueHazard()),
        "misspecified": validation_pack(cfg_mis, panel, misspecified),
        "extrapolated": validation_pack(cfg_mis, panel, with_age_tail(misspecified, "extrapolate")),
        "cfg": cfg_true,
    }


def _cohort_by_sql(panel, cfg) -> pd.DataFrame:
    """Loans alive and out of default at the end of the development window, and their 12-month outcome.

    Written here from the definitions, independently of the pack's queries.
    """
    end = int(cfg.windows.development.end)
    frame = panel.con.execute(
        """
        SELECT o.loan_id,
               CASE WHEN o.event = 'default' AND o.event_month_idx <= $end + 12 THEN 1
                    WHEN o.event_month_idx <= $end + 12 OR o.last_month_idx >= $end + 12 THEN 0
                    END AS flag
        FROM loan_outcomes AS o
        WHERE EXISTS (SELECT 1 FROM panel AS p
                      WHERE p.loan_id = o.loan_id AND p.month_idx = $end AND p.balance > $paid_off)
          AND coalesce(o.event_month_idx > $end, TRUE)
        ORDER BY o.loan_id
        """,
        {"end": end, "paid_off": float(cfg.events.paid_off_balance)},
    ).df()
    return frame


# --------------------------------------------------------------------------- shape of the pack


def test_every_table_has_its_documented_columns_and_the_summary_is_json(demo_pack):
    pack, _ = demo_pack
    assert isinstance(pack, ValidationPack)
    # no prior model in the config; the moves between arrears states are a multi-state model's (tests/test_pipeline.py)
    expected = set(PACK_COLUMNS) - {"coefficient_changes", "backtest_transitions", "transitions_development", "states_by_vintage"}
    assert set(pack.tables) == expected
    for name, table in pack.tables.items():
        assert list(table.columns) == list(PACK_COLUMNS[name]), name
        assert len(table) > 0, name
    json.dumps(pack.summary, allow_nan=False)
    assert any("prior model" in note for note in pack.summary["notes"])
    assert pack.summary["cohort_loans"] == len(pack.tables["development_cohort"])
    months = pack.tables["backtest_by_month"]["month"].unique().tolist()
    assert months == [f"{y}-{m:02d}" for y in (2023, 2024) for m in range(1, 13)][:18]


def test_same_inputs_give_identical_tables(demo_pack, opened):
    # DESIGN.md: same inputs, config and versions give identical tables (the
    # bootstrap is seeded by cfg.seed, the stability sample by a hash).
    pack, current = demo_pack
    cfg, panel, model, _ = opened
    again = validation_pack(cfg, panel, model, current_pd_12m=current)
    assert again.summary == pack.summary
    for name, table in pack.tables.items():
        pd.testing.assert_frame_equal(again.tables[name], table, check_exact=True)


def test_discrimination_matches_sklearn_on_the_cohort_rebuilt_here(demo_pack, opened):
    pack, _ = demo_pack
    cfg, panel, _, _ = opened
    ref = _cohort_by_sql(panel, cfg)
    mine = pack.tables["development_cohort"]
    assert mine["loan_id"].tolist() == ref["loan_id"].tolist()
    known = ref["flag"].notna().to_numpy()
    np.testing.assert_array_equal(mine["default_12m"].notna().to_numpy(), known)
    y = ref.loc[known, "flag"].to_numpy(dtype=int)
    np.testing.assert_array_equal(mine.loc[known, "default_12m"].to_numpy(dtype=int), y)
    row = pack.tables["discrimination"].iloc[0]
    # Reference: scikit-learn roc_auc_score on the same loans and scores.
    auc = roc_auc_score(y, mine.loc[known, "pd_12m"].to_numpy())
    assert row["auc"] == pytest.approx(auc, abs=1e-12)
    assert row["gini"] == pytest.approx(2 * auc - 1, abs=1e-12)
    assert (row["n"], row["defaults"]) == (known.sum(), y.sum())
    assert row["auc_lo"] < row["auc"] < row["auc_hi"]
    # Calibration by the demo config's credit-score grades; its totals are the cohort's.
    cal = pack.tables["calibration"]
    # the bands in numeric order (band_labels: closed on the left), whatever the text order
    order = ["(-inf, 640)", "[640, 700)", "[700, 760)", "[760, inf)"]
    assert cal["group"].tolist() == [b for b in order if b in set(cal["group"])]
    assert cal["n"].sum() == known.sum() and cal["actual"].sum() == y.sum()
    hl = pack.summary["calibration"]
    # the cohort's outcomes fall after the development window: an external sample, as many degrees of freedom as
    # groups (Hosmer, Lemeshow & Sturdivant 2013, Applied Logistic Regression, external validation; from memory)
    assert hl["hl_sample"] == "external" and hl["hl_df"] == len(cal)
    assert hl["hl_p_value"] == pytest.approx(stats.chi2.sf(hl["hl_statistic"], hl["hl_df"]), rel=1e-12)


def test_backtest_counts_are_the_risk_set_of_the_cohort(demo_pack, opened):
    pack, _ = demo_pack
    cfg, panel, _, _ = opened
    oot = cfg.windows.out_of_time
    # Reference: loan_months of the cohort's loans in the out-of-time window, counted here.
    ids = _cohort_by_sql(panel, cfg)["loan_id"]
    panel.con.register("_test_ids", pd.DataFrame({"loan_id": ids}))
    try:
        ref = panel.con.execute(
            """
            SELECT strftime(make_date(CAST(month_idx // 12 AS INTEGER), CAST(month_idx % 12 + 1 AS INTEGER), 1), '%Y-%m') AS month,
                   count(*) AS n, count(*) FILTER (WHERE outcome = 1) AS d, count(*) FILTER (WHERE outcome = 2) AS p
            FROM loan_months JOIN _test_ids USING (loan_id)
            WHERE month_idx BETWEEN $s AND $e GROUP BY ALL ORDER BY month
            """,
            {"s": int(oot.start), "e": int(oot.end)},
        ).df()
    finally:
        panel.con.unregister("_test_ids")
    bt = pack.tables["backtest_by_month"]
    for cause, col in (("default", "d"), ("prepay", "p")):
        part = bt[bt["cause"] == cause].reset_index(drop=True)
        assert part["month"].tolist() == ref["month"].tolist()
        np.testing.assert_array_equal(part["n"], ref["n"])
        np.testing.assert_array_equal(part["actual"], ref[col])
    # The three groupings share the same loan-months and expected events.
    for name in ("backtest_by_age_band", "backtest_by_vintage"):
        other = pack.tables[name]
        for cause in ("default", "prepay"):
            a, b = bt[bt["cause"] == cause], other[other["cause"] == cause]
            assert a["n"].sum() == b["n"].sum() and a["actual"].sum() == b["actual"].sum()
            assert a["expected"].sum() == pytest.approx(b["expected"].sum(), rel=1e-12)


def test_backtest_passes_the_true_hazard_and_fails_a_misspecified_model(downturn_packs):
    truth, wrong = downturn_packs["truth"], downturn_packs["misspecified"]
    assert truth.summary["backtest"]["months"] == 24
    # Reference: the simulator's own hazard is the correct model by construction, so
    # about 5% of months fall outside the 95% interval and the total is on target.
    for cause in ("default", "prepay"):
        right = truth.summary["backtest"][cause]
        assert right["share_months_outside"] <= 0.20, cause
        assert abs(right["z_total"]) < 3.0, cause
        assert wrong.summary["backtest"][cause]["actual"] == right["actual"]  # same loan-months, same events
    # Without unemployment, fitted before the 2020 spike: over the downturn the model expects far too few
    # defaults (the age tail held at the last supported age, the default).
    bad = wrong.summary["backtest"]["default"]
    assert bad["z_total"] > 3.0 and bad["actual"] > 1.4 * bad["expected"]
    # With the age effect extrapolated past the supported ages (a spline beyond its last knot, over ages up to
    # 24 months older than any the fit saw) prepayment is over-predicted month after month as well.
    runaway = downturn_packs["extrapolated"].summary["backtest"]["prepay"]
    assert runaway["share_months_outside"] >= 0.5 and runaway["z_total"] < -5.0
    # Defaults are too few (2-4 a month in this cohort) for a monthly interval to
    # catch the missing unemployment effect; what must hold is that the model does not
    # see the spike: its predicted default rate over 2020-05..2020-12 stays well
    # below the true hazard's.
    def spike_rate(pack):
        bt = pack.tables["backtest_by_month"]
        part = bt[(bt["cause"] == "default") & bt["month"].between("2020-05", "2020-12")]
        return part["expected"].sum() / part["n"].sum()

    assert spike_rate(wrong) < 0.75 * spike_rate(truth)


# --------------------------------------------------------------------------- cumulative incidence


def _vintage_outcomes(panel) -> pd.DataFrame:
    """Per loan seen from its first month: vintage, time and cause, from loan_outcomes (written here)."""
    return panel.con.execute(
        """
        SELECT l.origination_idx // 12 AS vintage,
               CASE WHEN o.event = 'censored' THEN o.last_age ELSE o.event_age END AS time,
               CASE o.event WHEN 'default' THEN 1 WHEN 'prepay' THEN 2 ELSE 0 END AS status
        FROM loan_outcomes AS o JOIN loans AS l USING (loan_id)
        WHERE o.entry_age <= 1
        """
    ).df()


def test_observed_incidence_is_statsmodels_cumincidence_on_each_vintage(downturn_packs, opened):
    inc = downturn_packs["truth"].tables["incidence_by_vintage"]
    loans = _vintage_outcomes(opened[1])
    assert sorted(inc["vintage"].unique()) == sorted(loans["vintage"].unique())
    for vintage, group in loans.groupby("vintage"):
        # Reference: statsmodels CumIncidenceRight on the vintage's realised outcomes.
        ref = CumIncidenceRight(group["time"].to_numpy(float), group["status"].to_numpy(float))
        for k, cause in ((1, "default"), (2, "prepay")):
            mine = inc[(inc["vintage"] == vintage) & (inc["cause"] == cause)].set_index("age")
            assert mine.index.max() == group["time"].max()
            at = np.asarray(ref.times, dtype=int)
            np.testing.assert_allclose(mine.loc[at, "observed"], ref.cinc[k - 1], rtol=0, atol=1e-10)


def test_true_hazard_incidence_lies_inside_the_aalen_johansen_band(downturn_packs):
    # The requirement: the model-implied cumulative incidence averaged over a
    # cohort, projected with the realised macro path, agrees with the non-parametric
    # estimate on the same loans within sampling error. Band: pointwise 99% normal
    # interval of the Aalen-Johansen estimate; at ages where the vintage has had
    # fewer than 5 events of the cause the normal interval is degenerate (zero
    # width at zero events), so there the exact Poisson 99% bounds on the count,
    # divided by the loans at origination, are used instead (this ignores censoring,
    # which at those early ages touches only the youngest vintages).
    inc = downturn_packs["truth"].tables["incidence_by_vintage"].copy()
    z = stats.norm.isf(0.005)
    inc["n0"] = inc.groupby(["vintage", "cause"])["n_risk"].transform("first")
    events = np.round(inc["observed"] * inc["n0"]).astype(int)  # events so far (exact before any censoring)
    few = events < 5
    lo = np.where(few, stats.chi2.ppf(0.005, 2 * events) / 2 / inc["n0"], inc["observed"] - z * inc["observed_se"])
    hi = np.where(few, stats.chi2.ppf(0.995, 2 * events + 2) / 2 / inc["n0"], inc["observed"] + z * inc["observed_se"])
    lo = np.nan_to_num(lo, nan=0.0)
    inside = (inc["model"] >= lo - 1e-12) & (inc["model"] <= hi + 1e-12)
    for cause in ("default", "prepay"):
        share = inside[inc["cause"] == cause].mean()
        assert share >= 0.95, (cause, share)


# --------------------------------------------------------------------------- stability


def test_psi_of_every_input_is_zero_against_its_own_window(opened):
    cfg, panel, model, _ = opened
    dev = (int(cfg.windows.development.start), int(cfg.windows.development.end))
    table = input_stability(panel, model, dev, dev, bins=cfg.validation.psi_bins)
    assert table["variable"].tolist() == [n for n in model.required_inputs if n != "log_age"]
    np.testing.assert_allclose(table["psi"], 0.0, atol=1e-12)
    # PSI 0 passes; an input that moves with the calendar is not judged whatever its PSI (expected drift)
    calendar = table["variable"].map(moves_with_calendar)
    assert calendar.any() and (~calendar).any()
    assert (table.loc[~calendar, "verdict"] == "pass").all() and (table.loc[calendar, "verdict"] == "expected drift").all()


def test_pd_psi_compares_the_cohort_with_the_current_book(demo_pack, opened):
    pack, current = demo_pack
    cfg = opened[0]
    st = pack.tables["stability"].set_index("variable")
    # Reference: psi() on the development cohort's 12-month PD and the array passed in.
    value, _ = psi(pack.tables["development_cohort"]["pd_12m"], current, bins=cfg.validation.psi_bins)
    assert st.loc["pd_12m", "psi"] == pytest.approx(value, rel=1e-12)
    assert st.loc["pd_12m", "n_current"] == len(current)
    # The reporting month's rows: the risk set at cfg.as_of.
    n_now = opened[1].con.execute("SELECT count(*) FROM loan_months WHERE month_idx = $m", {"m": int(cfg.as_of)}).fetchone()[0]
    assert st.loc["age", "n_current"] == n_now


# --------------------------------------------------------------------------- in-sample fit


def test_hazard_by_age_counts_and_the_intercept_score_equation(demo_pack, opened):
    pack, _ = demo_pack
    cfg, panel, model, _ = opened
    hba = pack.tables["hazard_by_age"]
    dev = cfg.windows.development
    # Reference: loan_months of the development window, counted here.
    ref = panel.con.execute(
        "SELECT age, count(*) AS n, count(*) FILTER (WHERE outcome = 1) AS d FROM loan_months "
        "WHERE month_idx BETWEEN $s AND $e GROUP BY age ORDER BY age",
        {"s": int(dev.start), "e": int(dev.end)},
    ).df()
    d = hba[hba["cause"] == "default"].reset_index(drop=True)
    np.testing.assert_array_equal(d["age"], ref["age"])
    np.testing.assert_array_equal(d["n"], ref["n"])
    np.testing.assert_array_equal(d["events"], ref["d"])
    # Reference: the likelihood equation of each cause's intercept -- at the maximum
    # likelihood estimate, the fitted hazards of the fit rows sum to the events.
    for cause in ("default", "prepay"):
        part = hba[hba["cause"] == cause]
        assert (part["n"] * part["model"]).sum() == pytest.approx(part["events"].sum(), rel=1e-6)
        assert model.events[cause] == part["events"].sum()


# --------------------------------------------------------------------------- what is left out, and why


def test_prior_model_gives_coefficient_changes(opened, book, tmp_path):
    cfg, panel, model, tmp = opened
    prior = model.save(tmp_path / "prior.json")
    with_prior = _config(book, tmp, validation={"prior_model": str(prior)})
    pack = validation_pack(with_prior, panel, model)
    changes = pack.tables["coefficient_changes"]
    assert list(changes.columns) == list(PACK_COLUMNS["coefficient_changes"])
    # Reference: a model compared with itself has not moved.
    np.testing.assert_allclose(changes["change"], 0.0, atol=0)
    assert (changes["present"] == "both").all()


def test_benchmark_curves_without_out_of_time_window_skip_with_notes(opened, book):
    _, panel, _, tmp = opened
    data_windows = {"development": {"start": "2016-01", "end": "2022-12"}}
    cfg = _config(book, tmp, windows=data_windows)
    pack = validation_pack(cfg, panel, BenchmarkCurves(psa=150.0, sda=100.0))
    assert not any(name.startswith("backtest") for name in pack.tables)
    assert "coefficient_changes" not in pack.tables
    notes = " ".join(pack.summary["notes"])
    assert "no out-of-time window" in notes and "not a fitted model" in notes
    # A curve of loan age alone still gets discrimination, calibration, incidence and
    # the in-sample curve; its stability covers loan age only.
    for name in ("discrimination", "calibration", "incidence_by_vintage", "hazard_by_age"):
        assert list(pack.tables[name].columns) == list(PACK_COLUMNS[name])
    assert pack.tables["stability"]["variable"].tolist() == ["age"]
    assert pack.summary["out_of_time"] is None
    assert parse_month(pack.summary["cohort_month"]) == int(cfg.windows.development.end)


def test_late_entrants_count_in_the_vintage_comparison_by_left_truncation(book, tmp_path):
    # A third of the loans are first seen at age 13 (their earlier rows cut from the panel): they enter the
    # vintage's risk set at age 13 instead of being left out. Reference: statsmodels SurvfuncRight with
    # entry (not at risk on or before the entry age); with two causes the all-cause survival is
    # 1 - F_default - F_prepay of the pack's observed curves.
    import shutil

    from statsmodels.duration.survfunc import SurvfuncRight

    late_book = tmp_path / "late_book"
    shutil.copytree(book, late_book)
    panel = pd.read_parquet(book / "panel.parquet")
    ids = np.sort(panel["loan_id"].unique())[:1500]
    panel = panel[panel["loan_id"].isin(ids)]
    late = panel["loan_id"].isin(ids[::3])
    panel = panel[~late | (panel["age"] >= 13)]
    panel.to_parquet(late_book / "panel.parquet", index=False)
    loans = pd.read_parquet(book / "loans.parquet")
    loans[loans["loan_id"].isin(panel["loan_id"].unique())].to_parquet(late_book / "loans.parquet", index=False)
    cfg = _config(late_book, tmp_path, validation={"bootstrap": 0})
    engine, _ = pipeline.open_checked(cfg)
    try:
        pack = validation_pack(cfg, engine, TrueHazard())
        outcomes = engine.con.execute(
            """
            SELECT l.origination_idx // 12 AS vintage, o.entry_age - 1 AS entry,
                   CASE WHEN o.event = 'censored' THEN o.last_age ELSE o.event_age END AS time,
                   CAST(o.event IN ('default', 'prepay') AS INTEGER) AS status
            FROM loan_outcomes AS o JOIN loans AS l USING (loan_id)
            """
        ).df()
    finally:
        engine.close()
    assert (outcomes["entry"] == 12).sum() > 100 and not any("left out" in n for n in pack.summary["notes"])
    inc = pack.tables["incidence_by_vintage"]
    for vintage, group in outcomes[outcomes["time"] > outcomes["entry"]].groupby("vintage"):
        ref = SurvfuncRight(group["time"].to_numpy(float), group["status"].to_numpy(float), entry=group["entry"].to_numpy(float))
        mine = inc[inc["vintage"] == vintage].pivot(index="age", columns="cause", values="observed")
        at = np.asarray(ref.surv_times, dtype=int)
        at = at[at <= mine.index.max()]
        np.testing.assert_allclose(
            1 - mine.loc[at, "default"] - mine.loc[at, "prepay"], ref.surv_prob[: len(at)], rtol=0, atol=1e-10
        )
        # the loans seen from origination are at risk at age 1; the late entrants join at 13
        n_risk = inc[(inc["vintage"] == vintage) & (inc["cause"] == "default")].set_index("age")["n_risk"]
        assert n_risk.loc[1] == int((group["entry"] == 0).sum())
        if 13 in n_risk.index and (group["entry"] == 12).any():
            assert n_risk.loc[13] > n_risk.loc[12]
