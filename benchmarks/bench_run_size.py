"""Benchmark: the bytes a compact run writes, at the demo's size and at a larger book.

Only two files of a run with the default outputs grow with the number of loans: the loan table
(``loan_ecl.parquet``) and the book it keeps for ``export`` (``projection_inputs/book.parquet``).
The other files grow with segments, bands, ages, scenarios and model terms, not loans. This script
takes a finished run folder, writes those two tables again with the loans of the run replicated under
new loan ids to N loans and their float values jittered (the same writer the run uses), and prints the folder's size at each N: the
fixed part as measured, the per-loan part as written.

Run::

    python benchmarks/bench_run_size.py reports/2024-12_<hash> --loans 1000000

Prints a Markdown table.
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from creditsurv.runs import write_table

PER_LOAN = ("loan_ecl.parquet", "projection_inputs/book.parquet")


def _replicated(frame: pd.DataFrame, n: int, rng: np.random.Generator) -> pd.DataFrame:
    """``frame`` repeated to ``n`` rows, each copy's loan ids made new (``<copy>-<id>``, copies in blocks, so the
    order by loan id holds) and each float value moved by a relative draw of up to 1e-3: copies that repeated
    the same bytes would compress better than a real book."""
    copies = -(-n // len(frame))
    floats = [c for c in frame.columns if pd.api.types.is_float_dtype(frame[c])]
    parts = []
    for k in range(copies):
        part = frame.copy()
        part["loan_id"] = f"{k:04d}-" + part["loan_id"].astype(str)
        for c in floats:
            part[c] = part[c] * (1.0 + rng.uniform(-1e-3, 1e-3, len(part)))
        parts.append(part)
    return pd.concat(parts, ignore_index=True).iloc[:n]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("run_dir", type=Path)
    parser.add_argument("--loans", default="1000000", help="comma-separated book sizes")
    args = parser.parse_args()
    run = args.run_dir
    files = [p for p in run.rglob("*") if p.is_file()]
    total = sum(p.stat().st_size for p in files)
    per_loan_now = sum((run / f).stat().st_size for f in PER_LOAN)
    fixed = total - per_loan_now
    loans = len(pd.read_parquet(run / "loan_ecl.parquet", columns=["loan_id"]))
    rows = [("as run", loans, per_loan_now, total)]
    rng = np.random.default_rng(20261203)
    with tempfile.TemporaryDirectory() as scratch:
        for n in (int(x) for x in args.loans.split(",")):
            size = 0
            for f in PER_LOAN:
                target = Path(scratch) / f.replace("/", "_")
                write_table(_replicated(pd.read_parquet(run / f), n, rng), target)
                size += target.stat().st_size
                target.unlink()
            rows.append(("replicated", n, size, fixed + size))
    print(f"run folder: {run.name}; files that do not grow with loans: {fixed / 1e6:.1f} MB\n")
    print("| book | loans | per-loan files (MB) | run folder (MB) | bytes per loan |")
    print("| --- | ---: | ---: | ---: | ---: |")
    for kind, n, size, folder in rows:
        print(f"| {kind} | {n:,} | {size / 1e6:,.1f} | {folder / 1e6:,.1f} | {size / n:,.0f} |")
    np.testing.assert_array_less(0, [r[2] for r in rows])  # a sanity check that something was written


if __name__ == "__main__":
    main()
