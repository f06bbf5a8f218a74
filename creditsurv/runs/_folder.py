"""Run folders and their manifest.

A run is built in a hidden temporary folder beside its final place and renamed
into place only when every output is written; ``manifest.json`` is written
last. An existing run folder is never overwritten, and a failed or interrupted
run leaves no folder that looks complete (the temporary folder is removed, and
a folder without ``manifest.json`` is never a run).

A process killed outright (SIGKILL, a power cut) cannot clean up: each temporary
folder holds an owner file (host, process id, start time), and the next run in
the same place removes the temporary folders of this host whose process is gone
(:func:`remove_stale_incomplete`).
"""

from __future__ import annotations

import datetime
import hashlib
import json
import os
import shutil
import socket
import uuid
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import OutputError, RunError, StaleRunWarning
from ..processes import process_running
from ._manifest import RunManifest, check_manifest

MANIFEST = "manifest.json"
INCOMPLETE_PREFIX = ".incomplete-"
OWNER = ".owner.json"


def sha256_file(path: Path, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes, read in chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            h.update(block)
    return h.hexdigest()


def write_table(df: pd.DataFrame, path: Path) -> None:
    """Write ``df`` as Parquet deterministically (no index, fixed settings)."""
    table = pa.Table.from_pandas(df, preserve_index=False)
    # Drop pandas' schema metadata: it records the pandas version, which is
    # not part of the table's content.
    table = table.replace_schema_metadata(None)
    pq.write_table(table, path, compression="zstd", use_dictionary=True, write_statistics=True)


RUN_EXISTS_HINT = (
    "Its name is the reporting month and a hash of the config and inputs, so this month was run before with the "
    "same config and inputs: use --out for another folder, or change the config or inputs."
)
"""What to do when the folder of a run or a fit exists (the default of :class:`RunFolder`)."""


@dataclass
class RunFolder:
    """A run being built: write outputs into ``.path``, then :meth:`commit`.

    Use as a context manager; on an exception the temporary folder is removed.

    Parameters
    ----------
    parent : path
        The folder to create the run folder in (made if missing).
    name : str
        The run folder's name.
    hint : str, optional
        What the user can do when ``parent / name`` already exists: the ``RunError`` says the folder exists
        and is never overwritten, then this. Each command passes the remedy that fits its own folders; by
        default the one of a run or a fit (:data:`RUN_EXISTS_HINT`).
    """

    parent: Path
    name: str
    hint: str | None = None
    path: Path = field(init=False)
    outputs: dict[str, dict] = field(default_factory=dict, init=False)

    def __post_init__(self):
        self.parent = Path(self.parent)
        self.final = self.parent / self.name
        if self.final.exists():
            hint = self.hint or RUN_EXISTS_HINT
            raise RunError(f"{self.final}: already exists, and creditsurv never overwrites an output folder. {hint}")
        if self.parent.exists() and not self.parent.is_dir():
            raise OutputError(f"{self.parent}: is a file, not a folder; the run folders go in a folder (outputs.dir or --out)")
        try:
            self.parent.mkdir(parents=True, exist_ok=True)
            remove_stale_incomplete(self.parent)
            self.path = self.parent / f"{INCOMPLETE_PREFIX}{self.name}-{uuid.uuid4().hex[:8]}"
            self.path.mkdir()
        except OSError as exc:
            raise _output_error(exc, self.parent, "cannot create the run folder") from None
        try:
            owner = {"host": socket.gethostname(), "pid": os.getpid(), "started": datetime.datetime.now().isoformat(timespec="seconds")}
            (self.path / OWNER).write_text(json.dumps(owner) + "\n", encoding="utf-8")
        except OSError as exc:
            shutil.rmtree(self.path, ignore_errors=True)
            raise _output_error(exc, self.path, "cannot write into the run folder") from None

    def __enter__(self) -> "RunFolder":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is not None:
            shutil.rmtree(self.path, ignore_errors=True)
            if issubclass(exc_type, OSError):
                raise _output_error(exc, self.path, "the run was not written") from None

    def add_table(self, df: pd.DataFrame, name: str, *, csv: bool = False) -> Path:
        """Write ``df`` as ``name`` (``.parquet`` or ``.csv``) and record it."""
        target = self.path / name
        target.parent.mkdir(parents=True, exist_ok=True)
        if name.endswith(".parquet"):
            write_table(df, target)
        elif name.endswith(".csv"):
            df.to_csv(target, index=False, lineterminator="\n")
        else:  # pragma: no cover - programming error
            raise ValueError(name)
        self.outputs[name] = {"rows": int(len(df))}
        if csv and name.endswith(".parquet"):
            self.add_table(df, name[: -len(".parquet")] + ".csv")
        return target

    def add_file(self, name: str, rows: int | None = None) -> Path:
        """Record a file that the caller wrote itself under ``.path``."""
        self.outputs[name] = {"rows": rows}
        return self.path / name

    def commit(self, manifest) -> Path:
        """Hash the outputs, write the manifest last, rename into place.

        ``manifest`` is a :class:`~creditsurv.runs.RunManifest` or, for other
        folders (the movement), a plain dict.
        """
        if isinstance(manifest, RunManifest):
            manifest = manifest.to_dict()
        files = []
        for name in sorted(self.outputs):
            p = self.path / name
            files.append({"file": name, "rows": self.outputs[name]["rows"], "bytes": p.stat().st_size, "sha256": sha256_file(p)})
        manifest = {**manifest, "outputs": files}
        text = json.dumps(manifest, indent=2, sort_keys=True, default=str)
        (self.path / OWNER).unlink(missing_ok=True)
        (self.path / MANIFEST).write_text(text + "\n", encoding="utf-8")
        if self.final.exists():
            raise RunError(f"{self.final}: appeared while the run was being built; the run was not moved into place")
        os.rename(self.path, self.final)
        return self.final


def _output_error(exc: OSError, where: Path, what: str) -> OutputError:
    """``OutputError`` naming the path and the operating system's reason (no space left, permission denied, ...)."""
    path = exc.filename or where
    return OutputError(f"{path}: {what} ({exc.strerror or exc}); nothing was left behind")


def remove_stale_incomplete(parent) -> list[Path]:
    """Remove the ``.incomplete-*`` folders under ``parent`` left by processes of this host that are gone.

    A folder's owner file names its host, process id and start time. A folder of this host whose
    process no longer runs is removed; folders of other hosts, of running processes, or without an
    owner file are left alone. Each folder found is told in one :class:`~creditsurv.errors.StaleRunWarning`.

    Parameters
    ----------
    parent : path
        The folder that holds run folders.

    Returns
    -------
    list of pathlib.Path
        The folders removed.
    """
    parent = Path(parent)
    if not parent.is_dir():
        return []
    host = socket.gethostname()
    removed, kept = [], []
    for folder in sorted(parent.glob(f"{INCOMPLETE_PREFIX}*")):
        try:
            owner = json.loads((folder / OWNER).read_text(encoding="utf-8"))
            o_host, o_pid, started = str(owner["host"]), int(owner["pid"]), owner.get("started", "?")
        except (OSError, ValueError, KeyError, TypeError):
            kept.append(f"{folder.name} (no owner file)")
            continue
        if o_host != host:
            kept.append(f"{folder.name} (host {o_host}, process {o_pid})")
        elif o_pid != os.getpid() and not process_running(o_pid):
            shutil.rmtree(folder, ignore_errors=True)
            removed.append(folder)
            warnings.warn(
                f"{folder}: removed an interrupted run's folder (process {o_pid} of this host, started {started}, is gone)",
                StaleRunWarning,
                stacklevel=2,
            )
    if kept:
        warnings.warn(
            f"{parent}: left alone {len(kept)} unfinished run folder(s) this host cannot judge: {', '.join(kept)}",
            StaleRunWarning,
            stacklevel=2,
        )
    return removed


def describe_inputs(files, relative) -> list[dict]:
    """Every file a run reads, with its config key, path, size and SHA-256.

    Parameters
    ----------
    files : list of (str, path)
        ``(config key, path)`` of every file or folder the config names for reading
        (:func:`creditsurv.config.config_files`). A glob names each file it matches; a
        prior run folder (``outputs.prior_run``) names the two files the movement reads.
    relative : callable(path) -> str
        How the record writes a path (relative to the config's folder).
    """
    out = []
    for key, path in files:
        path = Path(path)
        if any(c in path.name for c in "*?["):
            found = sorted(path.parent.glob(path.name))
        elif path.is_dir():
            found = [path / name for name in RUN_FILES_READ]
        else:
            found = [path]
        for f in found:
            try:
                out.append({"input": key, "path": relative(f), "bytes": f.stat().st_size, "sha256": sha256_file(f)})
            except OSError as exc:
                raise RunError(f"{key}: cannot read {f} to record it ({exc.strerror or exc})") from None
    return out


#: The files of a prior run that a run reads (the movement): its record and its loan table.
RUN_FILES_READ = (MANIFEST, "loan_ecl.parquet")


def read_manifest(run_dir) -> dict:
    """The manifest of a complete run folder, checked against its schema (``RunError`` naming the problem)."""
    run_dir = Path(run_dir)
    path = run_dir / MANIFEST
    if not run_dir.is_dir():
        raise RunError(f"{run_dir}: no such run folder")
    if not path.exists():
        raise RunError(f"{run_dir}: not a complete run folder (no {MANIFEST}); it may be an interrupted run")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise RunError(f"{path}: cannot read the manifest ({exc})") from None
    return check_manifest(data, path)


def folder_differences(run_dir, manifest: dict) -> list[str]:
    """How a run folder on disk differs from its manifest: every output re-hashed, every file accounted for.

    Returns one line per difference (an output changed or missing, a file the manifest does not list),
    empty when the folder is exactly what the manifest records.
    """
    run_dir = Path(run_dir)
    listed = {o["file"]: o for o in manifest["outputs"]}
    problems = []
    for name, item in sorted(listed.items()):
        p = run_dir / name
        if not p.is_file():
            problems.append(f"{name}: missing")
        elif p.stat().st_size != item["bytes"] or sha256_file(p) != item["sha256"]:
            problems.append(f"{name}: changed since the run (SHA-256 differs from the record {item['sha256'][:12]}...)")
    for p in sorted(run_dir.rglob("*")):
        name = p.relative_to(run_dir).as_posix()
        if (p.is_file() or p.is_symlink()) and name != MANIFEST and name not in listed:
            problems.append(f"{name}: not an output of the run (an extra file)")
    return problems


@dataclass
class OutputComparison:
    """How the outputs of two runs compare, file by file."""

    n_outputs: int
    mismatched: list[str]
    differences: pd.DataFrame | None = None

    @property
    def all_match(self) -> bool:
        return not self.mismatched

    @property
    def max_relative_difference(self) -> float:
        if self.differences is None or self.differences.empty:
            return 0.0 if self.all_match else float("inf")
        return float(self.differences["max_relative_difference"].max())

    def differences_text(self) -> str:
        if self.differences is None or self.differences.empty:
            return "no numeric column differences found (the differences are in text, order or layout)"
        lines = ["largest differences per table and column:"]
        for r in self.differences.itertuples():
            lines.append(f"  {r.file} {r.column}: abs {r.max_abs_difference:.3g}, rel {r.max_relative_difference:.3g}")
        return "\n".join(lines)


def _read_any(path: Path) -> pd.DataFrame | None:
    if path.suffix == ".parquet":
        return pd.read_parquet(path)
    if path.suffix == ".csv":
        return pd.read_csv(path)
    return None


def compare_outputs(dir_a: Path, dir_b: Path, manifest_a: dict, manifest_b: dict) -> OutputComparison:
    """Compare two runs' outputs by hash; for differing tables, the largest numeric differences."""
    a = {o["file"]: o["sha256"] for o in manifest_a["outputs"]}
    b = {o["file"]: o["sha256"] for o in manifest_b["outputs"]}
    names = sorted(set(a) | set(b))
    mismatched = [n for n in names if a.get(n) != b.get(n)]
    rows = []
    for name in mismatched:
        if name not in a or name not in b:
            continue
        ta, tb = _read_any(Path(dir_a) / name), _read_any(Path(dir_b) / name)
        if ta is None or tb is None or len(ta) != len(tb):
            continue
        for col in ta.columns:
            if col in tb.columns and pd.api.types.is_numeric_dtype(ta[col]) and pd.api.types.is_numeric_dtype(tb[col]):
                x, y = ta[col].to_numpy(dtype=float), tb[col].to_numpy(dtype=float)
                diff = abs(x - y)
                diff = diff[~(pd.isna(x) & pd.isna(y))]
                if diff.size and float(pd.Series(diff).max()) > 0:
                    scale = pd.Series(abs(x)).clip(lower=1e-300).to_numpy()[: diff.size]
                    rows.append(
                        {
                            "file": name,
                            "column": col,
                            "max_abs_difference": float(diff.max()),
                            "max_relative_difference": float((diff / scale).max()),
                        }
                    )
    differences = pd.DataFrame(rows, columns=["file", "column", "max_abs_difference", "max_relative_difference"])
    return OutputComparison(len(names), mismatched, differences)
