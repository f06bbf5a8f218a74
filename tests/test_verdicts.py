"""Validation verdicts: the rules at their thresholds, the areas, the config's levels, and a run's record and report.

The default levels are common practice (PSI 0.10 and 0.25 of credit scoring; the 5% and 1% test levels; AUC 0.70,
where Hosmer, Lemeshow & Sturdivant's Applied Logistic Regression starts calling discrimination acceptable, and
0.60) except the vintage curves' share of ages outside, our own documented rule (0.15 and 0.30). Each expected
verdict below follows from those levels and the closed side the rule states, written beside the check.
"""

import json
import math

import pandas as pd
import pytest
from test_report import parse

from creditsurv import validation as v
from creditsurv.config import config_from_dict
from creditsurv.errors import ConfigError, DataError
from creditsurv.report import render_report

# --------------------------------------------------------------------------- the rules at their thresholds

EPS = 1e-9


@pytest.mark.parametrize(
    "value, expected",
    [
        # PSI: at or above 0.10 is watch, at or above 0.25 fail (common practice)
        (0.10 - EPS, "pass"), (0.10, "watch"), (0.10 + EPS, "watch"),
        (0.25 - EPS, "watch"), (0.25, "fail"), (0.25 + EPS, "fail"),
        (0.0, "pass"), (12.47, "fail"),
    ],
)  # fmt: skip
def test_psi_verdict_flips_at_the_common_practice_levels(value, expected):
    assert v.psi_verdict(value) == expected
    assert v.psi_verdict(value, "current_ltv") == expected  # a loan-level input is judged the same


@pytest.mark.parametrize(
    "p, expected",
    [
        # a p-value at or below 0.05 is watch, at or below 0.01 fail (the usual test levels, common practice)
        (0.05 + EPS, "pass"), (0.05, "watch"), (0.05 - EPS, "watch"),
        (0.01 + EPS, "watch"), (0.01, "fail"), (0.01 - EPS, "fail"),
        (1.0, "pass"), (0.0, "fail"),
    ],
)  # fmt: skip
def test_p_value_verdict_flips_at_five_and_one_percent(p, expected):
    assert v.p_value_verdict(p) == expected


@pytest.mark.parametrize(
    "auc, expected",
    [
        # AUC below 0.70 is watch, below 0.60 fail; at 0.70 it passes (acceptable from 0.70: Hosmer, Lemeshow &
        # Sturdivant; 0.60 common practice)
        (0.70 + EPS, "pass"), (0.70, "pass"), (0.70 - EPS, "watch"),
        (0.60 + EPS, "watch"), (0.60, "watch"), (0.60 - EPS, "fail"),
        (0.5, "fail"), (0.95, "pass"),
    ],
)  # fmt: skip
def test_auc_verdict_flips_below_the_common_practice_levels(auc, expected):
    assert v.auc_verdict(auc) == expected


@pytest.mark.parametrize(
    "share, expected",
    # our own rule: a share of ages outside at or above 0.15 is watch, at or above 0.30 fail
    [(0.15 - EPS, "pass"), (0.15, "watch"), (0.30 - EPS, "watch"), (0.30, "fail"), (0.05, "pass")],
)
def test_share_outside_verdict_flips_at_its_documented_levels(share, expected):
    assert v.share_outside_verdict(share) == expected


def test_levels_given_replace_the_defaults_and_a_missing_number_is_refused():
    assert v.psi_verdict(0.15, watch=0.2, fail=0.3) == "pass"
    assert v.p_value_verdict(0.04, watch=0.01, fail=0.001) == "pass"
    assert v.auc_verdict(0.72, watch=0.75, fail=0.65) == "watch"
    with pytest.raises(DataError, match="PSI is missing"):
        v.psi_verdict(float("nan"))


# --------------------------------------------------------------------------- inputs that move with the calendar


