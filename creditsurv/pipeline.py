"""The pipeline runner: calls the stages in order. No modelling logic lives here."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from .config import load_config
from .errors import DataError


@dataclass(frozen=True)
class Outcome:
    """What a command did: text for the screen and whether it failed."""

    text: str
    failed: bool = False
    path: Path | None = None


def _refuse_existing(path: Path, what: str) -> None:
    if path.exists():
        raise DataError(f"{path}: {what} already exists; creditsurv never overwrites. Choose another path.")


def init_project(folder) -> list[Path]:
    """Write a commented starter config and an empty folder layout into ``folder``.

    Refuses to write over anything that exists.
    """
    from importlib import resources

    folder = Path(folder)
    config = folder / "config.yaml"
    _refuse_existing(config, "a config")
    for sub in ("data", "data/scenarios", "reports"):
        (folder / sub).mkdir(parents=True, exist_ok=True)
    text = resources.files("creditsurv").joinpath("starter.yaml").read_text(encoding="utf-8")
    config.write_text(text, encoding="utf-8")
    return [config, folder / "data", folder / "reports"]


def check_data(config_path, out: Path | None = None) -> Outcome:
    """Run the data checks of a config; optionally write the check table as CSV."""
    from .panel import format_checks, open_panel, run_checks

    cfg = load_config(config_path)
    if out is not None:
        _refuse_existing(Path(out), "the check table")
    with open_panel(cfg) as panel:
        checks = run_checks(panel)
    if out is not None:
        checks.to_csv(out, index=False)
    failed = bool(((checks["severity"] == "error") & (checks["count"] > 0)).any())
    return Outcome(format_checks(checks), failed=failed, path=out)


# --------------------------------------------------------------------------- shared steps


def _open_checked(cfg):
    """Open the panel, run the data checks (raise on errors), label events."""
    from .events import label_events
    from .panel import open_panel, raise_for_errors, run_checks

    panel = open_panel(cfg)
    try:
        checks = run_checks(panel)
        raise_for_errors(checks)
        label_events(panel)
    except BaseException:
        panel.close()
        raise
    return panel, checks


def _development_filter(cfg) -> tuple[str, tuple[int, int]]:
    dev = cfg.windows.development
    return "month_idx BETWEEN ? AND ?", (int(dev.start), int(dev.end))


def _hazard_model(cfg, panel, temp_dir):
    """The hazard source of a run.

    ``model.source`` fitted: the saved model when ``model.path`` is set, else a
    fit on the development window; benchmark: % PSA and % SDA curves; table:
    monthly hazards by loan age from a CSV file.
    """
    from .hazard import fit_model, load_model
    from .speeds import BenchmarkCurves, HazardTable

    if cfg.model.source == "benchmark":
        return BenchmarkCurves(psa=cfg.model.psa, sda=cfg.model.sda)
    if cfg.model.source == "table":
        import pandas as pd

        try:
            table = pd.read_csv(cfg.model.table)
        except (OSError, ValueError) as exc:
            raise DataError(f"model.table: cannot read {cfg.model.table}: {exc}") from None
        return HazardTable(table)
    if cfg.model.path is not None:
        return load_model(cfg.model.path)
    where, params = _development_filter(cfg)
    return fit_model(panel.con, cfg.model, cfg.collateral, where_sql=where, params=params, temp_dir=temp_dir)


def _config_text(cfg) -> str | None:
    return Path(cfg.source).read_text(encoding="utf-8") if cfg.source else None


def _manifest_start(cfg, panel, argv, kind: str):
    from .config import config_sha256, config_to_dict
    from .runs import base_manifest, describe_inputs, run_name

    inputs = describe_inputs(panel.sources, {})
    sha = config_sha256(cfg)
    name = run_name(cfg.as_of, sha, [i["sha256"] for i in inputs])
    manifest = base_manifest(
        run_id=f"{kind}_{name}",
        as_of=cfg.as_of,
        argv=argv,
        config_text=_config_text(cfg),
        config_resolved=config_to_dict(cfg),
        config_sha256=sha,
        seed=cfg.seed,
    )
    manifest["kind"] = kind
    manifest["inputs"] = inputs
    return manifest


def _output_parent(cfg, out) -> Path:
    if out is not None:
        return Path(out)
    if cfg.outputs.dir is not None:
        return Path(cfg.outputs.dir)
    base = Path(cfg.source).parent if cfg.source else Path.cwd()
    return base / "reports"


def _model_summary(model) -> dict:
    if not hasattr(model, "params"):
        return {"source": type(model).__name__, **{k: getattr(model, k) for k in ("psa", "sda") if hasattr(model, k)}}
    return {
        "kind": model.kind,
        "causes": list(model.causes),
        "terms": len(model.params.index),
        "n_rows": model.n_rows,
        "events": model.events,
        "loglik": model.loglik,
        "aic": model.aic,
        "bic": model.bic,
        "iterations": model.iterations,
        "converged": model.converged,
        "data_fingerprint": model.data_fingerprint,
    }


def _fired_warnings(checks) -> list[dict]:
    fired = checks[(checks["severity"] == "warning") & (checks["count"] > 0)]
    return [{"check": r.check, "count": int(r.count), "description": r.description} for r in fired.itertuples()]


def fit_model_command(config_path, out_dir: Path | None = None, argv=None) -> Outcome:
    """``creditsurv fit``: checks, events, fit; write the model JSON and coefficient table.

    The folder ``fit_<YYYY-MM>_<hash>`` is created under ``out_dir`` (default the
    config's output folder) and never overwritten.
    """
    from .events import event_counts
    from .runs import RunFolder

    cfg = load_config(config_path)
    panel, checks = _open_checked(cfg)
    with panel:
        manifest = _manifest_start(cfg, panel, argv, "fit")
        parent = _output_parent(cfg, out_dir)
        with RunFolder(parent, manifest["run_id"]) as run:
            model = _hazard_model(cfg, panel, temp_dir=run.path)
            model.save(run.add_file("hazard_model.json"))
            run.add_table(model.summary(), "coefficients.csv")
            run.add_table(checks, "data_checks.csv")
            run.add_table(event_counts(panel), "event_counts.csv")
            manifest["model"] = _model_summary(model)
            manifest["data_check_warnings"] = _fired_warnings(checks)
            final = run.commit(manifest)
    text = (
        f"fitted a {model.kind} model: {len(model.params.index)} terms per cause, "
        f"{model.n_rows:,} loan-months, events {model.events}, {model.iterations} Newton iterations\n"
        f"wrote {final}"
    )
    return Outcome(text, path=final)


# --------------------------------------------------------------------------- the monthly run


def _load_for_run(config_path, as_of: str | None):
    """Load the config, with the reporting month replaced when ``as_of`` is given."""
    from .config import _read_yaml, config_from_dict

    path = Path(config_path)
    if as_of is None:
        return load_config(path)
    data = _read_yaml(path)
    data["as_of"] = as_of
    return config_from_dict(data, path.resolve().parent, source=path)


def _macro_history(panel) -> "pd.DataFrame":
    frame = panel.con.execute("SELECT * EXCLUDE (month) FROM macro ORDER BY month_idx").df()
    return frame.set_index("month_idx")


def _macro_series_needed(model, cfg) -> list[str]:
    needed = [name.split(":")[1] for name in model.required_inputs if name.startswith("macro:")]
    if "rate_incentive" in model.required_inputs and cfg.collateral.market_rate_series:
        needed.append(cfg.collateral.market_rate_series)
    return sorted(set(needed))


def project_book(cfg, panel, model, run, *, progress=None):
    """Projection, ECL and the exported tables of one run, written into ``run``."""
    import numpy as np

    from .events import book_at_as_of
    from .loss import expected_credit_loss
    from .projection import TableWriter, prepare_paths, segment_pd_tables

    book = book_at_as_of(panel, cfg.segments.column)
    history = _macro_history(panel)
    remaining = (book["term"] - book["age"]).clip(lower=0)
    until = int(cfg.as_of) + int(remaining.max() if len(book) else 0) + cfg.loss.lgd.months_to_recovery + 1
    paths = prepare_paths(
        cfg.scenarios,
        history,
        as_of_idx=int(cfg.as_of),
        until_idx=until,
        extension=cfg.scenario_extension,
        required_series=_macro_series_needed(model, cfg),
    )
    weights = {s.name: s.weight for s in cfg.scenarios}
    options = {"compression": "zstd"}
    with (
        TableWriter(run.add_file("pd_term_structure.parquet"), **options) as curves,
        TableWriter(run.add_file("pd_annual_by_loan.parquet"), **options) as annual,
        TableWriter(run.add_file("ecl_schedule.parquet"), **options) as schedule,
    ):
        result = expected_credit_loss(
            book,
            model,
            paths,
            as_of_idx=int(cfg.as_of),
            weights=weights,
            loss=cfg.loss,
            staging=cfg.staging,
            default_days_past_due=cfg.default_definition.days_past_due,
            hpi_series=cfg.collateral.hpi_series,
            region_column=cfg.collateral.region_column,
            market_rate_series=cfg.collateral.market_rate_series,
            band_column=cfg.segments.band_column,
            band_edges=cfg.segments.band_edges,
            schedule_writer=schedule,
            curve_writer=curves,
            term_writer=annual,
        )
    run.outputs["pd_term_structure.parquet"]["rows"] = curves.rows
    run.outputs["pd_annual_by_loan.parquet"]["rows"] = annual.rows
    run.outputs["ecl_schedule.parquet"]["rows"] = schedule.rows
    csv = cfg.outputs.csv_copies
    run.add_table(result.loans, "loan_ecl.parquet", csv=csv)
    run.add_table(result.segments, "segment_summary.csv")
    tidy, wide = segment_pd_tables(result.projection.term_structure)
    run.add_table(tidy, "segment_pd_table.csv")
    run.add_table(wide, "segment_pd_matrix.csv")
    run.add_table(result.projection.speeds, "segment_speeds.csv")
    run.add_table(result.projection.speed_multiples, "equivalent_speeds.csv")
    totals = {
        "loans": int(len(result.loans)),
        "ead": float(np.sum(result.loans["ead"])),
        "ecl_reported": float(np.sum(result.loans["ecl_reported"])),
        "by_stage": {
            int(k): float(v) for k, v in result.loans.groupby("stage")["ecl_reported"].sum().items()
        },
    }
    return result, tidy, totals


def _describe_source(model) -> str:
    if hasattr(model, "params"):
        return f"{model.kind} model, {len(model.params.index)} terms per cause, {model.n_rows:,} loan-months"
    if hasattr(model, "psa"):
        return f"benchmark curves, {model.psa:g}% PSA and {model.sda:g}% SDA"
    return "a table of monthly hazards by loan age"


def run_command(config_path, as_of: str | None = None, out=None, argv=None) -> Outcome:
    """``creditsurv run``: the monthly job, written as one run folder."""
    import shutil

    from .events import event_counts
    from .runs import RunFolder

    cfg = _load_for_run(config_path, as_of)
    if not cfg.scenarios:
        from .errors import ConfigError

        raise ConfigError("scenarios: a run needs at least one scenario (name, weight, path)")
    panel, checks = _open_checked(cfg)
    with panel:
        manifest = _manifest_start(cfg, panel, argv, "run")
        parent = _output_parent(cfg, out)
        with RunFolder(parent, manifest["run_id"].removeprefix("run_")) as run:
            work = run.path / "_work"
            work.mkdir()
            model = _hazard_model(cfg, panel, temp_dir=work)
            shutil.rmtree(work)
            if hasattr(model, "save"):
                model.save(run.add_file("hazard_model.json"))
                run.add_table(model.summary(), "coefficients.csv")
            run.add_table(checks, "data_checks.csv")
            run.add_table(event_counts(panel), "event_counts.csv")
            result, segment_pd, totals = project_book(cfg, panel, model, run)
            manifest["model"] = _model_summary(model)
            manifest["data_check_warnings"] = _fired_warnings(checks)
            manifest["scenario_weights"] = {s.name: s.weight for s in cfg.scenarios}
            manifest["totals"] = totals
            final = run.commit(manifest)
    stage = ", ".join(f"stage {k}: {v:,.2f}" for k, v in totals["by_stage"].items())
    text = (
        f"reporting month {manifest['as_of']}: {totals['loans']:,} loans, EAD {totals['ead']:,.2f}, "
        f"reported ECL {totals['ecl_reported']:,.2f} ({stage})\n"
        f"hazards: {_describe_source(model)}\n"
        f"wrote {final}"
    )
    return Outcome(text, path=final)
