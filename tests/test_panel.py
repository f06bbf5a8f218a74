"""Tests of creditsurv.panel: the DuckDB views and the data checks."""

from __future__ import annotations

import json
import re
import warnings

import duckdb
import numpy as np
import pandas as pd
import pytest

from creditsurv.config import DATA_CHECK_NAMES
from creditsurv.data import CHECKS, format_checks, raise_for_errors
from creditsurv.engines import open_panel, run_checks
from creditsurv.errors import ConfigError, DataCheckError, DataCheckWarning, DataError
from creditsurv.sql import quote_ident

MACRO_COVARIATE = {"covariates": [{"name": "unemployment", "macro": "unemployment_rate", "lag": 3}]}


def _checks(cfg) -> pd.DataFrame:
    with open_panel(cfg) as panel:
        return run_checks(panel).set_index("check")


def _row(panel, loan_id, age):
    return (panel["loan_id"] == loan_id) & (panel["age"] == age)


# --------------------------------------------------------------------------- clean book and contracts


def test_clean_book_passes_every_check(panel_clean_book, panel_config_factory):
    panel, loans, macro = panel_clean_book
    cfg = panel_config_factory(panel, loans, macro, model=MACRO_COVARIATE)
    with open_panel(cfg) as p:
        checks = run_checks(p)
        stored = p.con.execute("SELECT * FROM data_checks").df()
    assert list(checks.columns) == ["check", "severity", "count", "examples", "source", "columns", "description"]
    assert list(checks["check"]) == [c.name for c in CHECKS]  # macro configured: every check runs
    assert checks["count"].tolist() == [0] * len(CHECKS)
    assert (checks["examples"] == "[]").all()
    assert stored["check"].tolist() == checks["check"].tolist()
    assert stored["count"].tolist() == checks["count"].tolist()
    raise_for_errors(checks)  # no error, no warning (warnings are errors in this suite)
    assert format_checks(checks).splitlines()[0].split() == ["OK", "panel_keys_missing", "0"]


def test_macro_checks_are_left_out_without_macro(panel_clean_book, panel_config_factory):
    panel, loans, _ = panel_clean_book
    checks = _checks(panel_config_factory(panel, loans))
    assert not any(name.startswith("macro_") for name in checks.index)
    assert len(checks) == len(CHECKS) - sum(c.table == "macro" for c in CHECKS)


def test_view_contract(panel_clean_book, panel_config_factory):
    panel, loans, macro = panel_clean_book
    panel = panel.assign(region=np.where(panel["loan_id"] == "L1", "north", "south"))
    loans = loans.assign(value=[2000.0, 2500.0, 1500.0], segment=["a", "b", "a"])
    cfg = panel_config_factory(panel, loans, macro, loan_columns={"property_value": "value"})
    with open_panel(cfg) as p:
        types = {t: dict(p.con.execute(f"SELECT column_name, column_type FROM (DESCRIBE {t})").fetchall())
                 for t in ("panel", "panel_all", "loans", "macro")}
        first = p.query("SELECT * FROM panel ORDER BY loan_id, month LIMIT 1").fetchall()[0]
        loan_rows = p.query("SELECT loan_id, origination_idx, note_rate, property_value FROM loans ORDER BY loan_id").fetchall()
        macro_first = p.query("SELECT month, month_idx, unemployment_rate FROM macro ORDER BY month LIMIT 1").fetchall()[0]
        assert set(p.sources) == {"panel", "loans", "macro"}
    assert types["panel"] == {
        "loan_id": "VARCHAR", "month": "DATE", "month_idx": "INTEGER", "age": "INTEGER",
        "balance": "DOUBLE", "days_past_due": "INTEGER", "status": "VARCHAR", "region": "VARCHAR",
    }
    assert types["panel_all"] == types["panel"]
    assert types["loans"] == {
        "loan_id": "VARCHAR", "origination_month": "DATE", "origination_idx": "INTEGER",
        "original_balance": "DOUBLE", "note_rate": "DOUBLE", "term": "INTEGER",
        "property_value": "DOUBLE", "segment": "VARCHAR",
    }
    assert types["macro"] == {"month": "DATE", "month_idx": "INTEGER", "unemployment_rate": "DOUBLE", "mortgage_rate": "DOUBLE"}
    import datetime as dt

    assert first == ("L1", dt.date(2020, 2, 1), 2020 * 12 + 1, 1, 990.0, 0, "current", "north")
    assert loan_rows == [("L1", 2020 * 12, 0.045, 2000.0), ("L2", 2020 * 12, 0.05, 2500.0), ("L3", 2020 * 12 + 5, 0.0325, 1500.0)]
    assert macro_first == (dt.date(2019, 1, 1), 2019 * 12, 5.0)


