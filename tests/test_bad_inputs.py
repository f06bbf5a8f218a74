"""The corpus of bad inputs and faults: each case is a user's mistake or a machine's fault, and its promise.

Every case runs the command line in this process on its own copy of one small book (2,000 loans of the
demo simulator, built once) and asserts

* the exit code (the rules in ``creditsurv.cli``: 1 data, model or run problems; 2 usage or config;
  3 a reproduction that does not match its record),
* the first line of the message (``ErrorName: ...`` naming the file, config key, column or rows),
* that no run folder, ``.incomplete-*`` folder or temporary folder is left behind (a mismatching
  reproduction, exit 3, is kept: it is the validator's evidence), and
* that the command leaves every file that was under ``reports`` before it ran untouched, byte for byte.

A case is a :class:`Case`: a name, the issue item it keeps fixed, a ``prepare`` function that breaks the
workspace and returns the command line, the exit code and a regular expression for the first line of
stderr. Add a case by appending to ``CASES`` in the section of its item.
"""

from __future__ import annotations

import errno
import json
import os
import re
import shutil
import socket
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from conftest import Workspace

import creditsurv
import creditsurv.report
from creditsurv import StaleRunWarning
from creditsurv.cli import main
from creditsurv.runs import remove_stale_incomplete


@dataclass(frozen=True)
class Case:
    """One bad input or fault and what the command line must do about it."""

    name: str
    item: str
    prepare: Callable[[Workspace], list[str]]
    exit_code: int
    first_line: str
    keeps: str | None = None  # a folder name pattern under reports that the case may leave (exit 3's evidence)
    own_process: bool = False  # run ``python -m creditsurv`` in a subprocess (signals), with ``ws.env`` and TMPDIR


CASES: list[Case] = []


def case(item: str, exit_code: int, first_line: str, keeps: str | None = None, own_process: bool = False):
    """Register the decorated ``prepare`` function as a case."""

    def register(prepare):
        CASES.append(Case(prepare.__name__, item, prepare, exit_code, first_line, keeps, own_process))
        return prepare

    return register


# ====================================================================== the record (items 1-4)


def _reproduce(ws, *extra) -> list[str]:
    return ["reproduce", str(ws.earlier_run), "--out", str(ws.reports / "reproductions"), *extra]


def _edit_scenario(ws) -> None:
    ws.edit_table("scenarios/baseline.csv", lambda f: f.assign(unemployment_rate=f["unemployment_rate"] + 0.1))


@case("1", 1, r"^RunError: cannot reproduce .*: 1 problem with the recorded inputs: scenarios\[0\]\.path: .*baseline\.csv: changed since the run")
def scenario_changed_after_the_run(ws):
    _edit_scenario(ws)
    return _reproduce(ws)


@case("1", 0, r"", keeps=r"2024-12_[0-9a-f]{10}")
def scenario_changed_is_a_new_run_not_a_refusal(ws):
    # The scenario file is part of the run's identity: a changed one makes a run of its own.
    _edit_scenario(ws)
    return ["run", str(ws.config)]


@case("1", 1, r"^RunError: cannot reproduce .*: 1 problem with the recorded inputs: inputs\.loans\.path: .*loans\.parquet: missing")
def input_deleted_after_the_run(ws):
    (ws.book / "loans.parquet").unlink()
    return _reproduce(ws)


@case("2", 3, r"^ReproduceMismatch: .*: 1 problem with the run folder against its manifest: loan_ecl\.parquet: changed since the run")
def output_edited_after_the_run(ws):
    path = ws.earlier_run / "loan_ecl.parquet"
    frame = pd.read_parquet(path)
    frame.loc[0, "ecl_reported"] *= 2
    frame.to_parquet(path, index=False)
    return _reproduce(ws)


@case("2", 3, r"^ReproduceMismatch: .*: 1 problem with the run folder against its manifest: report\.html: missing")
def report_deleted_after_the_run(ws):
    (ws.earlier_run / "report.html").unlink()
    return _reproduce(ws)


@case("2", 3, r"^ReproduceMismatch: .*: 1 problem with the run folder against its manifest: notes\.txt: not an output of the run")
def extra_file_in_the_run_folder(ws):
    (ws.earlier_run / "notes.txt").write_text("added after the run\n")
    return _reproduce(ws)


@case("3", 1, r"^RunError: cannot reproduce .*: 1 problem with the recorded inputs: inputs\.macro\.path: .*macro_history\.csv: missing or anywhere under")
def inputs_folder_lacks_a_recorded_file(ws):
    moved = ws.root / "moved"
    shutil.copytree(ws.book, moved)
    (moved / "macro_history.csv").unlink()
    shutil.rmtree(ws.book)
    return _reproduce(ws, "--inputs", str(moved))


