"""The corpus of bad inputs and faults: each case is a user's mistake or a machine's fault, and its promise.

Every case runs the command line in this process on its own copy of one small book (2,000 loans of the
demo simulator, built once) and asserts

* the exit code (the rules in ``creditsurv.cli``: 1 data, model or run problems; 2 usage or config;
  3 a reproduction that does not match its record),
* the first line of the message (``ErrorName: ...`` naming the file, config key, column or rows),
* that no run folder, ``.incomplete-*`` folder or temporary folder is left behind (a mismatching
  reproduction, exit 3, is kept: it is the validator's evidence), and
* that the earlier run in the workspace is untouched, byte for byte.

A case is a :class:`Case`: a name, the issue item it keeps fixed, a ``prepare`` function that breaks the
workspace and returns the command line, the exit code and a regular expression for the first line of
stderr. Add a case by appending to ``CASES`` in the section of its item.
"""

from __future__ import annotations

import hashlib
import re
import shutil
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import demo_config_data

from creditsurv.cli import main
from creditsurv.demo import TRUE_COEFFICIENTS, LogitHazard, write_demo_book

CORPUS_LOANS, CORPUS_SEED = 2000, 4242

# Defaults three times as frequent as the demo's: 2,000 loans then give enough default events in the
# development window for the demo model's 10 terms per cause (the events-per-parameter rule).
_BUSY = {cause: dict(terms) for cause, terms in TRUE_COEFFICIENTS.items()}
_BUSY["default"]["intercept"] += np.log(3.0)
BUSY = LogitHazard(_BUSY)


@pytest.fixture(scope="module")
def corpus_book(tmp_path_factory):
    """The corpus's book (written once) and one complete run of it, to copy into every workspace."""
    root = tmp_path_factory.mktemp("corpus")
    book = root / "book"
    write_demo_book(book, CORPUS_LOANS, CORPUS_SEED, hazard=BUSY)
    ws = Workspace.create(root / "template", book)
    code = main(["run", str(ws.config)])
    assert code == 0, "the corpus's clean run must succeed"
    return ws


@dataclass
class Workspace:
    """A folder holding a copy of the book, a config reading it and a ``reports`` folder with one earlier run."""

    root: Path
    data: dict = field(default_factory=dict)

    @classmethod
    def create(cls, root: Path, book: Path) -> "Workspace":
        root.mkdir(parents=True)
        shutil.copytree(book, root / "book")
        ws = cls(root)
        ws.data = demo_config_data(root / "book", root / "reports")
        ws.data["outputs"]["monthly_tables"] = False
        ws.save()
        return ws

    def copy_to(self, root: Path) -> "Workspace":
        shutil.copytree(self.root, root, symlinks=True)
        ws = Workspace(root)
        ws.data = demo_config_data(root / "book", root / "reports")
        ws.data["outputs"]["monthly_tables"] = False
        ws.save()
        return ws

    # ------------------------------------------------------------------ paths and edits

    @property
    def config(self) -> Path:
        return self.root / "config.yaml"

    @property
    def book(self) -> Path:
        return self.root / "book"

    @property
    def reports(self) -> Path:
        return self.root / "reports"

    @property
    def earlier_run(self) -> Path:
        (run,) = [p for p in self.reports.iterdir() if p.is_dir() and not p.name.startswith(".")]
        return run

    def save(self) -> None:
        self.config.write_text(yaml.safe_dump(self.data, sort_keys=False), encoding="utf-8")

    def edit_config(self, change: Callable[[dict], None]) -> Path:
        """Apply ``change`` to the config dict, write it, return its path."""
        change(self.data)
        self.save()
        return self.config

    def edit_table(self, name: str, change: Callable[[pd.DataFrame], pd.DataFrame | None]) -> Path:
        """Read ``book/<name>`` (Parquet or CSV), apply ``change`` and write it back in the same format."""
        path = self.book / name
        frame = pd.read_parquet(path) if path.suffix == ".parquet" else pd.read_csv(path)
        changed = change(frame)
        frame = frame if changed is None else changed
        if path.suffix == ".parquet":
            frame.to_parquet(path, index=False)
        else:
            frame.to_csv(path, index=False)
        return path

    def snapshot(self) -> dict[str, str]:
        """SHA-256 of every file under ``reports``, by relative path."""
        out = {}
        for p in sorted(self.reports.rglob("*")):
            if p.is_file():
                out[str(p.relative_to(self.reports))] = hashlib.sha256(p.read_bytes()).hexdigest()
        return out


@dataclass(frozen=True)
class Case:
    """One bad input or fault and what the command line must do about it."""

    name: str
    item: str
    prepare: Callable[[Workspace], list[str]]
    exit_code: int
    first_line: str
    keeps: str | None = None  # a folder name pattern under reports that the case may leave (exit 3's evidence)


