"""The pipeline: the stages in order for each command. No modelling logic lives here.

The commands (:func:`check`, :func:`fit`, :func:`run`, :func:`reproduce`,
:func:`compare`) are the package's public API (re-exported by ``creditsurv``)
and what the command line calls. Each takes a config file path or a loaded
:class:`~creditsurv.config.Config` and returns an :class:`Outcome`.
"""

from __future__ import annotations

import os
import signal
import threading
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .config import Config, config_from_dict, config_to_dict, load_config, read_yaml
from .errors import DataError, OutputError, RunError
from .model import (
    DESIGNS,
    HazardResults,
    MultiStateResults,
    hazard_source,
    hpi_series_name,
    parse_macro_key,
)
from .version import __version__


@dataclass(frozen=True)
class Outcome:
    """What a command did.

    Attributes
    ----------
    text : str
        The summary the command line prints.
    failed : bool
        True when the command found a problem it reports rather than raises
        (a data check of severity ``error`` in :func:`check`).
    path : pathlib.Path or None
        The folder or file written (a run folder for :func:`run`).
    """

    text: str
    failed: bool = False
    path: Path | None = None


def _config(config, as_of: str | None = None) -> Config:
    """``config`` as a Config: a path is read, a Config is taken as it is; ``as_of`` replaces the reporting month."""
    if isinstance(config, Config):
        if as_of is None:
            return config
        data = config_to_dict(config)
        data["as_of"] = as_of
        return config_from_dict(data, config.folder, source=config.source)
    path = Path(config)
    if as_of is None:
        return load_config(path)
    data = read_yaml(path)
    data["as_of"] = as_of
    return config_from_dict(data, path.resolve().parent, source=path)


def _refuse_existing(path: Path, what: str) -> None:
    if path.exists():
        raise DataError(f"{path}: {what} already exists; creditsurv never overwrites. Choose another path.")


def init_project(folder) -> list[Path]:
    """Write a commented starter config and an empty folder layout into ``folder``.

    Everything is checked before anything is made. A ``config.yaml`` already in ``folder``, or a file where a
    folder of the layout goes, is a :class:`~creditsurv.errors.UsageError` (exit 2: the command was pointed at
    a place it will not write over) and nothing is written. Folders of the layout that exist (a ``data/``
    holding the user's files) are kept as they are. If the system refuses a write, what this call made is
    removed again (:class:`~creditsurv.errors.OutputError`).

    Parameters
    ----------
    folder : path
        The project folder, made if missing.

    Returns
    -------
    list of pathlib.Path
        The config written, the data folder and the reports folder.
    """
    import contextlib
    from importlib import resources

    from .errors import UsageError

    folder = Path(folder)
    config = folder / "config.yaml"
    layout = [folder, folder / "data", folder / "data" / "scenarios", folder / "reports"]
    if config.exists() or config.is_symlink():
        raise UsageError(
            f"{config}: a config already exists there, and creditsurv never overwrites a file; nothing was "
            "written. Edit that config, or give init a folder without one."
        )
    in_the_way = [p for p in (*reversed(folder.parents), *layout) if (p.exists() or p.is_symlink()) and not p.is_dir()]
    if in_the_way:
        raise UsageError(
            f"{in_the_way[0]}: a file where init makes a folder, and creditsurv never overwrites a file; nothing "
            "was written. Give init another folder."
        )
    text = resources.files("creditsurv.config").joinpath("starter.yaml").read_text(encoding="utf-8")
    made = []
    try:
        for p in (*reversed(folder.parents), *layout):
            if not p.is_dir():
                p.mkdir()
                made.append(p)
        with open(config, "x", encoding="utf-8") as fh:
            made.append(config)
            fh.write(text)
    except OSError as exc:
        for p in reversed(made):  # the config first, then the folders this call made, innermost first
            with contextlib.suppress(OSError):
                if p == config:
                    p.unlink()
                else:
                    p.rmdir()
        raise OutputError(f"{exc.filename or folder}: cannot write the starter layout ({exc.strerror or exc}); nothing was left behind") from None
    return [config, folder / "data", folder / "reports"]


def config_reference(key: str | None = None) -> Outcome:
    """``creditsurv config-reference``: every config key, its type, default and meaning, as a Markdown table.

    Parameters
    ----------
    key : str, optional
        Only the keys that start with it (``staging``, ``model.fit``). A prefix no key has is a
        :class:`~creditsurv.errors.UsageError` naming the closest key.
    """
    from .config import schema_reference
    from .errors import UsageError, did_you_mean

    table = schema_reference(prefix=key)
    if key is not None and len(table.splitlines()) <= 2:
        keys = [row.split("`")[1] for row in schema_reference().splitlines()[2:]]
        raise UsageError(f"--key {key}: no config key starts with {key!r}{did_you_mean(key, keys)}")
    return Outcome(table)


def check(config, out: Path | None = None) -> Outcome:
    """Run the data checks of a config; optionally write the check table as CSV to ``out``.

    The preflight of the fit comes first (:func:`raise_preflight`). ``Outcome.failed`` is True
    when a check of severity ``error`` fired.
    """
    from .data import format_checks
    from .engines import open_engine

    cfg = _config(config)
    if out is not None:
        _refuse_existing(Path(out), "the check table")
        if not Path(out).parent.is_dir():
            raise OutputError(f"{out}: cannot write the check table: the folder {Path(out).parent} does not exist")
    with open_engine(cfg) as engine:
        raise_preflight(cfg, engine)
        checks = engine.run_checks()
    if out is not None:
        try:
            checks.to_csv(out, index=False)
        except OSError as exc:
            Path(out).unlink(missing_ok=True)  # it did not exist before (refused above): remove the partial file
            raise OutputError(f"{out}: cannot write the check table ({exc.strerror or exc}); nothing was left behind") from None
    failed = bool(((checks["severity"] == "error") & (checks["count"] > 0)).any())
    return Outcome(format_checks(checks), failed=failed, path=out)


# --------------------------------------------------------------------------- shared steps


def open_checked(cfg):
    """Open the inputs with the configured engine, preflight, run the data checks (raise on errors), label events.

    Returns
    -------
    (Engine, pandas.DataFrame)
        The open engine (close it, or use ``with``) and the check table.
    """
    from .engines import open_engine

    engine = open_engine(cfg)
    try:
        raise_preflight(cfg, engine)
        checks = check_and_label(engine)
    except BaseException:
        engine.close()
        raise
    return engine, checks


def raise_preflight(cfg, engine, *, run: bool = False) -> None:
    """The config against the opened inputs, before the data checks and the fit: one ``DataError`` listing every problem.

    ``run`` adds what only a run reads (see :func:`creditsurv.data.preflight_problems`).
    """
    from . import data

    data.raise_preflight(cfg, engine, hpi_series_name=hpi_series_name, run=run)


def check_and_label(engine):
    """Run the data checks (raise on errors, warn on warnings) and label the events; return the check table."""
    from .data import raise_for_errors

    checks = engine.run_checks()
    raise_for_errors(checks)
    engine.label_events()
    return checks


