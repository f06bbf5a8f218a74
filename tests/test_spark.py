"""The Spark engine against the DuckDB engine: same checks, same fit, same loan-level PD and ECL.

The reference for every number here is the DuckDB engine on the same files;
tolerances are relative, 1e-9 (sums are added in another order on Spark).
"""

from __future__ import annotations

import dataclasses
import os
import re
import shutil
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
import yaml

pytest.importorskip("pyspark")
if shutil.which("java") is None:
    pytest.skip("no Java runtime on PATH: Spark needs one (.ci/run installs it)", allow_module_level=True)

from conftest import demo_config_data  # noqa: E402
from test_events import BOOK, CURE_BOOK  # noqa: E402 - the hand-labelled loans of the event tests
from test_events import _config as events_config  # noqa: E402
from test_panel import BAD_BOOKS, MACRO_COVARIATE  # noqa: E402 - the crafted bad books of the DuckDB tests

from creditsurv import pipeline  # noqa: E402
from creditsurv.config import (  # noqa: E402
    Baseline,
    Covariate,
    SparkSettings,
    load_config,
    run_context,
)
from creditsurv.engines import Engine, open_engine, spark_session, spark_sql  # noqa: E402
from creditsurv.errors import DataCheckError  # noqa: E402
from creditsurv.loss import expected_credit_loss_by_partition  # noqa: E402
from creditsurv.model import hazard_source  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
RTOL = 1e-9


@pytest.fixture(scope="session")
def spark():
    """One local Spark session for the module: two cores, two shuffle partitions, no UI."""
    session, created = spark_session(
        SparkSettings(master="local[2]", partitions=2, settings={"spark.ui.enabled": "false", "spark.driver.memory": "2g"})
    )
    session.sparkContext.setLogLevel("FATAL")
    yield session
    if created:
        session.stop()


@pytest.fixture(scope="session")
def spark_book(corpus_book, tmp_path_factory):
    # The small book (2,000 loans, busy defaults) keeps the engines' comparisons quick; it has events
    # enough for the demo model's terms.
    folder = tmp_path_factory.mktemp("spark_book")
    data = demo_config_data(corpus_book.book, folder / "reports")
    data["spark"] = {"master": "local[2]", "partitions": 3}
    path = folder / "config.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return load_config(path)


def _ecl(cfg, engine, book, model):
    ctx = run_context(cfg)
    paths = pipeline.scenario_paths(ctx, engine, model, book, pipeline.preflight(ctx, engine))
    annual = []
    result = expected_credit_loss_by_partition(
        engine, book, model, paths, writers={"term": annual.append}, **ctx.ecl_options()
    )
    return result, pa.concat_tables(annual)


_EVENT_TABLES = (("loan_outcomes", "loan_id"), ("loan_months", "loan_id, month_idx"))


def _run(cfg, tmp, engine_name, reference_model=None, reference_multi=None):
    """Checks, events, fit, book and ECL of one engine, as the pipeline's run calls them.

    The same code for both engines: only ``cfg.engine`` differs. With
    ``reference_model`` the engine projects that model instead of its own fit,
    so that the partitioned ECL can be compared with the DuckDB engine's on the
    very same coefficients.
    """
    cfg = dataclasses.replace(cfg, engine=engine_name)
    out = {}
    engine, checks = pipeline.open_checked(cfg)
    with engine:
        assert engine.name == engine_name and isinstance(engine, Engine)
        model = hazard_source(cfg, engine, tmp)
        book, history, counts = engine.book_at_as_of(cfg.segments.column), engine.macro_history(), engine.event_counts()
        for name, key in _EVENT_TABLES:
            out[name] = engine.frame(f"SELECT * FROM {name} ORDER BY {key}")
        # Spark projects the DuckDB engine's fit, so that only the partitioning differs; each engine's own fit
        # end to end is the standalone cluster's run below.
        out["ecl"], out["annual"] = _ecl(cfg, engine, book, reference_model or model)
        # The multi-state model on the same open engine, its projection on a quarter of the book. Its terms are
        # discrete, so each origin state's rows collapse to covariate patterns in SQL: the engines still run the
        # same labelling, counts, first pass and kernel, at a fraction of the Spark jobs' time.
        discrete = dataclasses.replace(
            cfg.model, kind="multi_state", baseline=Baseline(kind="age_bands", edges=(12, 36)),
            covariates=(Covariate(name="score", column="credit_score", kind="bins", bins=(660.0, 720.0)),
                        Covariate(name="region", column="region", kind="categorical")),
        )  # fmt: skip
        out["multi"] = hazard_source(dataclasses.replace(cfg, model=discrete), engine, tmp)
        part = book.iloc[::4].reset_index(drop=True)
        out["ecl_multi"], _ = _ecl(cfg, engine, part, reference_multi or out["multi"])
    out.update(checks=checks, model=model, book=book, history=history, counts=counts)
    return out


