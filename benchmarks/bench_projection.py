"""Benchmark: projection and ECL of a large book beside the arithmetic floor, time and peak memory, side by side.

The book is the demo book at its reporting month (12,903 live loans of the
fictional lender, ages 3 to 105 months, terms up to 360), replicated under new
loan ids to N loans, projected under the demo's three scenarios with the demo
model fitted once on the development window as a competing-risk multinomial
logit (``--model multinomial``, the default) or as the demo's multi-state model
(``--model multi_state``). Each route runs in its own subprocess so that its
peak memory is its own: the proportional set size of that process and its
worker processes together, sampled (``PeakMemory``), beside an upper bound
from the largest resident sets:

``ecl``         ``expected_credit_loss``: projection, staging (with the PD at
                origination, a second projection of every loan from its
                origination month), collateral LGD, discounting, 12-month and
                lifetime ECL, on every available core (chunks in forked worker processes);
``ecl+tables``  the same, also writing the three loan-by-month Parquet tables;
``floor``       the arithmetic floor on one core: for the same loans and months,
                in chunks of 256 loans of similar remaining term (as the
                projection forms them), each cause's linear predictor as a per-age, a
                per-loan, a per-scenario-month and one per-loan-and-month term
                added up, the multinomial probabilities, the survival
                ``cumprod`` and the incidence ``cumsum`` of both causes. For
                ``--model multi_state`` the same per origin state and move of the
                demo model (9 linear predictors), then the chain's
                vector-matrix step per loan-month and the absorbed mass.

The table's last column is each route's time over the floor's.

Run::

    python benchmarks/bench_projection.py --loans 100000,1000000
    python benchmarks/bench_projection.py --loans 100000 --model multi_state
    python benchmarks/bench_projection.py --loans 100000 --routes ecl,ecl+tables,floor

Prints a table of time, peak memory and ratios; paste it into the README.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

from peak_memory import PeakMemory

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "benchmarks" / "_data"
CHUNK = 256  # loans per chunk of the floor: the projection's default


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
    )  # fmt: skip
    return cfg, book, paths, model


def _workers() -> int:
    """The worker processes the projection forks (one per core this process may use)."""
    from creditsurv.forecast import worker_count

    return worker_count(None)


def _replicate(book, n: int):
    import pandas as pd

    reps = -(-n // len(book))
    big = pd.concat([book] * reps, ignore_index=True).iloc[:n].copy()
    big["loan_id"] = [f"B{i:08d}" for i in range(n)]
    return big.reset_index(drop=True)


def _floor(age0, remaining, scenarios: int, moves: dict | None) -> None:
    """The arithmetic floor (module docstring) over the loans' remaining months, in chunks of ``CHUNK`` loans.

    ``moves``: None for the competing-risk model (two causes), else per origin state the end states its
    multinomial logit gives (the rest of the row, staying, is the reference).
    """
    import numpy as np

    rng = np.random.default_rng(0)
    origins = moves or {0: (1, 2)}
    K = sum(len(v) for v in origins.values())  # linear predictors
    T = len(origins)
    H_all = int(remaining.max())
    max_age = int(age0.max()) + H_all + 1
    per_age = rng.normal(-5.0, 0.3, (K, max_age))
    per_month = rng.normal(0.0, 0.1, (scenarios, K, H_all))
    for start in range(0, len(age0), CHUNK):
        rem = remaining[start : start + CHUNK]
        n, H = len(rem), int(rem.max())
        ages = age0[start : start + CHUNK, None] + np.arange(1, H + 1)[None, :]
        per_loan = rng.normal(0.0, 0.3, (K, n))
        cell = rng.uniform(0.2, 1.0, (n, H))  # a loan-by-month input (current LTV)
        for sc in range(scenarios):
            eta = np.empty((K, n, H))
            for k in range(K):
                np.take(per_age[k], ages, out=eta[k])
                eta[k] += per_loan[k][:, None]
                eta[k] += per_month[sc, k, None, :H]
                eta[k] += 0.8 * cell
            np.exp(eta, out=eta)
            if moves is None:
                den = 1.0 + eta[0] + eta[1]
                hd, hp = eta[0] / den, eta[1] / den
                surv = np.cumprod(1.0 - hd - hp, axis=1)
                prev = np.concatenate([np.ones((n, 1)), surv[:, :-1]], axis=1)
                np.cumsum(prev * hd, axis=1)
                np.cumsum(prev * hp, axis=1)
                continue
            rows, k = {}, 0
            for j, ends in origins.items():
                den = 1.0 + eta[k : k + len(ends)].sum(axis=0)
                for s in ends:
                    rows[(j, s)] = (eta[k] / den).T.copy()  # (H, n): month u of every loan in one row
                    k += 1
                rows[(j, j)] = (1.0 / den).T.copy()
            pi = np.zeros((H + 1, T, n))
            pi[0, 0] = 1.0
            entered = np.zeros((H, 2, n))
            for u in range(H):
                for (j, s), p in rows.items():
                    step = pi[u, j] * p[u]
                    if s < T:
                        pi[u + 1, s] += step
                    else:
                        entered[u, s - T] += step
            np.cumsum(entered, axis=0)


def route(name: str, n: int, kind: str) -> dict:
    from creditsurv.config import run_context
    from creditsurv.forecast import TableWriter
    from creditsurv.loss import expected_credit_loss

    cfg, book, paths, model = _demo(kind)
    loans = _replicate(book, n)
    options = run_context(cfg).ecl_options()
    live = loans.loc[~loans["in_default"]]
    months = int((live["term"] - live["age"]).clip(lower=1).sum())
    t0 = time.perf_counter()
    if name == "ecl":
        expected_credit_loss(loans, model, paths, **options)
    elif name == "ecl+tables":
        files = {role: DATA / f"bench_{role}.parquet" for role in ("curve", "term", "schedule")}
        writers = {role: TableWriter(path, compression="zstd") for role, path in files.items()}
        try:
            expected_credit_loss(loans, model, paths, **{f"{r}_writer": w for r, w in writers.items()}, **options)
        finally:
            for w in writers.values():
                w.close()
            for path in files.values():
                path.unlink(missing_ok=True)
    elif name == "floor":
        moves = None
        if kind == "multi_state":
            states = list(model.states)
            moves = {j: tuple(states.index(c) for c in model.origins[o].causes) for j, o in enumerate(model.labels)}
        # the loans in chunks of similar remaining term, as the projection takes them
        live = live.assign(remaining=(live["term"] - live["age"]).clip(lower=1)).sort_values("remaining", kind="stable")
        age0 = live["age"].to_numpy(dtype="int64")
        _floor(age0, live["remaining"].to_numpy(dtype="int64"), len(cfg.scenarios), moves)
    else:
        raise SystemExit(f"unknown route {name}")
    seconds = time.perf_counter() - t0
    return {"seconds": seconds, "live_loans": len(live), "loan_months": months * len(cfg.scenarios)}


def run_child(name: str, n: int, kind: str) -> dict:
    proc = subprocess.run(
        [sys.executable, __file__, "--child", name, "--n", str(n), "--model", kind], capture_output=True, text=True
    )
    if proc.returncode != 0:
        return {"error": (proc.stderr.strip().splitlines() or ["failed"])[-1]}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--loans", default="100000,1000000")
    ap.add_argument("--routes", default="ecl,floor")
    ap.add_argument("--model", default="multinomial", choices=["multinomial", "multi_state"])
    ap.add_argument("--child")
    ap.add_argument("--n", type=int)
    args = ap.parse_args()
    if args.child:
        memory = PeakMemory(_workers())
        result = route(args.child, args.n, args.model)
        print(json.dumps(result | memory.stop()))
        return
    _demo(args.model)  # fit and cache the model once, outside the timed routes
    table = []
    for n in (int(x) for x in args.loans.split(",")):
        results = {r: run_child(r, n, args.model) for r in args.routes.split(",")}
        for r, res in results.items():
            print(json.dumps({"loans": n, "model": args.model, "route": r, **res}), flush=True)
        table.append((n, results))
    print()
    print(f"model: {args.model}")
    print("| loans | route | scenario loan-months | time s | M loan-months/s | peak MiB, all processes | time / floor |")
    print("|---|---|---|---|---|---|---|")
    for n, results in table:
        floor = results.get("floor", {}).get("seconds")
        for r, res in results.items():
            if "error" in res:
                print(f"| {n:,} | {r} | failed: {res['error']} | | | | |")
                continue
            ratio = f"{res['seconds'] / floor:.1f}" if floor else ""
            rate = res["loan_months"] / res["seconds"] / 1e6
            peak = f"{res['peak_mib']:,.0f} (at most {res['bound_mib']:,.0f})"
            print(f"| {n:,} | {r} | {res['loan_months']:,} | {res['seconds']:.1f} | {rate:.1f} | {peak} | {ratio} |")


if __name__ == "__main__":
    main()
