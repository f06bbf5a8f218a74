"""The record of a run, declared: what ``manifest.json`` holds, who fills which part, and how it is read back.

A run folder's ``manifest.json`` is written last, from one :class:`RunManifest`:
the pipeline starts it when the inputs are open (:func:`start_manifest`: the
run id, the config as given and resolved, every input's SHA-256, versions,
platform, seed) and sets the results as the stages finish. Optional parts a
command does not produce are left out of the file, not written as null.

A manifest is read back only through :func:`check_manifest`, against the
declared fields of its schema version (:data:`SCHEMA_VERSION`; a manifest
without ``schema_version`` is version 1, written before the field existed).
Later versions may add keys; a version this creditsurv does not know is refused
by name.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import platform
import re
import sys
from dataclasses import dataclass, field
from importlib import metadata

from ..config import canonical_sha256
from ..errors import RunError, problem_list
from ..months import format_month

__all__ = ["READABLE_VERSIONS", "SCHEMA_VERSION", "RunManifest", "check_manifest", "package_versions", "run_identity", "start_manifest"]

#: The manifest schema this creditsurv writes. Version 2: every file read is an input with a path
#: relative to the config's folder (``config_dir``), and the run id does not depend on where files live.
SCHEMA_VERSION = 2
#: The versions :func:`check_manifest` reads.
READABLE_VERSIONS = (1, 2)

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
        The command, the folder's id (``YYYY-MM_<hash>``, see :func:`run_identity`),
        the reporting month ``YYYY-MM`` and the UTC creation time.
    command : list of str or None
        The command line as typed.
    config_as_given : str or None
        The config file's text; ``config_resolved`` the config with defaults
        filled and paths relative to the config's folder, ``config_sha256`` the
        SHA-256 of its canonical JSON.
    config_dir : str
        The config's folder when the run was made (absolute): where
        ``reproduce`` looks for the inputs unless told where they are now.
    versions, platform : dict
        Package versions; Python, system and machine.
    seed : int
    inputs : list of dict
        Every file the run read: ``input`` (the config key naming it, e.g.
        ``scenarios[1].path``), ``path`` (relative to ``config_dir``), ``bytes``, ``sha256``.
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
    config_dir: str
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
        """The manifest as JSON-ready data with its ``schema_version``; optional parts not set are left out."""
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        out = {k: v for k, v in out.items() if not (k in self._OPTIONAL and v is None)}
        return {"schema_version": SCHEMA_VERSION, **out}


def start_manifest(
    *, kind: str, run_id: str, as_of: int, argv, config_text: str | None, config_resolved: dict, config_sha256: str,
    config_dir: str, seed: int, inputs: list,
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
        config_dir=config_dir,
        versions=package_versions(),
        platform={"python": sys.version.split()[0], "system": platform.platform(), "machine": platform.machine()},
        seed=seed,
        inputs=inputs,
    )


def run_identity(as_of: int, config_without_paths: dict, inputs: list[dict]) -> str:
    """The run id ``YYYY-MM_<10 hex>``: the reporting month and a hash of what the run computes from.

    The hash covers the resolved config with every path left out (``config_to_dict(cfg, paths="omit")``,
    so ``outputs.dir`` and ``--out`` do not count) and the SHA-256 of every input by its config key. The
    same config and the same file contents give the same id wherever the files and the checkout live.
    """
    contents = sorted((item["input"], item["sha256"]) for item in inputs)
    h = canonical_sha256({"config": config_without_paths, "inputs": contents})[:10]
    return f"{format_month(as_of)}_{h}"


# --------------------------------------------------------------------------- reading a manifest back

_HEX64 = re.compile(r"[0-9a-f]{64}")
_MONTH = re.compile(r"\d{4}-\d{2}")


def _is_count(v) -> bool:
    return isinstance(v, int) and not isinstance(v, bool) and v >= 0


# Each declared field: (JSON type check, what it must be). Version 2 adds ``schema_version`` and ``config_dir``.
_TEXT = (lambda v: isinstance(v, str), "text")
_FIELDS_V1 = {
    "kind": _TEXT,
    "run_id": _TEXT,
    "as_of": (lambda v: isinstance(v, str) and bool(_MONTH.fullmatch(v)), "a month YYYY-MM"),
    "created": _TEXT,
    "command": (lambda v: v is None or (isinstance(v, list) and all(isinstance(a, str) for a in v)), "a list of text or null"),
    "config_as_given": (lambda v: v is None or isinstance(v, str), "text or null"),
    "config_resolved": (lambda v: isinstance(v, dict), "an object"),
    "config_sha256": (lambda v: isinstance(v, str) and bool(_HEX64.fullmatch(v)), "a SHA-256 (64 hex digits)"),
    "versions": (lambda v: isinstance(v, dict) and all(isinstance(x, str) for x in v.values()), "an object of package versions"),
    "platform": (lambda v: isinstance(v, dict), "an object"),
    "seed": (_is_count, "a whole number"),
    "inputs": (lambda v: isinstance(v, list), "a list"),
    "outputs": (lambda v: isinstance(v, list), "a list"),
}
_FIELDS_V2 = {**_FIELDS_V1, "schema_version": (lambda v: v == 2, "2"), "config_dir": _TEXT}
_INPUT_FIELDS = {"input": _TEXT, "path": _TEXT, "bytes": (_is_count, "a whole number"),
                 "sha256": (lambda v: isinstance(v, str) and bool(_HEX64.fullmatch(v)), "a SHA-256")}  # fmt: skip
_OUTPUT_FIELDS = {"file": _TEXT, "bytes": (_is_count, "a whole number"),
                  "sha256": (lambda v: isinstance(v, str) and bool(_HEX64.fullmatch(v)), "a SHA-256")}  # fmt: skip
# Folders that are not runs (the movement of ``compare``) record only what they are and what they hold.
_FIELDS_OTHER = {"kind": _TEXT, "outputs": _FIELDS_V1["outputs"]}


def _field_problems(data: dict, fields: dict, where: str) -> list[str]:
    problems = []
    for name, (ok, what) in fields.items():
        if name not in data:
            problems.append(f"{where}{name}: missing")
        elif not ok(data[name]):
            problems.append(f"{where}{name}: expected {what}, got {_short(data[name])}")
    return problems


def _short(value) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def check_manifest(data, path) -> dict:
    """Check parsed ``manifest.json`` data against its declared schema; return it, or raise ``RunError``.

    Every problem is listed in one error naming the file and the field: a field missing or of the wrong
    type, an input or output entry without its path, size or SHA-256, an edited ``config_resolved``
    whose SHA-256 no longer matches ``config_sha256``, or a schema version this creditsurv cannot read.
    """
    if not isinstance(data, dict):
        raise RunError(f"{path}: a manifest must be a JSON object, got a JSON {type(data).__name__}")
    version = data.get("schema_version", 1)
    if version not in READABLE_VERSIONS:
        raise RunError(
            f"{path}: manifest schema version {version!r} cannot be read by creditsurv {_own_version()} "
            f"(it reads versions {', '.join(map(str, READABLE_VERSIONS))}); use the creditsurv that wrote it"
        )
    if data.get("kind") not in ("run", "fit"):
        problems = _field_problems(data, _FIELDS_OTHER, "")
    else:
        problems = _field_problems(data, _FIELDS_V2 if version == 2 else _FIELDS_V1, "")
        for i, item in enumerate(data.get("inputs") if isinstance(data.get("inputs"), list) else []):
            problems += _entry_problems(item, _INPUT_FIELDS if version == 2 else {**_INPUT_FIELDS, "input": _TEXT}, f"inputs[{i}].")
        if not problems and canonical_sha256(data["config_resolved"]) != data["config_sha256"]:
            problems.append(
                "config_resolved: its SHA-256 no longer matches config_sha256 "
                f"({data['config_sha256'][:12]}...): the recorded config was changed after the run"
            )
    for i, item in enumerate(data.get("outputs") if isinstance(data.get("outputs"), list) else []):
        problems += _entry_problems(item, _OUTPUT_FIELDS, f"outputs[{i}].")
    if problems:
        raise RunError(f"{path}: {problem_list(problems, 'the manifest')}")
    return data


def _entry_problems(item, fields: dict, where: str) -> list[str]:
    if not isinstance(item, dict):
        return [f"{where[:-1]}: expected an object, got {_short(item)}"]
    return _field_problems(item, fields, where)


def _own_version() -> str:
    from ..version import __version__

    return __version__