@case("3", 1, r"^RunError: --inputs .*nowhere: no such folder")
def inputs_folder_does_not_exist(ws):
    return _reproduce(ws, "--inputs", str(ws.root / "nowhere"))


def _edit_manifest(ws, change) -> None:
    path = ws.earlier_run / "manifest.json"
    data = json.loads(path.read_text())
    changed = change(data)
    path.write_text(json.dumps(data if changed is None else changed))




def _manifest_without(key):
    def prepare(ws):
        _edit_manifest(ws, lambda d: d.__delitem__(key))
        return _reproduce(ws)

    prepare.__name__ = f"manifest_without_{key}"
    return prepare


for _key in ("inputs", "outputs", "config_resolved", "versions"):
    case("4", 1, rf"^RunError: .*manifest\.json: 1 problem with the manifest: {_key}: missing")(_manifest_without(_key))


@case("4", 1, r"^RunError: .*manifest\.json: a manifest must be a JSON object, got a JSON list")
def manifest_holding_a_json_list(ws):
    _edit_manifest(ws, lambda d: [d])
    return _reproduce(ws)


@case("4", 1, r"^RunError: .*manifest\.json: 1 problem with the manifest: inputs: expected a list, got")
def manifest_inputs_as_an_object(ws):
    _edit_manifest(ws, lambda d: d.update(inputs={i["input"]: i for i in d["inputs"]}))
    return _reproduce(ws)


@case("4", 1, r"^RunError: .*manifest\.json: 1 problem with the manifest: config_resolved: its SHA-256 no longer matches")
def manifest_config_edited(ws):
    _edit_manifest(ws, lambda d: d["config_resolved"]["loss"]["lgd"].update(floor=0.0))
    return _reproduce(ws)


@case("4", 1, r"^RunError: .*manifest\.json: manifest schema version 7 cannot be read by creditsurv")
def manifest_from_a_later_version(ws):
    _edit_manifest(ws, lambda d: d.update(schema_version=7))
    return _reproduce(ws)


@case("4", 1, r"^RunError: .*manifest\.json: schema version 1 records absolute input paths")
def manifest_of_schema_version_1(ws):
    def to_version_1(d):
        del d["schema_version"], d["config_dir"]

    _edit_manifest(ws, to_version_1)
    return _reproduce(ws)


@case("4", 1, r"^RunError: .*: not a complete run folder \(no manifest\.json\)")
def run_folder_without_manifest(ws):
    (ws.earlier_run / "manifest.json").unlink()
    return _reproduce(ws)


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


@case("6", 1, r"^ModelError: model\.path: .*thin_model\.json: too few events behind the saved model: default: 12 events for 10 parameters")
def saved_model_fitted_on_too_few_events(ws):
    # A model fitted elsewhere on a dozen defaults is checked against today's limits before it is used.
    model = json.loads((ws.earlier_run / "hazard_model.json").read_text())
    model["fit"]["events"]["default"] = 12
    (ws.root / "thin_model.json").write_text(json.dumps(model))
    return ["run", str(ws.edit_config(lambda d: d["model"].update(path="thin_model.json")))]


@case("7", 1, r"^DataCheckError: 1 data check failed on .*loans\.parquet: note_rate_implausible: 2000 rows")
def percent_rates_read_as_decimal(ws):
    return ["run", str(ws.edit_config(lambda d: d["inputs"]["loans"].update(rate_unit="decimal")))]


@case("7", 1, r"^DataCheckError: 1 data check failed on .*macro_history\.csv: macro_values_negative: 1 months \(e\.g\. month=2019-06-01")
def negative_unemployment(ws):
    ws.edit_table("macro_history.csv", lambda m: m.assign(unemployment_rate=m["unemployment_rate"].where(m["month"] != "2019-06", -1.0)))
    return ["run", str(ws.config)]


@case("7", 1, r"^ProjectionError: 1 problem with the scenario paths: scenario 'downside' .*downside\.csv\): series 'hpi_north' is negative in months 2026-0[1-9]")
def negative_house_prices_in_a_scenario(ws):
    # A scenario is checked as the history is (checks.non_negative_series), before the fit.
    def dip(f):
        row = f.index[f["month"].astype(str).str.startswith("2026")][0]
        f.loc[row, "hpi_north"] = -5.0
        return f

    ws.edit_table("scenarios/downside.csv", dip)
    return ["run", str(ws.config)]