@pytest.fixture(scope="session")
def both_engines(spark, spark_book, tmp_path_factory):
    tmp = tmp_path_factory.mktemp("fit")
    duck = _run(spark_book, tmp, "duckdb")
    return duck, _run(spark_book, tmp, "spark", reference_model=duck["model"], reference_multi=duck["multi"])


def _close(a: pd.DataFrame, b: pd.DataFrame, atol: float = 0.0) -> None:
    pd.testing.assert_frame_equal(a, b, check_exact=False, rtol=RTOL, atol=atol)


# The segment tables' conditional PDs of the far years are differences of nearly equal
# pooled cumulative PDs (values down to 1e-11): there a last-bit difference in the pooled
# sums shows at ~1e-9 relative, so those tables are also allowed 1e-12 absolute on
# probabilities. The per-loan conditional PD is checked without that floor.
PROB_ATOL = 1e-12


# --------------------------------------------------------------------------- the book, end to end


def test_checks_events_book_and_macro_history_are_the_same(both_engines):
    duck, spark = both_engines
    pd.testing.assert_frame_equal(duck["checks"], spark["checks"])
    pd.testing.assert_frame_equal(duck["counts"], spark["counts"])
    pd.testing.assert_frame_equal(duck["book"], spark["book"])  # same rows, columns, order and dtypes
    pd.testing.assert_frame_equal(duck["history"], spark["history"])
    for name, _key in _EVENT_TABLES:
        pd.testing.assert_frame_equal(duck[name], spark[name])


def test_fit_gives_the_same_coefficients_and_standard_errors(both_engines):
    duck, spark = both_engines
    a, b = duck["model"], spark["model"]
    assert (a.n_rows, a.events, a.n_stored_rows, a.converged) == (b.n_rows, b.events, b.n_stored_rows, b.converged)
    assert a.spec.columns == b.spec.columns
    _close(a.params, b.params)
    _close(a.bse, b.bse)
    np.testing.assert_allclose(b.cov, a.cov, rtol=1e-8, atol=1e-14)
    assert b.loglik == pytest.approx(a.loglik, rel=1e-12)


def test_partitioned_ecl_equals_the_single_machine_one(both_engines):
    """Same coefficients, so only the partitioning differs."""
    duck, spark = both_engines
    a, b = duck["ecl"], spark["ecl"]
    assert len(a.loans) == len(b.loans) > 1000
    _close(a.loan_table(), b.loan_table())
    _close(a.projection.loans, b.projection.loans)
    _close(a.segments, b.segments)
    # segment tables combined from the partitions' pooled sums
    _close(a.projection.term_structure, b.projection.term_structure, atol=PROB_ATOL)
    _close(a.projection.speeds, b.projection.speeds)
    _close(a.projection.speed_multiples, b.projection.speed_multiples)
    # the long table arrives through the driver in loan order
    pa_a, pa_b = duck["annual"], spark["annual"]
    assert pa_a.column_names == pa_b.column_names and pa_a.num_rows == pa_b.num_rows
    _close(pa_a.to_pandas(), pa_b.to_pandas(), atol=PROB_ATOL)
    # the year's conditional PD adds the year's marginal PDs: 1e-9 relative even where survival is tiny
    np.testing.assert_allclose(pa_b["conditional_pd"].to_numpy(), pa_a["conditional_pd"].to_numpy(), rtol=RTOL, atol=0)


# --------------------------------------------------------------------------- the data checks on crafted bad books


def _compose(mutations):
    def mutate(p, lo, m):
        for f in mutations:
            p, lo, m = f(p, lo, m)
        return p, lo, m

    return mutate


# Every crafted defect of the DuckDB tests in one book, then each group on its own
# (a NULL month and a duplicate interact with the other checks' counts).
CRAFTED = {
    "every_defect": _compose([m for _n, m, *_ in BAD_BOOKS]),
    "keys_and_gaps": _compose([m for n, m, *_ in BAD_BOOKS if n in ("panel_keys_missing", "month_gaps", "duplicate_loan_months")]),
    "macro_only": _compose([m for n, m, *_ in BAD_BOOKS if n.startswith("macro_")]),
}