def test_decimal_rates_and_unmapped_status(panel_clean_book, panel_config_factory, tmp_path):
    panel, loans, _ = panel_clean_book
    loans = loans.assign(note_rate=loans["note_rate"] / 100)
    cfg = panel_config_factory(panel.drop(columns="status"), loans, panel_columns={"status": None})
    data = {"as_of": "2021-01", "windows": {"development": {"start": "2020-01", "end": "2020-12"}},
            "inputs": {"panel": {"path": "panel.parquet"}, "loans": {"path": "loans.parquet", "rate_unit": "decimal"}}}
    from creditsurv.config import config_from_dict

    cfg = config_from_dict(data, base_dir=tmp_path)
    with open_panel(cfg) as p:
        assert p.query("SELECT count(*) FROM panel WHERE status IS NOT NULL").fetchall() == [(0,)]
        assert p.query("SELECT note_rate FROM loans ORDER BY loan_id").fetchall() == [(0.045,), (0.05,), (0.0325,)]


@pytest.mark.parametrize("fmt", ["parquet", "csv", "duckdb"])
def test_every_source_format_gives_the_same_views(panel_clean_book, panel_config_factory, tmp_path, fmt):
    panel, loans, macro = panel_clean_book
    if fmt == "duckdb":
        db = tmp_path / "book.duckdb"
        with duckdb.connect(str(db)) as con:
            for name, frame in (("perf", panel), ("loan_facts", loans), ("econ", macro)):
                con.register("frame", frame)
                con.execute(f"CREATE TABLE {name} AS SELECT * FROM frame")
                con.unregister("frame")
        from creditsurv.config import config_from_dict

        cfg = config_from_dict(
            {
                "as_of": "2021-01",
                "windows": {"development": {"start": "2020-01", "end": "2020-12"}},
                "inputs": {
                    "panel": {"path": "book.duckdb", "table": "perf", "columns": {"status": "status"}},
                    "loans": {"path": "book.duckdb", "table": "loan_facts"},
                    "macro": {"path": "book.duckdb", "table": "econ"},
                },
            },
            base_dir=tmp_path,
        )
    else:
        cfg = panel_config_factory(panel, loans, macro, fmt=fmt)
    with open_panel(cfg) as p:
        got = {t: p.query(f"SELECT * FROM {t} ORDER BY ALL").fetchall() for t in ("panel", "loans", "macro")}
        checks = run_checks(p)
    assert len(got["panel"]) == len(panel)
    assert got["panel"][0][:7] == (
        "L1", pd.Timestamp("2020-02-01").date(), 2020 * 12 + 1, 1, 990.0, 0, "current"
    )
    assert [r[:6] for r in got["loans"]][2] == ("L3", pd.Timestamp("2020-06-01").date(), 2020 * 12 + 5, 1000.0, 0.0325, 240)
    assert len(got["macro"]) == 25
    assert checks["count"].sum() == 0


def test_timestamp_and_day_text_months(panel_clean_book, panel_config_factory):
    panel, loans, _ = panel_clean_book
    panel = panel.assign(month=pd.to_datetime(panel["month"] + "-15 13:45"))
    loans = loans.assign(origination_month=loans["origination_month"] + "-28")
    cfg = panel_config_factory(panel, loans)
    with open_panel(cfg) as p:
        assert p.query("SELECT min(month), min(day(month)), max(day(month)) FROM panel").fetchall() == [
            (pd.Timestamp("2020-02-01").date(), 1, 1)
        ]
        assert p.query("SELECT DISTINCT day(origination_month) FROM loans").fetchall() == [(1,)]
        assert run_checks(p)["count"].sum() == 0


# --------------------------------------------------------------------------- one bad book per check


def _drop_rows(mask):
    return lambda p, lo, m: (p[~mask(p)].reset_index(drop=True), lo, m)


def _bad_month(p, lo, m):
    p = p.copy()
    p.loc[_row(p, "L2", 3), "month"] = "2020-13"
    return p, lo, m