CASES: list[Case] = []


def case(item: str, exit_code: int, first_line: str, keeps: str | None = None):
    """Register the decorated ``prepare`` function as a case."""

    def register(prepare):
        CASES.append(Case(prepare.__name__, item, prepare, exit_code, first_line, keeps))
        return prepare

    return register


# ====================================================================== the record (items 1-4)


# ====================================================================== no silent wrong numbers (items 5-8)

# items 5-7


@case("5", 2, r"^ConfigError: .*config\.yaml.*scenarios\[0\]\.weight: expected a finite number, got nan")
def nan_scenario_weight(ws):
    return ["run", str(ws.edit_config(lambda d: d["scenarios"][0].update(weight=float("nan"))))]


@case("5", 2, r"^ConfigError: .*config\.yaml.*loss\.lgd\.constant: expected a finite number, got nan")
def nan_constant_lgd(ws):
    return ["run", str(ws.edit_config(lambda d: d.setdefault("loss", {}).setdefault("lgd", {}).update(kind="constant", constant=float("nan"))))]


@case("5", 1, r"^DataCheckError: 1 data check failed on .*panel\.parquet: panel_values_not_finite: 1 rows \(e\.g\. loan_id=.*balance=inf\b")
def infinite_balance(ws):
    ws.edit_table("panel.parquet", lambda p: p.assign(balance=p["balance"].where(p.index != len(p) // 2, np.inf)))
    return ["run", str(ws.config)]


@case("5", 1, r"^DataCheckError: 1 data check failed on .*macro_history\.csv: macro_values_not_finite: 1 months \(e\.g\. month=2018-01-01.*unemployment_rate=inf\b")
def infinite_macro_history(ws):
    ws.edit_table("macro_history.csv", lambda m: m.assign(unemployment_rate=m["unemployment_rate"].where(m["month"] != "2018-01", np.inf)))
    return ["run", str(ws.config)]


@case("5", 1, r"^ProjectionError: 1 problem with the scenario paths: scenario 'baseline' .*baseline\.csv.*series 'unemployment_rate' has infinite values in months 2025-03")
def infinite_scenario_value(ws):
    ws.edit_table("scenarios/baseline.csv", lambda m: m.assign(unemployment_rate=m["unemployment_rate"].where(m["month"] != "2025-03", np.inf)))
    return ["run", str(ws.config)]


@case("6", 1, r"^ModelError: too few events to fit the model: default: \d+ events for 10 parameters .*min_events_per_parameter")
def too_few_default_events(ws):
    # Six months of development (the loans then span every age): a few default events for 10 terms.
    return ["run", str(ws.edit_config(lambda d: d["windows"]["development"].update(start="2022-07", end="2022-12")))]


@case("6", 1, r"^ModelError: \d+ problems? with the fitted coefficients")
def coefficients_beyond_the_limits(ws):
    # A user's limit that no fitted term keeps: the run stops instead of using the model.
    return ["run", str(ws.edit_config(lambda d: d["model"]["fit"].update(max_scaled_coefficient=1e-6)))]


@case("7", 1, r"^DataCheckError: 1 data check failed on .*loans\.parquet: note_rate_implausible: 2000 rows")
def percent_rates_read_as_decimal(ws):
    return ["run", str(ws.edit_config(lambda d: d["inputs"]["loans"].update(rate_unit="decimal")))]


@case("7", 1, r"^DataCheckError: 1 data check failed on .*macro_history\.csv: macro_values_negative: 1 months \(e\.g\. month=2019-06-01")
def negative_unemployment(ws):
    ws.edit_table("macro_history.csv", lambda m: m.assign(unemployment_rate=m["unemployment_rate"].where(m["month"] != "2019-06", -1.0)))
    return ["run", str(ws.config)]



# ====================================================================== faults leave nothing behind (items 9-12)


@case("11", 2, r"^ConfigError: .*config\.yaml.*\bmodle\b.*did you mean 'model'")
def misspelt_top_level_key(ws):
    ws.data["modle"] = ws.data.pop("model")
    return ["run", str(ws.edit_config(lambda d: None))]


# ====================================================================== the data checks, one case per class


def _row_change(column, value, row=None):
    """A change of one cell of a table: the middle row unless ``row`` says which."""

    def change(frame):
        i = len(frame) // 2 if row is None else row(frame)
        frame[column] = frame[column].astype(object) if value is None else frame[column]
        frame.loc[frame.index[i], column] = value
        return frame

    return change


def _macro_month(column, value, month="2018-01"):
    def change(m):
        m[column] = m[column].astype(float)
        m.loc[m["month"] == month, column] = value
        return m

    return change


def _last_row_of_first_loan(p):
    first = p["loan_id"].iloc[0]
    return int(np.flatnonzero((p["loan_id"] == first).to_numpy())[-1])


def _second_row_of_first_loan(p):
    first = p["loan_id"].iloc[0]
    return int(np.flatnonzero((p["loan_id"] == first).to_numpy())[1])


DATA_CHECK_CASES = [
    # (check, table, change)
    ("panel_keys_missing", "panel.parquet", _row_change("loan_id", None, _last_row_of_first_loan)),  # no gap left
    ("duplicate_loan_months", "panel.parquet", lambda p: pd.concat([p, p.iloc[[len(p) // 2]]], ignore_index=True)),
    ("month_gaps", "panel.parquet", lambda p: p.drop(index=p.index[_second_row_of_first_loan(p)])),
    ("age_mismatch", "panel.parquet", lambda p: p.assign(age=p["age"].where(p.index != len(p) // 2, p["age"] + 1))),
    ("rows_after_closure", "panel.parquet", _row_change("balance", 0.0, _second_row_of_first_loan)),
    ("balance_missing", "panel.parquet", _row_change("balance", np.nan)),
    # the loan's last row: a balance at or below zero also closes the loan (rows_after_closure)
    ("balance_negative", "panel.parquet", _row_change("balance", -5.0, _last_row_of_first_loan)),
    ("days_past_due_invalid", "panel.parquet", _row_change("days_past_due", -1)),
    ("panel_values_not_finite", "panel.parquet", _row_change("balance", np.inf)),
    ("panel_loans_not_in_loan_table", "loans.parquet", lambda lo: lo.iloc[1:]),
    ("loan_table_duplicates", "loans.parquet", lambda lo: pd.concat([lo, lo.iloc[[0]]], ignore_index=True)),
    ("loan_fields_invalid", "loans.parquet", _row_change("term_months", 0)),
    ("loan_values_not_finite", "loans.parquet", _row_change("property_value", np.inf)),
    ("note_rate_implausible", "loans.parquet", _row_change("note_rate", 45.0)),  # 45% a year
    ("macro_duplicate_months", "macro_history.csv", lambda m: pd.concat([m, m[m["month"] == "2018-01"]], ignore_index=True)),
    ("macro_months_missing", "macro_history.csv", lambda m: m[m["month"] != "2018-01"]),
    ("macro_values_missing", "macro_history.csv", _macro_month("unemployment_rate", np.nan)),
    ("macro_values_not_finite", "macro_history.csv", _macro_month("hpi_north", np.inf)),
    ("macro_values_negative", "macro_history.csv", _macro_month("hpi_south", -3.0)),
]


def _data_check_case(check, table, change):
    def prepare(ws):
        ws.edit_table(table, change)
        return ["run", str(ws.config)]

    prepare.__name__ = f"data_check_{check}"
    stem = re.escape(table)
    return case("data checks", 1, rf"^DataCheckError: 1 data check failed on .*{stem}.*: {check}: \d+ ")(prepare)


for _check, _table, _change in DATA_CHECK_CASES:
    _data_check_case(_check, _table, _change)


def test_every_error_check_has_a_case():
    from creditsurv.data import CHECKS

    assert sorted(c for c, *_ in DATA_CHECK_CASES) == sorted(c.name for c in CHECKS if c.severity == "error")


# ====================================================================== the runner


@pytest.fixture
def workspace(corpus_book, tmp_path, monkeypatch):
    """A fresh copy of the corpus workspace; temporary files of the case go to a folder of its own."""
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(scratch))
    ws = corpus_book.copy_to(tmp_path / "ws")
    ws.scratch = scratch
    return ws


@pytest.mark.parametrize("bad", CASES, ids=[c.name for c in CASES])
def test_bad_input_or_fault(bad: Case, workspace, capsys):
    before = workspace.snapshot()
    argv = bad.prepare(workspace)
    capsys.readouterr()
    code = main(argv)
    err = capsys.readouterr().err
    first = err.strip().splitlines()[0] if err.strip() else ""
    assert code == bad.exit_code, f"exit {code}, expected {bad.exit_code}; stderr:\n{err}"
    assert re.search(bad.first_line, first), f"first line {first!r} does not match {bad.first_line!r}"
    assert "Traceback" not in err
    after = workspace.snapshot()
    assert {k: v for k, v in after.items() if k in before} == before, "an earlier run changed"
    new = {Path(k).parts[0] for k in after if k not in before}
    if bad.keeps is not None:
        new = {n for n in new if not re.fullmatch(bad.keeps, n)}
    assert not new, f"left behind under reports: {sorted(new)}"
    leftovers = [p.name for p in workspace.reports.iterdir() if p.name.startswith(".")]
    assert not leftovers, f"left behind: {leftovers}"
    assert not list(workspace.scratch.iterdir()), f"temporary files left: {list(workspace.scratch.iterdir())}"

