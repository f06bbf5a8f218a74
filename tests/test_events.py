"""Tests of creditsurv.events: outcomes and the risk set, against hand-labelled loans."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from statsmodels.duration.survfunc import SurvfuncRight

from creditsurv.config import config_from_dict
from creditsurv.data import raise_for_errors
from creditsurv.engines import event_counts, label_events, open_panel, run_checks
from creditsurv.errors import ConfigError

ORIG = 2020 * 12  # 2020-01
AS_OF = ORIG + 12  # 2021-01


def _text(idx: int) -> str:
    return f"{idx // 12:04d}-{idx % 12 + 1:02d}"


def _loan(loan_id, dpd, balance=None, status=None, orig=ORIG, first_age=1, term=360):
    """Rows of one loan from ``first_age``; ``dpd``, ``balance``, ``status`` are per row."""
    n = len(dpd)
    ages = list(range(first_age, first_age + n))
    balance = balance or [1000.0 - a for a in ages]
    status = status or ["current" if d < 30 else "delinquent" for d in dpd]
    rows = pd.DataFrame(
        {
            "loan_id": loan_id,
            "month": [_text(orig + a) for a in ages],
            "age": ages,
            "balance": balance,
            "days_past_due": dpd,
            "status": status,
        }
    )
    fact = {"loan_id": loan_id, "origination_month": _text(orig), "original_balance": 1000.0, "note_rate": 5.0, "term": term}
    return rows, fact


# Each loan written out by hand; expectations below are labelled by hand from these rows.
BOOK = [
    # default at 90 dpd after 30 and 60; its rows then stop
    _loan("default90", [0, 0, 30, 60, 90, 120]),
    # 30, 60, back to current: no event; censored at the reporting month (age 12)
    _loan("cure", [0, 30, 60, 30, 0, 0, 0, 0, 0, 0, 0, 0]),
    # pays off at age 4, before its term
    _loan("prepay", [0, 0, 0, 0], balance=[900.0, 800.0, 700.0, 0.0]),
    # runs to its 6-month term and pays off at age 6
    _loan("mature", [0] * 6, balance=[800.0, 600.0, 400.0, 200.0, 100.0, 0.0], term=6),
    # rows stop at age 7 without a closure
    _loan("left", [0] * 7),
    # 90 dpd at age 4, then in workout until the reporting month
    _loan("workout", [0, 30, 60, 90, 120, 150, 180, 210, 240, 270, 300, 330]),
    # 90 dpd at age 4, then charged off with a zero balance at age 7
    _loan(
        "chargeoff",
        [0, 30, 60, 90, 120, 150, 180],
        balance=[999.0, 998.0, 997.0, 997.0, 997.0, 997.0, 0.0],
        status=["current", "delinquent", "delinquent", "delinquent", "delinquent", "delinquent", "charged_off"],
    ),
    # status code 'default' at age 3 with only 30 dpd
    _loan("status", [0, 30, 30, 0, 0], status=["current", "delinquent", "default", "default", "default"]),
    # 90 dpd and a zero balance in the same row (a short sale): default, not prepayment
    _loan("both", [0, 30, 60, 90], balance=[999.0, 998.0, 997.0, 0.0]),
    # delayed entry: originated 2019-07, first seen at age 7, censored at the reporting month (age 18)
    _loan("late", [0] * 12, orig=ORIG - 6, first_age=7),
]

# loan_id: entry_age, entry_month_idx, last_age, last_month_idx, event, event_age,
#          event_month_idx, censor_reason, in_default_at_as_of, in_cure_period_at_as_of, days_past_due_at_as_of,
#          balance_at_as_of,
#          last_arrears_month_idx (the last month at or above the 30-day backstop or in default);
#          default_start_month_idx is checked beside them
EXPECTED_OUTCOMES = {
    "both": (1, ORIG + 1, 4, ORIG + 4, "default", 4, ORIG + 4, None, False, False, None, None, ORIG + 4),
    "chargeoff": (1, ORIG + 1, 7, ORIG + 7, "default", 4, ORIG + 4, None, False, False, None, None, ORIG + 7),
    "cure": (1, ORIG + 1, 12, AS_OF, "censored", None, None, "end_of_window", False, False, 0, 988.0, ORIG + 4),
    "default90": (1, ORIG + 1, 6, ORIG + 6, "default", 5, ORIG + 5, None, False, False, None, None, ORIG + 6),
    "late": (7, ORIG + 1, 18, AS_OF, "censored", None, None, "end_of_window", False, False, 0, 982.0, None),
    "left": (1, ORIG + 1, 7, ORIG + 7, "censored", None, None, "left_panel", False, False, None, None, None),
    "mature": (1, ORIG + 1, 6, ORIG + 6, "maturity", 6, ORIG + 6, None, False, False, None, None, None),
    "prepay": (1, ORIG + 1, 4, ORIG + 4, "prepay", 4, ORIG + 4, None, False, False, None, None, None),
    "status": (1, ORIG + 1, 5, ORIG + 5, "default", 3, ORIG + 3, None, False, False, None, None, ORIG + 5),
    "workout": (1, ORIG + 1, 12, AS_OF, "default", 4, ORIG + 4, None, True, False, 330, 988.0, AS_OF),
}

# loan_id: months_in_arrears_at_default, balance_at_onset: from the last row under 30 days past due up to the
# default's start (instalments missed), and that row's balance (1000 - age unless given)
EXPECTED_ONSETS = {
    "both": (3, 999.0),  # paid at age 1, default at 4
    "chargeoff": (3, 999.0),
    "default90": (3, 998.0),  # paid at age 2, default at 5
    "status": (2, 999.0),  # paid at age 1, default on the status code at 3
    "workout": (3, 999.0),
}

# loan_id: outcome of each risk-set row, from its first row on
EXPECTED_RISK_SET = {
    "both": [0, 0, 0, 1],
    "chargeoff": [0, 0, 0, 1],
    "cure": [0] * 12,
    "default90": [0, 0, 0, 0, 1],
    "late": [0] * 12,
    "left": [0] * 7,
    "mature": [0] * 6,
    "prepay": [0, 0, 0, 2],
    "status": [0, 0, 1],
    "workout": [0, 0, 0, 1],
}


def _config(tmp_path, panel, loans, **overrides):
    panel.to_parquet(tmp_path / "panel.parquet", index=False)
    loans.to_parquet(tmp_path / "loans.parquet", index=False)
    data = {
        "as_of": _text(AS_OF),
        "windows": {"development": {"start": "2020-01", "end": "2020-12"}},
        "inputs": {"panel": {"path": "panel.parquet", "columns": {"status": "status"}}, "loans": {"path": "loans.parquet"}},
        "default_definition": {"days_past_due": 90, "status_codes": ["default"]},
    }
    data.update(overrides)
    return config_from_dict(data, base_dir=tmp_path)


@pytest.fixture
def events_book_panel(tmp_path):
    """The hand-labelled book, opened, checked and labelled."""
    panel = pd.concat([rows for rows, _ in BOOK], ignore_index=True)
    loans = pd.DataFrame([fact for _, fact in BOOK])
    with open_panel(_config(tmp_path, panel, loans)) as p:
        raise_for_errors(run_checks(p))
        label_events(p)
        yield p


def test_loan_outcomes_match_hand_labels(events_book_panel):
    got = events_book_panel.con.execute("SELECT * FROM loan_outcomes ORDER BY loan_id").fetchall()
    assert [r[0] for r in got] == sorted(EXPECTED_OUTCOMES)
    for row in got:
        expected = EXPECTED_OUTCOMES[row[0]]
        # with no cure period the default a loan is in began at its first default: its event month
        start = expected[6] if expected[4] == "default" else None
        assert tuple(row[1:]) == (*expected, start, *EXPECTED_ONSETS.get(row[0], (None, None))), row[0]


def test_loan_outcomes_types(events_book_panel):
    types = dict(events_book_panel.con.execute("SELECT column_name, column_type FROM (DESCRIBE loan_outcomes)").fetchall())
    assert types == {
        "loan_id": "VARCHAR", "entry_age": "INTEGER", "entry_month_idx": "INTEGER", "last_age": "INTEGER",
        "last_month_idx": "INTEGER", "event": "VARCHAR", "event_age": "INTEGER", "event_month_idx": "INTEGER",
        "censor_reason": "VARCHAR", "in_default_at_as_of": "BOOLEAN", "in_cure_period_at_as_of": "BOOLEAN",
        "days_past_due_at_as_of": "INTEGER",
        "balance_at_as_of": "DOUBLE", "last_arrears_month_idx": "INTEGER", "default_start_month_idx": "INTEGER",
        "months_in_arrears_at_default": "INTEGER", "balance_at_onset": "DOUBLE",
    }


# loan_id: (origin_state, destination) of each risk-set row, labelled by hand from the days past due with the
# default arrears states (0 current, 1 30-59, 2 60-89; destination 0 stay, 1 default, 2 prepaid, 3 + k to state k)
EXPECTED_TRANSITIONS = {
    "both": ([0, 0, 1, 2], [0, 4, 5, 1]),
    "chargeoff": ([0, 0, 1, 2], [0, 4, 5, 1]),
    "cure": ([0, 0, 1, 2, 1, 0, 0, 0, 0, 0, 0, 0], [0, 4, 5, 4, 3, 0, 0, 0, 0, 0, 0, 0]),
    "default90": ([0, 0, 0, 1, 2], [0, 0, 4, 5, 1]),
    # first seen at age 7: the state before its first row is unknown
    "late": ([None] + [0] * 11, [None] + [0] * 11),
    "left": ([0] * 7, [0] * 7),
    # a maturity row is a month like any other (current to current)
    "mature": ([0] * 6, [0] * 6),
    "prepay": ([0] * 4, [0, 0, 0, 2]),
    # the status code makes the 30-59 loan's third month a default
    "status": ([0, 0, 1], [0, 4, 1]),
    "workout": ([0, 0, 1, 2], [0, 4, 5, 1]),
}


def test_risk_set_matches_hand_labels(events_book_panel):
    got = events_book_panel.con.execute("SELECT * FROM loan_months ORDER BY loan_id, month_idx").df()
    types = dict(events_book_panel.con.execute("SELECT column_name, column_type FROM (DESCRIBE loan_months)").fetchall())
    assert types == {
        "loan_id": "VARCHAR", "month_idx": "INTEGER", "age": "INTEGER", "outcome": "TINYINT", "origin_state": "TINYINT",
        "destination": "TINYINT", "previously_defaulted": "TINYINT",
    }
    got = got.astype(object).where(got.notna(), None)
    for loan_id, outcomes in EXPECTED_RISK_SET.items():
        rows = got[got["loan_id"] == loan_id]
        entry = EXPECTED_OUTCOMES[loan_id][0]
        assert rows["outcome"].tolist() == outcomes, loan_id
        assert rows["age"].tolist() == list(range(entry, entry + len(outcomes))), loan_id
        assert (rows["origin_state"].tolist(), rows["destination"].tolist()) == EXPECTED_TRANSITIONS[loan_id], loan_id
    assert len(got) == sum(map(len, EXPECTED_RISK_SET.values()))


# Loans that cure, labelled by hand with a cure period of 3 months (dpd threshold 90, backstop 30, ages 1-12).
CURE_BOOK = [
    # default at age 4; ages 5-7 meet no default condition, so it is cured at the end of age 7 and at risk from 8
    _loan("recure", [0, 30, 60, 90, 60, 30, 0, 0, 0, 0, 30, 0]),
    # default at age 10: at the reporting month (age 12) two clean months, still in its cure period
    _loan("incure", [0, 0, 0, 0, 0, 0, 0, 30, 60, 90, 30, 0]),
    # cured at the end of age 7, defaults again at age 11: in default (not cure) at the reporting month
    _loan("redefault", [0, 30, 60, 90, 0, 0, 0, 0, 30, 60, 90, 120]),
    # 90 at age 4 and again at age 6 (the clock restarts): in default in ages 4-8, at risk again from age 10
    _loan("relapse", [0, 0, 0, 90, 60, 90, 60, 30, 0, 0, 0, 0]),
]

# loan_id: (age, outcome, origin_state, destination, previously_defaulted) of each risk-set row
EXPECTED_CURE_RISK_SET = {
    "recure": [(1, 0, 0, 0, 0), (2, 0, 0, 4, 0), (3, 0, 1, 5, 0), (4, 1, 2, 1, 0),
               (8, 0, 0, 0, 1), (9, 0, 0, 0, 1), (10, 0, 0, 0, 1), (11, 0, 0, 4, 1), (12, 0, 1, 3, 1)],
    "incure": [(a, 0, 0, 0, 0) for a in range(1, 8)] + [(8, 0, 0, 4, 0), (9, 0, 1, 5, 0), (10, 1, 2, 1, 0)],
    "redefault": [(1, 0, 0, 0, 0), (2, 0, 0, 4, 0), (3, 0, 1, 5, 0), (4, 1, 2, 1, 0),
                  (8, 0, 0, 0, 1), (9, 0, 0, 4, 1), (10, 0, 1, 5, 1), (11, 1, 2, 1, 1)],
    "relapse": [(1, 0, 0, 0, 0), (2, 0, 0, 0, 0), (3, 0, 0, 0, 0), (4, 1, 0, 1, 0),
                (10, 0, 0, 0, 1), (11, 0, 0, 0, 1), (12, 0, 0, 0, 1)],
}  # fmt: skip

# loan_id: (event, event_age, in_default_at_as_of, in_cure_period_at_as_of, last_arrears_month_idx)
EXPECTED_CURE_OUTCOMES = {
    "recure": ("default", 4, False, False, ORIG + 11),
    "incure": ("default", 10, True, True, ORIG + 11),
    "redefault": ("default", 4, True, False, ORIG + 12),
    "relapse": ("default", 4, False, False, ORIG + 8),
}


def test_a_cured_loan_is_at_risk_again_in_a_new_spell(tmp_path):
    panel = pd.concat([rows for rows, _ in BOOK + CURE_BOOK], ignore_index=True)
    loans = pd.DataFrame([fact for _, fact in BOOK + CURE_BOOK])
    config = _config(tmp_path, panel, loans, default_definition={"days_past_due": 90, "status_codes": ["default"], "cure_months": 3})
    with open_panel(config) as p:
        label_events(p)
        months = p.con.execute("SELECT * FROM loan_months ORDER BY loan_id, month_idx").df()
        outcomes = p.con.execute("SELECT * FROM loan_outcomes ORDER BY loan_id").df().set_index("loan_id")
        book = p.book_at_as_of().set_index("loan_id")
    for loan_id, expected in EXPECTED_CURE_RISK_SET.items():
        rows = months[months["loan_id"] == loan_id]
        got = list(rows[["age", "outcome", "origin_state", "destination", "previously_defaulted"]].itertuples(index=False, name=None))
        assert got == expected, loan_id
        o = outcomes.loc[loan_id]
        assert (o["event"], o["event_age"], bool(o["in_default_at_as_of"]), bool(o["in_cure_period_at_as_of"]),
                o["last_arrears_month_idx"]) == EXPECTED_CURE_OUTCOMES[loan_id], loan_id  # fmt: skip
    # the loans of the first book never cure (workout, charge-off, status code to the end): the same risk set
    first = months[months["loan_id"].isin(EXPECTED_RISK_SET)]
    assert {k: g["outcome"].tolist() for k, g in first.groupby("loan_id")} == EXPECTED_RISK_SET
    assert (first["previously_defaulted"] == 0).all()
    # the book: cured loans are live with the flag, the others in default (stage 3), one in its cure period
    assert book.loc[["recure", "relapse"], "previously_defaulted"].tolist() == [1, 1]
    assert book.loc[["recure", "relapse"], "in_default"].tolist() == [False, False]
    assert book.loc[["incure", "redefault", "workout"], "in_default"].tolist() == [True, True, True]
    assert book.loc[["incure", "redefault", "workout"], "in_cure_period"].tolist() == [True, False, False]
    assert book.loc["recure", "months_since_arrears"] == 1 and book.loc["recure", "arrears_state"] == 0
    # months since the default the loan is in began: incure from age 10, redefault from its second default at
    # age 11 (not its first at 4), workout from age 4; none for the cured loans
    assert book.loc[["incure", "redefault", "workout"], "months_in_default"].tolist() == [2, 1, 8]
    assert book.loc[["recure", "relapse"], "months_in_default"].isna().all()
    # the delinquency before that default: incure paid at age 7, redefault at age 8 (after its cure), workout at 1
    assert book.loc[["incure", "redefault", "workout"], "months_in_arrears_at_default"].tolist() == [3, 3, 3]
    assert book.loc[["incure", "redefault", "workout"], "balance_at_onset"].tolist() == [993.0, 992.0, 999.0]
    assert book.loc[["recure", "relapse"], ["months_in_arrears_at_default", "balance_at_onset"]].isna().all().all()
    # with no cure period the same loans stop at their first default, and default is absorbing
    config = _config(tmp_path, panel, loans, default_definition={"days_past_due": 90, "status_codes": ["default"]})
    with open_panel(config) as p:
        label_events(p)
        months = p.con.execute("SELECT loan_id, age, outcome FROM loan_months ORDER BY loan_id, month_idx").df()
        book = p.book_at_as_of().set_index("loan_id")
    for loan_id, expected in EXPECTED_CURE_RISK_SET.items():
        first_spell = [r[:2] for r in expected if r[4] == 0]
        assert list(months[months["loan_id"] == loan_id][["age", "outcome"]].itertuples(index=False, name=None)) == first_spell
    assert book.loc[list(EXPECTED_CURE_RISK_SET), "in_default"].all()
    # default is for good: every loan counts from its first default
    assert book.loc[["recure", "incure", "redefault", "relapse"], "months_in_default"].tolist() == [8, 2, 8, 8]
    assert not book["in_cure_period"].any() and (book["previously_defaulted"] == 0).all()


def test_arrears_states_follow_the_configured_starts(tmp_path):
    # Missed payments instead of days: states current, 1, 2 missed payments; default at 3.
    rows, fact = _loan("m", [0, 1, 2, 1, 0, 2, 3])
    config = _config(
        tmp_path, rows, pd.DataFrame([fact]), default_definition={"days_past_due": 3}, arrears={"starts": [1, 2]}
    )
    assert config.arrears.labels(3) == ("current", "1", "2")
    with open_panel(config) as p:
        label_events(p)
        got = p.con.execute("SELECT origin_state, destination FROM loan_months ORDER BY month_idx").fetchall()
    assert got == [(0, 0), (0, 4), (1, 5), (2, 4), (1, 3), (0, 5), (2, 1)]
    # No arrears states: one transient state, and the destination is the outcome of the competing-risk model.
    config = _config(tmp_path, rows, pd.DataFrame([fact]), default_definition={"days_past_due": 3}, arrears={"starts": []})
    with open_panel(config) as p:
        label_events(p)
        got = p.con.execute("SELECT origin_state, destination, outcome FROM loan_months ORDER BY month_idx").fetchall()
    assert got == [(0, 0, 0)] * 6 + [(0, 1, 1)]


def test_arrears_states_must_start_below_the_default_threshold(tmp_path):
    rows, fact = _loan("m", [0])
    with pytest.raises(ConfigError, match=r"arrears\.starts: \[60\] at or above default_definition\.days_past_due 60"):
        _config(tmp_path, rows, pd.DataFrame([fact]), default_definition={"days_past_due": 60})


def test_event_counts(events_book_panel):
    counts = event_counts(events_book_panel)
    assert list(counts.columns) == ["event", "censor_reason", "loans", "share"]
    assert [tuple(r) for r in counts[["event", "censor_reason", "loans"]].astype(object).itertuples(index=False)] == [
        ("default", None, 5),
        ("prepay", None, 1),
        ("maturity", None, 1),
        ("censored", "end_of_window", 2),
        ("censored", "left_panel", 1),
    ]
    assert counts["share"].sum() == pytest.approx(1.0, abs=1e-12)


def test_event_counts_labels_when_needed(tmp_path):
    panel = pd.concat([rows for rows, _ in BOOK[:3]], ignore_index=True)
    loans = pd.DataFrame([fact for _, fact in BOOK[:3]])
    with open_panel(_config(tmp_path, panel, loans)) as p:
        counts = event_counts(p)
    assert counts["loans"].sum() == 3


def test_status_codes_alone_and_dpd_alone(tmp_path):
    rows, fact = _loan("s", [0, 120, 0], status=["current", "current", "default"])
    loans = pd.DataFrame([fact])
    with open_panel(_config(tmp_path, rows, loans, default_definition={"days_past_due": None, "status_codes": ["default"]})) as p:
        label_events(p)
        assert p.con.execute("SELECT event, event_age FROM loan_outcomes").fetchall() == [("default", 3)]
    with open_panel(_config(tmp_path, rows, loans, default_definition={"days_past_due": 120})) as p:
        label_events(p)
        assert p.con.execute("SELECT event, event_age FROM loan_outcomes").fetchall() == [("default", 2)]


# --------------------------------------------------------------------------- invariants on a random book


def _random_book(seed=7, n_loans=300):
    """Loans whose monthly rows hit 90 dpd, pay off or stop at random; some enter late."""
    rng = np.random.default_rng(seed)
    panels, facts = [], []
    for i in range(n_loans):
        orig = AS_OF - int(rng.integers(13, 40))
        first_age = int(rng.integers(1, 6))
        dpd, balance = [], []
        for age in range(first_age, AS_OF - orig + 1):
            u = rng.random()
            if u < 0.02:
                dpd.append(90)
                balance.append(500.0)
                break
            if u < 0.05:
                dpd.append(0)
                balance.append(0.0)
                break
            if u < 0.06:
                break  # leaves the panel
            dpd.append(int(rng.choice([0, 0, 0, 30, 60])))
            balance.append(1000.0 - age)
        if not dpd:
            continue
        rows, fact = _loan(f"r{i:03d}", dpd, balance=balance, orig=orig, first_age=first_age, term=int(rng.choice([24, 360])))
        panels.append(rows)
        facts.append(fact)
    return pd.concat(panels, ignore_index=True), pd.DataFrame(facts)


@pytest.fixture
def events_random_book_panel(tmp_path):
    panel, loans = _random_book()
    with open_panel(_config(tmp_path, panel, loans, default_definition={"days_past_due": 90})) as p:
        raise_for_errors(run_checks(p))
        label_events(p)
        yield p


def test_at_most_one_event_and_it_is_the_last_risk_set_row(events_random_book_panel):
    con = events_random_book_panel.con
    bad = con.execute(
        """
        SELECT loan_id FROM (
            SELECT loan_id, outcome, month_idx,
                   count(*) FILTER (WHERE outcome <> 0) OVER (PARTITION BY loan_id) AS events,
                   max(month_idx) OVER (PARTITION BY loan_id) AS last_idx
            FROM loan_months)
        WHERE events > 1 OR (outcome <> 0 AND month_idx <> last_idx)
        """
    ).fetchall()
    assert bad == []
    # the two tables agree loan by loan
    mismatched = con.execute(
        """
        SELECT o.loan_id FROM loan_outcomes AS o
        JOIN (SELECT loan_id, max(age) AS last_risk_age, max(outcome) AS outcome FROM loan_months GROUP BY loan_id) AS m
          USING (loan_id)
        WHERE m.outcome <> CASE o.event WHEN 'default' THEN 1 WHEN 'prepay' THEN 2 ELSE 0 END
           OR m.last_risk_age <> coalesce(o.event_age, o.last_age)
        """
    ).fetchall()
    assert mismatched == []
    kinds = dict(con.execute("SELECT event, count(*) FROM loan_outcomes GROUP BY ALL").fetchall())
    assert set(kinds) == {"default", "prepay", "maturity", "censored"}  # the book exercises every case


def test_kaplan_meier_from_outcomes_equals_risk_set_hazards(events_random_book_panel):
    con = events_random_book_panel.con
    out = con.execute(
        "SELECT entry_age, coalesce(event_age, last_age) AS time, (event = 'default')::INTEGER AS status "
        "FROM loan_outcomes ORDER BY loan_id"
    ).df()
    # Independent source: statsmodels' Kaplan-Meier with left truncation (a loan first seen
    # at age e is at risk from age e, i.e. after entry time e - 1); prepayment and maturity censor.
    km = SurvfuncRight(out["time"].to_numpy(float), out["status"].to_numpy(float), entry=out["entry_age"].to_numpy(float) - 1)
    hazards = con.execute(
        "SELECT age, count(*) AS at_risk, count(*) FILTER (WHERE outcome = 1) AS defaults "
        "FROM loan_months GROUP BY age ORDER BY age"
    ).df()
    survival = np.cumprod(1.0 - hazards["defaults"] / hazards["at_risk"])
    direct = pd.Series(survival.to_numpy(), index=hazards["age"].to_numpy())
    assert len(km.surv_times) > 10
    np.testing.assert_allclose(km.surv_prob, direct.loc[km.surv_times.astype(int)].to_numpy(), rtol=0, atol=1e-12)
    # at-risk counts agree too
    np.testing.assert_array_equal(km.n_risk, hazards.set_index("age").loc[km.surv_times.astype(int), "at_risk"].to_numpy())


def _states_by_hand(panel: pd.DataFrame, loans: pd.DataFrame) -> pd.DataFrame:
    """Origin and end state of every month at risk, walked loan by loan in plain Python (the events rules:
    default at 90 days past due, closure at a zero balance before the term is a prepayment, after it a maturity)."""
    term = dict(zip(loans["loan_id"], loans["term"]))
    rows = []
    for loan_id, g in panel.sort_values(["loan_id", "month"]).groupby("loan_id", sort=True):
        previous = None
        for r in g.itertuples():
            origin = previous if previous is not None else ("current" if r.age <= 1 else None)
            if r.days_past_due >= 90:
                end = "default"
            elif r.balance <= 0.005 and r.age < term[loan_id]:
                end = "prepaid"
            else:
                end = "current" if r.days_past_due < 30 else "30-59" if r.days_past_due < 60 else "60-89"
            rows.append((r.month, origin, end))
            if end in ("default", "prepaid") or r.balance <= 0.005:
                break
            previous = end
    return pd.DataFrame(rows, columns=["month", "origin", "end"])


def test_observed_transitions_equal_a_walk_through_the_panel(tmp_path):
    from creditsurv.data import (
        TRANSITION_COUNTS_SQL,
        state_names,
        transition_matrix,
        transition_table,
    )

    panel, loans = _random_book(seed=11, n_loans=400)
    by_hand = _states_by_hand(panel, loans).dropna(subset=["origin"])
    labels = ("current", "30-59", "60-89")
    with open_panel(_config(tmp_path, panel, loans, default_definition={"days_past_due": 90})) as p:
        raise_for_errors(run_checks(p))
        label_events(p)
        counts = p.frame(TRANSITION_COUNTS_SQL)
    expected = pd.crosstab(by_hand["origin"], by_hand["end"]).reindex(index=list(labels), columns=state_names(labels), fill_value=0)
    assert expected.to_numpy().min() >= 0 and (expected.to_numpy()[:, :3] > 0).all()  # every move occurs in the book
    matrix = transition_matrix(counts, labels).set_index("origin")
    np.testing.assert_array_equal(matrix["loan_months"].to_numpy(), expected.sum(axis=1).to_numpy())
    np.testing.assert_allclose(matrix[state_names(labels)].to_numpy(), expected.div(expected.sum(axis=1), axis=0).to_numpy(), rtol=1e-15)
    # a window keeps only its months; the monthly table adds up to the same counts
    window = by_hand[by_hand["month"] <= "2020-09"]
    dev = transition_matrix(counts, labels, end=2020 * 12 + 8).set_index("origin")
    assert dev["loan_months"].tolist() == window["origin"].value_counts().reindex(list(labels), fill_value=0).tolist()
    tidy = transition_table(counts, labels)
    assert tidy["loan_months"].sum() == len(by_hand)
    per_month = tidy.groupby(["month", "origin"])["rate"].sum()
    np.testing.assert_allclose(per_month.to_numpy(), 1.0, rtol=1e-12)
    got = tidy.set_index(["month", "origin", "destination"])["loan_months"]
    want = by_hand.groupby(["month", "origin", "end"]).size()
    want.index.names = got.index.names
    pd.testing.assert_series_equal(got.sort_index(), want.sort_index(), check_names=False, check_dtype=False)


def test_state_distribution_at_the_reporting_month():
    from creditsurv.data import state_distribution

    book = pd.DataFrame(
        {"arrears_state": [0, 0, 1, 2, 2, 0], "in_default": [False, False, False, False, True, True], "balance": [100.0, 50.0, 30.0, 20.0, 10.0, 5.0]}
    )
    got = state_distribution(book, ("current", "30-59", "60-89"))
    assert got["state"].tolist() == ["current", "30-59", "60-89", "default"]
    assert got["loans"].tolist() == [2, 1, 1, 2]
    assert got["balance"].tolist() == [150.0, 30.0, 20.0, 15.0]
    assert got["balance_share"].sum() == pytest.approx(1.0, abs=1e-15)


def test_the_routes_into_default_are_counted_on_the_development_window(events_book_panel):
    # The hand-labelled book's default events: four reach 90 days past due (both, chargeoff, default90,
    # workout), one defaults on its status code at 30 days past due (status). The projected exposure mixes
    # the two routes by that share (README, exposure at default).
    import dataclasses

    from creditsurv.pipeline import default_routes_of

    cfg = events_book_panel.cfg
    routes = default_routes_of(events_book_panel, cfg)
    assert (routes["defaults"], routes["defaults_on_days_past_due"]) == (5, 4)
    assert routes["days_past_due_share"] == 0.8 and routes["source"] == "development window"
    # a configured share wins; a window with no default leaves every default on days past due
    configured = dataclasses.replace(cfg, loss=dataclasses.replace(
        cfg.loss, exposure=dataclasses.replace(cfg.loss.exposure, days_past_due_share=0.5)))
    assert default_routes_of(events_book_panel, configured)["days_past_due_share"] == 0.5
    late = dataclasses.replace(cfg.windows.development, start=cfg.windows.development.start + 6)  # 2020-07 on
    quiet = dataclasses.replace(cfg, windows=dataclasses.replace(cfg.windows, development=late))
    assert default_routes_of(events_book_panel, quiet)["days_past_due_share"] == 1.0
    assert default_routes_of(events_book_panel, quiet)["source"] == "no default in the development window"