@pytest.mark.parametrize(
    # every defect read from CSV; Parquet registration with the other two groups
    "case, fmt", [("every_defect", "csv"), ("keys_and_gaps", "parquet"), ("macro_only", "parquet")]
)
def test_data_checks_fire_on_spark_exactly_as_on_duckdb(spark, panel_clean_book, panel_config_factory, case, fmt):
    panel, loans, macro = CRAFTED[case](*panel_clean_book)
    cfg = panel_config_factory(panel, loans, macro, fmt=fmt, model=MACRO_COVARIATE)
    with open_engine(cfg) as p:
        expected = p.run_checks()
    with open_engine(dataclasses.replace(cfg, engine="spark")) as p:
        got = p.run_checks()
    assert (expected["count"] > 0).sum() >= 3
    pd.testing.assert_frame_equal(got, expected)  # check, severity, count, examples, source, columns, description


def test_open_checked_raises_the_same_error(spark, panel_clean_book, panel_config_factory):
    panel, loans, macro = CRAFTED["keys_and_gaps"](*panel_clean_book)
    cfg = panel_config_factory(panel, loans, macro, model=MACRO_COVARIATE)
    with pytest.raises(DataCheckError) as duck:
        pipeline.open_checked(cfg)
    with pytest.raises(DataCheckError) as on_spark:
        pipeline.open_checked(dataclasses.replace(cfg, engine="spark"))
    assert str(on_spark.value) == str(duck.value)
    assert not spark.catalog.tableExists("panel_all")  # a failed open leaves no views behind


def test_cures_and_spells_are_labelled_alike(spark, tmp_path):
    # The hand-labelled loans (tests/test_events.py) with a cure period: both engines run the same SQL.
    panel = pd.concat([rows for rows, _ in BOOK + CURE_BOOK], ignore_index=True)
    loans = pd.DataFrame([fact for _, fact in BOOK + CURE_BOOK])
    dd = {"days_past_due": 90, "status_codes": ["default"], "cure_months": 3}
    cfg = events_config(tmp_path, panel, loans, default_definition=dd)
    tables = []
    for engine in ("duckdb", "spark"):
        with open_engine(dataclasses.replace(cfg, engine=engine)) as p:
            p.label_events()
            tables.append([p.frame(f"SELECT * FROM {name} ORDER BY {key}") for name, key in _EVENT_TABLES] + [p.book_at_as_of()])
    assert tables[0][1]["previously_defaulted"].sum() > 0
    for a, b in zip(*tables):
        pd.testing.assert_frame_equal(a, b)


# --------------------------------------------------------------------------- the dialect rendering


def test_spark_rendering_of_the_shared_sql():
    sql = "SELECT arg_min(age, month_idx) FILTER (WHERE x), CAST(a AS VARCHAR), m // 12 FROM t WHERE m = $as_of"
    assert spark_sql(sql) == (
        "SELECT min_by(age, month_idx) FILTER (WHERE x), CAST(a AS STRING), m div 12 FROM t WHERE m = :as_of"
    )
    codes = spark_sql("coalesce(list_contains(CAST($codes AS VARCHAR[]), status), FALSE)", codes=["a'b"])
    assert codes == "coalesce(array_contains(CAST(array('a''b') AS ARRAY<STRING>), status), FALSE)"


# --------------------------------------------------------------------------- a standalone cluster on localhost
#
# Master and worker are separate JVMs, executors start their own Python workers:
# the interpreter the config names must reach them. The runs go through the
# command line in a subprocess (one SparkContext per process; this module's local
# session stays as it is). The data checks are pure Spark SQL, tested above in
# local mode; here they are off, to keep the cluster's jobs few.

def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_for(path: Path, text: str, seconds: float, procs) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if path.exists() and text in path.read_text(errors="replace"):
            return
        if any(p.poll() is not None for p in procs):
            break
        time.sleep(0.2)
    raise RuntimeError(f"{path.name} did not say {text!r}:\n{path.read_text(errors='replace')[-2000:]}")


