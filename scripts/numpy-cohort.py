#!/usr/bin/env python3
"""
The bench's cohort workload written independently with numpy and its BLAS (OpenBLAS in the
numpy wheels), the way someone fluent in numpy would write it fast, for comparison with
cairn's kernels on the same machine in the same run (`npm run bench` calls it when python3
and numpy are there). No code is shared with cairn.

Workload (the same as cohortStage in src/bench/stages.ts): S series × T years in G lifetime
groups of equal size; inflow uniform in [1, 100); group g has a normal lifetime with mean
20 + 30·g/(G − 1) years and sd 30 % of the mean, in the midpoint convention (share still in
use at the end of the year of age a: sigma(a) = 1 − F(a + 1/2); leaving at age a:
sigma(a − 1) − sigma(a), sigma(−1) = 1, so the mass below age 0 leaves at age 0); shares below
1e−300 are 0, as in cairn, which keeps subnormal numbers out of the product.

The inflow-driven model, batched over the groups (arrays of shape groups × series × years):
    outflow = inflow @ P              BLAS dgemm per group (numpy.matmul over the stacked
                                      batch); P[c, t] = p(t − c) for t ≥ c, else 0 (T × T)
    stock_change = inflow − outflow
    stock = cumsum(stock_change)      along the years
The product skips the zero quadrant of the triangular P (years in two halves: the first half
needs only the first half of the cohorts), a quarter of the multiply-adds. Every result goes
into arrays allocated once (out=), so a timed run measures arithmetic, not page faults.

Two ways to use the cores are timed, each in a process of its own, and the faster is reported:
  blas   OpenBLAS threads inside each dgemm; the balance on Python threads over the groups
         (numpy releases the GIL in these loops);
  split  one BLAS thread per Python thread, each thread taking whole groups, product and
         balance (OPENBLAS_NUM_THREADS=1 set before numpy loads).
Two figures: the model (outflow, stock and stock change: what cairn's inflow-driven kernel
makes) and the product alone (outflow only). A cell is one series × year × cohort term with
c ≤ t, counted as the bench counts them: S · T(T + 1)/2 per run.

Prints one JSON object (medians of the timed runs after warm-up, cells/s, the BLAS numpy
reports, and checks: the outflow of a few series against plain sums, and the balance).

    python3 scripts/numpy-cohort.py [--series 100000] [--years 200] [--groups 100] [--runs 7] [--warmup 2]
"""
import argparse
import json
import math
import os
import platform
import statistics
import subprocess
import sys
import time


def leaving_shares(np, mean, sd, n):
    """p(a), a = 0..n−1, of a normal lifetime in the midpoint convention."""
    def sigma(a):  # 1 − F(a + 1/2) from the complementary error function (keeps the upper tail)
        return 0.5 * math.erfc((a + 0.5 - mean) / (sd * math.sqrt(2.0)))
    p = np.empty(n)
    prev = 1.0
    for a in range(n):
        s = sigma(a)
        p[a] = prev - s
        prev = s
    p[np.abs(p) < 1e-300] = 0.0
    return p