def _duplicate(p, lo, m):
    return pd.concat([p, p[_row(p, "L1", 5)]], ignore_index=True), lo, m


def _age_off(p, lo, m):
    p = p.copy()
    p.loc[_row(p, "L1", 7), "age"] = 8
    return p, lo, m


def _after_closure(p, lo, m):
    extra = pd.DataFrame(
        {"loan_id": "L3", "month": ["2020-11", "2020-12"], "age": [5, 6], "balance": 0.0, "days_past_due": 0, "status": "paid"}
    )
    return pd.concat([p, extra], ignore_index=True), lo, m


def _set(loan_id, age, column, value):
    def mutate(p, lo, m):
        p = p.copy()
        if column == "days_past_due":
            p[column] = p[column].astype("float64")
        p.loc[_row(p, loan_id, age), column] = value
        return p, lo, m

    return mutate


def _both(*mutations):
    def mutate(p, lo, m):
        for f in mutations:
            p, lo, m = f(p, lo, m)
        return p, lo, m

    return mutate


def _loans(change):
    return lambda p, lo, m: (p, change(lo.copy()), m)


def _extra_loan(lo):
    new = pd.DataFrame({"loan_id": ["L9"], "origination_month": ["2020-09"], "original_balance": [500.0], "note_rate": [6.0], "term": [120]})
    return pd.concat([lo, new], ignore_index=True)


def _bad_loan_fields(lo):
    lo.loc[lo["loan_id"] == "L1", "term"] = 0
    lo.loc[lo["loan_id"] == "L2", "note_rate"] = np.nan
    return lo


def _after_as_of(p, lo, m):
    extra = pd.DataFrame(
        {"loan_id": "L1", "month": ["2021-02", "2021-03"], "age": [13, 14], "balance": 880.0, "days_past_due": 0, "status": "current"}
    )
    return pd.concat([p, extra], ignore_index=True), lo, m


def _macro(change):
    return lambda p, lo, m: (p, lo, change(m.copy()))


def _macro_gaps(m):
    return m[~m["month"].isin(["2019-05", "2019-11", "2020-02"])]  # 2019-05 is before the window less the lag


def _macro_nulls(m):
    m.loc[m["month"].isin(["2019-02", "2020-03"]), "unemployment_rate"] = np.nan
    m.loc[m["month"] == "2020-04", "mortgage_rate"] = np.nan  # not a series the model uses
    return m


def _loan_value(loan_id, column, value):
    def change(lo):
        lo.loc[lo["loan_id"] == loan_id, column] = value
        return lo

    return _loans(change)


def _macro_value(month, column, value):
    def change(m):
        m.loc[m["month"] == month, column] = value
        return m

    return _macro(change)


