"""Benchmark: projection and ECL of a large book, time and peak memory, side by side.

The book is the demo book at its reporting month (12,903 live loans of the
fictional lender, ages 3 to 105 months, terms up to 360), replicated under new
loan ids to N loans, projected under the demo's three scenarios with the demo
model (fitted once on the development window). Each route runs in its own
subprocess so that its peak memory (``ru_maxrss``) is its own:

``ecl``        ``expected_credit_loss``: projection, staging, collateral LGD,
               discounting, 12-month and lifetime ECL, PD at origination;
``ecl+tables`` the same, also writing the two loan-by-month Parquet tables;
``hazards``    only the model's hazards for the same loan-months (the design
               and the logit, nothing else): the floor the others are compared to.

Run::

    python benchmarks/bench_projection.py --loans 100000,1000000
    python benchmarks/bench_projection.py --loans 100000 --routes ecl,ecl+tables,hazards

Prints a table of time, peak memory and ratios; paste it into the README.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "benchmarks" / "_data"


def _demo(kind: str = "multinomial"):
    """The demo config, its book at the reporting month, the scenario paths and the demo model fitted as ``kind``."""
    import dataclasses

    from creditsurv.config import load_config
    from creditsurv.forecast import prepare_paths
    from creditsurv.model import hazard_source, load_model
    from creditsurv.pipeline import (
        loans_with_panel_history,
        macro_series_needed,
        open_checked,
    )

    cfg = load_config(ROOT / "configs" / "demo.yaml")
    cfg = dataclasses.replace(cfg, model=dataclasses.replace(cfg.model, kind=kind))
    DATA.mkdir(parents=True, exist_ok=True)
    model_path = DATA / f"demo_model_{kind}.json"
    engine, _ = open_checked(cfg)
    with engine:
        if model_path.exists():
            model = load_model(model_path)
        else:
            model = hazard_source(cfg, engine, temp_dir=DATA)
            model.save(model_path)
        book = loans_with_panel_history(engine, engine.book_at_as_of(cfg.segments.column), model, int(cfg.as_of))
        history = engine.macro_history()
    until = int(cfg.as_of) + 360 + cfg.loss.lgd.months_to_recovery + 1
    paths = prepare_paths(
        cfg.scenarios, history, as_of_idx=int(cfg.as_of), until_idx=until,
        extension=cfg.scenario_extension, required_series=macro_series_needed(model, cfg),
    )
    return cfg, book, paths, model


def _replicate(book, n: int):
    import pandas as pd

    reps = -(-n // len(book))
    big = pd.concat([book] * reps, ignore_index=True).iloc[:n].copy()
    big["loan_id"] = [f"B{i:08d}" for i in range(n)]
    return big.reset_index(drop=True)


def route(name: str, n: int) -> dict:
    import numpy as np

    from creditsurv.forecast import TableWriter
    from creditsurv.loss import expected_credit_loss

    cfg, book, paths, model = _demo()
    loans = _replicate(book, n)
    weights = {s.name: s.weight for s in cfg.scenarios}
    kwargs = dict(
        as_of_idx=int(cfg.as_of), weights=weights, loss=cfg.loss, staging=cfg.staging,
        collateral=cfg.collateral,
        band_column=cfg.segments.band_column, band_edges=cfg.segments.band_edges,
    )
    live = int((~loans["in_default"]).sum())
    months = int((loans.loc[~loans["in_default"], "term"] - loans.loc[~loans["in_default"], "age"]).sum())
    t0 = time.perf_counter()
    if name == "ecl":
        expected_credit_loss(loans, model, paths, **kwargs)
        rows = 0
    elif name == "ecl+tables":
        with TableWriter(DATA / "bench_curves.parquet", compression="zstd") as c, TableWriter(
            DATA / "bench_schedule.parquet", compression="zstd"
        ) as s:
            expected_credit_loss(loans, model, paths, curve_writer=c, schedule_writer=s, **kwargs)
        rows = c.rows + s.rows
        (DATA / "bench_curves.parquet").unlink()
        (DATA / "bench_schedule.parquet").unlink()
    elif name == "hazards":
        # The same loan-months through the model's design and logit, scenario by
        # scenario, in the same chunks of 2,000 loans, with raw inputs drawn from
        # the book (ages, LTVs and macro values of realistic ranges).
        rng = np.random.default_rng(0)
        per_loan = (loans["term"] - loans["age"]).clip(lower=0).to_numpy()
        inputs = model.required_inputs
        rows = 0
        for start in range(0, n, 2000):
            m = int(per_loan[start : start + 2000].sum())
            raw = {}
            for key in inputs:
                if key in ("age", "log_age"):
                    a = rng.integers(1, 360, m).astype(float)
                    raw[key] = np.log(a) if key == "log_age" else a
                elif key.startswith("macro:"):
                    raw[key] = rng.uniform(3, 9, m)
                elif key == "current_ltv":
                    raw[key] = rng.uniform(0.2, 1.0, m)
                elif key == "rate_incentive":
                    raw[key] = rng.uniform(-3, 2, m)
                else:
                    raw[key] = rng.choice(loans[key].to_numpy(), m)
            for _ in cfg.scenarios:
                model.hazards(raw)
            rows += m * len(cfg.scenarios)
    else:
        raise SystemExit(f"unknown route {name}")
    return {"seconds": time.perf_counter() - t0, "live_loans": live, "loan_months": months * len(cfg.scenarios), "rows_written": rows}


def run_child(name: str, n: int) -> dict:
    proc = subprocess.run([sys.executable, __file__, "--child", name, "--n", str(n)], capture_output=True, text=True)
    if proc.returncode != 0:
        return {"error": (proc.stderr.strip().splitlines() or ["failed"])[-1]}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--loans", default="100000,1000000")
    ap.add_argument("--routes", default="ecl,hazards")
    ap.add_argument("--child")
    ap.add_argument("--n", type=int)
    args = ap.parse_args()
    if args.child:
        result = route(args.child, args.n)
        result["peak_mib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        print(json.dumps(result))
        return
    _demo()  # fit and cache the model once, outside the timed routes
    table = []
    for n in (int(x) for x in args.loans.split(",")):
        results = {r: run_child(r, n) for r in args.routes.split(",")}
        for r, res in results.items():
            print(json.dumps({"loans": n, "route": r, **res}), flush=True)
        table.append((n, results))
    print()
    print("| loans | route | scenario loan-months | time s | peak MiB | time / hazards-only |")
    print("|---|---|---|---|---|---|")
    for n, results in table:
        floor = results.get("hazards", {}).get("seconds")
        for r, res in results.items():
            if "error" in res:
                print(f"| {n:,} | {r} | failed: {res['error']} | | | |")
                continue
            ratio = f"{res['seconds'] / floor:.1f}" if floor else ""
            print(f"| {n:,} | {r} | {res['loan_months']:,} | {res['seconds']:.1f} | {res['peak_mib']:,.0f} | {ratio} |")


if __name__ == "__main__":
    main()
