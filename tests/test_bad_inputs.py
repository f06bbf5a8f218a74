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


# item 8
# Problems are found before the fit: each is the preflight's DataError (or the scenario check's
# ProjectionError) naming the config key, the file and the closest name, raised before any data check or fit.


@case("8", 1, r"^DataError: 1 problem with the config against the input data: segments\.column: column 'regoin' is not in the loan table \S*loans\.parquet; did you mean 'region'\?")
def misspelt_segment_column(ws):
    return ["run", str(ws.edit_config(lambda d: d["segments"].update(column="regoin")))]


@case("8", 1, r"^DataError: .*segments\.band_column: column 'credit_scor' is not in the loan table \S*loans\.parquet.*did you mean 'credit_score'\?")
def misspelt_band_column(ws):
    return ["run", str(ws.edit_config(lambda d: d["segments"].update(band_column="credit_scor")))]


@case("8", 1, r"^DataError: .*model\.covariates\[2\]\.column: column 'dtii' is in neither the loan table \S*loans\.parquet nor the panel \S*panel\.parquet; did you mean 'dti'\?")
def misspelt_covariate_column_on_fit(ws):
    return ["fit", str(ws.edit_config(lambda d: d["model"]["covariates"][2].update(column="dtii")))]


@case("8", 1, r"^DataError: .*model\.covariates\[0\]\.column: column 'credit_scor' .*did you mean 'credit_score'\?")
def misspelt_covariate_column_on_check(ws):
    return ["check", str(ws.edit_config(lambda d: d["model"]["covariates"][0].update(column="credit_scor")))]


@case("8", 1, r"^DataError: .*collateral\.hpi_series: 'house_\{region\}' names series that are not in the macro history \S*macro_history\.csv.*did you mean 'hpi_")
def house_price_series_not_in_the_history(ws):
    return ["run", str(ws.edit_config(lambda d: d["collateral"].update(hpi_series="house_{region}")))]


@case("8", 1, r"^DataError: .*collateral\.market_rate_series: series 'mortage_rate' is not in the macro history \S*macro_history\.csv; did you mean 'mortgage_rate'\?")
def misspelt_market_rate_series(ws):
    return ["run", str(ws.edit_config(lambda d: d["collateral"].update(market_rate_series="mortage_rate")))]


@case("8", 1, r"^DataError: .*as_of: 2025-06 is after the panel's last month 2024-12 \(\S*panel\.parquet\)")
def reporting_month_beyond_the_panel_with_the_macro_check_off(ws):
    def change(d):
        d["as_of"] = "2025-06"
        d["checks"] = {"severity": {"macro_months_missing": "off", "macro_values_missing": "off"}}

    return ["run", str(ws.edit_config(change))]


@case("8", 1, r"^DataError: .*default_definition\.status_codes: 'charged_of' never occurs in the status column .*panel\.parquet; did you mean 'charged_off'\?")
def misspelt_default_status_code(ws):
    return ["run", str(ws.edit_config(lambda d: d["default_definition"].update(status_codes=["charged_of"])))]


@case("8", 1, r"^DataError: .*outputs\.prior_run: no run folder \S*no_such_run")
def prior_run_that_does_not_exist(ws):
    return ["run", str(ws.edit_config(lambda d: d["outputs"].update(prior_run=str(ws.root / "no_such_run"))))]


@case("8", 1, r"^ProjectionError: .*scenario 'downside' \(\S*downside\.csv\): the path starts at 2025-03 but the as-of month is 2024-12")
def scenario_that_starts_late(ws):
    path = ws.book / "scenarios" / "downside.csv"
    header, *rows = path.read_text().splitlines()
    path.write_text("\n".join([header, *rows[2:]]) + "\n")
    return ["run", str(ws.config)]


@case("8", 1, r"^ProjectionError: .*scenario 'baseline' \(\S*baseline\.csv\): missing series \['unemployment_rate'\]")
def scenario_without_a_series_the_model_reads(ws):
    ws.edit_table("scenarios/baseline.csv", lambda f: f.drop(columns="unemployment_rate"))
    return ["run", str(ws.config)]



# ====================================================================== faults leave nothing behind (items 9-12)


@case("11", 2, r"^ConfigError: .*config\.yaml.*\bmodle\b.*did you mean 'model'")
def misspelt_top_level_key(ws):
    ws.data["modle"] = ws.data.pop("model")
    return ["run", str(ws.edit_config(lambda d: None))]


# ====================================================================== the data checks, one case per class


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