BAD_BOOKS = [
    ("panel_keys_missing", _bad_month, 1, [{"loan_id": "L2", "month": None, "month_idx": None, "age": 3}]),
    ("duplicate_loan_months", _duplicate, 1, [{"loan_id": "L1", "month": "2020-06-01", "rows": 2}]),
    (
        "month_gaps",
        _drop_rows(lambda p: (p["loan_id"] == "L2") & p["age"].isin([4, 5])),
        1,
        [{"loan_id": "L2", "month": "2020-07-01", "previous_month": "2020-04-01", "missing_months": 2}],
    ),
    ("age_mismatch", _age_off, 1, [{"loan_id": "L1", "month": "2020-08-01", "age": 8, "expected_age": 7}]),
    (
        "rows_after_closure",
        _after_closure,
        2,
        [
            {"loan_id": "L3", "month": "2020-11-01", "balance": 0.0, "closed_month": "2020-10-01"},
            {"loan_id": "L3", "month": "2020-12-01", "balance": 0.0, "closed_month": "2020-10-01"},
        ],
    ),
    ("balance_missing", _set("L1", 2, "balance", np.nan), 1, [{"loan_id": "L1", "month": "2020-03-01", "balance": None}]),
    ("balance_negative", _set("L2", 9, "balance", -5.0), 1, [{"loan_id": "L2", "month": "2020-10-01", "balance": -5.0}]),
    (
        "days_past_due_invalid",
        _both(_set("L2", 4, "days_past_due", np.nan), _set("L1", 3, "days_past_due", -1)),
        2,
        [
            {"loan_id": "L1", "month": "2020-04-01", "days_past_due": -1},
            {"loan_id": "L2", "month": "2020-05-01", "days_past_due": None},
        ],
    ),
    # An infinite balance is also more than 1.5 times the original: both checks fire.
    ("panel_values_not_finite", _set("L1", 2, "balance", np.inf), 1, [{"loan_id": "L1", "month": "2020-03-01", "balance": np.inf}]),
    (
        "balance_above_original",
        _set("L2", 3, "balance", 1600.0),  # 1.6 x the original 1,000 of the clean book
        1,
        [{"loan_id": "L2", "month": "2020-04-01", "balance": 1600.0, "original_balance": 1000.0}],
    ),
    (
        "panel_loans_not_in_loan_table",
        _loans(lambda lo: lo[lo["loan_id"] != "L3"]),
        1,
        [{"loan_id": "L3", "first_month": "2020-07-01", "rows": 4}],
    ),
    ("loans_without_panel_rows", _loans(_extra_loan), 1, [{"loan_id": "L9", "origination_month": "2020-09-01"}]),
    ("loan_table_duplicates", _loans(lambda lo: pd.concat([lo, lo.iloc[[1]]])), 1, [{"loan_id": "L2", "rows": 2}]),
    (
        "loan_fields_invalid",
        _loans(_bad_loan_fields),
        2,
        [
            {"loan_id": "L1", "origination_month": "2020-01-01", "original_balance": 1000.0, "note_rate": 0.045, "term": 0},
            {"loan_id": "L2", "origination_month": "2020-01-01", "original_balance": 1000.0, "note_rate": None, "term": 360},
        ],
    ),
    (
        "loan_values_not_finite",
        _loan_value("L3", "original_balance", np.inf),
        1,
        # the clean book's L3: 3.25 percent read as 0.0325; no property value mapped
        [{"loan_id": "L3", "original_balance": np.inf, "note_rate": 0.0325}],
    ),
    # 45 percent a year: above the 30% rule (a decimal book read as percent gives such rates).
    ("note_rate_implausible", _loan_value("L2", "note_rate", 45.0), 1, [{"loan_id": "L2", "note_rate": 0.45}]),
    (
        "months_after_as_of",
        _after_as_of,
        2,
        [{"loan_id": "L1", "month": "2021-02-01"}, {"loan_id": "L1", "month": "2021-03-01"}],
    ),
    (
        "macro_duplicate_months",
        _macro(lambda m: pd.concat([m, m[m["month"] == "2020-05"]])),
        1,
        [{"month": "2020-05-01", "rows": 2}],
    ),
    ("macro_months_missing", _macro(_macro_gaps), 2, [{"month": "2019-11-01"}, {"month": "2020-02-01"}]),
    (
        "macro_values_missing",
        _macro(_macro_nulls),
        1,
        [{"month": "2020-03-01", "unemployment_rate": None}],
    ),
    (
        # every series of the history counts, also one the model does not use (mortgage_rate)
        "macro_values_not_finite",
        _macro_value("2020-04", "mortgage_rate", -np.inf),
        1,
        [{"month": "2020-04-01", "unemployment_rate": 5.15, "mortgage_rate": -np.inf}],  # 5.0 + 0.01 x 15 months
    ),
    (
        "macro_values_negative",
        _macro_value("2020-02", "unemployment_rate", -1.0),  # matches the default pattern unemployment*
        1,
        [{"month": "2020-02-01", "unemployment_rate": -1.0}],
    ),
]


def test_bad_books_cover_every_check():
    assert sorted(name for name, *_ in BAD_BOOKS) == sorted(c.name for c in CHECKS)


@pytest.mark.parametrize("name, mutate, count, examples", BAD_BOOKS, ids=[b[0] for b in BAD_BOOKS])
def test_each_check_fires_on_its_bad_book(panel_clean_book, panel_config_factory, name, mutate, count, examples):
    panel, loans, macro = mutate(*panel_clean_book)
    checks = _checks(panel_config_factory(panel, loans, macro, model=MACRO_COVARIATE))
    assert checks.loc[name, "count"] == count
    assert json.loads(checks.loc[name, "examples"]) == examples
    severity = checks.loc[name, "severity"]
    if severity == "error":
        with pytest.raises(DataCheckError, match=rf"{name}: {count} "):
            raise_for_errors(checks.reset_index())
    else:
        others = checks.reset_index()
        others = others[(others["check"] == name) | (others["severity"] == "warning")]
        with pytest.warns(DataCheckWarning, match=rf"{name}: {count} "):
            raise_for_errors(others)