# item 8
# Problems are found before the fit: each is the preflight's DataError (or the scenario check's
# ProjectionError) naming the config key, the file and the closest name, raised before any data check or fit.



@case("8", 1, r"^DataError: 1 problem with the config against the input data: outputs\.prior_run: .*book is not a complete run folder \(no manifest\.json or loan_ecl\.parquet\)")
def prior_run_that_is_not_a_run(ws):
    # Found before the checks and the fit, not when the movement or the record reads it.
    return ["run", str(ws.edit_config(lambda d: d["outputs"].update(prior_run="book")))]

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



# ====================================================================== the CECL basis (issue 14, item 6)


def _on_cecl(d, forecast_months=24):
    d["accounting"] = "cecl"
    d["cecl"] = {"forecast_months": forecast_months, "reversion_months": 12}


@case("14.6", 2, r"^ConfigError: .*config\.yaml.*cecl: accounting cecl needs the reasonable and supportable forecast period")
def cecl_without_its_periods(ws):
    return ["run", str(ws.edit_config(lambda d: d.update(accounting="cecl")))]


@case("14.6", 1, r"^ProjectionError: 1 problem with the scenario paths: scenario 'downside' \(\S*downside\.csv\): the path ends at 2026-06, before the end of the reasonable and supportable forecast period: cecl\.forecast_months 24 after the reporting month 2024-12 needs the path to reach 2026-12")
def cecl_forecast_period_beyond_a_scenario_path(ws):
    ws.edit_table("scenarios/downside.csv", lambda m: m[m["month"] <= "2026-06"])
    return ["run", str(ws.edit_config(_on_cecl))]


@case("14.6", 1, r"^RunError: outputs\.prior_run: \S+ is on the IFRS 9 basis \(accounting: ifrs9\) and this run on CECL")
def cecl_run_after_an_ifrs9_prior_run(ws):
    def change(d):
        _on_cecl(d)
        d["outputs"]["prior_run"] = f"reports/{ws.earlier_run.name}"

    return ["run", str(ws.edit_config(change))]


# ====================================================================== faults leave nothing behind (items 9-12)


@case("9", 143, r"^stopped by SIGTERM", own_process=True)
def sigterm_during_fit(ws):
    ws.env["CREDITSURV_TEST_KILL_AT"] = "fit"
    return ["run", str(ws.config)]


@case("9", 143, r"^stopped by SIGTERM", own_process=True)
def sigterm_while_writing_report(ws):
    ws.env["CREDITSURV_TEST_KILL_AT"] = "report"
    return ["run", str(ws.config)]


@case("9", 129, r"^stopped by SIGHUP", own_process=True)
def sighup_during_projection(ws):
    ws.env.update(CREDITSURV_TEST_KILL_AT="projection", CREDITSURV_TEST_KILL_SIGNAL="SIGHUP")
    return ["run", str(ws.config)]


@case("9", 130, r"^interrupted", own_process=True)
def ctrl_c_during_validation(ws):
    ws.env.update(CREDITSURV_TEST_KILL_AT="validation", CREDITSURV_TEST_KILL_SIGNAL="SIGINT")
    return ["run", str(ws.config)]


@case("10", 1, r"^OutputError: .*notes\.txt: is a file, not a folder")
def outputs_dir_names_a_file(ws):
    (ws.root / "notes.txt").write_text("not a folder\n")
    return ["run", str(ws.edit_config(lambda d: d["outputs"].update(dir=str(ws.root / "notes.txt"))))]


@case("10", 1, r"^OutputError: .*missing/checks\.csv: cannot write the check table: the folder .*missing does not exist")
def check_out_into_a_missing_folder(ws):
    return ["check", str(ws.config), "--out", str(ws.root / "missing" / "checks.csv")]


@case("10", 1, r"^OutputError: .*report\.html: the run was not written \(No space left on device\)")
def disk_full_while_writing_the_report(ws):
    def full(path, tables, meta):
        Path(path).write_bytes(b"<html>")  # a partial page, then the disk fills
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))

    ws.monkeypatch.setattr(creditsurv.report, "write_report", full)
    return ["run", str(ws.config)]


@case("10", 1, r"^OutputError: .*locked.*cannot create the run folder \(Permission denied\)")
def read_only_outputs_folder(ws):
    if os.geteuid() == 0:
        pytest.skip("runs as root, whom a read-only folder does not stop (outputs_dir_names_a_file covers the path)")
    locked = ws.root / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    return ["run", str(ws.edit_config(lambda d: d["outputs"].update(dir=str(locked))))]


