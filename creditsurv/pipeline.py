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
