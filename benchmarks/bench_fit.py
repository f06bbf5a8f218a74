"""Benchmark: creditsurv's out-of-core fit against pandas + statsmodels, side by side.

For each size (loan-months) the script simulates a synthetic book once (cached
under ``benchmarks/_data/``), then runs each route in its own subprocess so that
peak memory belongs to that route alone (its process and the worker processes it forks together,
sampled, beside an upper bound: ``peak_memory.PeakMemory``):

``creditsurv``  open the book in DuckDB, label events, fit the 24-column
                multinomial logit (and, separately, the default cause-specific
                logit) out of core with ``fit_model``;
``pandas``      read the same risk set (exported once to Parquet by DuckDB, with
                the raw inputs already joined, which spares pandas the joins)
                into pandas, build the same design with the same
                ``FeatureSpec.design`` and fit statsmodels ``GLM(Binomial)``
                and ``MNLogit``;
``scan``        one plain DuckDB scan of the design's raw columns in that Parquet
                file (sums, so nothing is transferred), the yardstick for the
                time of one Newton iteration.

The pandas route is skipped where it would exhaust memory (estimated from the
measured 3.3 KB per loan-month of a 24-column logit) and the script says so.
Coefficients of the two routes are compared (largest relative difference).

Run::

    python benchmarks/bench_fit.py --sizes 1M,5M,20M
    python benchmarks/bench_fit.py --sizes 100M --skip-pandas   # about 4 GB of disk for the book and its export

Prints a table; paste it into the README.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

from peak_memory import PeakMemory

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "benchmarks" / "_data"
ROWS_PER_LOAN = 43.1  # measured on the simulator's book: 1,000,000 loans -> 43.1 M loan-months
PANDAS_BYTES_PER_ROW = 3300  # 16 GiB / 5 M loan-months for a 24-column logit, measured on this machine class

# 24 design columns per cause: intercept + 9 age bands, 5 numeric, 4 region levels,
# 1 channel level, 3 LTV bins... minus the numeric LTV, plus one interaction.
MODEL = {
    "kind": "multinomial",
    "baseline": {"kind": "age_bands", "edges": [6, 9, 12, 24, 36, 48, 60, 72, 96]},
    "covariates": [
        {"name": "credit_score", "column": "credit_score", "transform": "standardise"},
        {"name": "dti", "column": "dti"},
        {"name": "rate_incentive", "column": "rate_incentive"},
        {"name": "unemployment", "macro": "unemployment_rate"},
        {"name": "current_ltv", "column": "current_ltv", "floor": 0.1, "cap": 2.0},
        {"name": "ltv_band", "column": "current_ltv", "kind": "bins", "bins": [0.6, 0.8, 0.95]},
        {"name": "region", "column": "region", "kind": "categorical", "reference": "Central"},
        {"name": "channel", "column": "channel", "kind": "categorical", "reference": "retail"},
    ],
    "interactions": [["credit_score", "current_ltv"]],
    "fit": {"batch_size": 250_000, "max_iter": 50, "tol": 1e-8},
}


def parse_size(text: str) -> int:
    text = text.strip().upper()
    mult = {"K": 1_000, "M": 1_000_000}.get(text[-1], 1)
    return int(float(text.rstrip("KM")) * mult)


def book_dir(rows: int) -> Path:
    return DATA / f"book_{rows // 1_000_000}M"


def config_dict(book: Path) -> dict:
    return {
        "as_of": "2024-12",
        "inputs": {
            "panel": {"path": str(book / "panel.parquet"), "columns": {"status": "status"}},
            "loans": {"path": str(book / "loans.parquet"), "columns": {"term": "term_months", "property_value": "property_value"}},
            "macro": {"path": str(book / "macro_history.csv")},
        },
        "default_definition": {"days_past_due": 90, "status_codes": ["charged_off"]},
        "windows": {"development": {"start": "2016-01", "end": "2024-12"}},
        "model": MODEL,
        "duckdb": {"threads": 2, "memory_limit": "512MB"},
    }


def ensure_book(rows: int) -> Path:
    from creditsurv.demo import write_demo_book

    target = book_dir(rows)
    if not (target / "panel.parquet").exists():
        target.mkdir(parents=True, exist_ok=True)
        print(f"simulating a book of ~{rows:,} loan-months into {target} ...", flush=True)
        write_demo_book(target, int(round(rows / ROWS_PER_LOAN)), seed=7)
    return target


def ensure_risk_set(book: Path) -> Path:
    """Export the labelled risk set with its raw inputs, once, for the pandas and scan routes."""
    out = book / "risk_set.parquet"
    if out.exists():
        return out
    from creditsurv.config import config_from_dict
    from creditsurv.engines import label_events, open_panel
    from creditsurv.model import feature_spec

    cfg = config_from_dict(config_dict(book), ROOT)
    with open_panel(cfg) as panel:
        label_events(panel)
        spec = feature_spec(cfg.model, cfg.collateral)
        sql = spec.raw_query(panel.con, "TRUE", order=True)
        panel.con.execute(f"COPY ({sql}) TO '{out}' (FORMAT parquet, COMPRESSION zstd)")
    return out


# ------------------------------------------------------------------ routes (run in subprocesses)


def _scratch_bytes(before: set) -> int:
    """Bytes of the fit's temporary files: its folders under ``benchmarks/_data``, those not in ``before`` (a
    folder left by a fit that was killed would count otherwise)."""
    folders = [d for d in DATA.glob("creditsurv-fit-*") if d not in before]
    return sum(f.stat().st_size for d in folders for f in d.glob("**/*") if f.is_file())


def route_creditsurv(book: Path, kind: str) -> dict:
    import dataclasses

    from creditsurv.config import config_from_dict
    from creditsurv.engines import open_engine
    from creditsurv.model import fit_model

    passes, marks = [], {}

    def timing_passes(design_sums):
        """Time the first pass (``design_sums``: the read, the rows' cell form, their first sums) and every
        Newton pass (one per iteration, plus any step-halving passes) by wrapping the engine's methods."""

        def wrapped(*args, **kwargs):
            before = set(DATA.glob("creditsurv-fit-*"))
            marks["first_start"] = time.perf_counter()
            sums = design_sums(*args, **kwargs)
            marks["first_end"] = time.perf_counter()
            marks["scratch_bytes"] = _scratch_bytes(before)
            evaluate = sums.evaluate

            def timed(*a, **k):
                start = time.perf_counter()
                out = evaluate(*a, **k)
                passes.append(time.perf_counter() - start)
                return out

            sums.evaluate = timed
            return sums

        return wrapped

    cfg = config_from_dict(config_dict(book), ROOT)
    model = dataclasses.replace(cfg.model, kind=kind)
    t0 = time.perf_counter()
    with open_engine(cfg) as engine:
        engine.design_sums = timing_passes(engine.design_sums)
        engine.label_events()
        t1 = time.perf_counter()
        # No default before age 3 in the simulated book (the first payment falls
        # due at age 1): the fit starts at age 3 so that no level is separated.
        res = fit_model(engine, model, cfg.collateral, where_sql="age >= ?", params=(3,), temp_dir=DATA)
    t2 = time.perf_counter()
    causes = ["default"] if kind == "cause_specific" else list(res.params.columns)
    params = {c: {t: float(v) for t, v in res.params[c].items()} for c in causes}
    return {
        "seconds": t2 - t0,
        "events_seconds": t1 - t0,
        "learn_seconds": marks["first_start"] - t1,
        "first_pass_seconds": marks["first_end"] - marks["first_start"],
        "fit_seconds": t2 - t1,
        "iterations": res.iterations,
        "passes": len(passes),
        "seconds_per_pass": sum(passes) / max(len(passes), 1),
        "scratch_bytes": marks["scratch_bytes"],
        "rows": res.n_rows,
        "columns": len(res.params.index),
        "params": params,
    }


def route_pandas(book: Path, kind: str) -> dict:
    import numpy as np
    import pandas as pd
    import statsmodels.api as sm

    from creditsurv.config import config_from_dict
    from creditsurv.engines import open_panel
    from creditsurv.model import feature_spec

    # Learn the same spec constants (levels, standardisation) as the creditsurv route.
    cfg = config_from_dict(config_dict(book), ROOT)
    with open_panel(cfg) as panel:
        from creditsurv.engines import label_events

        label_events(panel)
        spec = feature_spec(cfg.model, cfg.collateral).learn(panel.con, "age >= ?", (3,))
    t0 = time.perf_counter()
    frame = pd.read_parquet(book / "risk_set.parquet", filters=[("age", ">=", 3)])
    raw = {c: frame[c].to_numpy() for c in frame.columns}
    X, names = spec.design(raw)
    y = frame["outcome"].to_numpy()
    if kind == "cause_specific":
        # the default logit: every month a trial, the prepayment month one without default
        fit = sm.GLM((y == 1).astype(float), X, family=sm.families.Binomial()).fit(tol=1e-10)
        params = {"default": {n: float(v) for n, v in zip(names, fit.params)}}
    else:
        fit = sm.MNLogit(y, X).fit(method="newton", maxiter=100, tol=1e-10, disp=0)
        p = np.asarray(fit.params)
        params = {"default": {n: float(v) for n, v in zip(names, p[:, 0])}, "prepay": {n: float(v) for n, v in zip(names, p[:, 1])}}
    t1 = time.perf_counter()
    return {"seconds": t1 - t0, "params": params}


def route_scan(book: Path, kind: str) -> dict:
    import duckdb

    path = book / "risk_set.parquet"
    con = duckdb.connect()
    con.execute("SET threads = 2")
    cols = [r[0] for r in con.execute(f"DESCRIBE SELECT * FROM read_parquet('{path}')").fetchall()]
    numeric = [c for c in cols if c not in ("region", "channel", "loan_id")]
    sums = ", ".join(f'sum("{c}")' for c in numeric) + ", count(DISTINCT region), count(DISTINCT channel)"
    best = float("inf")
    for _ in range(3):
        t0 = time.perf_counter()
        con.execute(f"SELECT {sums} FROM read_parquet('{path}') WHERE age >= 3").fetchall()
        best = min(best, time.perf_counter() - t0)
    return {"seconds": best, "columns": len(cols)}


ROUTES = {"creditsurv": route_creditsurv, "pandas": route_pandas, "scan": route_scan}


def run_child(route: str, book: Path, kind: str) -> dict:
    cmd = [sys.executable, __file__, "--child", route, "--book", str(book), "--kind", kind]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        return {"error": (proc.stderr.strip().splitlines() or ["failed"])[-1]}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def max_rel_diff(a: dict, b: dict) -> float:
    worst = 0.0
    for cause, terms in b.items():
        for term, v in terms.items():
            mine = a[cause][term]
            worst = max(worst, abs(mine - v) / max(abs(v), 1e-12))
    return worst


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", default="1M,5M,20M")
    ap.add_argument("--kinds", default="multinomial,cause_specific")
    ap.add_argument("--skip-pandas", action="store_true")
    ap.add_argument("--child", choices=sorted(ROUTES))
    ap.add_argument("--book", type=Path)
    ap.add_argument("--kind", default="multinomial")
    args = ap.parse_args()

    if args.child:
        # the Newton passes run in one worker process per DuckDB thread (its default: one per core)
        memory = PeakMemory(len(os.sched_getaffinity(0)))
        result = ROUTES[args.child](args.book, args.kind)
        print(json.dumps(result | memory.stop()))
        return

    total_ram = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    rows_out = []
    for size in args.sizes.split(","):
        rows = parse_size(size)
        book = ensure_book(rows)
        ensure_risk_set(book)
        scan = run_child("scan", book, "multinomial")
        for kind in args.kinds.split(","):
            ours = run_child("creditsurv", book, kind)
            if "error" in ours:
                print(f"{size} {kind}: creditsurv failed: {ours['error']}")
                continue
            fits_memory = rows * PANDAS_BYTES_PER_ROW < 0.8 * total_ram
            theirs = None
            if args.skip_pandas:
                note = "pandas route skipped (--skip-pandas)"
            elif not fits_memory:
                note = f"pandas route skipped: needs ~{rows * PANDAS_BYTES_PER_ROW / 2**30:.0f} GiB"
            else:
                theirs = run_child("pandas", book, kind)
                note = theirs.get("error", "")
            per_iter = ours["seconds_per_pass"]
            row = {
                "size": size,
                "rows": ours["rows"],
                "kind": kind,
                "columns": ours["columns"],
                "ours_s": ours["seconds"],
                "ours_mib": ours["peak_mib"],
                "ours_bound_mib": ours["bound_mib"],
                "events_s": ours["events_seconds"],
                "learn_s": ours["learn_seconds"],
                "first_s": ours["first_pass_seconds"],
                "iters": ours["iterations"],
                "passes": ours["passes"],
                "per_iter_s": per_iter,
                "scan_s": scan["seconds"],
                "iter_over_scan": per_iter / scan["seconds"],
                "scratch_mib": ours["scratch_bytes"] / 2**20,
                "dense_mib": ours["rows"] * ours["columns"] * 8 / 2**20,
                "input_mib": input_bytes(book) / 2**20,
                "theirs_s": theirs["seconds"] if theirs and "seconds" in theirs else None,
                "theirs_mib": theirs["peak_mib"] if theirs and "peak_mib" in theirs else None,
                "max_rel_diff": max_rel_diff(ours["params"], theirs["params"]) if theirs and "params" in theirs else None,
                "note": note,
            }
            rows_out.append(row)
            print(json.dumps(row), flush=True)

    print()
    print("Times in seconds. creditsurv: events = labelling, learn = the feature spec's constants, first = the first "
          "pass (read, cell form, first sums), then the Newton passes. Scratch: the fit's temporary file (creditsurv), "
          "against the dense float64 design it replaces (rows x columns x 8) and the input Parquet (panel + loans); "
          "pandas + statsmodels holds the design in memory and writes nothing.")
    print()
    print("| loan-months | model | cols/cause | creditsurv s | events s | learn s | first pass s | Newton its (passes) | s per pass "
          "| DuckDB scan s | pass/scan | peak MiB, all processes | scratch MiB | dense design MiB | input MiB "
          "| pandas+statsmodels s | peak MiB | speed-up | max rel. diff |")
    print("|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|")
    for r in rows_out:
        theirs = f"{r['theirs_s']:.1f} | {r['theirs_mib']:,.0f} | {r['theirs_s'] / r['ours_s']:.1f}x" if r["theirs_s"] else f"{r['note']} | | "
        diff = f"{r['max_rel_diff']:.1e}" if r["max_rel_diff"] is not None else ""
        print(
            f"| {r['rows']:,} | {r['kind']} | {r['columns']} | {r['ours_s']:.1f} | {r['events_s']:.1f} | {r['learn_s']:.1f} | "
            f"{r['first_s']:.1f} | {r['iters']} ({r['passes']}) | {r['per_iter_s']:.2f} | {r['scan_s']:.2f} | {r['iter_over_scan']:.1f} | "
            f"{r['ours_mib']:,.0f} (at most {r['ours_bound_mib']:,.0f}) | {r['scratch_mib']:,.0f} | {r['dense_mib']:,.0f} | {r['input_mib']:,.0f} | {theirs} | {diff} |"
        )


def input_bytes(book: Path) -> int:
    return sum((book / name).stat().st_size for name in ("panel.parquet", "loans.parquet"))


if __name__ == "__main__":
    main()
