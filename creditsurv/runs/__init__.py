"""Runs: the run folder (written whole or not at all), its manifest, output comparison and the ECL movement."""

from ._folder import (
    MANIFEST,
    OutputComparison,
    RunFolder,
    compare_outputs,
    describe_inputs,
    read_manifest,
    remove_stale_incomplete,
    run_name,
    sha256_file,
    write_table,
)
from ._manifest import RunManifest, package_versions, start_manifest
from ._movement import (
    WALK_STEPS,
    MovementResult,
    check_walk_reconciles,
    compare_run_folders,
    movement,
    movement_against_run,
)
from ._reproduce import check_inputs_unchanged, judge_reproduction, reproduction_name

__all__ = [
    "MANIFEST", "MovementResult", "OutputComparison", "RunFolder", "RunManifest", "start_manifest", "WALK_STEPS", "check_walk_reconciles",
    "check_inputs_unchanged", "compare_outputs", "compare_run_folders", "describe_inputs", "judge_reproduction",
    "movement", "movement_against_run", "reproduction_name", "package_versions",
    "read_manifest", "remove_stale_incomplete", "run_name", "sha256_file", "write_table",
]  # fmt: skip
