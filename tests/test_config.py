"""Tests of creditsurv.config: every kind of config error and its message."""

from __future__ import annotations

import copy
from pathlib import Path

import pytest

from creditsurv.config import (
    config_from_dict,
    config_sha256,
    config_to_dict,
    load_config,
)
from creditsurv.errors import ConfigError

MINIMAL = {
    "as_of": "2021-01",
    "inputs": {"panel": {"path": "data/panel.parquet"}, "loans": {"path": "data/loans.csv"}},
    "windows": {"development": {"start": "2020-01", "end": "2020-12"}},
}


def _problems(change, tmp_path) -> list[str]:
    data = copy.deepcopy(MINIMAL)
    change(data)
    with pytest.raises(ConfigError) as info:
        config_from_dict(data, base_dir=tmp_path)
    assert str(info.value).startswith("config: ")
    # Several problems are listed one per line; a single one stays on the message's first line.
    for problem in info.value.problems:
        assert (f"  - {problem}" if len(info.value.problems) > 1 else f": {problem}") in str(info.value)
    return info.value.problems


@pytest.mark.parametrize(
    "change, expected",
    [
        pytest.param(
            lambda d: d.update(as_f="2021-01"),
            "as_f: unknown key (valid keys: as_of, inputs, windows, name, currency, default_definition, events, arrears, model, "
            "collateral, scenarios, scenario_extension, loss, accounting, cecl, staging, segments, validation, outputs, engine, "
            "duckdb, spark, checks, seed, synthetic_data); did you mean 'as_of'?",
            id="unknown-top-level",
        ),
        pytest.param(
            lambda d: d["inputs"]["panel"].update(colums={}),
            "inputs.panel.colums: unknown key (valid keys: path, format, table, columns); did you mean 'columns'?",
            id="unknown-nested",
        ),
        pytest.param(
            lambda d: d.update(model={"covariates": [{"name": "a", "column": "b"}, {"name": "c", "column": "d", "tranform": "log"}]}),
            "model.covariates[1].tranform: unknown key (valid keys: name, column, macro, lag, kind, transform, "
            "floor, cap, bins, reference, before_first, before_first_column, projection, revert_to, revert_months); did you mean 'transform'?",
            id="unknown-in-list-item",
        ),
        pytest.param(
            lambda d: d.update(
                scenarios=[{"name": "baseline", "weight": 1.0, "path": "b.csv"}], staging={"sicr_scenario": "baseine"}
            ),
            "staging.sicr_scenario: 'baseine' is not a configured scenario; did you mean 'baseline'?",
            id="sicr-scenario-unknown",
        ),
        pytest.param(
            lambda d: d["windows"].update(fit_on="development_and_out_of_time"),
            "windows.fit_on: development_and_out_of_time needs windows.out_of_time",
            id="fit-on-both-without-out-of-time",
        ),
        pytest.param(lambda d: d.update(seed="abc"), "seed: expected an integer, got 'abc'", id="wrong-type"),
        pytest.param(lambda d: d.update(seed=True), "seed: expected an integer, got True", id="bool-is-not-int"),
        pytest.param(lambda d: d.update(seed=-1), "seed: -1 is below the minimum 0", id="below-minimum"),
        pytest.param(
            lambda d: d.update(loss={"lgd": {"constant": 1.5}}),
            "loss.lgd.constant: 1.5 is above the maximum 1.0",
            id="above-maximum",
        ),
        pytest.param(
            lambda d: d.update(model={"kind": "multinomal"}),
            "model.kind: 'multinomal' is not one of multinomial, cause_specific, multi_state; did you mean 'multinomial'?",
            id="bad-literal",
        ),
        pytest.param(lambda d: d.pop("as_of"), "as_of: missing required key (reporting month, YYYY-MM)", id="missing"),
        pytest.param(
            lambda d: d["inputs"].pop("loans"), "inputs.loans: missing required key (loan table)", id="missing-nested"
        ),
        pytest.param(lambda d: d.update(as_of="2021-13"), "as_of: expected a month YYYY-MM, got '2021-13'", id="bad-month"),
        pytest.param(
            lambda d: d.update(
                scenarios=[{"name": "a", "weight": 0.5, "path": "a.csv"}, {"name": "b", "weight": 0.4, "path": "b.csv"}]
            ),
            "scenarios: scenario weights must sum to 1, got 0.9 (a=0.5, b=0.4)",
            id="weights",
        ),
        pytest.param(
            lambda d: d["windows"]["development"].update(end="2019-01"),
            "windows.development: end 2019-01 is before start 2020-01",
            id="window-order",
        ),
        pytest.param(
            lambda d: d["inputs"]["panel"].update(path="data/panel.txt"),
            "inputs.panel: path: cannot tell the format of 'panel.txt' from its suffix; set format to parquet, csv or duckdb",
            id="unknown-suffix",
        ),
        pytest.param(
            lambda d: d["inputs"]["panel"].update(path="book.duckdb"),
            "inputs.panel: table: required when the source is a DuckDB database file",
            id="duckdb-needs-table",
        ),
        pytest.param(
            lambda d: d.update(arrears={"starts": [60, 30]}),
            "arrears: starts: must increase strictly, got [60, 30]",
            id="arrears-order",
        ),
        pytest.param(
            lambda d: d.update(checks={"severity": {"month_gaps": "warn"}}),
            "checks.severity.month_gaps: 'warn' is not one of error, warning, off; did you mean 'warning'?",
            id="severity-literal",
        ),
    ],
)
def test_each_problem_has_its_message(tmp_path, change, expected):
    assert _problems(change, tmp_path) == [expected]