@pytest.fixture(scope="module")
def standalone_cluster(tmp_path_factory):
    """``spark://127.0.0.1:<port>``: a standalone master and one worker (2 cores, 1 GB), stopped at teardown."""
    import pyspark

    folder = tmp_path_factory.mktemp("standalone")
    home = Path(pyspark.__file__).parent
    env = {**os.environ, "SPARK_HOME": str(home), "SPARK_LOCAL_IP": "127.0.0.1", "SPARK_LOG_DIR": str(folder)}
    env.pop("PYSPARK_PYTHON", None)  # the executors' Python comes from the config alone
    spark_class = str(home / "bin" / "spark-class")
    port = _free_port()
    master_cmd = [spark_class, "org.apache.spark.deploy.master.Master", "--host", "127.0.0.1", "--port", str(port),
                  "--webui-port", str(_free_port())]  # fmt: skip
    worker_cmd = [spark_class, "org.apache.spark.deploy.worker.Worker", f"spark://127.0.0.1:{port}", "--host", "127.0.0.1",
                  "--cores", "2", "--memory", "1g", "--webui-port", str(_free_port()), "--work-dir", str(folder / "work")]  # fmt: skip
    procs = []
    try:
        for name, cmd in (("master", master_cmd), ("worker", worker_cmd)):
            with open(folder / f"{name}.log", "wb") as log:
                procs.append(subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, env=env, start_new_session=True))
        _wait_for(folder / "master.log", "Registering worker", 120, procs)
        yield f"spark://127.0.0.1:{port}"
    finally:
        for p in procs:
            p.terminate()
        for p in procs:
            try:
                p.wait(timeout=30)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait()


@pytest.fixture(scope="module")
def cluster_workspace(corpus_book, tmp_path_factory):
    """A small book and its config: a one-covariate model, the data checks off, one DuckDB run to compare with.

    The out-of-time window stays, so the cluster also runs the backtest of the validation pack.
    """
    from creditsurv.config import DATA_CHECK_NAMES, config_from_dict

    folder = tmp_path_factory.mktemp("cluster_book")
    data = demo_config_data(corpus_book.book, folder / "duckdb")
    data["model"]["baseline"] = {"kind": "age_bands", "edges": [24]}
    data["model"]["covariates"] = [{"name": "credit_score", "column": "credit_score", "transform": "standardise"}]
    data["checks"] = {"severity": {name: "off" for name in DATA_CHECK_NAMES}}
    data["validation"] = {"bootstrap": 10}
    data["outputs"]["loan_period_tables"] = True  # the loan-level annual table is compared across engines
    duck = pipeline.execute_run(config_from_dict(data, base_dir=folder), folder / "duckdb").path
    return folder, data, duck


def _cli_run_on(cluster: str, folder: Path, data: dict, name: str, python: str):
    data = {**data, "engine": "spark", "outputs": {**data["outputs"], "dir": str(folder / name)}}
    data["spark"] = {"master": cluster, "partitions": 2,
                     "settings": {"spark.pyspark.python": python, "spark.task.maxFailures": "1", "spark.ui.enabled": "false"}}  # fmt: skip
    config = folder / f"{name}.yaml"
    config.write_text(yaml.safe_dump(data, sort_keys=False))
    env = {k: v for k, v in os.environ.items() if k != "PYSPARK_PYTHON"}
    main = "import sys; from creditsurv.cli import main; sys.exit(main())"
    return subprocess.run([sys.executable, "-c", main, "run", str(config)], capture_output=True, text=True, env=env, timeout=600)