@pytest.mark.parametrize("variable", ["macro:unemployment_rate:1", "age", "log_age"])
def test_calendar_inputs_are_expected_drift_whatever_their_psi(variable):
    # A macro series, or the age of a book one window older, differs between windows by construction.
    for value in (0.0, 0.12, 12.47):
        assert v.psi_verdict(value, variable) == v.EXPECTED_DRIFT == "expected drift"
    assert not v.moves_with_calendar("current_ltv") and not v.moves_with_calendar("panel:refreshed_score:1")


def test_expected_drift_is_left_out_of_the_stability_verdict():
    stability = pd.DataFrame({"variable": ["macro:unemployment_rate:1", "age", "dti", "pd_12m"],
                              "psi": [12.47, 1.43, 0.02, 0.05]})  # fmt: skip
    table = v.verdict_table({}, {"stability": stability})
    by_item = table.set_index("item")["verdict"]
    assert by_item["macro:unemployment_rate:1"] == by_item["age"] == "expected drift"
    # the judged inputs are below 0.10: pass; the two far larger PSIs of the calendar inputs do not count
    assert v.area_verdicts(table) == {"stability": "pass"}
    only_calendar = v.verdict_table({}, {"stability": stability.iloc[:2]})
    assert v.area_verdicts(only_calendar) == {"stability": "expected drift"}
    drift = table.set_index("item").loc["macro:unemployment_rate:1", "sentence"]
    assert "PSI 12.4700" in drift and "not judged" in drift


# --------------------------------------------------------------------------- the overall verdict of an area


def test_an_area_reads_its_worst_item():
    assert v.worst_verdict(["pass", "watch", "pass"]) == "watch"
    assert v.worst_verdict(["watch", "fail", "pass", "expected drift"]) == "fail"
    assert v.worst_verdict(["pass", "expected drift"]) == "pass"
    assert v.worst_verdict(["expected drift"]) == "expected drift"
    with pytest.raises(DataError, match="not verdicts"):
        v.worst_verdict(["pass", "shift"])
    with pytest.raises(DataError, match="at least one"):
        v.worst_verdict([])
    # PSI 0.12 is watch, 0.30 fail, 0.01 pass: the stability area is fail; calibration p 0.03 is watch alone
    summary = {"calibration": {"hl_p_value": 0.03, "hl_statistic": 14.0, "hl_df": 6, "groups": 6, "expected": 50.0,
                               "actual": 63, "grouping": "pd quantile groups"}}  # fmt: skip
    stability = pd.DataFrame({"variable": ["dti", "current_ltv", "credit_score"], "psi": [0.12, 0.30, 0.01]})
    table = v.verdict_table(summary, {"stability": stability})
    assert v.area_verdicts(table) == {"calibration": "watch", "stability": "fail"}
    assert list(table.columns) == list(v.VERDICT_COLUMNS)


# --------------------------------------------------------------------------- the backtest reads the one-factor z


def _backtest_summary(actual, expected, z, z_factor):
    return {"out_of_time": {"start": "2023-01", "end": "2024-06"},
            "backtest": {"prepay": {"actual": actual, "expected": expected, "z_total": z, "z_total_factor": z_factor}}}  # fmt: skip


def test_the_backtest_verdict_uses_the_one_factor_z():
    # Under independence z 3.43 has a two-sided p of erfc(3.43 / sqrt 2) = 0.0006: fail at the 1% level. With the
    # loan-months of a month sharing one economic factor the z is 1.10, p = erfc(1.10 / sqrt 2) = 0.27: pass.
    assert v.p_value_verdict(math.erfc(3.43 / math.sqrt(2))) == "fail"
    row = v.verdict_table(_backtest_summary(762, 673.4, 3.43, 1.10), {}).iloc[0]
    assert (row["area"], row["statistic"], row["verdict"]) == ("backtest_prepay", "p-value of the one-factor z", "pass")
    # Reference: the normal's two-sided tail in closed form, erfc(|z| / sqrt 2)
    assert row["value"] == pytest.approx(math.erfc(1.10 / math.sqrt(2)), rel=1e-12)
    assert v.two_sided_p_value(-1.10) == pytest.approx(math.erfc(1.10 / math.sqrt(2)), rel=1e-12)
    # what was seen: both z, the counts and the verdict in words
    for text in ("762 actual against 673.4 expected", "z 3.43", "one-factor z 1.10", ": pass"):
        assert text in row["sentence"], text
    # a one-factor z of 2.80 (p = erfc(2.80 / sqrt 2) = 0.005) fails
    assert v.verdict_table(_backtest_summary(800, 673.4, 4.9, 2.80), {})["verdict"].item() == "fail"


