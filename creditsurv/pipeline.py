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
    """The config's saved model when ``model.path`` is set, else a fit on the development window."""
    from .hazard import fit_model, load_model

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
