"""The CECL basis (``accounting: cecl``): lifetime expected credit loss for every loan, no stages.

ASC 326 paragraphs the checks rely on, cited from memory (verify against the Codification before relying on
them): 326-20-30-2 (expected credit losses measured on a pool basis where assets share risk characteristics:
our allowance is per loan, and a pool's is the sum of its loans'); 326-20-30-6 (the contractual term,
adjusted for expected prepayments: each loan's schedule runs to its contractual maturity, shortened by the
prepayment hazard); 326-20-30-9 (reasonable and supportable forecasts, then reversion to historical loss
information: the scenario paths over the forecast period, then a straight-line reversion of the macro inputs
to their long-run values); 326-20-30-4 (a discounted cash flow method discounts at the effective interest
rate; other methods do not discount).

Expected values come from outside the code under test: hand sums over the ECL schedule (marginal PD x LGD x
EAD x discount factor) written here, a month-by-month loop with numpy-financial balances, straight lines
computed here from the scenario files and the macro history, and numpy-financial's present value for the
discount factors.

Whole runs: one CECL run of the small book (the IFRS 9 run beside it is the corpus workspace's own earlier
run) and one reproduction of it.
"""

from __future__ import annotations

import json

import numpy as np
import numpy_financial as npf
import pandas as pd
import pyarrow.parquet as pq
import pytest
import yaml
from conftest import demo_config_data

import creditsurv
from creditsurv import pipeline
from creditsurv.config import (
    Cecl,
    Lgd,
    Loss,
    ScenarioExtension,
    config_from_dict,
    discount_method,
)
from creditsurv.errors import ConfigError, DataError, ProjectionError, RunError
from creditsurv.forecast import extend_paths
from creditsurv.loss import discount_factors, expected_credit_loss
from creditsurv.model import HazardTable
from creditsurv.months import format_month, parse_month
from creditsurv.runs import MANIFEST, accounting_basis, read_manifest

FORECAST, REVERSION = 24, 12
AS_OF = parse_month("2024-12")


def _cecl(data: dict, forecast: int = FORECAST, reversion: int = REVERSION) -> dict:
    """The config dict on the CECL basis, with the basis's default discounting (none)."""
    data["accounting"] = "cecl"
    data["cecl"] = {"forecast_months": forecast, "reversion_months": reversion}
    data["loss"].pop("discount", None)
    return data


@pytest.fixture(scope="module")
def workspace(corpus_book, tmp_path_factory):
    """A copy of the small book's workspace: its earlier run is the IFRS 9 run of the same book and config."""
    return corpus_book.copy_to(tmp_path_factory.mktemp("cecl") / "ws")


@pytest.fixture(scope="module")
def ifrs9_run(workspace):
    return workspace.earlier_run


@pytest.fixture(scope="module")
def cecl_run(workspace):
    """The same book and config as the IFRS 9 run, on the CECL basis (24 months' forecast, 12 of reversion)."""
    config = workspace.root / "cecl.yaml"
    data = _cecl(json.loads(json.dumps(workspace.data)))
    data["outputs"]["dir"] = "cecl_reports"  # reports/ holds the IFRS 9 run alone
    config.write_text(yaml.safe_dump(data, sort_keys=False))
    return creditsurv.run(config, argv=["creditsurv", "run", "cecl.yaml"]).path


def _weights(run) -> dict[str, float]:
    return {s["name"]: s["weight"] for s in read_manifest(run)["config_resolved"]["scenarios"]}


# --------------------------------------------------------------------------- the allowance