def test_examples_are_at_most_five_and_ordered(panel_clean_book, panel_config_factory):
    panel, loans, macro = panel_clean_book
    panel = panel.copy()
    panel["balance"] = panel["balance"].where(panel["age"] % 2 == 0, -1.0)  # odd ages negative
    panel = panel.sample(frac=1.0, random_state=3)  # file order must not matter
    checks = _checks(panel_config_factory(panel, loans, macro))
    examples = json.loads(checks.loc["balance_negative", "examples"])
    assert checks.loc["balance_negative", "count"] == 6 + 6 + 2
    assert [(e["loan_id"], e["month"]) for e in examples] == [
        ("L1", "2020-02-01"), ("L1", "2020-04-01"), ("L1", "2020-06-01"), ("L1", "2020-08-01"), ("L1", "2020-10-01")
    ]


def test_rows_after_as_of_are_excluded_and_warned(panel_clean_book, panel_config_factory):
    panel, loans, macro = _after_as_of(*panel_clean_book)
    cfg = panel_config_factory(panel, loans, macro)
    with open_panel(cfg) as p:
        assert p.query("SELECT count(*), max(month_idx) FROM panel").fetchall() == [(len(panel) - 2, 2021 * 12)]
        assert p.query("SELECT count(*) FROM panel_all").fetchall() == [(len(panel),)]
        checks = run_checks(p)
    with pytest.warns(DataCheckWarning, match=r"months_after_as_of: 2 rows \(e\.g\. loan_id=L1, month=2021-02-01\)"):
        raise_for_errors(checks)


def test_error_message_lists_every_failed_check(panel_clean_book, panel_config_factory):
    panel, loans, macro = _both(_duplicate, _set("L1", 2, "balance", np.nan), _loans(_extra_loan))(*panel_clean_book)
    checks = _checks(panel_config_factory(panel, loans, macro)).reset_index()
    with pytest.raises(DataCheckError) as info:
        raise_for_errors(checks)
    text = str(info.value)
    assert text.startswith("2 data checks failed on ")
    assert "  - duplicate_loan_months: 1 loan-months (e.g. loan_id=L1, month=2020-06-01, rows=2)" in text
    assert "  - balance_missing: 1 rows (e.g. loan_id=L1, month=2020-03-01, balance=None)" in text
    assert "  - loans_without_panel_rows: 1 loans" in text.split("warnings:")[1]
    assert "checks.severity" in text


# --------------------------------------------------------------------------- severity


def test_severity_override(panel_clean_book, panel_config_factory):
    panel, loans, macro = _both(_duplicate, _after_as_of)(*panel_clean_book)
    cfg = panel_config_factory(
        panel, loans, macro, checks={"severity": {"duplicate_loan_months": "warning", "months_after_as_of": "off"}}
    )
    checks = _checks(cfg)
    assert checks.loc["duplicate_loan_months", "severity"] == "warning"
    assert checks.loc["months_after_as_of", "severity"] == "off"
    assert checks.loc["months_after_as_of", "count"] == 0
    with pytest.warns(DataCheckWarning, match="duplicate_loan_months: 1 loan-months") as record:
        raise_for_errors(checks.reset_index())
    assert len(record) == 1
    assert "OFF  months_after_as_of" in format_checks(checks.reset_index())
    assert "WARN duplicate_loan_months" in format_checks(checks.reset_index())


def test_unknown_check_name_is_a_config_error_when_the_config_is_read(panel_clean_book, panel_config_factory):
    panel, loans, _ = panel_clean_book
    with pytest.raises(ConfigError, match=r"checks\.severity\.duplicate_loan_month: unknown data check; "
                       r"did you mean 'duplicate_loan_months'\?"):
        panel_config_factory(panel, loans, checks={"severity": {"duplicate_loan_month": "off"}})


def test_the_config_knows_every_data_check_by_name():
    assert tuple(check.name for check in CHECKS) == DATA_CHECK_NAMES


# --------------------------------------------------------------------------- input errors