def preflight(ctx, engine) -> dict:
    """Everything a run needs from the config and the inputs together, checked before the data checks and the fit.

    The columns and macro series the config names, the status codes, the reporting month against
    the panel and the files a run reads later (one ``DataError`` listing every problem), then every
    scenario file, read and checked once against the history and the reporting month (one
    ``ProjectionError`` listing every problem).

    Returns
    -------
    dict of str to DataFrame
        The scenario paths as read, for :func:`scenario_paths`.
    """

    from .data import check_severity
    from .forecast import load_scenario_paths

    raise_preflight(ctx.cfg, engine, run=True)
    history = engine.macro_history() if engine.has_table("macro") else pd.DataFrame()
    checks = ctx.cfg.checks
    return load_scenario_paths(
        ctx.cfg.scenarios, history, as_of_idx=ctx.as_of, non_negative=checks.non_negative_series,
        negative_severity=checks.severity.get("macro_values_negative", check_severity("macro_values_negative")),
        forecast_months=ctx.cfg.cecl.forecast_months if ctx.cfg.cecl is not None else None,
    )


def _config_text(cfg) -> str | None:
    return Path(cfg.source).read_text(encoding="utf-8") if cfg.source else None


def _manifest_start(cfg, argv, kind: str, config_text: str | None = None):
    """The record of a run or fit, started before any output: id, config, every input's hash, versions."""
    from .config import config_files, config_sha256, config_to_dict
    from .runs import describe_inputs, run_identity, start_manifest

    inputs = describe_inputs(config_files(cfg), cfg.relative)
    name = run_identity(cfg.as_of, config_to_dict(cfg, paths="omit"), inputs)
    return start_manifest(
        kind=kind,
        run_id=name if kind == "run" else f"{kind}_{name}",
        as_of=cfg.as_of,
        argv=argv,
        config_text=config_text if config_text is not None else _config_text(cfg),
        config_resolved=config_to_dict(cfg, paths="relative"),
        config_sha256=config_sha256(cfg),
        config_dir=str(cfg.folder),
        seed=cfg.seed,
        inputs=inputs,
    )


def _output_parent(cfg, out) -> Path:
    if out is not None:
        return Path(out)
    if cfg.outputs.dir is not None:
        return Path(cfg.outputs.dir)
    base = Path(cfg.source).parent if cfg.source else Path.cwd()
    return base / "reports"


def arrears_tables(cfg, engine) -> dict:
    """The observed arrears transitions: month by month, and as one-month matrices per window.

    Returns
    -------
    dict of file name to DataFrame
        ``arrears_transitions.csv`` (tidy, every month of the panel) and ``arrears_matrix.csv``
        (one matrix per window: ``development``, ``out_of_time`` when configured, ``all``).
    """

    from .data import TRANSITION_COUNTS_SQL, transition_matrix, transition_table

    counts = engine.frame(TRANSITION_COUNTS_SQL)
    labels = cfg.arrears.labels(cfg.default_definition.days_past_due)
    windows = {"development": cfg.windows.development, "out_of_time": cfg.windows.out_of_time}
    matrices = [
        transition_matrix(counts, labels, w.start, w.end).assign(window=name) for name, w in windows.items() if w is not None
    ]
    matrices.append(transition_matrix(counts, labels).assign(window="all"))
    matrix = pd.concat(matrices, ignore_index=True)
    matrix.insert(0, "window", matrix.pop("window"))
    return {"arrears_transitions.csv": transition_table(counts, labels), "arrears_matrix.csv": matrix}


def _fired_warnings(checks) -> list[dict]:
    fired = checks[(checks["severity"] == "warning") & (checks["count"] > 0)]
    return [{"check": r.check, "count": int(r.count), "description": r.description} for r in fired.itertuples()]


def fit(config, out: Path | None = None, argv=None) -> Outcome:
    """``creditsurv fit``: checks, events, fit; write the model JSON and coefficient table.

    The folder ``fit_<YYYY-MM>_<hash>`` is created under ``out`` (default the
    config's output folder) and never overwritten.
    """
    from .runs import RunFolder

    cfg = _config(config)
    engine, checks = open_checked(cfg)
    with engine:
        manifest = _manifest_start(cfg, argv, "fit")
        parent = _output_parent(cfg, out)
        with RunFolder(parent, manifest.run_id) as run:
            model = hazard_source(cfg, engine, temp_dir=run.path)
            model.save(run.add_file("hazard_model.json"))
            run.add_table(model.summary(), "coefficients.csv")
            if isinstance(model, MultiStateResults):
                run.add_table(model.transitions, "transition_fits.csv")
            run.add_table(checks, "data_checks.csv")
            run.add_table(engine.event_counts(), "event_counts.csv")
            for file, table in arrears_tables(cfg, engine).items():
                run.add_table(table, file)
            manifest.model = model.record()
            manifest.data_check_warnings = _fired_warnings(checks)
            final = run.commit(manifest)
    if isinstance(model, MultiStateResults):
        reduced = model.transitions[model.transitions["design"].isin(["baseline", "intercept", "none"])]
        detail = "; ".join(f"{r.origin} to {r.destination}: {DESIGNS[r.design]}" for r in reduced.itertuples())
        head = f"fitted a {model.describe()}, {model.iterations} Newton iterations at most" + (f"\nreduced: {detail}" if detail else "")
    else:
        head = (
            f"fitted a {model.kind} model: {len(model.params.index)} terms per cause, "
            f"{model.n_rows:,} loan-months, events {model.events}, {model.iterations} Newton iterations"
        )
    text = f"{head}\nwrote {final}"
    return Outcome(text, path=final)


# --------------------------------------------------------------------------- the monthly run


def macro_series_needed(model, cfg) -> list[str]:
    """The macro series a hazard source reads, the market rate of the rate incentive included."""
    needed = [parsed[0] for parsed in map(parse_macro_key, model.required_inputs) if parsed is not None]
    if "rate_incentive" in model.required_inputs and cfg.collateral.market_rate_series:
        needed.append(cfg.collateral.market_rate_series)
    return sorted(set(needed))


LOAN_PERIOD_TABLES = {
    "curve": "pd_term_structure.parquet", "term": "pd_annual_by_loan.parquet", "schedule": "ecl_schedule.parquet",
}  # fmt: skip
"""The loan-by-period tables by writer role: a run writes them with ``outputs.loan_period_tables``, and
``export`` recomputes them for chosen loans."""


class LoanPeriodWriters:
    """The three loan-by-period Parquet tables, written chunk by chunk through ``path_of(file)``."""

    def __init__(self, path_of):
        from .forecast import TableWriter

        self.writers = {role: TableWriter(path_of(file), compression="zstd") for role, file in LOAN_PERIOD_TABLES.items()}

    def callbacks(self) -> dict:
        return dict(self.writers)

    def rows(self) -> dict[str, int]:
        return {LOAN_PERIOD_TABLES[role]: w.rows for role, w in self.writers.items()}

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        for w in self.writers.values():
            w.close()


def scenario_paths(ctx, engine, model, book, loaded) -> dict:
    """Every scenario's macro path from the month after the reporting month to the book's last month of recovery.

    ``loaded`` are the paths :func:`preflight` read; the history extends them (on the CECL basis, after the
    forecast period, with the reversion of the ``cecl`` section).
    """
    from .forecast import extend_paths, remaining_term

    remaining = remaining_term(book["age"], book["term"])
    return extend_paths(
        loaded,
        engine.macro_history(),
        as_of_idx=ctx.as_of,
        until_idx=ctx.horizon_end(remaining.max() if len(book) else 0),
        extension=ctx.cfg.scenario_extension,
        required_series=macro_series_needed(model, ctx.cfg),
        history_source=f"macro history ({ctx.cfg.inputs.macro.path})" if ctx.cfg.inputs.macro else "macro history",
        cecl=ctx.cfg.cecl,
    )