def test_a_standalone_cluster_runs_a_small_book_as_duckdb_does(standalone_cluster, cluster_workspace):
    # `engine: spark` end to end through the run command, each engine with its own fit. The reference is the
    # DuckDB engine's run of the same config (module docstring).
    folder, data, duck = cluster_workspace
    done = _cli_run_on(standalone_cluster, folder, data, "cluster", sys.executable)
    assert done.returncode == 0, done.stderr[-3000:]
    (on_cluster,) = (folder / "cluster").iterdir()
    ca, cb = pd.read_csv(duck / "coefficients.csv"), pd.read_csv(on_cluster / "coefficients.csv")
    assert list(ca.columns) == list(cb.columns) and len(ca) == len(cb) > 2
    numeric = ca.select_dtypes("number").columns
    _close(ca[numeric], cb[numeric])
    la, lb = pd.read_parquet(duck / "loan_ecl.parquet"), pd.read_parquet(on_cluster / "loan_ecl.parquet")
    assert list(la["loan_id"]) == list(lb["loan_id"]) and list(la["stage"]) == list(lb["stage"]) and len(la) > 500
    for col in ("pd_12m", "pd_lifetime", "ecl_lifetime", "ecl_reported"):
        np.testing.assert_allclose(lb[col], la[col], rtol=RTOL, atol=1e-12, err_msg=col)
    ya, yb = pd.read_parquet(duck / "pd_annual_by_loan.parquet"), pd.read_parquet(on_cluster / "pd_annual_by_loan.parquet")
    assert ya[["loan_id", "scenario", "year_ahead"]].astype(str).equals(yb[["loan_id", "scenario", "year_ahead"]].astype(str))
    # conditional_pd adds the year's marginal PDs, so no absolute floor is needed even where survival is tiny
    np.testing.assert_allclose(yb["conditional_pd"], ya["conditional_pd"], rtol=RTOL, atol=0)
    ta, tb = pd.read_csv(duck / "segment_pd_table.csv"), pd.read_csv(on_cluster / "segment_pd_table.csv")
    np.testing.assert_allclose(tb["cumulative_pd"], ta["cumulative_pd"], rtol=RTOL, atol=1e-12)
    # the observed arrears states and transitions: counts from the same SQL, so the same files
    for name in ("arrears_transitions.csv", "arrears_matrix.csv", "arrears_states.csv"):
        assert (duck / name).read_bytes() == (on_cluster / name).read_bytes(), name
    # The validation pack runs through the same engine interface: every table, on both engines.
    tables = sorted(p.name for p in (duck / "validation").glob("*.csv"))
    assert len(tables) >= 8 and tables == sorted(p.name for p in (on_cluster / "validation").glob("*.csv"))
    for name in tables:
        va, vb = pd.read_csv(duck / "validation" / name), pd.read_csv(on_cluster / "validation" / name)
        if name == "stability.csv":
            # More development rows than the stability sample holds: each engine draws its
            # one-in-k rows with its own SQL hash (docs/scaling.md), so the indices of the
            # sampled inputs differ; the variables and the unsampled current rows agree.
            assert list(va["variable"]) == list(vb["variable"])
            _close(va[["variable", "n_current"]], vb[["variable", "n_current"]])
            continue
        if name == "verdicts.csv":
            # the stability rows read those sampled PSIs (above); every other verdict agrees whole
            assert list(va[["area", "item"]].itertuples(index=False)) == list(vb[["area", "item"]].itertuples(index=False))
            va, vb = (t[t["area"] != "stability"].reset_index(drop=True) for t in (va, vb))
        _close(va, vb, atol=PROB_ATOL)


def test_executors_without_creditsurv_fail_with_one_line_naming_the_step(standalone_cluster, cluster_workspace, tmp_path):
    # A bare virtual environment: the standard library only, no numpy, pandas or creditsurv.
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(tmp_path / "bare")], check=True)
    folder, data, _duck = cluster_workspace
    bare = str(tmp_path / "bare" / "bin" / "python")
    done = _cli_run_on(standalone_cluster, folder, data, "bare", bare)
    assert done.returncode == 1
    assert "Traceback" not in done.stderr
    last = done.stderr.strip().splitlines()[-1]
    assert re.fullmatch(
        r"EngineError: Spark tasks failed in the executors' start-up check: ModuleNotFoundError: No module named '\w+'; "
        rf"the executors started '{re.escape(bare)}', which must be a Python with creditsurv installed: .*spark\.archives.*",
        last,
    ), last
    assert not (folder / "bare").exists() or not any((folder / "bare").iterdir())



def test_the_multi_state_fit_and_projection_are_the_same_on_both_engines(both_engines):
    # One multinomial logit per arrears state, from the same shared SQL and batch kernel on each engine; each
    # engine projects the DuckDB engine's model as a Markov chain over its own partitions of the book.
    duck, spark = both_engines
    a, b = duck["multi"], spark["multi"]
    pd.testing.assert_frame_equal(a.transitions, b.transitions)
    assert a.references == b.references and set(a.origins) == {"current", "30-59", "60-89"}
    assert all(part.collapsed for part in a.origins.values())
    for origin in a.origins:
        _close(a.origins[origin].params, b.origins[origin].params)
        _close(a.origins[origin].bse, b.origins[origin].bse)
        assert b.origins[origin].loglik == pytest.approx(a.origins[origin].loglik, rel=1e-12)
    la, lb = duck["ecl_multi"].loans, spark["ecl_multi"].loans
    assert list(la["loan_id"]) == list(lb["loan_id"]) and list(la["stage"]) == list(lb["stage"])
    for col in ("pd_12m", "pd_lifetime", "ecl_reported"):
        np.testing.assert_allclose(lb[col], la[col], rtol=RTOL, atol=1e-12, err_msg=col)