def test_several_problems_in_one_error(tmp_path):
    problems = _problems(lambda d: d.update(seed=-1, as_of="soon", bogus=1), tmp_path)
    assert len(problems) == 3
    assert problems[0].startswith("bogus: unknown key")
    assert problems[1:] == ["as_of: expected a month YYYY-MM, got 'soon'", "seed: -1 is below the minimum 0"]


def _write(tmp_path: Path, text: str, name="run.yaml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


@pytest.mark.parametrize(
    "text, pattern",
    [
        pytest.param("as_of: 2021-01\ninputs: [a, b\n", r"YAML syntax error at line 3, column 1: .*expected ',' or ']'", id="syntax"),
        pytest.param(
            "as_of: 2021-01\nname: a\nas_of: 2021-02\n",
            r"YAML syntax error at line 3, column 1: while reading a mapping found the key 'as_of' twice \(first on line 1\)",
            id="duplicate-key",
        ),
        pytest.param("", r"the config file is empty", id="empty"),
        pytest.param("# only a comment\n", r"the config file is empty", id="comment-only"),
        pytest.param("- a\n- b\n", r"the config must be a mapping of keys, got list", id="not-a-mapping"),
    ],
)
def test_yaml_file_problems(tmp_path, text, pattern):
    path = _write(tmp_path, text)
    with pytest.raises(ConfigError, match=rf"^{path}: {pattern}"):
        load_config(path)


def test_missing_config_file(tmp_path):
    with pytest.raises(ConfigError, match=r"nope\.yaml: config file not found"):
        load_config(tmp_path / "nope.yaml")


def test_problems_in_a_file_are_labelled_with_the_file(tmp_path):
    path = _write(tmp_path, "as_of: 2021-01\nseed: -3\n")
    with pytest.raises(ConfigError) as info:
        load_config(path)
    assert str(info.value).startswith(f"{path}: 3 problems with the config:")
    assert info.value.problems == [
        "inputs: missing required key (where the data are and how columns map)",
        "windows: missing required key (development and out-of-time windows)",
        "seed: -3 is below the minimum 0",
    ]


YAML_CONFIG = """\
as_of: 2021-01
inputs:
  panel: {path: data/panel.parquet}
  loans: {path: ../shared/loans.csv}
  macro: {path: /abs/macro.csv}
windows:
  development: {start: 2020-01, end: 2020-12}
model:
  covariates:
    - {name: u, macro: unemployment_rate, lag: 2}
"""


def test_relative_paths_resolve_against_the_config_folder(tmp_path, monkeypatch):
    folder = tmp_path / "configs"
    folder.mkdir()
    path = _write(folder, YAML_CONFIG)
    monkeypatch.chdir(tmp_path)  # the working folder must not matter
    cfg = load_config(Path("configs") / "run.yaml")
    assert cfg.inputs.panel.path == folder / "data" / "panel.parquet"
    assert cfg.inputs.loans.path == tmp_path / "shared" / "loans.csv"
    assert cfg.inputs.macro.path == Path("/abs/macro.csv")
    assert cfg.source == path
    assert cfg.as_of == 2021 * 12 and str(cfg.as_of) == "2021-01"


def test_defaults_are_filled(tmp_path):
    cfg = config_from_dict(MINIMAL, base_dir=tmp_path)
    assert cfg.default_definition.days_past_due == 90
    assert cfg.events.paid_off_balance == 0.005
    assert cfg.inputs.loans.rate_unit == "percent"
    assert cfg.inputs.panel.columns.status is None
    assert cfg.checks.severity == {}


def test_config_is_frozen(tmp_path):
    cfg = config_from_dict(MINIMAL, base_dir=tmp_path)
    with pytest.raises(AttributeError):
        cfg.as_of = 5  # type: ignore[misc]


def test_to_dict_and_sha256_are_stable(tmp_path):
    folder = tmp_path / "configs"
    folder.mkdir()
    path = _write(folder, YAML_CONFIG)
    first, second = load_config(path), load_config(path)
    plain = config_to_dict(first)
    assert plain == config_to_dict(second)
    assert plain["as_of"] == "2021-01"
    assert plain["inputs"]["panel"]["path"] == str(folder / "data" / "panel.parquet")
    assert plain["model"]["covariates"][0]["lag"] == 2
    assert config_sha256(first) == config_sha256(second)
    assert len(config_sha256(first)) == 64
    # round trip: the plain form builds the same config wherever it is read from
    assert config_from_dict(plain, base_dir=tmp_path / "elsewhere") == first
    # the recorded form: paths relative to the config's folder, so a copy of the folder elsewhere hashes the same
    relative = config_to_dict(first, paths="relative")
    assert relative["inputs"]["panel"]["path"] == "data/panel.parquet"
    again = config_from_dict(relative, base_dir=tmp_path / "elsewhere")
    assert config_to_dict(again)["inputs"]["panel"]["path"] == str(tmp_path / "elsewhere" / "data" / "panel.parquet")
    assert config_sha256(again) == config_sha256(first)
    assert config_to_dict(first, paths="omit")["inputs"]["panel"]["path"] is None
    # and any change of value changes the hash
    changed = config_from_dict({**plain, "seed": plain["seed"] + 1}, base_dir=tmp_path)
    assert config_sha256(changed) != config_sha256(first)


def test_the_executors_python_is_named_once_and_the_driver_python_cannot_change(tmp_path):
    # The session is built inside the running process (docs/scaling.md, "The executors' Python").
    import sys

    two = {"spark.pyspark.python": "/opt/a/bin/python", "spark.executorEnv.PYSPARK_PYTHON": "/opt/b/bin/python"}
    assert _problems(lambda d: d.update(spark={"settings": two}), tmp_path) == [
        "spark: settings: spark.pyspark.python ('/opt/a/bin/python') and spark.executorEnv.PYSPARK_PYTHON "
        "('/opt/b/bin/python') name different Pythons for the executors; keep one"
    ]
    (problem,) = _problems(lambda d: d.update(spark={"settings": {"spark.pyspark.driver.python": "/opt/a/bin/python"}}), tmp_path)
    assert problem.startswith("spark: settings.spark.pyspark.driver.python: cannot apply: the driver is this creditsurv process")
    same = {"spark.pyspark.python": "/opt/a/bin/python", "spark.executorEnv.PYSPARK_PYTHON": "/opt/a/bin/python",
            "spark.pyspark.driver.python": sys.executable}  # fmt: skip
    data = {**MINIMAL, "spark": {"settings": same}}
    assert config_from_dict(data, base_dir=tmp_path).spark.settings == same


def test_a_model_refitted_on_both_windows_reads_them_and_says_its_backtest_is_in_sample(tmp_path):
    # Once validated the production model may be refitted on the development and out-of-time windows together:
    # the fit's row filter reaches the out-of-time end, and the validation pack labels the backtest in-sample.
    from creditsurv.model import development_window
    from creditsurv.validation import out_of_time_in_sample

    data = copy.deepcopy(MINIMAL)
    data["as_of"] = "2022-06"
    data["windows"]["out_of_time"] = {"start": "2021-01", "end": "2022-06"}
    held_out = config_from_dict(data, base_dir=tmp_path)
    data["windows"]["fit_on"] = "development_and_out_of_time"
    both = config_from_dict(data, base_dir=tmp_path)
    assert development_window(held_out)[1] == (held_out.windows.development.start, held_out.windows.development.end)
    assert development_window(both)[1] == (both.windows.development.start, both.windows.out_of_time.end)
    assert not out_of_time_in_sample(held_out) and out_of_time_in_sample(both)