def test_every_loans_allowance_is_its_weighted_lifetime_ecl_summed_over_its_schedule(cecl_run, tmp_path):
    table = pd.read_parquet(cecl_run / "loan_ecl.parquet")
    live = table[table["arrears_state"] != "default"]
    # loans of every arrears state and segment, the longest and shortest remaining terms among them
    chosen = pd.concat([
        live.groupby("arrears_state").head(2), live.groupby("segment").head(1),
        live.nlargest(1, "remaining_term"), live.nsmallest(1, "remaining_term"),
    ])["loan_id"].drop_duplicates()  # fmt: skip
    export = creditsurv.export(cecl_run, tmp_path, by=(), loans=list(chosen), fmt="parquet").path
    schedule = pd.read_parquet(export / "ecl_schedule.parquet")
    weights = _weights(cecl_run)
    rows = table.set_index("loan_id").loc[list(chosen)]
    for loan_id, loan in rows.iterrows():
        own = schedule[schedule["loan_id"] == loan_id]
        lifetime = {}
        for s in weights:
            sc = own[own["scenario"].astype(str) == s].sort_values("month_ahead")
            # the loan's life: month 1 to its contractual maturity, no month beyond (326-20-30-6)
            assert sc["month_ahead"].tolist() == list(range(1, int(loan["remaining_term"]) + 1))
            lifetime[s] = float((sc["marginal_pd"] * sc["lgd"] * sc["ead"] * sc["discount_factor"]).sum())
            assert loan[f"ecl_lifetime_{s}"] == pytest.approx(lifetime[s], rel=1e-9)
        allowance = sum(w * lifetime[s] for s, w in weights.items())
        assert loan["allowance"] == pytest.approx(allowance, rel=1e-9), loan_id
        assert loan["ecl_reported"] == loan["allowance"] == loan["ecl_lifetime"]
    # the basis's default: not discounted (326-20-30-4 applies to a discounted cash flow method only)
    assert (schedule["discount_factor"] == 1.0).all()


def test_a_loan_in_default_carries_its_lgd_times_its_exposure(cecl_run):
    table = pd.read_parquet(cecl_run / "loan_ecl.parquet")
    defaulted = table[table["arrears_state"] == "default"]
    assert len(defaulted) > 0
    # lgd is the probability-weighted LGD of a default now: sum_s w_s LGD_s x EAD = lgd x EAD
    np.testing.assert_allclose(defaulted["allowance"], defaulted["lgd"] * defaulted["ead"], rtol=1e-12)


def test_no_stage_and_nothing_that_only_serves_staging(cecl_run):
    table = pd.read_parquet(cecl_run / "loan_ecl.parquet")
    for col in ("stage", "stage_reason", "months_since_sicr", "pd_lifetime_origination", "pd_lifetime_staging"):
        assert table[col].isna().all(), col
    np.testing.assert_array_equal(table["ecl_reported"], table["allowance"])
    np.testing.assert_array_equal(table["ecl_lifetime"], table["allowance"])
    assert not (cecl_run / "sicr_sensitivity.csv").exists()
    summary = pd.read_csv(cecl_run / "segment_summary.csv")
    assert summary["stage"].isna().all() and summary["segment"].is_unique
    assert summary["ecl"].sum() == pytest.approx(table["allowance"].sum(), rel=1e-12)
    tail = pd.read_csv(cecl_run / "age_tail_sensitivity.csv")
    assert tail["stage_2_loans"].isna().all()