def test_a_killed_run_is_swept_at_the_next_start(workspace):
    # SIGKILL cannot be caught: the killed run leaves its .incomplete folder (with its owner file) ...
    workspace.env.update(CREDITSURV_TEST_KILL_AT="projection", CREDITSURV_TEST_KILL_SIGNAL="SIGKILL")
    code, err = run_own_process(["run", str(workspace.config)], workspace)
    assert code == -9, err  # subprocess's convention for a child ended by signal 9
    (left,) = workspace.reports.glob(".incomplete-*")
    assert list(workspace.scratch.glob("creditsurv-duckdb-*")), "the killed run's spill folder stays until the next start"
    owner = json.loads((left / ".owner.json").read_text())
    assert owner["host"] == socket.gethostname() and owner["pid"] > 0
    # ... which the next run of this host removes, saying so, before it builds its own.
    with pytest.warns(StaleRunWarning, match=rf"{left.name}: removed an interrupted run's folder \(process {owner['pid']} "):
        assert main(["fit", str(workspace.config)]) == 0
    assert not list(workspace.reports.glob(".incomplete-*"))
    assert not list(workspace.scratch.iterdir()), "the next start removes the killed run's spill folder too"


def test_unfinished_folders_of_other_hosts_and_running_processes_are_left_alone(tmp_path):
    other = tmp_path / ".incomplete-2024-12_abc-00000001"
    other.mkdir()
    (other / ".owner.json").write_text(json.dumps({"host": "another-host", "pid": 1, "started": "2026-01-01T00:00:00"}))
    alive = tmp_path / ".incomplete-2024-12_abc-00000002"
    alive.mkdir()
    (alive / ".owner.json").write_text(json.dumps({"host": socket.gethostname(), "pid": os.getppid(), "started": "x"}))
    with pytest.warns(StaleRunWarning, match=r"left alone 1 unfinished run folder.*another-host") as record:
        assert remove_stale_incomplete(tmp_path) == []
    assert len(record) == 1 and other.exists() and alive.exists()


@case("11", 2, r"^ConfigError: .*config\.yaml.*\bmodle\b.*did you mean 'model'")
def misspelt_top_level_key(ws):
    ws.data["modle"] = ws.data.pop("model")
    return ["run", str(ws.edit_config(lambda d: None))]


@case("11", 1, r"^DataError: .*inputs\.panel\.path: .*panel\.parquet has no rows with a readable month")
def empty_panel(ws):
    panel = pq.read_table(ws.book / "panel.parquet")
    pq.write_table(panel.slice(0, 0), ws.book / "panel.parquet")  # the columns and types kept, no rows
    return ["run", str(ws.config)]


def _first_loans(column, value, n=5):
    def change(loans):
        loans.loc[loans.sort_values("loan_id").index[:n], column] = value

    return change


@case("11", 1, r"^FeatureError: .*'dti': \d+ rows have no value .*column 'dti' of the loan table \(inputs\.loans\), loans QL0000001, ")
def missing_covariate_values(ws):
    ws.edit_table("loans.parquet", _first_loans("dti", np.nan))
    return ["run", str(ws.config)]


@case("11", 1, r"^FeatureError: .*'dti': log of non-positive values in \d+ rows.*column 'dti' of the loan table.*loans QL0000001, ")
def log_of_zeros(ws):
    ws.edit_table("loans.parquet", _first_loans("dti", 0.0))
    return ["run", str(ws.edit_config(lambda d: d["model"]["covariates"][2].update(transform="log")))]


@case("11", 1, r"^DataCheckError: 1 data check failed on .*loans\.parquet: note_rate_implausible: 3 rows \(e\.g\. loan_id=")
def note_rate_of_a_million_percent(ws):
    # A data problem, exit 1, naming the file, the check and the first loan (not a feature error blamed on current_ltv).
    ws.edit_table("loans.parquet", _first_loans("note_rate", 1e6, n=3))
    return ["run", str(ws.config)]


@case("12", 1, r"^DataError: inputs\.loans\.path: .*loans\.csv.*This file is not utf-8 encoded")
def latin1_loan_table(ws):
    loans = pd.read_parquet(ws.book / "loans.parquet")
    loans["region"] = loans["region"].astype(str)
    loans.loc[loans.index[:3], "region"] = "Zürich"
    loans.to_csv(ws.book / "loans.csv", index=False, encoding="latin-1")
    return ["run", str(ws.edit_config(lambda d: d["inputs"]["loans"].update(path=str(ws.book / "loans.csv"))))]