def test_missing_file_names_key_and_path(panel_clean_book, panel_config_factory):
    panel, loans, _ = panel_clean_book
    cfg = panel_config_factory(panel, loans)
    (panel_config_factory.base_dir / "panel.parquet").unlink()
    with pytest.raises(DataError, match=r"inputs\.panel\.path: file not found: .*panel\.parquet"):
        open_panel(cfg)


def test_missing_column_names_file_key_and_closest_match(panel_clean_book, panel_config_factory):
    panel, loans, _ = panel_clean_book
    cfg = panel_config_factory(panel.rename(columns={"balance": "balance_amt"}), loans)
    with pytest.raises(DataError) as info:
        open_panel(cfg)
    text = str(info.value)
    assert "panel.parquet: inputs.panel.columns.balance: column 'balance' not found; did you mean 'balance_amt'?" in text
    assert "(available: loan_id, month, age, balance_amt, days_past_due, status)" in text


def test_every_missing_column_is_reported_at_once(panel_clean_book, panel_config_factory):
    panel, loans, _ = panel_clean_book
    cfg = panel_config_factory(panel, loans, panel_columns={"age": "loan_age"}, loan_columns={"term": "term_months"})
    with pytest.raises(DataError, match=r"^2 problems with the input data") as info:
        open_panel(cfg)
    assert "inputs.panel.columns.age: column 'loan_age'" in str(info.value)
    assert "inputs.loans.columns.term: column 'term_months' not found; did you mean 'term'?" in str(info.value)


def test_text_balance_is_a_data_error(panel_clean_book, panel_config_factory):
    panel, loans, _ = panel_clean_book
    panel = panel.assign(balance=panel["balance"].astype(str))
    panel.loc[5, "balance"] = "n/a"
    cfg = panel_config_factory(panel, loans, fmt="csv")
    with pytest.raises(DataError, match=r"panel\.csv: column 'balance' \(inputs\.panel\.columns\.balance\) holds text such as 'n/a'"):
        open_panel(cfg)


def test_numbers_stored_as_text_are_read(panel_clean_book, panel_config_factory):
    panel, loans, _ = panel_clean_book
    panel = panel.assign(balance=panel["balance"].map(lambda v: f" {v} "))
    with open_panel(panel_config_factory(panel, loans)) as p:
        assert p.query("SELECT sum(balance) FROM panel WHERE loan_id = 'L1'").fetchall() == [(sum(1000.0 - 10 * a for a in range(1, 13)),)]


def test_unreadable_month_type_is_a_data_error(panel_clean_book, panel_config_factory):
    panel, loans, _ = panel_clean_book
    panel = panel.assign(month=panel["age"] * 1.5)
    with pytest.raises(DataError, match=r"column 'month' \(inputs\.panel\.columns\.month\) has type DOUBLE; expected a date"):
        open_panel(panel_config_factory(panel, loans))


def test_passthrough_column_clashing_with_internal_name(panel_clean_book, panel_config_factory):
    panel, loans, _ = panel_clean_book
    panel = panel.assign(Month_Idx=1)
    with pytest.raises(DataError, match=r"unmapped column 'Month_Idx' has the name of an internal panel column"):
        open_panel(panel_config_factory(panel, loans))


def test_missing_macro_series_of_the_model(panel_clean_book, panel_config_factory):
    panel, loans, macro = panel_clean_book
    model = {"covariates": [{"name": "u", "macro": "unemployment"}]}
    with pytest.raises(DataError, match=r"model\.covariates\[0\]\.macro: macro series 'unemployment' not found; "
                       r"did you mean 'unemployment_rate'"):
        open_panel(panel_config_factory(panel, loans, macro, model=model))


def test_missing_duckdb_table(panel_clean_book, tmp_path):
    panel, loans, _ = panel_clean_book
    with duckdb.connect(str(tmp_path / "b.duckdb")) as con:
        con.execute("CREATE TABLE performance AS SELECT * FROM panel")
        con.execute("CREATE TABLE loans AS SELECT * FROM loans")
    from creditsurv.config import config_from_dict

    cfg = config_from_dict(
        {"as_of": "2021-01", "windows": {"development": {"start": "2020-01", "end": "2020-12"}},
         "inputs": {"panel": {"path": "b.duckdb", "table": "perfomance"}, "loans": {"path": "b.duckdb", "table": "loans"}}},
        base_dir=tmp_path,
    )
    with pytest.raises(DataError, match=r"inputs\.panel\.table: no table 'perfomance' in .*b\.duckdb .*did you mean 'performance'"):
        open_panel(cfg)


