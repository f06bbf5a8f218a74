"""The record of a run, declared: what ``manifest.json`` holds and who fills which part.

A run folder's ``manifest.json`` is written last, from one :class:`RunManifest`:
the pipeline starts it when the inputs are open (:func:`start_manifest`: the
run id, the config as given and resolved, every input's SHA-256, versions,
platform, seed) and sets the results as the stages finish. Optional parts a
command does not produce are left out of the file, not written as null.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import platform
import sys
from dataclasses import dataclass, field
from importlib import metadata

from ..months import format_month

__all__ = ["RunManifest", "package_versions", "start_manifest"]


_PACKAGES = ("creditsurv", "numpy", "pandas", "pyarrow", "duckdb", "statsmodels", "scipy", "scikit-learn", "pyyaml")


def package_versions() -> dict[str, str]:
    out = {}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


@dataclass
class RunManifest:
    """What a run (``kind`` "run") or a fit (``kind`` "fit") records.

    Attributes
    ----------
    kind, run_id, as_of, created : str
        The command, the folder's id (``YYYY-MM_<hash>``), the reporting month
        ``YYYY-MM`` and the UTC creation time.
    command : list of str or None
        The command line as typed.
    config_as_given : str or None
        The config file's text; ``config_resolved`` the config with defaults
        filled and paths resolved, ``config_sha256`` its hash.
    versions, platform : dict
        Package versions; Python, system and machine.
    seed : int
    inputs : list of dict
        Every input file: ``input``, ``path``, ``bytes``, ``sha256``, ``rows``.
    model : dict, optional
        The hazard source's record (:meth:`creditsurv.model.HazardSource.record`).
    data_check_warnings : list of dict, optional
        The data checks of severity warning that fired.
    scenario_weights, totals, validation, calibration : dict, optional
        A run's scenario weights, book totals, validation summary and calibration.
    prior_run : str, optional
        The run the movement was measured against (``outputs.prior_run``).
    """

    kind: str
    run_id: str
    as_of: str
    created: str
    command: list | None
    config_as_given: str | None
    config_resolved: dict
    config_sha256: str
    versions: dict
    platform: dict
    seed: int
    inputs: list = field(default_factory=list)
    model: dict | None = None
    data_check_warnings: list | None = None
    scenario_weights: dict | None = None
    totals: dict | None = None
    validation: dict | None = None
    calibration: dict | None = None
    prior_run: str | None = None

    _OPTIONAL = ("model", "data_check_warnings", "scenario_weights", "totals", "validation", "calibration", "prior_run")

    def to_dict(self) -> dict:
        """The manifest as JSON-ready data; optional parts that were not set are left out."""
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        return {k: v for k, v in out.items() if not (k in self._OPTIONAL and v is None)}


def start_manifest(
    *, kind: str, run_id: str, as_of: int, argv, config_text: str | None, config_resolved: dict, config_sha256: str,
    seed: int, inputs: list,
) -> RunManifest:
    """A new record of a run or fit: identity, config, inputs, versions, platform and seed."""
    return RunManifest(
        kind=kind,
        run_id=run_id,
        as_of=format_month(as_of),
        created=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        command=list(argv) if argv else None,
        config_as_given=config_text,
        config_resolved=config_resolved,
        config_sha256=config_sha256,
        versions=package_versions(),
        platform={"python": sys.version.split()[0], "system": platform.platform(), "machine": platform.machine()},
        seed=seed,
        inputs=inputs,
    )