def loans_with_panel_history(engine, loans, model, month: int):
    """``loans`` with the last panel values the model's lagged panel covariates read (nothing to add: as given)."""
    from .data import panel_history_sql
    from .forecast import panel_history_columns, with_panel_history

    needed = panel_history_columns(model)
    if not needed:
        return loans
    depth = max(j for _, j in needed)
    history = engine.frame(panel_history_sql(sorted({c for c, _ in needed})), {"first": int(month) - depth, "last": int(month)})
    return with_panel_history(loans, history, model, int(month))


def stage_reasons(loans) -> dict:
    """Loans of stages 2 and 3 by stage and reason: ``{"2": {"backstop": n, ...}, "3": {...}}`` (JSON-ready)."""
    out = {}
    impaired = loans[loans["stage"] > 1]
    for (stage, reason), n in impaired.groupby(["stage", "stage_reason"], sort=True).size().items():
        out.setdefault(str(int(stage)), {})[str(reason)] = int(n)
    return out


def with_sicr_history(cfg, as_of: int, book):
    """The book with the staging's SICR history (:data:`creditsurv.loss.SICR_HISTORY`) and a sentence naming its source.

    From ``staging.sicr_history_column`` when set, else from ``outputs.prior_run``; with neither, probation
    applies to arrears exits only, and the sentence says so.
    """

    from .errors import DataError
    from .forecast import loan_list_text
    from .loss import SICR_HISTORY

    col = cfg.staging.sicr_history_column
    if col is not None:
        values = pd.to_numeric(book[col], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
        given = ~np.isnan(values)
        bad = (book[col].notna().to_numpy() & ~given) | (given & ((values < 0) | (values != np.floor(values))))
        if bad.any():
            raise DataError(
                f"{cfg.inputs.loans.path}: staging.sicr_history_column: column {col!r} must hold whole months "
                f"(0 or more) or be empty; not so for {loan_list_text(book['loan_id'][bad])}"
            )
        return book.assign(**{SICR_HISTORY: values}), f"SICR history from the loan-table column {col!r}"
    no_history = (
        "no SICR history (neither staging.sicr_history_column nor outputs.prior_run): probation was applied "
        "to exits from the arrears backstop only, not to exits from SICR or the watch list"
    )
    if cfg.outputs.prior_run is not None:
        from .runs import sicr_history_of_run

        history, gap = sicr_history_of_run(cfg.outputs.prior_run, as_of)
        if history is None:
            return book, no_history.replace("outputs.prior_run)", "an outputs.prior_run of an earlier month)")
        values = book["loan_id"].map(history).to_numpy(dtype=float, na_value=np.nan)
        text = f"SICR history from the prior run {cfg.outputs.prior_run}"
        if gap > 1:
            text += f" ({gap} months earlier: SICR or watch-list triggers in the {gap - 1} months between are unknown)"
        return book.assign(**{SICR_HISTORY: values}), text
    return book, no_history


def project_book(ctx, engine, model, run, loaded, *, progress=None):
    """Projection, ECL and the exported tables of one run, written into ``run``."""

    from .data import state_distribution
    from .exporting import save_projection_inputs
    from .forecast import segment_level, segment_pd_tables, segment_speeds
    from .loss import expected_credit_loss_by_partition, sicr_sensitivity

    cfg = ctx.cfg
    cecl = cfg.accounting == "cecl"
    book = loans_with_panel_history(engine, engine.book_at_as_of(cfg.segments.column), model, ctx.as_of)
    book, sicr_history = (book, None) if cecl else with_sicr_history(cfg, ctx.as_of, book)
    states = state_distribution(book, cfg.arrears.labels(cfg.default_definition.days_past_due))
    run.add_table(states, "arrears_states.csv")
    paths = scenario_paths(ctx, engine, model, book, loaded)
    routes = default_routes_of(engine, cfg)
    ecl_options = {**ctx.ecl_options(), "days_past_due_share": routes["days_past_due_share"]}
    save_projection_inputs(run, book, paths, cfg.model.table if cfg.model.source == "table" else None)
    if cfg.outputs.loan_period_tables:
        with LoanPeriodWriters(run.add_file) as writers:
            result = expected_credit_loss_by_partition(
                engine, book, model, paths, writers=writers.callbacks(), progress=progress, **ecl_options
            )
        for file, rows in writers.rows().items():
            run.outputs[file]["rows"] = rows
    else:
        result = expected_credit_loss_by_partition(engine, book, model, paths, progress=progress, **ecl_options)
    result.raise_for_non_finite()
    csv = cfg.outputs.csv_copies
    loan_table = with_cut_columns(result.loan_table(), book, cfg)
    run.add_table(loan_table, "loan_ecl.parquet", csv=csv)
    sensitivity = None if cecl else sicr_sensitivity(result.loans, book, cfg.staging)  # staging: IFRS 9 only
    if sensitivity is not None:
        run.add_table(sensitivity, "sicr_sensitivity.csv")
    age_tail, tail_table = age_tail_sensitivity(engine, book, model, paths, result, ecl_options)
    if tail_table is not None:
        run.add_table(tail_table, "age_tail_sensitivity.csv")
    run.add_table(result.segments, "segment_summary.csv")
    tidy, wide = segment_pd_tables(result.projection.term_structure)
    run.add_table(tidy, "segment_pd_table.csv")
    run.add_table(wide, "segment_pd_matrix.csv")
    run.add_table(result.projection.speeds, "segment_speeds.csv")
    run.add_table(result.projection.speed_multiples, "equivalent_speeds.csv")
    shown = sorted({c for p in paths.values() for c in p.columns})
    report_tables = {
        "scenario_paths": scenario_path_table(
            paths, loaded, ctx.weights, ctx.as_of, shown, forecast_months=cfg.cecl.forecast_months if cecl else None
        ),
        "loan_ecl": loan_table,
        "arrears_states": states,
        "segment_summary": result.segments,
        "segment_pd_table": segment_level(tidy),
    }
    if sensitivity is not None:
        report_tables["sicr_sensitivity"] = sensitivity
    report_tables["segment_speeds"], report_tables["equivalent_speeds"] = segment_speeds(result.projection.speeds)
    if tail_table is not None:
        report_tables["age_tail_sensitivity"] = tail_table
    balance, allowance = float(np.sum(result.loans["balance"])), float(np.sum(result.loans["allowance"]))
    totals = {
        "accounting": cfg.accounting,
        "loans": int(len(result.loans)),
        "balance": balance,
        "ead": float(np.sum(result.loans["ead"])),
        "ecl_reported": float(np.sum(result.loans["ecl_reported"])),
        "allowance": allowance,
        # the stage figures of IFRS 9; empty on the CECL basis, which has no stages
        "by_stage": {} if cecl else {
            int(k): float(v) for k, v in result.loans.groupby("stage")["ecl_reported"].sum().items()
        },
        "stage_reasons": {} if cecl else stage_reasons(result.loans),
        "sicr_history": sicr_history,
        # loans at or past their term with a balance left, projected as due next month (forecast.remaining_term)
        "past_term": int(((book["age"] >= book["term"]) & ~book["in_default"].astype(bool)).sum()),
        "age_tail": age_tail,
        "default_routes": routes,
        "origination_view": None if cecl else origination_view_of(cfg, book, paths),
        "low_credit_risk": None if cecl else _low_credit_risk_totals(cfg, result.loans),
    }  # fmt: skip
    if cecl:
        totals["cecl"] = cecl_totals(ctx, balance, allowance)
    return result, report_tables, totals


def cecl_totals(ctx, balance: float, allowance: float) -> dict:
    """The CECL basis of a run, for the record and the report: the periods, the months they end, the discounting
    and the lifetime loss rate (the allowance over the amortised cost basis, the book's balance; NaN for none)."""
    from .months import format_month

    cecl, cfg = ctx.cfg.cecl, ctx.cfg
    forecast_end = ctx.as_of + cecl.forecast_months
    return {
        "forecast_months": int(cecl.forecast_months),
        "forecast_end": format_month(forecast_end),
        "reversion_months": int(cecl.reversion_months),
        "reversion_end": format_month(forecast_end + cecl.reversion_months),
        "long_run": dict(cfg.scenario_extension.long_run),
        "hold_last_series": list(cfg.scenario_extension.hold_last_series),
        "discount": cfg.loss.discount,
        "lifetime_loss_rate": allowance / balance if balance > 0 else float("nan"),
    }


SCENARIO_MONTHS_SHOWN = (24, 120)
"""The report's scenario chart: months of history before the reporting month, and at most this many ahead."""


def scenario_path_table(paths: dict, loaded: dict, weights, as_of: int, series, forecast_months=None) -> pd.DataFrame:
    """The macro paths the run projected with, tidy, for the report: ``scenario``, ``weight``, ``month``,
    ``series``, ``value`` and ``part`` (``history`` up to the reporting month, ``scenario`` while the scenario
    file gives the month, then ``extension``), from 24 months before the reporting month to the end of the
    longest scenario file plus the extension, at most 120 months ahead. On the CECL basis (``forecast_months``)
    the scenario part ends with the forecast period: the reversion after it is the extension."""
    from .months import format_month

    rows = []
    for name, frame in paths.items():
        given = loaded.get(name)
        last_given = int(max(given.index)) if given is not None and len(given) else as_of
        if forecast_months is not None:
            last_given = min(last_given, as_of + int(forecast_months))
        end = min(int(frame.index.max()), as_of + SCENARIO_MONTHS_SHOWN[1])
        window = frame.loc[(frame.index >= as_of - SCENARIO_MONTHS_SHOWN[0]) & (frame.index <= end)]
        month = window.index.to_numpy(dtype=np.int64)
        part = np.where(month <= as_of, "history", np.where(month <= last_given, "scenario", "extension"))
        for col in series:
            if col in window.columns:
                rows.append(pd.DataFrame({
                    "scenario": name, "weight": float(weights[name]), "month": [format_month(int(m)) for m in month],
                    "series": col, "value": window[col].to_numpy(dtype=float), "part": part,
                }))  # fmt: skip
    return pd.concat(rows, ignore_index=True) if rows else pd.DataFrame(
        columns=["scenario", "weight", "month", "series", "value", "part"]
    )


CUT_COLUMNS = (
    "region", "band", "vintage", "origination_month", "age", "age_band", "remaining_term", "arrears_state",
)  # fmt: skip
"""The columns :func:`with_cut_columns` adds to the loan table, after ``segment``: what a loan-level cut groups by."""


def age_band_labels(age) -> np.ndarray:
    """Loan age in whole years as intervals closed on the left: ``[0, 12)``, ``[12, 24)``, ... (months)."""
    start = (np.asarray(age, dtype=np.int64) // 12) * 12
    return np.array([f"[{a}, {a + 12})" for a in start], dtype=object)


def with_cut_columns(loan_table, book, cfg):
    """The loan table with the columns a loan-level cut needs, from the book at the reporting month.

    After ``segment``: ``region`` (``collateral.region_column``, when the loan table has it), ``band`` (the
    score band of ``segments.band_column``, :func:`creditsurv.forecast.band_labels`; ``all`` without one),
    ``vintage`` (origination year), ``origination_month`` (YYYY-MM), ``age`` (months on book), ``age_band``
    (whole years), ``remaining_term`` (months left, :func:`creditsurv.forecast.remaining_term`) and
    ``arrears_state`` (the arrears state at the reporting month, ``default`` for a loan in default).
    """
    from .forecast import band_codes, band_labels, remaining_term
    from .months import format_month

    b = book.set_index("loan_id").loc[loan_table["loan_id"].to_numpy()]
    cuts = {}
    region = cfg.collateral.region_column
    if region is not None and region in b.columns:
        cuts["region"] = b[region].astype(str).to_numpy()
    seg = cfg.segments
    labels = np.array(band_labels(seg.band_edges if seg.band_column else ()), dtype=object)
    if seg.band_column and seg.band_edges:
        cuts["band"] = labels[band_codes(b[seg.band_column].to_numpy(dtype=float), seg.band_edges)]
    else:
        cuts["band"] = np.repeat(labels[:1], len(b))
    orig = b["origination_idx"].to_numpy(dtype=np.int64)
    cuts["vintage"] = orig // 12
    cuts["origination_month"] = np.array([format_month(int(m)) for m in orig], dtype=object)
    age = b["age"].to_numpy(dtype=np.int64)
    cuts["age"] = age
    cuts["age_band"] = age_band_labels(age)
    cuts["remaining_term"] = remaining_term(age, b["term"].to_numpy())
    states = np.array([*cfg.arrears.labels(cfg.default_definition.days_past_due), "default"], dtype=object)
    codes = np.where(b["in_default"].to_numpy(dtype=bool), len(states) - 1, b["arrears_state"].to_numpy(dtype=np.int64))
    cuts["arrears_state"] = states[codes]
    at = list(loan_table.columns).index("segment") + 1
    head, tail = loan_table.iloc[:, :at], loan_table.iloc[:, at:]
    return pd.concat([head, pd.DataFrame(cuts, index=loan_table.index), tail], axis=1)


def _low_credit_risk_totals(cfg, loans):
    """The IFRS 9 5.5.10 exemption of the run: its threshold and the live loans at or below it (None when off)."""
    from .loss import low_credit_risk

    threshold = cfg.staging.low_credit_risk_pd
    if threshold is None:
        return None
    live = loans["stage"].to_numpy() < 3
    low = low_credit_risk(loans["pd_12m"], cfg.staging)
    return {"pd_12m_at_most": float(threshold), "live_loans": int((low & live).sum())}


def origination_view_of(cfg, book, paths) -> dict:
    """How the SICR test compared today's lifetime PD with the PD at origination, for the record and report.

    ``basis`` ``single_path`` (both projected on one path: today's ``scenario``, the origination month's
    values reverting over ``reversion_months``) or ``stored`` (the loan-table column against the weighted
    PD, with the ``model`` that made it); ``before_macro_history``: loans originated before the macro history
    starts, whose origination view reads its first month.
    """
    from .loss import staging_scenario

    staging = cfg.staging
    first_month = int(min(p.index.min() for p in paths.values()))
    before = int((book["origination_idx"] < first_month).sum()) if "origination_idx" in book.columns else 0
    if staging.pd_at_origination_column:
        return {
            "basis": "stored", "column": staging.pd_at_origination_column, "model": staging.pd_at_origination_model,
            "scenario": staging_scenario(staging, list(paths)),
        }  # fmt: skip
    return {
        "basis": "single_path", "scenario": staging_scenario(staging, list(paths)),
        "reversion_months": int(cfg.scenario_extension.months), "hold_last_series": list(cfg.scenario_extension.hold_last_series),
        "before_macro_history": before,
    }  # fmt: skip


def default_routes_of(engine, cfg) -> dict:
    """The routes into default behind the projected exposure at default (``loss.exposure``).

    The share of defaults on days past due is the config's, else that of the default events of the
    development window (the rest defaulted on a status code alone); with no days-past-due definition it
    is 0, and with no default in the window 1. Returns the share, where it came from, the window's default
    events and the instalments each route has missed.
    """
    from .data import DEFAULT_ROUTES_SQL

    exposure = cfg.loss.exposure
    out = {"onset_months": exposure.onset_months, "onset_months_status": exposure.onset_months_status}
    if exposure.days_past_due_share is not None:
        return {"days_past_due_share": float(exposure.days_past_due_share), "source": "loss.exposure.days_past_due_share", **out}
    dpd = cfg.default_definition.days_past_due
    if dpd is None:
        return {"days_past_due_share": 0.0, "source": "no days-past-due default definition", **out}
    dev = cfg.windows.development
    counts = engine.frame(DEFAULT_ROUTES_SQL, {"dpd": int(dpd), "first": int(dev.start), "last": int(dev.end)})
    defaults, on_dpd = int(counts["defaults"].iloc[0]), int(counts["on_days_past_due"].iloc[0])
    if defaults == 0:
        return {"days_past_due_share": 1.0, "source": "no default in the development window", **out}
    return {
        "days_past_due_share": on_dpd / defaults, "source": "development window", "defaults": defaults,
        "defaults_on_days_past_due": on_dpd, **out,
    }  # fmt: skip


def age_tail_sensitivity(engine, book, model, paths, result, ecl_options: dict):
    """How much of the projection rests on loan ages the development data barely cover, and what the other
    age-tail rule would give.

    The supported ages run to the last one with ``model.baseline.tail_min_loan_months`` development
    loan-months. For the run's rule and the other one (``hold`` / ``extrapolate``, the ECL recomputed with
    it): the share of the book's expected defaulted balance (scenario-weighted) falling at older ages, the
    lifetime and reported ECL and the stage-2 loans (empty on the CECL basis). Returns ``(summary, table)``, both ``None`` for a
    source with no fitted age baseline (benchmark curves, a table).
    """

    from .config import WEIGHTED
    from .loss import expected_credit_loss_by_partition
    from .model import HazardResults, MultiStateResults, with_age_tail

    if not isinstance(model, (HazardResults, MultiStateResults)) or "supported_age" not in (model.spec.learned or {}):
        return None, None
    supported = int(model.spec.learned["supported_age"])
    rule = "hold" if model.age_cap is not None else "extrapolate"
    other = "extrapolate" if rule == "hold" else "hold"
    alternative = expected_credit_loss_by_partition(engine, book, with_age_tail(model, other), paths, **ecl_options)
    rows = []
    staged = result.accounting != "cecl"  # the stage 2 count is IFRS 9's; empty on the CECL basis
    for name, res in ((rule, result), (other, alternative)):
        speeds = res.projection.speeds
        weighted = speeds[speeds["scenario"].astype(str) == WEIGHTED]
        total = float(weighted["defaulted"].sum())
        beyond = float(weighted.loc[weighted["loan_age"] > supported, "defaulted"].sum())
        loans = res.loans
        rows.append({
            "tail": name, "in_use": name == rule, "supported_age": supported,
            "share_of_defaults_beyond": beyond / total if total > 0 else 0.0,
            "ecl_lifetime": float(loans["ecl_lifetime"].sum()), "ecl_reported": float(loans["ecl_reported"].sum()),
            "stage_2_loans": int((loans["stage"] == 2).sum()) if staged else None,
        })  # fmt: skip
    table = pd.DataFrame(rows)
    table["stage_2_loans"] = table["stage_2_loans"].astype("Int64")
    table["ecl_change"] = table["ecl_reported"] - table["ecl_reported"].iloc[0]
    summary = {
        "rule": rule, "supported_age": supported,
        "share_of_defaults_beyond": float(table["share_of_defaults_beyond"].iloc[0]),
        "ecl_reported_other_rule": float(table["ecl_reported"].iloc[1]),
    }  # fmt: skip
    return summary, table


def run(config, as_of: str | None = None, out=None, argv=None, progress=None) -> Outcome:
    """``creditsurv run``: the monthly job, written as one new run folder.

    Parameters
    ----------
    config : path or Config
    as_of : str, optional
        Reporting month ``YYYY-MM`` in place of the config's.
    out : path, optional
        Folder to create the run folder in (default ``outputs.dir``, else
        ``reports/`` beside the config).
    argv : list of str, optional
        The command line, for the record.
    progress : callable(label, done, total), optional
    """
    cfg = _config(config, as_of)
    return execute_run(cfg, _output_parent(cfg, out), argv=argv, progress=progress)


def _say(progress, text: str) -> None:
    if progress is not None:
        progress(text, None, None)


KILL_AT = "CREDITSURV_TEST_KILL_AT"
KILL_SIGNAL = "CREDITSURV_TEST_KILL_SIGNAL"


def kill_point(stage: str) -> None:
    """Test hook: stop this process at a named stage of a run, as a scheduler or the machine would.

    When the environment variable ``CREDITSURV_TEST_KILL_AT`` equals ``stage`` (``fit``, ``projection``,
    ``validation``, ``report``), the process sends itself ``SIGTERM``, or the signal named by
    ``CREDITSURV_TEST_KILL_SIGNAL`` (``SIGHUP``, ``SIGINT``, ``SIGKILL``). The fault tests reach their
    kill points this way rather than by timing. Unset, it does nothing.
    """
    if os.environ.get(KILL_AT) == stage:
        # To this thread, not the process: a process-directed signal may land on a library's worker thread and
        # reach Python only after a library (pyarrow) has put its own SIGINT handler in place, which can drop it.
        signal.pthread_kill(threading.get_ident(), getattr(signal, os.environ.get(KILL_SIGNAL, "SIGTERM")))


def execute_run(
    cfg, parent: Path, *, argv=None, name: str | None = None, config_text: str | None = None, progress=None,
    exists_hint: str | None = None,
) -> Outcome:
    """Run the monthly job of ``cfg`` into a new folder under ``parent``.

    ``name`` overrides the folder name; the run id stays ``YYYY-MM_<hash of
    config and inputs>``, so a reproduction carries the id of the run it
    reproduces. ``config_text`` is the config text recorded as given (default:
    the config file's). ``exists_hint`` is what the error says to do when the
    folder exists (default: a run's remedy; ``RunFolder``'s ``hint``).
    """
    import shutil

    from .config import run_context
    from .engines import open_engine
    from .runs import RunFolder, movement_against_run

    ctx = run_context(cfg)
    if cfg.outputs.prior_run is not None:
        _check_prior_run_basis(cfg)
    _say(progress, "data checks and events")
    with open_engine(cfg) as engine:
        loaded = preflight(ctx, engine)
        checks = check_and_label(engine)
        manifest = _manifest_start(cfg, argv, "run", config_text)
        folder = name or manifest.run_id
        with RunFolder(parent, folder, hint=exists_hint) as run:
            work = run.path / "_work"
            work.mkdir()
            _say(progress, "hazard model")
            kill_point("fit")
            model = hazard_source(cfg, engine, temp_dir=work)
            shutil.rmtree(work)
            coefficients = model.summary() if isinstance(model, (HazardResults, MultiStateResults)) else None
            if coefficients is not None:
                model.save(run.add_file("hazard_model.json"))
                run.add_table(coefficients, "coefficients.csv")
            if isinstance(model, MultiStateResults):
                run.add_table(model.transitions, "transition_fits.csv")
            run.add_table(checks, "data_checks.csv")
            events = engine.event_counts()
            run.add_table(events, "event_counts.csv")
            for file, table in arrears_tables(cfg, engine).items():
                run.add_table(table, file)
            _say(progress, "projection and ECL")
            kill_point("projection")
            chunk_progress = (lambda done, total: progress("projection and ECL", done, total)) if progress else None
            result, report_tables, totals = project_book(ctx, engine, model, run, loaded, progress=chunk_progress)
            report_tables["data_checks"] = checks
            report_tables["event_counts"] = events
            if coefficients is not None:
                report_tables["coefficients"] = coefficients
            if isinstance(model, MultiStateResults):
                report_tables["transition_fits"] = model.transitions
            manifest.model = model.record()
            manifest.data_check_warnings = _fired_warnings(checks)
            manifest.scenario_weights = dict(ctx.weights)
            manifest.totals = {**totals, "input_rows": input_row_counts(cfg, engine, loaded)}
            _validate_run(cfg, engine, model, result, run, manifest, report_tables, progress)
            if cfg.outputs.prior_run is not None:
                _say(progress, "movement against the prior run")
                movement = movement_against_run(cfg.outputs.prior_run, report_tables["loan_ecl"], manifest.scenario_weights)
                for file, table in movement.to_tables().items():
                    run.add_table(table, file)
                report_tables["movement_walk"] = movement.walk
                if cfg.accounting != "cecl":  # no stages, no migration
                    report_tables["stage_migration"] = movement.migration_matrix("loans").reset_index()
                manifest.prior_run = str(cfg.outputs.prior_run)
            _say(progress, "report")
            kill_point("report")
            _write_report(run, cfg, manifest, report_tables)
            final = run.commit(manifest)
    if cfg.accounting == "cecl":
        rate = totals["cecl"]["lifetime_loss_rate"]
        figures = f"allowance {totals['allowance']:,.2f} (CECL, lifetime for every loan; lifetime loss rate {rate:.2%})"
    else:
        stage = ", ".join(f"stage {k}: {v:,.2f}" for k, v in totals["by_stage"].items())
        figures = f"reported ECL {totals['ecl_reported']:,.2f} ({stage})"
    text = (
        f"reporting month {manifest.as_of}: {totals['loans']:,} loans, EAD {totals['ead']:,.2f}, {figures}\n"
        f"hazards: {model.describe()}\n"
        f"wrote {final}"
    )
    return Outcome(text, path=final)


def _refuse_mixed_bases(run_a, run_b) -> None:
    """``compare``: ``RunError`` naming both runs when one is on IFRS 9 and the other on CECL
    (:func:`creditsurv.runs.check_same_basis`)."""
    from .runs import check_same_basis

    check_same_basis(run_a, run_b)


def _check_prior_run_basis(cfg) -> None:
    """``outputs.prior_run`` on another accounting basis than this run: ``RunError`` before any work."""
    from .runs import BASIS_NAMES, accounting_basis, read_manifest

    try:
        prior = accounting_basis(read_manifest(cfg.outputs.prior_run))
    except RunError:  # not a readable run: the preflight names that problem with the others
        return
    if prior != cfg.accounting:
        raise RunError(
            f"outputs.prior_run: {cfg.outputs.prior_run} is on the {BASIS_NAMES[prior]} basis (accounting: {prior}) "
            f"and this run on {BASIS_NAMES[cfg.accounting]} (accounting: {cfg.accounting}); the movement between "
            "allowances of two bases would show the change of basis as a change of risk. Name a prior run of this basis"
        )


_REPORTED_VALIDATION = (
    "discrimination", "calibration", "stability", "coefficient_changes", "incidence_by_vintage", "hazard_by_age",
    "backtest_transitions", "transitions_development", "states_by_vintage", "verdicts",
)  # fmt: skip


def _validate_run(cfg, engine, model, result, run, manifest, report_tables: dict, progress) -> None:
    """The validation pack: tables under ``validation/``, summary in the manifest and report."""
    from .validation import validation_pack

    _say(progress, "validation")
    kill_point("validation")
    live = result.loans["loan_id"].isin(result.projection.loans["loan_id"]).to_numpy()  # not in default: projected
    pack = validation_pack(cfg, engine, model, current_pd_12m=result.loans.loc[live, "pd_12m"].to_numpy())
    for name, table in pack.tables.items():
        suffix = ".parquet" if name == "development_cohort" else ".csv"
        run.add_table(table, f"validation/{name}{suffix}")
    manifest.validation = pack.summary
    if "calibration" in pack.summary:
        manifest.calibration = pack.summary["calibration"]
    report_tables.update({k: v for k, v in pack.tables.items() if k in _REPORTED_VALIDATION})
    if "backtest_by_month" in pack.tables:
        report_tables["backtest"] = pack.tables["backtest_by_month"]


def input_row_counts(cfg, engine, loaded: dict) -> dict[str, int]:
    """Rows read from each input, by config key: the panel, loan and macro tables as the engine opened them (every
    file of a glob together) and each scenario file."""
    counts = {}
    for key, table, source in (("inputs.panel", "panel", cfg.inputs.panel), ("inputs.loans", "loans", cfg.inputs.loans),
                               ("inputs.macro", "macro", cfg.inputs.macro)):  # fmt: skip
        if source is not None:
            counts[f"{key}.path"] = int(engine.frame(f"SELECT count(*) AS n FROM {table}")["n"].iloc[0])
    for i, scenario in enumerate(cfg.scenarios):
        if scenario.name in loaded:
            counts[f"scenarios[{i}].path"] = int(len(loaded[scenario.name]))
    return counts


def _write_report(run, cfg, manifest, tables: dict) -> None:
    """``report.html``: the run's tables and record in one self-contained page.

    The creation time is left out of the page (it is in the manifest) so that
    the same inputs give the same bytes.
    """
    from .report import write_report

    meta = {
        "run_id": manifest.run_id,
        "as_of": manifest.as_of,
        "config_name": cfg.name,
        "versions": manifest.versions,
        "model": manifest.model,
        "scenario_weights": manifest.scenario_weights,
        "inputs": manifest.inputs,
        "input_rows": (manifest.totals or {}).get("input_rows"),
        "currency": cfg.currency,
        "config_sha256": manifest.config_sha256,
        "seed": manifest.seed,
        "synthetic": cfg.synthetic_data,
        "sicr_history": (manifest.totals or {}).get("sicr_history"),
        "past_term": (manifest.totals or {}).get("past_term"),
        "default_routes": (manifest.totals or {}).get("default_routes"),
        "origination_view": (manifest.totals or {}).get("origination_view"),
        "low_credit_risk": (manifest.totals or {}).get("low_credit_risk"),
        "arrears_fee": cfg.loss.exposure.arrears_fee,
        "asset_correlation": cfg.validation.asset_correlation,
        "fit_on": cfg.windows.fit_on,
        "accounting": cfg.accounting,
        "discount": cfg.loss.discount,
        **({"cecl": (manifest.totals or {}).get("cecl")} if cfg.accounting == "cecl" else {}),
        **({"calibration": manifest.calibration} if manifest.calibration is not None else {}),
    }
    write_report(run.add_file("report.html"), tables, meta)


# --------------------------------------------------------------------------- reproduce and compare


def _run_manifest(run_dir: Path) -> dict:
    """The manifest of a folder written by ``creditsurv run`` (read against its schema); another folder is refused."""
    from .runs import read_manifest

    manifest = read_manifest(run_dir)
    if manifest["kind"] != "run":
        raise RunError(f"{run_dir}: not a run folder made by creditsurv run (kind {manifest['kind']!r})")
    return manifest


REPRODUCTION_EXISTS_HINT = (
    "Reproductions are numbered (<run>_repro1, _repro2, ...), so another reproduction of this run took the "
    "number at the same moment: run the command again for the next one."
)
EXPORT_EXISTS_HINT = (
    "Exports are numbered (export_<run>, export_<run>_2, ...), so another export of this run took the name "
    "at the same moment: run the command again for the next one."
)


def reproduce(run_dir, out=None, inputs=None, progress=None) -> Outcome:
    """``creditsurv reproduce``: re-run a past run from its record and compare every output.

    In order: the manifest is read against its schema (its config's SHA-256
    checked); the run folder is re-hashed and must be exactly what the manifest
    records (else ``ReproduceMismatch``, exit 3, naming the file); every input is
    found and must hash to the record (else ``RunError`` naming the file) — at its
    recorded place, or, with ``inputs``, anywhere under that folder; then the month
    is re-run from the found files into ``out`` (default
    ``<run_dir>/../reproductions``) and judged: with the same package versions
    every output must match byte for byte (else ``ReproduceMismatch``, exit 3);
    with other versions the largest numeric difference per table and column is
    reported.
    """
    import tempfile

    from .runs import (
        check_folder_on_disk,
        judge_reproduction,
        locate_inputs,
        reproduction_name,
        stage_inputs,
    )

    run_dir = Path(run_dir)
    manifest = _run_manifest(run_dir)
    check_folder_on_disk(run_dir, manifest)
    if manifest.get("schema_version", 1) < 2:
        raise RunError(
            f"{run_dir / 'manifest.json'}: schema version 1 records absolute input paths and a run id that depends "
            f"on them; this creditsurv ({__version__}) cannot re-run it byte for byte. Reproduce it with the "
            f"creditsurv that wrote it ({manifest['versions'].get('creditsurv', 'version not recorded')})"
        )
    found = locate_inputs(manifest, Path(inputs) if inputs is not None else None)
    parent = Path(out) if out is not None else run_dir.parent / "reproductions"
    with tempfile.TemporaryDirectory(prefix="creditsurv-reproduce-") as scratch:
        folder = stage_inputs(found, Path(scratch))
        cfg = config_from_dict(manifest["config_resolved"], folder)
        argv = ["creditsurv", "reproduce", str(run_dir)] + (["--inputs", str(inputs)] if inputs is not None else [])
        fresh = execute_run(
            cfg, parent, argv=argv, name=reproduction_name(parent, run_dir.name),
            config_text=manifest.get("config_as_given"), progress=progress, exists_hint=REPRODUCTION_EXISTS_HINT,
        ).path
    return Outcome(judge_reproduction(run_dir, fresh), path=fresh)


def compare(run_a, run_b, out=None) -> Outcome:
    """``creditsurv compare``: the ECL walk, stage migration and PD change from run A to run B.

    Run A is normally the earlier month. A later run A is compared all the same and the text's first line
    says the walk runs backwards; two runs of one month are said to be so. A change of model, method or
    package versions between the runs is named with the steps of the walk that hold it
    (:class:`~creditsurv.runs.RunDifferences`). The movement folder's ``manifest.json`` records both
    (``direction``, ``model_and_method``).
    """
    from .runs import SCHEMA_VERSION, RunFolder, compare_run_folders, read_manifest

    _refuse_mixed_bases(run_a, run_b)
    result = compare_run_folders(run_a, run_b)
    a, b = read_manifest(run_a), read_manifest(run_b)
    differences = result.differences
    parent = Path(out) if out is not None else Path(run_b).parent
    hint = "It holds the movement between these two runs, made by an earlier compare: remove it, or use --out for another folder."
    with RunFolder(parent, f"movement_{Path(run_a).name}_to_{Path(run_b).name}", hint=hint) as folder:
        for file, table in result.to_tables().items():
            folder.add_table(table, file)
        record = {
            "schema_version": SCHEMA_VERSION, "kind": "movement", "run_a": str(run_a), "run_b": str(run_b),
            "as_of_a": a["as_of"], "as_of_b": b["as_of"], **differences.to_dict(),
        }  # fmt: skip
        final = folder.commit(record)
    walk = result.walk
    lines = [differences.headline()]
    for row in walk.itertuples():
        value = row.ecl_balance if row.step in ("opening", "closing") else row.ecl_change
        lines.append(f"  {row.step:<24} {int(row.loans):>8,} loans  {value:>18,.2f}")
    lines += differences.summary()
    lines.append(f"wrote {final}")
    return Outcome("\n".join(lines), path=final)


# --------------------------------------------------------------------------- export


def _run_hazard_source(cfg, run_dir: Path, hazard_table):
    """The hazard source a finished run projected with, from its folder: its model file, its benchmark
    speeds (config) or its copy of the hazard table."""
    from .model import BenchmarkCurves, HazardTable, load_model

    if cfg.model.source == "benchmark":
        return BenchmarkCurves(psa=cfg.model.psa, sda=cfg.model.sda)
    if cfg.model.source == "table":
        return HazardTable(pd.read_csv(hazard_table))
    return load_model(run_dir / "hazard_model.json")


def _export_name(parent: Path, run_name: str) -> str:
    for i in range(1, 10_000):
        candidate = f"export_{run_name}" + (f"_{i}" if i > 1 else "")
        if not (parent / candidate).exists():
            return candidate
    raise RunError(f"{parent}: no free folder name for an export of {run_name}")  # pragma: no cover


def _loan_ids(loans, table: pd.DataFrame, run_dir: Path) -> np.ndarray:
    """The chosen loan ids, every one checked against the run's loan table."""
    ids = pd.Index(pd.unique(np.asarray([str(x) for x in loans], dtype=object)))
    known = pd.Index(table["loan_id"].astype(str))
    unknown = ids[~ids.isin(known)]
    if len(unknown):
        from .forecast import loan_list_text

        raise DataError(f"{run_dir / 'loan_ecl.parquet'}: no loan {loan_list_text(unknown)} in the run (--loans)")
    return table["loan_id"].to_numpy()[known.isin(ids)]


def export(
    run_dir,
    out=None,
    *,
    by=(("segment",),),
    scenarios=("weighted",),
    weightings=("count", "balance"),
    measures=("cumulative", "marginal", "conditional", "survival"),
    period: str = "year",
    fmt: str = "csv",
    loans=None,
) -> Outcome:
    """``creditsurv export``: PD term structures of a finished run, grouped by loan attributes, and the
    loan-by-period tables of chosen loans.

    The run folder is first checked against its manifest (every output's SHA-256; a changed folder is
    refused with ``ReproduceMismatch``); nothing in it is changed. The curves are recomputed from what the
    run kept (``projection_inputs/``, its model and config), so they are the run's own, and written as one
    new folder under ``out`` (default: ``exports/`` beside the run folder), never inside the run folder.

    Parameters
    ----------
    run_dir : path
        A folder written by ``creditsurv run``.
    out : path, optional
        The folder to create the export folder in.
    by : sequence of sequence of str
        One table per entry: the loan-table columns to group by (``segment``, ``band``, ``vintage``,
        ``stage``, ``age_band``, ``arrears_state``, ``region``, ...); ``()`` is the whole book.
    scenarios : sequence of str
        Scenario names of the run, or ``weighted``.
    weightings : ``count`` and/or ``balance`` (balance at the reporting month).
    measures : ``cumulative``, ``marginal``, ``conditional``, ``survival``.
    period : ``year`` or ``month``.
    fmt : ``csv``, ``parquet`` or ``xlsx`` (one workbook, a sheet per table).
    loans : sequence of str, optional
        Loan ids whose loan-by-period tables (``pd_term_structure``, ``pd_annual_by_loan``,
        ``ecl_schedule``) are written too, equal to the ones the run writes with
        ``outputs.loan_period_tables``.

    Conventions: the grouped curves cover the loans the run projected (loans not in default); past its
    maturity a loan keeps its final cumulative PD and survival and adds no marginal PD.
    """
    from .config import WEIGHTED, run_context
    from .exporting import (
        FORMATS,
        MEASURES,
        PERIODS,
        WEIGHTINGS,
        GroupedCurves,
        check_fits_a_sheet,
        read_projection_inputs,
        write_tables,
    )
    from .forecast import remaining_term
    from .loss import STAGING_COLUMNS, expected_credit_loss, loans_in_default
    from .runs import RunFolder, accounting_basis, check_folder_on_disk, sha256_file

    run_dir = Path(run_dir)
    manifest = _run_manifest(run_dir)
    problems = []
    for name, given, allowed in (
        ("--format", [fmt], FORMATS), ("--period", [period], PERIODS),
        ("--weighting", list(weightings), WEIGHTINGS), ("--measure", list(measures), tuple(MEASURES)),
    ):  # fmt: skip
        bad = [v for v in given if v not in allowed]
        if bad or not given:
            problems.append(f"{name}: {bad or 'nothing given'}; choose from {list(allowed)}")
    cfg = config_from_dict(manifest["config_resolved"], run_dir)
    ctx = run_context(cfg)
    names = (*ctx.scenarios, WEIGHTED)  # config order (the manifest's mappings are written with sorted keys)
    bad = [s for s in scenarios if s not in names]
    if bad or not scenarios:
        problems.append(f"--scenario: {bad or 'nothing given'}; the run has {list(names)}")
    if problems:
        from .errors import ConfigError, problem_list

        raise ConfigError(problem_list(problems, "the export options"))
    parent = Path(out) if out is not None else run_dir.parent / "exports"
    if parent.resolve().is_relative_to(run_dir.resolve()):
        raise OutputError(f"{parent}: inside the run folder {run_dir}; a finished run never changes. Choose another --out")
    check_folder_on_disk(run_dir, manifest)

    table = pd.read_parquet(run_dir / "loan_ecl.parquet")
    groupings = [tuple(b) for b in by]
    missing = sorted({c for b in groupings for c in b} - set(table.columns))
    if missing:
        raise DataError(f"{run_dir / 'loan_ecl.parquet'}: no column {missing} to group by (--by); have {list(table.columns)}")
    staged = sorted({c for b in groupings for c in b} & set(STAGING_COLUMNS))
    if staged and accounting_basis(manifest) == "cecl":
        raise DataError(
            f"{run_dir / 'loan_ecl.parquet'}: {staged} are empty on the CECL basis of this run (no stages); "
            "group by other columns (--by)"
        )
    chosen = _loan_ids(loans, table, run_dir) if loans is not None else None

    inputs = read_projection_inputs(run_dir, ctx.scenarios)
    source = _run_hazard_source(cfg, run_dir, inputs.hazard_table)
    share = manifest["totals"]["default_routes"]["days_past_due_share"]
    options = {**ctx.ecl_options(), "days_past_due_share": share}

    tables = {}
    if groupings:
        book = inputs.book
        # the loans the run projected: not in default (stage 3 under IFRS 9; on the CECL basis there is no stage)
        projected = book.loc[~loans_in_default(book, cfg.default_definition.days_past_due), "loan_id"]
        live = table[table["loan_id"].isin(projected)]
        horizon = int(remaining_term(book["age"], book["term"]).max()) if len(book) else 0
        grouped = GroupedCurves(live, groupings, scenarios, horizon)
        expected_credit_loss(inputs.book, source, inputs.paths, on_chunk=grouped, **options)
        tables = grouped.tables(period=period, weightings=weightings, measures=measures)
        if fmt == "xlsx":
            check_fits_a_sheet(tables)
    with RunFolder(parent, _export_name(parent, run_dir.name), hint=EXPORT_EXISTS_HINT) as folder:
        loan_rows = {}
        if chosen is not None:
            subset = inputs.book[inputs.book["loan_id"].isin(chosen)]
            loan_rows, loan_frames = _loan_period_tables(subset, source, inputs.paths, options, folder, fmt)
            tables = {**loan_frames, **tables}
        write_tables(folder, tables, fmt)
        record = {
            "schema_version": 1, "kind": "export", "creditsurv": __version__,
            "run": run_dir.name, "run_id": manifest["run_id"], "as_of": manifest["as_of"],
            "run_manifest_sha256": sha256_file(run_dir / "manifest.json"),
            "options": {
                "by": [list(b) for b in groupings], "scenarios": list(scenarios), "weightings": list(weightings),
                "measures": list(measures), "period": period, "format": fmt,
                "loans": None if chosen is None else [str(x) for x in chosen],
            },
            "conventions": "grouped curves over the loans the run projected (not in default); past its maturity "
            "a loan keeps its final cumulative PD and survival and adds no marginal PD",
        }  # fmt: skip
        final = folder.commit(record)
    lines = [f"export of {run_dir.name} ({manifest['as_of']})"]
    if chosen is not None:
        lines.append(f"  loan-by-period tables of {len(chosen):,} loans: " + ", ".join(f"{k} {v:,} rows" for k, v in loan_rows.items()))
    for name, t in tables.items():
        if name not in loan_rows:
            lines.append(f"  {name}: {len(t):,} rows")
    lines.append(f"wrote {final}")
    return Outcome("\n".join(lines), path=final)


def _loan_period_tables(book, source, paths, options, folder, fmt) -> tuple[dict[str, int], dict[str, pd.DataFrame]]:
    """The loan-by-period tables of the loans of ``book``: rows per table, and the tables to write.

    Parquet: written here chunk by chunk, exactly as a run writes them (nothing left to write); CSV and
    Excel: returned as frames, written with the other tables.
    """
    import pyarrow as pa

    from .loss import expected_credit_loss

    if fmt == "parquet":
        with LoanPeriodWriters(folder.add_file) as writers:
            expected_credit_loss(book, source, paths, **options, **_writer_arguments(writers.callbacks()))
        rows = {}
        for file, n in writers.rows().items():
            folder.outputs[file]["rows"] = n
            rows[file.removesuffix(".parquet")] = n
        return rows, {}
    parts = {role: [] for role in LOAN_PERIOD_TABLES}
    expected_credit_loss(book, source, paths, **options, **_writer_arguments({r: parts[r].append for r in parts}))
    frames = {
        LOAN_PERIOD_TABLES[r].removesuffix(".parquet"): pa.concat_tables(p).to_pandas() if p else pd.DataFrame()
        for r, p in parts.items()
    }
    return {k: len(v) for k, v in frames.items()}, frames


def _writer_arguments(writers: dict) -> dict:
    return {"schedule_writer": writers["schedule"], "curve_writer": writers["curve"], "term_writer": writers["term"]}