# --------------------------------------------------------------------------- SQL safety

HOSTILE_NAMES = [
    'x"; DROP TABLE sentinel; --',
    "balance'); DROP TABLE sentinel; --",
    "select",
    'a "quoted" name',
]


def test_quote_ident():
    assert quote_ident("balance") == '"balance"'
    assert quote_ident('x"; DROP TABLE t; --') == '"x""; DROP TABLE t; --"'


@pytest.mark.parametrize("name", HOSTILE_NAMES)
def test_hostile_mapping_is_a_missing_column(panel_clean_book, tmp_path, name):
    panel, loans, _ = panel_clean_book
    db = tmp_path / "book.duckdb"
    with duckdb.connect(str(db)) as con:
        con.execute("CREATE TABLE perf AS SELECT * FROM panel")
        con.execute("CREATE TABLE loan_facts AS SELECT * FROM loans")
        con.execute("CREATE TABLE sentinel AS SELECT 42 AS answer")
    from creditsurv.config import config_from_dict

    cfg = config_from_dict(
        {"as_of": "2021-01", "windows": {"development": {"start": "2020-01", "end": "2020-12"}},
         "inputs": {"panel": {"path": "book.duckdb", "table": "perf", "columns": {"loan_id": name}},
                    "loans": {"path": "book.duckdb", "table": "loan_facts"}}},
        base_dir=tmp_path,
    )
    with pytest.raises(DataError, match=r"inputs\.panel\.columns\.loan_id: column " + re.escape(repr(name)) + " not found"):
        open_panel(cfg)
    with duckdb.connect(str(db), read_only=True) as con:
        assert con.execute("SELECT answer FROM sentinel").fetchall() == [(42,)]
        assert con.execute("SELECT count(*) FROM perf").fetchall() == [(len(panel),)]


@pytest.mark.parametrize("name", HOSTILE_NAMES)
def test_hostile_column_names_that_exist_are_read_as_names(panel_clean_book, panel_config_factory, name):
    panel, loans, _ = panel_clean_book
    panel = panel.rename(columns={"balance": name}).assign(**{name + " extra": 1})
    cfg = panel_config_factory(panel, loans, panel_columns={"balance": name})
    with open_panel(cfg) as p:
        assert p.query("SELECT sum(balance) FROM panel").fetchall() == [(panel[name].sum(),)]
        assert name + " extra" in p.columns("panel")
        assert run_checks(p)["count"].sum() == 0


def test_bad_duckdb_settings_are_a_config_error(panel_clean_book, panel_config_factory):
    panel, loans, _ = panel_clean_book
    cfg = panel_config_factory(panel, loans, duckdb={"memory_limit": "lots", "threads": 1})
    with pytest.raises(ConfigError, match=r"duckdb: DuckDB rejected the settings"):
        open_panel(cfg)


def test_settings_and_close(panel_clean_book, panel_config_factory):
    panel, loans, _ = panel_clean_book
    cfg = panel_config_factory(panel, loans, duckdb={"memory_limit": "512MB", "threads": 1})
    with open_panel(cfg) as p:
        threads, spill = p.con.execute("SELECT current_setting('threads'), current_setting('temp_directory')").fetchall()[0]
        assert threads == 1
        assert "creditsurv-duckdb-" in spill
        con = p.con
    assert p.con is None
    with pytest.raises(duckdb.Error):
        con.execute("SELECT 1")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        p.close()  # closing twice is harmless


def test_duplicate_and_gap_in_one_loan_are_both_found(panel_clean_book, panel_config_factory):
    # L1 repeats age 3 and misses age 5: as many rows as months in its span.
    panel, loans, macro = _both(_drop_rows(lambda p: _row(p, "L1", 5)), _duplicate_age3)(*panel_clean_book)
    checks = _checks(panel_config_factory(panel, loans, macro))
    assert checks.loc["duplicate_loan_months", "count"] == 1
    assert checks.loc["month_gaps", "count"] == 1
    assert json.loads(checks.loc["month_gaps", "examples"])[0]["month"] == "2020-07-01"


def _duplicate_age3(p, lo, m):
    return pd.concat([p, p[_row(p, "L1", 3)]], ignore_index=True), lo, m