@case("12", 0, r"^$", keeps=r"2024-12_[0-9a-f]{10}")
def segment_names_that_look_like_maths_or_hidden_labels(ws):
    # matplotlib reads "$...$" as maths (and "$x^$" fails to parse) and leaves labels starting with "_" out of legends.
    def rename(loans):
        levels = sorted(loans["channel"].astype(str).unique())
        names = dict(zip(levels, ["$x^$", "$100k-$250k", "_north"]))
        loans["channel"] = loans["channel"].astype(str).map(lambda v: names.get(v, v))

    ws.edit_table("loans.parquet", rename)
    return ["run", str(ws.edit_config(lambda d: d["segments"].update(column="channel")))]


@case("12", 2, r"^ConfigError: .*config\.yaml: the config file is [\d,]+ bytes, above the limit of 1,048,576 bytes")
def config_of_many_megabytes(ws):
    # A list pasted into the config: 20,000 lines of 100 characters, about 2 MB.
    return ["run", str(ws.edit_config(lambda d: d.update(notes=["x" * 100] * 20_000)))]


# ====================================================================== no look-ahead in panel covariates


@case("look-ahead", 1, r"^DataError: .*model\.covariates\[5\]\.column: 'days_past_due' is a panel column, a month-end value: .* lag: 1")
def same_month_panel_covariate(ws):
    # Month-end days past due of the outcome's own month: at or above 90 in every default month.
    return ["run", str(ws.edit_config(lambda d: d["model"]["covariates"].append({"name": "dpd", "column": "days_past_due"})))]


@case("look-ahead", 1, r"^DataError: .*model\.covariates\[5\]\.column: column 'note_rate' is not in the panel .*\(lag applies to macro series and panel columns\)")
def lag_on_a_loan_table_column(ws):
    return ["run", str(ws.edit_config(lambda d: d["model"]["covariates"].append({"name": "r", "column": "note_rate", "lag": 1})))]


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
    """A fresh copy of the corpus workspace; temporary files of the case go to a folder of its own.

    ``ws.monkeypatch`` lets a case replace a public function (a full disk, say); it is undone after the case.
    """
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(scratch))
    ws = corpus_book.copy_to(tmp_path / "ws")
    # The earlier run was made from this very config and files; another seed (only the validation's bootstrap
    # reads it) makes a run of the case a new run rather than the earlier one's twin.
    ws.edit_config(lambda d: d.update(seed=d.get("seed", 0) + 1))
    ws.scratch = scratch
    ws.monkeypatch = monkeypatch
    return ws


def run_own_process(argv: list[str], ws: Workspace) -> tuple[int, str]:
    """``python -m creditsurv argv`` in a subprocess, with the case's environment and TMPDIR in its scratch folder."""
    package_root = str(Path(creditsurv.__file__).resolve().parent.parent)
    env = {**os.environ, **ws.env, "TMPDIR": str(ws.scratch)}
    env["PYTHONPATH"] = os.pathsep.join(p for p in (package_root, env.get("PYTHONPATH")) if p)
    # Python's own Ctrl-C handler, as in a terminal: a shell that starts the suite in the background hands its
    # children an ignored SIGINT, and a Python started with SIGINT ignored keeps ignoring it.
    main = (
        "import runpy, signal, sys; signal.signal(signal.SIGINT, signal.default_int_handler); "
        "sys.argv[0] = 'creditsurv'; runpy.run_module('creditsurv', run_name='__main__', alter_sys=True)"
    )
    done = subprocess.run([sys.executable, "-c", main, *argv], check=False, env=env, capture_output=True, text=True, timeout=600)
    return done.returncode, done.stderr


@pytest.mark.parametrize("bad", CASES, ids=[c.name for c in CASES])
def test_bad_input_or_fault(bad: Case, workspace, capsys):
    argv = bad.prepare(workspace)
    before = workspace.snapshot()  # after the breakage: what the command itself must leave untouched
    capsys.readouterr()
    if bad.own_process:
        code, err = run_own_process(argv, workspace)
    else:
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



def test_the_corpus_has_a_case_for_every_item_and_at_least_60():
    # The corpus's promise: one case or more per item of the record, the numbers and the faults (1-12), one per
    # data check of severity error (test_every_error_check_has_a_case), at least 60 in all.
    assert len(CASES) >= 60, len(CASES)
    assert {str(i) for i in range(1, 13)} <= {c.item for c in CASES}
