"""Runs: the run folder (written whole or not at all), its manifest, output comparison and the ECL movement."""

from ._folder import (
    MANIFEST,
    OutputComparison,
    RunFolder,
    base_manifest,
    compare_outputs,
    describe_inputs,
    package_versions,
    read_manifest,
    run_name,
    sha256_file,
    write_table,
)
from ._movement import (
    WALK_STEPS,
    MovementResult,
    check_walk_reconciles,
    compare_run_folders,
    movement,
)

__all__ = [
    "MANIFEST", "MovementResult", "OutputComparison", "RunFolder", "WALK_STEPS", "base_manifest", "check_walk_reconciles",
    "compare_outputs", "compare_run_folders", "describe_inputs", "movement", "package_versions",
    "read_manifest", "run_name", "sha256_file", "write_table",
]  # fmt: skip