def test_allowance_of_a_small_book_against_a_month_by_month_loop():
    # Constant hazards, constant LGD: ECL = sum_u S(u-1) hD LGD EAD(u) DF(u) to maturity, for every loan (no
    # 12-month horizon on the CECL basis), EAD(u) the balance after the last paid instalment (3 missed) with
    # their interest; a loan in default carries LGD x its EAD now.
    hd, hp, lgd = 0.01, 0.02, 0.3
    source = HazardTable(pd.DataFrame({"age": np.arange(1, 61), "default": hd, "prepay": hp}))
    idx = np.arange(parse_month("2015-01"), AS_OF + 121)
    macro = pd.DataFrame({"mortgage_rate": np.full(len(idx), 5.0)}, index=pd.Index(idx, name="month_idx"))
    book = pd.DataFrame({
        "loan_id": ["A", "B", "D"], "segment": ["prime"] * 3, "age": [4, 10, 30], "term": [24, 30, 60],
        "note_rate": [0.06, 0.09, 0.05], "balance": [10_000.0, 4_000.0, 7_000.0],
        "original_balance": [12_000.0, 6_000.0, 9_000.0], "origination_idx": [AS_OF - 4, AS_OF - 10, AS_OF - 30],
        "days_past_due": [0, 30, 120], "in_default": [False, False, True],
    })  # fmt: skip

    def by_hand(balance, rate, remaining, discount):
        r = rate / 12
        payment = -npf.pmt(r, remaining, balance)
        after = [balance]
        for _ in range(remaining):
            after.append(after[-1] * (1 + r) - payment)
        survival, total = 1.0, 0.0
        for u in range(1, remaining + 1):
            ead = after[max(u - 3, 0)] * (1 + r) ** 3
            total += survival * hd * lgd * ead * ((1 + r) ** -u if discount else 1.0)
            survival *= 1 - hd - hp
        return total

    for discount in (None, "effective_interest_rate"):
        schedules = []
        res = expected_credit_loss(
            book, source, {"base": macro}, as_of_idx=AS_OF, accounting="cecl", schedule_writer=schedules.append,
            loss=Loss(lgd=Lgd(kind="constant", constant=lgd, floor=0.0), discount=discount),
        ).loans.set_index("loan_id")
        eir = discount is not None
        assert res.loc["A", "allowance"] == pytest.approx(by_hand(10_000.0, 0.06, 20, eir), rel=1e-10)
        assert res.loc["B", "allowance"] == pytest.approx(by_hand(4_000.0, 0.09, 20, eir), rel=1e-10)
        assert res.loc["D", "allowance"] == pytest.approx(lgd * 7_000.0 * (1 + 0.05 / 12) ** 3, rel=1e-12)
        assert res["stage"].isna().all()
        frame = pd.concat([t.to_pandas() for t in schedules])
        rate = frame["loan_id"].map({"A": 0.06, "B": 0.09})
        expected = npf.pv(rate / 12, frame["month_ahead"], 0, -1) if eir else np.ones(len(frame))
        np.testing.assert_allclose(frame["discount_factor"], expected, rtol=1e-12)


# --------------------------------------------------------------------------- discounting


def test_discount_factors_are_one_without_discounting_and_the_eir_present_value_with_it():
    rate = np.array([0.001, 0.045, 0.12])[:, None]
    months = np.arange(1, 361)[None, :]
    np.testing.assert_array_equal(discount_factors(rate, months, "none"), np.ones((3, 360)))
    # numpy-financial: the present value of 1 due in u months at r/12 a month is (1 + r/12)^-u
    np.testing.assert_allclose(
        discount_factors(rate, months, "effective_interest_rate"), npf.pv(rate / 12, months, 0, -1), rtol=1e-12
    )
    np.testing.assert_array_equal(discount_factors(0.0, months, "effective_interest_rate"), np.ones((1, 360)))


def test_the_discounting_default_follows_the_basis(workspace):
    assert discount_method(None, "cecl") == "none"
    assert discount_method(None, "ifrs9") == "effective_interest_rate"
    assert discount_method("effective_interest_rate", "cecl") == "effective_interest_rate"
    data = json.loads(json.dumps(workspace.data))
    data["loss"].pop("discount", None)
    assert config_from_dict(data, workspace.root).loss.discount == "effective_interest_rate"
    cecl = config_from_dict(_cecl(data), workspace.root)
    assert cecl.loss.discount == "none"
    data["loss"]["discount"] = "effective_interest_rate"  # a discounted cash flow method
    assert config_from_dict(data, workspace.root).loss.discount == "effective_interest_rate"


# --------------------------------------------------------------------------- forecast and reversion