def measure(a, strategy):
    if strategy == "split":
        os.environ["OPENBLAS_NUM_THREADS"] = "1"  # before numpy loads its BLAS
    import numpy as np
    from concurrent.futures import ThreadPoolExecutor

    S, T, G = a.series, a.years, a.groups
    n = S // G
    rng = np.random.default_rng(7)
    inflow = 1.0 + 99.0 * rng.random((G, n, T))
    c = np.arange(T)[:, None]
    age = np.arange(T)[None, :] - c
    P = np.zeros((G, T, T))
    for g in range(G):
        mean = 20.0 + 30.0 * g / max(G - 1, 1)
        p = leaving_shares(np, mean, 0.3 * mean, T)
        P[g] = np.where(age >= 0, p[np.clip(age, 0, T - 1)], 0.0)
    outflow = np.empty_like(inflow)
    change = np.empty_like(inflow)
    stock = np.empty_like(inflow)
    h = T // 2
    threads = max(1, os.cpu_count() or 1)
    parts = [range(k, G, threads) for k in range(threads)]
    pool = ThreadPoolExecutor(threads)

    def product(gs):
        # years < h need cohorts < h only (P is 0 below the diagonal)
        np.matmul(inflow[gs, :, :h], P[gs, :h, :h], out=outflow[gs, :, :h])
        np.matmul(inflow[gs], P[gs, :, h:], out=outflow[gs, :, h:])

    def balance(gs):
        np.subtract(inflow[gs], outflow[gs], out=change[gs])
        np.cumsum(change[gs], axis=-1, out=stock[gs])

    every = slice(None)
    if strategy == "blas":
        def run_product():
            product(every)

        def run_model():
            product(every)
            list(pool.map(lambda gs: [balance(g) for g in gs], parts))
    else:
        def run_product():
            list(pool.map(lambda gs: [product(g) for g in gs], parts))

        def run_model():
            def part(gs):
                for g in gs:
                    product(g)
                    balance(g)
            list(pool.map(part, parts))

    def timed(f):
        for _ in range(a.warmup):
            f()
        out = []
        for _ in range(a.runs):
            t0 = time.perf_counter()
            f()
            out.append(time.perf_counter() - t0)
        return out

    product_runs = timed(run_product)
    model_runs = timed(run_model)
    # Checks: the outflow of the first and last series of every 10th group against plain sums,
    # and the balance stock(t) − stock(t − 1) = inflow(t) − outflow(t).
    err = 0.0
    for g in range(0, G, 10):
        for s in (0, n - 1):
            row = inflow[g, s]
            for t in range(0, T, 7):
                ref = math.fsum(row[k] * P[g, k, t] for k in range(t + 1))
                if ref > 0:
                    err = max(err, abs(outflow[g, s, t] - ref) / ref)
    bal = float(np.max(np.abs(np.diff(stock, axis=2) - (inflow - outflow)[:, :, 1:]) / np.maximum(np.abs(stock[:, :, 1:]), 1.0)))
    try:
        b = np.show_config(mode="dicts").get("Build Dependencies", {}).get("blas", {})
        blas = {"name": b.get("name"), "version": b.get("version"), "configuration": b.get("openblas configuration")}
    except Exception:  # older numpy: no dict mode
        blas = {"name": "unknown"}
    return {"strategy": strategy, "model_runs_s": model_runs, "product_runs_s": product_runs,
            "outflow_max_rel_error_vs_plain_sums": err, "balance_max_residual": bal,
            "numpy": np.__version__, "blas": blas, "threads": threads}


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=100000)
    ap.add_argument("--years", type=int, default=200)
    ap.add_argument("--groups", type=int, default=100)
    ap.add_argument("--runs", type=int, default=7)
    ap.add_argument("--warmup", type=int, default=2)
    ap.add_argument("--strategy", choices=["blas", "split"], help="time one way only, in this process")
    a = ap.parse_args()
    if a.series % a.groups:
        sys.exit(f"numpy-cohort: --series ({a.series}) must be a multiple of --groups ({a.groups})")
    if a.strategy:
        print(json.dumps(measure(a, a.strategy)))
        return
    results = []
    for strategy in ("blas", "split"):
        args = [sys.executable, os.path.abspath(__file__), "--strategy", strategy] + [f"--{k}={getattr(a, k)}" for k in ("series", "years", "groups", "runs", "warmup")]
        env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
        r = subprocess.run(args, capture_output=True, text=True, env=env)
        if r.returncode != 0:
            sys.exit(f"numpy-cohort: the {strategy} run failed: {r.stderr.strip()}")
        results.append(json.loads(r.stdout))
    cells = a.series * a.years * (a.years + 1) / 2
    best = lambda key: min(results, key=lambda r: statistics.median(r[key]))
    m, p = best("model_runs_s"), best("product_runs_s")
    model_s, product_s = statistics.median(m["model_runs_s"]), statistics.median(p["product_runs_s"])
    print(json.dumps({
        "implementation": "numpy.matmul over the stacked groups (BLAS dgemm, zero quadrant skipped) + subtract and cumsum; the faster of BLAS threads and one BLAS thread per Python thread",
        "series": a.series, "years": a.years, "groups": a.groups, "cells_per_run": cells,
        "inflow_driven_s": model_s, "inflow_driven_cells_per_s": cells / model_s, "inflow_driven_strategy": m["strategy"],
        "product_s": product_s, "product_cells_per_s": cells / product_s, "product_strategy": p["strategy"],
        "dgemm_multiply_adds_per_run": a.series * ((a.years // 2) ** 2 + a.years * (a.years - a.years // 2)),
        "outflow_max_rel_error_vs_plain_sums": max(r["outflow_max_rel_error_vs_plain_sums"] for r in results),
        "balance_max_residual": max(r["balance_max_residual"] for r in results),
        "numpy": results[0]["numpy"], "python": platform.python_version(), "blas": results[0]["blas"], "threads": results[0]["threads"],
        "strategies": results,
    }))


if __name__ == "__main__":
    main()