def test_each_move_between_arrears_states_reads_its_one_factor_z():
    moves = pd.DataFrame({
        "origin": ["current", "current", "30-59", "30-59"],
        "destination": ["current", "30-59", "current", "default"],
        "n": [10_000, 10_000, 400, 400], "expected": [9_800.0, 200.0, 150.0, 0.0], "actual": [9_757, 243, 160, 3],
        "z": [-3.1, 3.1, 1.0, float("nan")], "z_factor": [-1.2, 1.2, 0.4, float("nan")],
    })  # fmt: skip
    table = v.verdict_table({}, {"backtest_transitions": moves}).set_index("item")
    # staying is the rest of the state's months: no row of its own
    assert list(table.index) == ["current to 30-59", "30-59 to current", "30-59 to default"]
    # |z| 3.1 fails under independence (p 0.002); its one-factor z 1.2 (p 0.23) passes
    assert table.loc["current to 30-59", "verdict"] == "pass"
    # a move the model gives probability 0 (no variance) that happened: fail; one that did not: pass
    assert table.loc["30-59 to default", "verdict"] == "fail"
    quiet = moves.assign(actual=[9_757, 243, 160, 0])
    assert v.verdict_table({}, {"backtest_transitions": quiet}).set_index("item").loc["30-59 to default", "verdict"] == "pass"
    assert v.area_verdicts(table.reset_index()) == {"backtest_transitions": "fail"}


# --------------------------------------------------------------------------- the config's levels


def _config(thresholds: dict):
    data = {
        "as_of": "2021-01",
        "inputs": {"panel": {"path": "panel.parquet"}, "loans": {"path": "loans.parquet"}},
        "windows": {"development": {"start": "2020-01", "end": "2020-12"}},
        "validation": {"thresholds": thresholds},
    }
    return config_from_dict(data, base_dir=".")


def test_the_config_defaults_are_the_rules_defaults():
    levels = _config({}).validation.thresholds
    assert {k: getattr(levels, k) for k in v.THRESHOLDS} == v.THRESHOLDS
    # common practice: PSI 0.10 / 0.25, p 0.05 / 0.01, AUC 0.70 / 0.60
    assert (levels.psi_watch, levels.psi_fail, levels.p_value_watch, levels.p_value_fail) == (0.10, 0.25, 0.05, 0.01)
    assert (levels.auc_watch, levels.auc_fail) == (0.70, 0.60)


@pytest.mark.parametrize(
    "thresholds, key",
    [
        ({"psi_watch": 0.25, "psi_fail": 0.10}, "psi_fail"),
        ({"p_value_watch": 0.01, "p_value_fail": 0.05}, "p_value_fail"),
        ({"auc_watch": 0.60, "auc_fail": 0.70}, "auc_fail"),
        ({"ages_outside_watch": 0.5, "ages_outside_fail": 0.2}, "ages_outside_fail"),
    ],
)
def test_watch_and_fail_in_the_wrong_order_is_a_config_error_naming_the_key(thresholds, key):
    with pytest.raises(ConfigError, match=rf"validation\.thresholds\.{key}: .* so fail must be at or (above|below) watch"):
        _config(thresholds)