def test_after_the_forecast_period_the_inputs_move_linearly_to_the_long_run_and_hold_it():
    history = pd.DataFrame(
        {"unemployment_rate": np.linspace(4.0, 6.0, 36), "hpi_north": np.linspace(100.0, 140.0, 36)},
        index=pd.Index(np.arange(AS_OF - 35, AS_OF + 1)),
    )
    ahead = np.arange(AS_OF + 1, AS_OF + 61)
    path = pd.DataFrame(
        {"unemployment_rate": 7.0 + 0.05 * np.arange(60), "hpi_north": 150.0 + np.arange(60)}, index=pd.Index(ahead)
    )
    forecast, reversion = 18, 9
    mean = float(history["unemployment_rate"].mean())
    for long_run, reversion_months in (({}, reversion), ({"unemployment_rate": 5.5}, reversion), ({}, 0)):
        (out,) = extend_paths(
            {"base": path}, history, as_of_idx=AS_OF, until_idx=AS_OF + 80, extension=ScenarioExtension(long_run=long_run),
            cecl=Cecl(forecast_months=forecast, reversion_months=reversion_months),
        ).values()  # fmt: skip
        target = long_run.get("unemployment_rate", mean)
        end = path["unemployment_rate"].loc[AS_OF + forecast]
        u = out["unemployment_rate"]
        # the forecast period: the scenario itself
        np.testing.assert_array_equal(u.loc[AS_OF + 1: AS_OF + forecast], path["unemployment_rate"].iloc[:forecast])
        for k in range(1, 81 - forecast):
            month = AS_OF + forecast + k
            share = min(k, reversion_months) / reversion_months if reversion_months else 1.0
            # a straight line from the value at the end of the forecast period, then the long-run value held
            assert u.loc[month] == pytest.approx(end + (target - end) * share, rel=1e-12), format_month(month)
        # a trending index (scenario_extension.hold_last_series) holds its value at the end of the forecast period
        hpi = out["hpi_north"].loc[AS_OF + forecast:]
        assert (hpi == path["hpi_north"].loc[AS_OF + forecast]).all()


def test_the_runs_own_paths_follow_the_scenarios_then_revert_month_by_month(cecl_run, workspace):
    history = pd.read_csv(workspace.book / "macro_history.csv")
    history = history[history["month"].map(parse_month) <= AS_OF]
    for k, scenario in enumerate(workspace.data["scenarios"]):
        given = pd.read_csv(workspace.root / scenario["path"])
        given.index = given["month"].map(parse_month)
        kept = pd.read_parquet(cecl_run / "projection_inputs" / f"scenario_path_{k + 1}.parquet").set_index("month_idx")
        for series in ("unemployment_rate", "mortgage_rate"):
            x = kept[series]
            months = np.arange(AS_OF + 1, AS_OF + FORECAST + 1)
            np.testing.assert_allclose(x.loc[months], given.loc[months, series], rtol=0, atol=0)
            end, target = given.loc[AS_OF + FORECAST, series], history[series].mean()
            for j in range(1, int(x.index.max()) - AS_OF - FORECAST + 1):
                expected = end + (target - end) * min(j, REVERSION) / REVERSION
                assert x.loc[AS_OF + FORECAST + j] == pytest.approx(expected, rel=1e-12), (scenario["name"], series, j)
        hpi = kept["hpi_north"].loc[AS_OF + FORECAST:]
        assert (hpi == given.loc[AS_OF + FORECAST, "hpi_north"]).all()


def test_a_scenario_path_shorter_than_the_forecast_period_is_refused_before_the_fit(corpus_book, tmp_path, monkeypatch):
    # the book's scenario paths run to 2029-12, 60 months: a 72-month forecast period needs 2030-12
    data = _cecl(demo_config_data(corpus_book.book, tmp_path / "reports"), forecast=72)
    config = tmp_path / "config.yaml"
    config.write_text(yaml.safe_dump(data, sort_keys=False))

    def boom(*args, **kwargs):
        raise AssertionError("the run reached the data checks or the fit")

    monkeypatch.setattr(pipeline, "hazard_source", boom)
    monkeypatch.setattr(pipeline, "check_and_label", boom)
    with pytest.raises(ProjectionError) as info:
        creditsurv.run(config)
    text = str(info.value)
    assert text.startswith("3 problems with the scenario paths")
    for name in ("baseline", "upside", "downside"):
        assert (
            f"scenario '{name}' ({corpus_book.book / 'scenarios' / name}.csv): the path ends at 2029-12, before the end "
            "of the reasonable and supportable forecast period: cecl.forecast_months 72 after the reporting month "
            "2024-12 needs the path to reach 2030-12"
        ) in text
    assert not (tmp_path / "reports").exists()


