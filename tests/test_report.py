"""The HTML run report: structure, self-containment, numbers, escaping, determinism."""

from __future__ import annotations

import base64
import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from creditsurv.errors import DataError
from creditsurv.report import (
    NOT_PRODUCED,
    SECTIONS,
    fmt_money,
    fmt_pct,
    render_report,
    write_report,
)

SECTION_IDS = [
    "summary",
    "cautions",
    "data-checks",
    "events",
    "model",
    "hazard-curves",
    "cumulative-incidence",
    "scenarios",
    "pd-term-structure",
    "ecl",
    "speeds",
    "validation",
    "movement",
    "run-record",
]
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


class Collector(HTMLParser):
    """Tags, ids, image sources, and the text inside each section, with a check that tags nest."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.ids, self.imgs, self.errors = [], [], [], []
        self.stack: list[str] = []
        self.section_text: dict[str, list[str]] = {}
        self._section: str | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        if "id" in a:
            self.ids.append(a["id"])
        if tag == "section":
            self._section = a.get("id")
            self.section_text[self._section] = []
        if tag == "img":
            self.imgs.append(a.get("src", ""))
        if tag not in VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
            return
        self.stack.pop()
        if tag == "section":
            self._section = None

    def handle_data(self, data):
        if self._section is not None:
            self.section_text[self._section].append(data)

    def text(self, section: str) -> str:
        return "".join(self.section_text[section])


def parse(doc: str) -> Collector:
    c = Collector()
    c.feed(doc)
    c.close()
    return c


@pytest.fixture(scope="module")
def tables():
    """Every table the report shows: three segments, two scenarios plus the weighted one."""
    rng = np.random.default_rng(7)
    segments = ["prime", "near_prime", "buy_to_let"]
    scenarios = ["base", "downside"]
    n = 30
    stage = np.array([1] * 20 + [2] * 7 + [3] * 3)
    ead = rng.uniform(50_000, 400_000, n).round(2)
    e12 = {s: ead * rng.uniform(0.001, 0.01, n) * (2 if s == "downside" else 1) for s in scenarios}
    elt = {s: e12[s] * rng.uniform(2, 6, n) for s in scenarios}
    w = {"base": 0.6, "downside": 0.4}
    loan_ecl = pd.DataFrame(
        {
            "loan_id": [f"L{i:03d}" for i in range(n)],
            "segment": [segments[i % 3] for i in range(n)],
            "stage": stage,
            "pd_12m": rng.uniform(0.002, 0.05, n),
            "pd_lifetime": rng.uniform(0.01, 0.2, n),
            "ead": ead,
            "lgd": 0.25,
            "ecl_12m": sum(w[s] * e12[s] for s in scenarios),
            "ecl_lifetime": sum(w[s] * elt[s] for s in scenarios),
        }
    )
    loan_ecl["ecl_reported"] = np.where(stage == 1, loan_ecl["ecl_12m"], loan_ecl["ecl_lifetime"])
    for s in scenarios:
        loan_ecl[f"ecl_12m_{s}"] = e12[s]
        loan_ecl[f"ecl_lifetime_{s}"] = elt[s]

    ages = np.arange(1, 37)
    hazard_by_age = pd.concat(
        [
            pd.DataFrame(
                {"age": ages, "cause": c, "observed": base * (1 + rng.normal(0, 0.2, ages.size)), "model": base}
            )
            for c, base in (("default", 0.002 * np.ones(ages.size)), ("prepay", 0.01 + 0.0005 * ages))
        ],
        ignore_index=True,
    )
    rows = []
    for v in ["2019-01", "2019-07", "2020-01"]:
        for c, h in (("default", 0.002), ("prepay", 0.012)):
            model = 1 - (1 - h) ** ages
            obs = model * (1 + rng.normal(0, 0.05, ages.size))
            rows.append(
                pd.DataFrame(
                    {
                        "vintage": v,
                        "age": ages,
                        "cause": c,
                        "model": model,
                        "observed": obs,
                        "observed_lo": obs * 0.8,
                        "observed_hi": obs * 1.2,
                    }
                )
            )
    incidence_by_vintage = pd.concat(rows, ignore_index=True)

    rows = []
    for weighting in ("count", "balance"):
        for seg_i, seg in enumerate(segments):
            for scen, mult in (("base", 1.0), ("downside", 1.8), ("weighted", 1.32)):
                years = np.arange(1, 11)
                cum = 1 - (1 - 0.01 * (seg_i + 1) * mult) ** years
                rows.append(
                    pd.DataFrame(
                        {
                            "segment": seg,
                            "scenario": scen,
                            "year": years,
                            "cumulative_pd": cum,
                            "conditional_pd": 0.01 * (seg_i + 1) * mult,
                            "survival": 1 - cum,
                            "weighting": weighting,
                        }
                    )
                )
    segment_pd_table = pd.concat(rows, ignore_index=True)

    segment_summary = (
        loan_ecl.groupby(["segment", "stage"], sort=True)
        .agg(loans=("loan_id", "size"), balance=("ead", "sum"), ecl=("ecl_reported", "sum"))
        .reset_index()
    )
    segment_summary["coverage"] = segment_summary["ecl"] / segment_summary["balance"]

    segment_speeds = pd.concat(
        [
            pd.DataFrame(
                {
                    "segment": seg,
                    "age": ages,
                    "smm": 0.01 * (i + 1),
                    "cpr": 1 - (1 - 0.01 * (i + 1)) ** 12,
                    "mdr": 0.001,
                    "cdr": 1 - 0.999**12,
                }
            )
            for i, seg in enumerate(segments)
        ],
        ignore_index=True,
    )
    months = [f"2021-{m:02d}" for m in range(1, 13)]
    backtest = pd.concat(
        [
            pd.DataFrame(
                {
                    "month": months,
                    "cause": c,
                    "n": 1000,
                    "expected": r * 1000,
                    "actual": np.full(12, int(r * 1000)),
                    "predicted_rate": r,
                    "observed_rate": np.full(12, int(r * 1000)) / 1000,
                    "observed_lo": r * 0.6,
                    "observed_hi": r * 1.5,
                    "outside": [False] * 11 + [True],
                    "z": 0.3,
                }
            )
            for c, r in (("default", 0.004), ("prepay", 0.015))
        ],
        ignore_index=True,
    )
    return {
        "loan_ecl": loan_ecl,
        "data_checks": pd.DataFrame(
            {
                "check": ["duplicate_loan_month", "negative_balance", "age_gap", "unknown_status"],
                "severity": ["error", "error", "warning", "off"],
                "count": [0, 0, 1234, 0],
                "description": [
                    "one row per loan and month",
                    "balance is never negative",
                    "ages run without gaps",
                    "status codes are known",
                ],
            }
        ),
        "event_counts": pd.DataFrame(
            {
                "event": ["default", "prepay", "censored", "censored"],
                "censor_reason": [None, None, "end_of_window", "maturity"],
                "loans": [87, 2310, 5402, 121],
            }
        ),
        "coefficients": pd.DataFrame(
            {
                "cause": ["default"] * 2 + ["prepay"] * 2,
                "term": ["intercept", "ltv"] * 2,
                "estimate": [-6.1, 1.9, -4.2, -0.3],
                "std_error": [0.2, 0.3, 0.05, 0.04],
                "z": [-30.5, 6.3, -84.0, -7.5],
                "p_value": [0.0, 3e-10, 0.0, 6e-14],
                "ci_lo": [-6.5, 1.3, -4.3, -0.38],
                "ci_hi": [-5.7, 2.5, -4.1, -0.22],
            }
        ),
        "hazard_by_age": hazard_by_age,
        "incidence_by_vintage": incidence_by_vintage,
        "segment_pd_table": segment_pd_table,
        "segment_summary": segment_summary,
        "segment_speeds": segment_speeds,
        "equivalent_speeds": pd.DataFrame(
            {"segment": segments, "psa": [95.0, 160.0, 210.0], "sda": [80.0, 120.0, 45.0]}
        ),
        "backtest": backtest,
        "discrimination": pd.DataFrame(
            {
                "n": [5000],
                "defaults": [61],
                "auc": [0.78123],
                "auc_lo": [0.74],
                "auc_hi": [0.82],
                "gini": [0.56246],
                "ks": [0.4412],
            }
        ),
        "calibration": pd.DataFrame(
            {
                "group": range(1, 6),
                "n": 1000,
                "pd_mean": [0.002, 0.005, 0.01, 0.02, 0.05],
                "expected": [2.0, 5.0, 10.0, 20.0, 50.0],
                "actual": [1, 6, 9, 23, 47],
                "observed_rate": [0.001, 0.006, 0.009, 0.023, 0.047],
                "observed_lo": [0.0002, 0.003, 0.005, 0.015, 0.035],
                "observed_hi": [0.005, 0.012, 0.016, 0.033, 0.061],
                "p_value": [0.4, 0.6, 0.8, 0.5, 0.7],
            }
        ),
        "stability": pd.DataFrame({"variable": ["ltv", "score"], "psi": [0.031, 0.14], "verdict": ["pass", "watch"]}),
        "coefficient_changes": pd.DataFrame(
            {"cause": ["default"], "term": ["ltv"], "previous": [1.8], "current": [1.9]}
        ),
        "movement_walk": pd.DataFrame(
            {
                "step": ["opening", "new_loans", "risk_parameters", "closing"],
                "loans": [30, 2, 28, 32],
                "ecl_change": [np.nan, 1500.0, -300.5, np.nan],
                "ecl_balance": [10_000.0, 11_500.0, 11_199.5, 11_199.5],
            }
        ),
        "scenario_paths": _scenario_paths(),
        "stage_migration": pd.DataFrame(
            {
                "stage_from": ["1", "1", "2", "new"],
                "stage_to": ["1", "2", "2", "1"],
                "loans": [18, 2, 7, 2],
                "ead": [1.0, 2.0, 3.0, 4.0],
            }
        ),
    }


@pytest.fixture(scope="module")
def meta():
    return {
        "run_id": "2021-12_abc123def0",
        "reporting_month": "2021-12",
        "config_name": "demo.yaml",
        "created": "2022-01-05T09:00:00+00:00",
        "version": "0.1.0",
        "synthetic": True,
        "model": {
            "kind": "multinomial",
            "loglik": -12345.678,
            "aic": 24711.4,
            "bic": 24800.1,
            "n_rows": 250_000,
            "events": {"default": 87, "prepay": 2310},
            "iterations": 7,
            "converged": True,
        },
        "calibration": {"hl_statistic": 3.21, "hl_df": 3, "hl_p_value": 0.36},
        "scenario_weights": {"base": 0.6, "downside": 0.4},
        "inputs": [
            {"input": "panel", "path": "data/panel.parquet", "rows": 250_000, "bytes": 1024, "sha256": "ab" * 32}
        ],
        "versions": {"creditsurv": "0.1.0", "numpy": "2.0"},
        "config_sha256": "cd" * 32,
        "seed": 11,
    }


@pytest.fixture(scope="module")
def doc(tables, meta):
    return render_report(tables, meta)


def test_every_section_present_and_tags_nest(doc):
    c = parse(doc)
    assert c.errors == [] and c.stack == []
    assert [s for s in c.ids if s in SECTION_IDS] == SECTION_IDS
    assert [sid for sid, _, _ in SECTIONS] == SECTION_IDS
    assert len(c.ids) == len(set(c.ids))
    assert NOT_PRODUCED not in doc  # every table was given


def test_self_contained(doc):
    c = parse(doc)
    assert len(c.imgs) >= 9  # hazard, incidence, 2 PD, ECL, speeds, backtest, calibration, walk
    for src in c.imgs:
        head, _, data = src.partition(",")
        assert head == "data:image/png;base64"
        assert base64.b64decode(data, validate=True).startswith(PNG_MAGIC)
    low = doc.lower()
    for banned in ('src="http', "<script", "<link", "@import", "url(", 'href="http'):
        assert banned not in low, banned
    assert "@media print" in doc


def test_summary_numbers_match_loan_table(doc, tables):
    c = parse(doc)
    summary = c.text("summary")
    loans = tables["loan_ecl"]
    assert fmt_money(loans["ecl_reported"].sum()) in summary
    assert fmt_money(loans["ead"].sum()) in summary
    assert fmt_pct(loans["ecl_reported"].sum() / loans["ead"].sum()) in summary
    for stage in (1, 2, 3):
        assert fmt_money(loans.loc[loans["stage"] == stage, "ecl_reported"].sum()) in summary
    for value in ("2021-12_abc123def0", "2021-12", "demo.yaml", "2022-01-05T09:00:00+00:00", "0.1.0", "multinomial"):
        assert value in summary
    assert re.search(r"Loans</th><td>30</td>", doc)


def test_money_and_rates_are_formatted():
    assert fmt_money(1234567.891) == "1,234,567.89"
    assert fmt_money(-1e-9) == "0.00"
    assert fmt_money(float("nan")) == "n/a"
    assert fmt_pct(0.012345) == "1.23%"


def test_checks_counts_and_scores_shown(doc, tables, meta):
    c = parse(doc)
    checks = c.text("data-checks")
    for _, row in tables["data_checks"].iterrows():
        assert row["check"] in checks
        assert f"{row['count']:,d}" in checks
    assert "4 checks: 2 passed, 1 warning, 0 failed, 1 not run." in checks
    validation = c.text("validation")
    assert "0.781" in validation  # AUC
    assert "0.562" in validation  # Gini
    assert "0.441" in validation  # KS
    assert "3.21" in validation and "0.3600" in validation  # Hosmer-Lemeshow
    assert "ECL walk" in c.text("movement") and "1,500.00" in c.text("movement")
    record = c.text("run-record")
    assert meta["inputs"][0]["sha256"] in record and meta["config_sha256"] in record


def test_scenario_ecl_at_stage_horizon(doc, tables):
    loans = tables["loan_ecl"]
    ecl = parse(doc).text("ecl")
    base = np.where(loans["stage"] == 1, loans["ecl_12m_base"], loans["ecl_lifetime_base"]).sum()
    assert fmt_money(base) in ecl
    assert fmt_money(loans["ecl_reported"].sum()) in ecl


def test_cautions_mention_synthetic_data_only_when_synthetic(meta):
    on = parse(render_report({}, meta)).text("cautions")
    off = parse(render_report({}, {**meta, "synthetic": False})).text("cautions")
    for text in (on, off):
        assert "model risk policy" in text and "supervisory rules prevail" in text
    assert "synthetic" in on and "synthetic" not in off


def test_nothing_given_every_section_says_not_produced():
    c = parse(render_report({}, {}))
    assert c.errors == [] and c.imgs == []
    assert [s for s in c.ids if s in SECTION_IDS] == SECTION_IDS
    for sid in SECTION_IDS:
        if sid not in ("cautions", "movement"):
            assert NOT_PRODUCED in c.text(sid), sid
    # no previous run: the movement section says why there is none and how to get one
    assert "outputs.prior_run is not set" in c.text("movement") and "creditsurv compare" in c.text("movement")


def test_missing_tables_say_not_produced(tables, meta):
    gone = {
        "loan_ecl",
        "backtest",
        "discrimination",
        "calibration",
        "stability",
        "coefficient_changes",
        "movement_walk",
        "stage_migration",
        "hazard_by_age",
    }
    c = parse(render_report({k: v for k, v in tables.items() if k not in gone}, meta))
    assert c.errors == []
    assert [s for s in c.ids if s in SECTION_IDS] == SECTION_IDS
    assert NOT_PRODUCED in c.text("summary") and NOT_PRODUCED in c.text("ecl")
    assert "segment_summary" not in c.text("ecl")  # the table that was given is shown, not reported absent
    assert c.text("validation").count(NOT_PRODUCED) == 4
    assert "Coefficient changes" not in c.text("validation")
    assert "outputs.prior_run is not set" in c.text("movement")  # no movement tables: the reason, not two absences
    assert NOT_PRODUCED in c.text("hazard-curves")
    assert NOT_PRODUCED not in c.text("cumulative-incidence")


def test_empty_tables_do_not_fail(tables, meta):
    empty = {k: v.iloc[:0] for k, v in tables.items()}
    c = parse(render_report(empty, meta))
    assert c.errors == [] and c.imgs == []


def test_user_text_is_escaped(tables, meta):
    evil = '<script>alert("x")</script>'
    names = ("loan_ecl", "segment_pd_table", "segment_summary", "segment_speeds", "equivalent_speeds", "data_checks")
    t = {k: tables[k] for k in names}
    for name in ("loan_ecl", "segment_pd_table", "segment_summary", "segment_speeds", "equivalent_speeds"):
        df = t[name].copy()
        df["segment"] = df["segment"].replace("prime", evil)
        t[name] = df
    checks = t["data_checks"].copy()
    checks.loc[0, "description"] = "<b>bold</b> & more"
    t["data_checks"] = checks
    doc = render_report(t, {**meta, "run_id": "<img src=x onerror=alert(1)>"})
    assert "<script" not in doc.lower()
    assert "&lt;script&gt;" in doc
    assert "<b>bold</b>" not in doc and "&lt;b&gt;bold&lt;/b&gt; &amp; more" in doc
    assert "<img src=x" not in doc
    assert parse(doc).errors == []


def test_rendering_is_deterministic_and_leaves_state_alone(tables, meta, doc, tmp_path):
    import matplotlib

    before = {k: v.copy() for k, v in tables.items()}
    rc = dict(matplotlib.rcParams)
    a = write_report(tmp_path / "a.html", tables, meta).read_bytes()
    b = write_report(tmp_path / "b.html", tables, meta).read_bytes()
    assert a == b
    assert a.decode("utf-8") == doc
    for k, v in tables.items():
        pd.testing.assert_frame_equal(v, before[k])
    assert dict(matplotlib.rcParams) == rc


def test_pngs_carry_no_software_or_time_chunk(doc):
    for src in parse(doc).imgs:
        png = base64.b64decode(src.partition(",")[2])
        assert b"tEXt" not in png and b"tIME" not in png and b"iTXt" not in png


def test_alias_columns_from_loss_summary_accepted(tables, meta):
    given = {"segment_summary": tables["segment_summary"]}
    renamed = {
        "segment_summary": tables["segment_summary"].rename(columns={"loans": "n_loans", "coverage": "coverage_ratio"})
    }
    assert render_report(renamed, meta) == render_report(given, meta)


def test_missing_columns_named_in_one_error(tables, meta):
    t = dict(tables)
    t["loan_ecl"] = tables["loan_ecl"].drop(columns=["ead"])
    t["discrimination"] = tables["discrimination"].drop(columns=["auc"])
    with pytest.raises(
        DataError, match=r"loan_ecl: lacks columns \['ead'\](?s:.*)discrimination: lacks columns \['auc'\]"
    ):
        render_report(t, meta)


def test_long_tables_are_cut_with_a_note(meta):
    stability = pd.DataFrame({"variable": [f"v{i:03d}" for i in range(75)], "psi": 0.01, "verdict": "pass"})
    text = parse(render_report({"stability": stability}, meta)).text("validation")
    assert "v059" in text and "v060" not in text
    assert "First 60 of 75 rows shown (full table: stability in the run folder)." in text


def test_the_summary_states_the_exposure_and_sicr_basis(tables, meta):
    # The run's bases in words: the routes into default behind EAD, and what the SICR test compared.
    routes = {"days_past_due_share": 0.8, "source": "development window", "defaults": 5, "onset_months": 3,
              "onset_months_status": 0}  # fmt: skip
    view = {"basis": "single_path", "scenario": "baseline", "reversion_months": 24, "hold_last_series": ["hpi_*"],
            "before_macro_history": 7}  # fmt: skip
    text = parse(render_report(tables, {**meta, "default_routes": routes, "origination_view": view, "arrears_fee": 25.0})).text("summary")
    assert "3 for a default on days past due" in text and "80.00% of the development window's 5 defaults" in text
    assert "a fee of 25.00 per missed instalment" in text
    assert "under the baseline scenario" in text and "over 24 months (hpi_* held)" in text
    assert "7 loans were originated before the macro history starts" in text
    text = parse(render_report(tables, {**meta, "low_credit_risk": {"pd_12m_at_most": 0.001, "live_loans": 42}})).text("summary")
    assert "Low credit risk (IFRS 9 5.5.10): 42 live loans with a 12-month PD at or below 0.100%" in text
    stored = {"basis": "stored", "column": "pd0", "model": "PD model 2019.2"}
    text = parse(render_report(tables, {**meta, "origination_view": stored})).text("summary")
    assert "stored PD at origination (loan-table column pd0, made by PD model 2019.2)" in text


def test_expected_drift_is_explained_beside_the_stability_table(meta):
    stability = pd.DataFrame({"variable": ["macro:unemployment_rate:1", "dti"], "psi": [12.5, 0.01], "verdict": ["expected drift", "pass"]})
    text = parse(render_report({"stability": stability}, meta)).text("validation")
    assert "expected drift" in text and "no signal about the model" in text
    calm = pd.DataFrame({"variable": ["dti"], "psi": [0.01], "verdict": ["pass"]})
    assert "no signal about the model" not in parse(render_report({"stability": calm}, meta)).text("validation")


def _scenario_paths() -> pd.DataFrame:
    months = [f"2021-{m:02d}" for m in range(1, 13)] + [f"2022-{m:02d}" for m in range(1, 13)]
    rows = []
    for name, weight, shift in (("base", 0.6, 0.0), ("downside", 0.4, 1.5)):
        for i, month in enumerate(months):
            part = "history" if i < 12 else ("scenario" if i < 20 else "extension")
            rows.append({"scenario": name, "weight": weight, "month": month, "series": "unemployment_rate",
                         "value": 4.0 + (shift * (i - 11) / 12 if i >= 12 else 0.0), "part": part})  # fmt: skip
    return pd.DataFrame(rows)


def test_scenario_paths_are_drawn_with_their_weights(tables, meta):
    c = parse(render_report(tables, meta))
    text = c.text("scenarios")
    assert NOT_PRODUCED not in text and "base 60%" in text and "downside 40%" in text
    assert "faded: its extension" in text
    without = {k: v for k, v in tables.items() if k != "scenario_paths"}
    assert NOT_PRODUCED in parse(render_report(without, meta)).text("scenarios")


def test_every_amount_carries_the_reporting_currency(tables, meta):
    c = parse(render_report(tables, {**meta, "currency": "GBP"}))
    summary = c.text("summary")
    total = tables["loan_ecl"]["ecl_reported"].sum()
    assert f"GBP {total:,.2f}" in summary  # the headline amount, written with its currency
    doc = render_report(tables, {**meta, "currency": "GBP"})
    assert "EAD (GBP)" in doc and "Reported ECL (GBP)" in doc  # table headers: the currency once per column
    assert "Amounts in GBP" in doc
    # in a table the cells of an amount column hold the number alone (its header names the currency); a label
    # and value pair (the headline numbers) carries the code beside the number
    assert not re.search(r'<td class="num">GBP ', doc) and re.search(r'<td class="num">[\d,]+\.\d\d</td>', doc)
    # without a currency in the config the page says so, and amounts are plain numbers
    plain = re.sub(r"<img[^>]*>", "", render_report(tables, meta))  # (base64 images may hold any three letters)
    assert "set <code>currency</code>" in plain and "GBP" not in plain
    # the currency of one call does not leak into the next
    assert fmt_money(1234.5) == "1,234.50"


def test_the_config_takes_a_currency_code_only():
    from conftest import demo_config_data

    from creditsurv.config import config_from_dict
    from creditsurv.errors import ConfigError

    data = demo_config_data("book", "reports")
    assert config_from_dict({**data, "currency": "USD"}).currency == "USD"
    with pytest.raises(ConfigError, match="currency.*three-letter currency code"):
        config_from_dict({**data, "currency": "dollars"})


def test_run_record_shows_rows_read_and_created(tables, meta):
    rows = {"inputs.panel.path": 250_000}
    inputs = [{"input": "inputs.panel.path", "path": "data/panel.parquet", "bytes": 1024, "sha256": "ab" * 32}]
    c = parse(render_report(tables, {**meta, "inputs": inputs, "input_rows": rows}))
    assert "250,000" in c.text("run-record")
    unset = parse(render_report(tables, {k: v for k, v in meta.items() if k != "created"}))
    assert "recorded in manifest.json" in unset.text("summary")
    assert "Seed11" in c.text("run-record").replace(" ", "")  # a seed, not a count: no thousands separator


def test_calibration_by_band_is_labelled_by_band(tables, meta):
    cal = pd.DataFrame({"group": ["(-inf, 640)", "[640, 700)"], "n": [10, 20], "pd_mean": [0.05, 0.01],
                        "observed_rate": [0.1, 0.0], "expected": [0.5, 0.2], "actual": [1, 0]})  # fmt: skip
    m = {**meta, "calibration": {**meta["calibration"], "grouping": "grades of credit_score"}}
    c = parse(render_report({**tables, "calibration": cal}, m))
    assert "Band of credit_score" in c.text("validation") and "[640, 700)" in c.text("validation")