def test_equal_levels_are_allowed_and_a_level_out_of_range_is_refused():
    assert _config({"psi_watch": 0.2, "psi_fail": 0.2}).validation.thresholds.psi_fail == 0.2
    with pytest.raises(ConfigError, match=r"validation\.thresholds\.p_value_watch: 1.5 is above the maximum 1"):
        _config({"p_value_watch": 1.5})
    with pytest.raises(ConfigError, match=r"validation\.thresholds\.psi_warn: unknown key .*did you mean"):
        _config({"psi_warn": 0.1})


# --------------------------------------------------------------------------- the report


def test_the_report_summary_prints_each_areas_verdict_and_what_was_seen():
    summary = _backtest_summary(762, 673.4, 3.43, 2.9)  # one-factor p = erfc(2.9 / sqrt 2) = 0.004: fail
    stability = pd.DataFrame({"variable": ["macro:unemployment_rate:1", "dti"], "psi": [12.47, 0.13]})
    verdicts = v.verdict_table(summary, {"stability": stability})
    html = render_report({"verdicts": verdicts, "stability": stability.assign(verdict=["expected drift", "watch"])}, {})
    doc = parse(html)
    text = doc.text("summary")
    # the words are printed, not carried by colour alone: a marked row still reads fail or watch
    assert '<tr class="flag"><td>Backtest, prepayment</td><td>fail</td>' in html
    assert '<tr class="flag"><td>Stability</td><td>watch</td>' in html
    assert "Prepayment backtest, out of time, 2023-01 to 2024-06: 762 actual against 673.4 expected" in text
    assert "Stability of dti: PSI 0.1300" in text and "watch (PSI below 0.10 passes, at or above 0.10 is watch" in text
    assert "Not judged, expected drift" in text and "macro:unemployment_rate:1 (PSI 12.4700)" in text
    validation = doc.text("validation")
    assert "Stability: verdict watch." in validation and "Backtest, prepayment: verdict fail." in validation


# --------------------------------------------------------------------------- a finished run: record and report


def test_a_runs_manifest_table_and_report_carry_the_verdicts(corpus_book):
    run = corpus_book.earlier_run
    record = json.loads((run / "manifest.json").read_text())["validation"]["verdicts"]
    table = pd.read_csv(run / "validation" / "verdicts.csv")
    assert list(table.columns) == list(v.VERDICT_COLUMNS)
    words = {"pass", "watch", "fail", "expected drift"}
    assert set(table["verdict"]) <= words and set(record["areas"].values()) <= words
    # the competing-risk run judges these areas; each is the worst of its items (fail over watch over pass,
    # expected drift left out), recomputed here from the table
    assert set(record["areas"]) == {"discrimination", "calibration", "backtest_default", "backtest_prepay",
                                    "stability", "vintage_curves"}  # fmt: skip
    rank = {"pass": 0, "watch": 1, "fail": 2}
    for area, rows in table.groupby("area"):
        judged = [w for w in rows["verdict"] if w != "expected drift"]
        assert record["areas"][area] == max(judged, key=rank.get), area
    assert record["thresholds"] == v.THRESHOLDS
    assert [item["sentence"] for item in record["items"]] == table["sentence"].tolist()
    # the macro series of the demo model moves with the calendar
    assert table.set_index("item").loc["macro:unemployment_rate:1", "verdict"] == "expected drift"
    # each verdict follows from its value and the rule
    for r in table.itertuples():
        if r.statistic == "PSI" and r.verdict != "expected drift":
            assert r.verdict == v.psi_verdict(r.value, watch=r.watch_threshold, fail=r.fail_threshold)
        if r.statistic.endswith("p-value") or r.statistic.startswith("p-value"):
            assert r.verdict == v.p_value_verdict(r.value, watch=r.watch_threshold, fail=r.fail_threshold)
    html = (run / "report.html").read_text(encoding="utf-8")
    summary = parse(html).text("summary")
    assert "Validation verdicts" in summary
    for area, verdict in record["areas"].items():
        assert f"<td>{v.AREAS[area]}</td><td>{verdict}</td>" in html, area
    for r in table[table["verdict"].isin(["watch", "fail"])].itertuples():
        assert r.sentence in summary