def test_the_cecl_section_is_required_on_the_cecl_basis_and_refused_on_ifrs9(workspace):
    data = json.loads(json.dumps(workspace.data))
    data["accounting"] = "cecl"
    with pytest.raises(ConfigError, match=r"cecl: accounting cecl needs the reasonable and supportable forecast period"):
        config_from_dict(data, workspace.root)
    data["accounting"] = "ifrs9"
    data["cecl"] = {"forecast_months": 24, "reversion_months": 12}
    with pytest.raises(ConfigError, match=r"cecl: given but accounting is ifrs9"):
        config_from_dict(data, workspace.root)


# --------------------------------------------------------------------------- the two bases side by side


def test_the_tables_of_both_bases_have_the_same_columns(cecl_run, ifrs9_run):
    for name in ("loan_ecl.parquet",):
        a, b = pq.read_schema(ifrs9_run / name), pq.read_schema(cecl_run / name)
        assert a.names == b.names and "allowance" in a.names
        assert [str(t) for t in a.types] == [str(t) for t in b.types]
    for name in ("segment_summary.csv", "age_tail_sensitivity.csv"):
        assert list(pd.read_csv(ifrs9_run / name).columns) == list(pd.read_csv(cecl_run / name).columns)
    ifrs9 = pd.read_parquet(ifrs9_run / "loan_ecl.parquet")
    np.testing.assert_array_equal(ifrs9["allowance"], ifrs9["ecl_reported"])
    assert set(ifrs9["stage"]) <= {1, 2, 3}
    cecl = pd.read_parquet(cecl_run / "loan_ecl.parquet")
    assert cecl["loan_id"].tolist() == ifrs9["loan_id"].tolist()


def test_the_record_states_the_basis_and_totals_the_allowance(cecl_run, ifrs9_run):
    manifest, earlier = read_manifest(cecl_run), read_manifest(ifrs9_run)
    assert accounting_basis(manifest) == "cecl" and accounting_basis(earlier) == "ifrs9"
    # a run recorded before the key existed is IFRS 9, the only basis there was
    assert accounting_basis({"config_resolved": {}}) == "ifrs9"
    resolved = manifest["config_resolved"]
    assert resolved["cecl"] == {"forecast_months": FORECAST, "reversion_months": REVERSION}
    assert resolved["loss"]["discount"] == "none"
    totals = manifest["totals"]
    table = pd.read_parquet(cecl_run / "loan_ecl.parquet")
    assert totals["by_stage"] == {} and totals["stage_reasons"] == {}
    assert totals["origination_view"] is None and totals["low_credit_risk"] is None
    assert totals["allowance"] == pytest.approx(table["allowance"].sum(), rel=1e-12)
    c = totals["cecl"]
    assert (c["forecast_end"], c["reversion_end"]) == ("2026-12", "2027-12")
    assert c["lifetime_loss_rate"] == pytest.approx(table["allowance"].sum() / table["balance"].sum(), rel=1e-12)


def test_the_report_speaks_cecl_on_cecl_and_ifrs9_on_ifrs9(cecl_run, ifrs9_run):
    cecl = (cecl_run / "report.html").read_text()
    for text in (
        "Allowance for credit losses", "Lifetime loss rate (allowance / amortised cost basis)", "CECL (ASC 326)",
        "reasonable and supportable forecast period of 24 months (to 2026-12)",
        "reversion period of 12 months (to 2027-12)", "Discounting: not discounted",
        "IFRS 9 staging does not apply on the CECL basis", "must be validated independently",
        "path over the reasonable and supportable forecast period (to 2026-12), faded: the reversion",
        "Accounting judgement and local supervisory rules prevail",
    ):
        assert text in cecl, text
    for text in ("Reported ECL by stage", "Stages 2 and 3 by reason", "relative SICR threshold", "SICR basis"):
        assert text not in cecl, text
    ifrs9 = (ifrs9_run / "report.html").read_text()
    assert "Reported ECL by stage" in ifrs9 and "Expected credit loss" in ifrs9
    assert "CECL" not in ifrs9 and "Allowance for credit losses" not in ifrs9


# --------------------------------------------------------------------------- compare, export, reproduce


def test_compare_refuses_an_ifrs9_run_against_a_cecl_run(cecl_run, ifrs9_run, tmp_path):
    for a, b, first, second in ((ifrs9_run, cecl_run, "IFRS 9", "CECL"), (cecl_run, ifrs9_run, "CECL", "IFRS 9")):
        with pytest.raises(RunError) as info:
            creditsurv.compare(a, b, out=tmp_path)
        text = str(info.value)
        assert text.startswith("cannot compare runs on different accounting bases")
        assert f"run A {a} is {first}" in text and f"run B {b} is {second}" in text
    assert not any(tmp_path.iterdir())
    # two runs of the one basis compare: the walk with no stages, no stage migration
    out = creditsurv.compare(cecl_run, cecl_run, out=tmp_path).path
    walk = pd.read_csv(out / "movement_walk.csv")
    assert walk["ecl_change"].iloc[1:-1].abs().max() == 0.0
    assert walk["ecl_balance"].iloc[-1] == pytest.approx(pd.read_parquet(cecl_run / "loan_ecl.parquet")["allowance"].sum())
    assert not (out / "stage_migration.csv").exists()


def test_a_cecl_run_refuses_an_ifrs9_prior_run_before_any_work(workspace, ifrs9_run, tmp_path, monkeypatch):
    data = _cecl(json.loads(json.dumps(workspace.data)))
    data["outputs"]["prior_run"] = str(ifrs9_run)
    data["outputs"]["dir"] = str(tmp_path / "reports")
    config = workspace.root / "cecl_after_ifrs9.yaml"
    config.write_text(yaml.safe_dump(data, sort_keys=False))
    monkeypatch.setattr(pipeline, "check_and_label", lambda *a, **k: pytest.fail("the run reached the data checks"))
    with pytest.raises(RunError, match=r"outputs\.prior_run: .* is on the IFRS 9 basis \(accounting: ifrs9\) and this run on CECL"):
        creditsurv.run(config)
    assert not (tmp_path / "reports").exists()


def test_export_works_on_a_cecl_run(cecl_run, tmp_path):
    table = pd.read_parquet(cecl_run / "loan_ecl.parquet")
    out = creditsurv.export(cecl_run, tmp_path, by=[(), ("arrears_state",)], fmt="parquet").path
    whole = pd.read_parquet(out / "pd_whole_book.parquet")
    # the loans the run projected: those not in default (no stage to tell them by)
    assert set(whole["n_loans"]) == {int((table["arrears_state"] != "default").sum())}
    by_state = pd.read_parquet(out / "pd_by_arrears_state.parquet")
    assert "default" not in set(by_state["arrears_state"])
    with pytest.raises(DataError, match=r"\['stage'\] are empty on the CECL basis"):
        creditsurv.export(cecl_run, tmp_path, by=[("stage",)])


def test_a_cecl_run_reproduces_byte_for_byte(cecl_run, tmp_path):
    outcome = creditsurv.reproduce(cecl_run, out=tmp_path)
    assert "outputs match byte for byte" in outcome.text
    assert read_manifest(outcome.path)["run_id"] == read_manifest(cecl_run)["run_id"]
    assert (outcome.path / MANIFEST).exists()
