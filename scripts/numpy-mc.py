#!/usr/bin/env python3
"""
The bench's Monte Carlo workload written independently with numpy, scipy and OpenBLAS, for
comparison with cairn on the same machine in the same run (`npm run bench` calls it when
python3, numpy and scipy are there). No code is shared with cairn.

Workload (the same as src/bench/mc.ts): D draws of S series × T years in G lifetime groups of
equal size; inflow uniform in [1, 100); group g has a normal lifetime with mean
m_g = 20 + 30·g/(G − 1) years and sd 30 % of m_g; each draw scales each group's mean by a
factor F ~ N(1, 0.1²) truncated at 0 (sd unchanged); midpoint convention: the share still in
use at the end of the year of age a is sigma(a) = 1 − Φ((a + ½ − mean)/sd), shares below 1e−300
are 0. Inflow-driven: stock_d(t) = Σ_k sigma_d(k)·I(t − k). Output per series and year: the
mean and the 5/25/50/75/95 % quantiles (numpy's default "linear" method: Hyndman & Fan type 7)
of the stock over the draws.

Per group: the draws' survival curves as one D × T matrix; each series' inflow as its T × T
Toeplitz matrix; the stocks of all draws of all the group's series by one batched matmul
(draws × T) @ (series × T × T) → series × draws × T (OpenBLAS); then np.quantile and mean over
the draws. Groups are shared among Python threads (numpy releases the GIL), one BLAS thread
each. Prints one JSON line: seconds, cells per second (D·S·T(T+1)/2), threads.

Usage: python3 scripts/numpy-mc.py [D] [S] [T] [G] [THREADS]
"""
import json
import os
import sys
import time

THREADS = int(sys.argv[5]) if len(sys.argv) > 5 else os.cpu_count() or 1
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402
from concurrent.futures import ThreadPoolExecutor  # noqa: E402
from scipy.special import ndtr  # noqa: E402
from scipy.stats import truncnorm  # noqa: E402


def main() -> None:
    D, S, T, G = (int(x) for x in (sys.argv[1:5] + ["1000", "10000", "200", "100"][len(sys.argv[1:5]):]))
    rng = np.random.default_rng(7)
    inflow = 1 + 99 * rng.random((S, T))
    per = -(-S // G)
    # Factors: N(1, 0.1²) truncated at 0, one per group and draw.
    factors = truncnorm.rvs(-1 / 0.1, np.inf, loc=1, scale=0.1, size=(G, D), random_state=rng)
    ages = np.arange(T) + 0.5
    probs = [0.05, 0.25, 0.5, 0.75, 0.95]
    q_out = np.empty((len(probs), S, T))
    mean_out = np.empty((S, T))
    idx = np.arange(T)
    lag = idx[None, :] - idx[:, None]  # lag[k, t] = t − k

    def group(g: int) -> None:
        s0, s1 = g * per, min(S, (g + 1) * per)
        if s0 >= s1:
            return
        m = 20 + 30 * g / max(G - 1, 1)
        sd = 0.3 * m
        sig = 1 - ndtr((ages[None, :] - m * factors[g][:, None]) / sd)  # D × T
        sig[sig < 1e-300] = 0
        x = inflow[s0:s1]
        toe = np.where(lag >= 0, x[:, np.clip(lag, 0, None)], 0.0)  # series × T × T: toe[s, k, t] = I_s(t − k)
        stock = np.matmul(sig[None, :, :], toe)  # series × D × T
        q_out[:, s0:s1, :] = np.quantile(stock, probs, axis=1)
        mean_out[s0:s1] = stock.mean(axis=1)

    t0 = time.perf_counter()
    with ThreadPoolExecutor(THREADS) as ex:
        list(ex.map(group, range(G)))
    s = time.perf_counter() - t0
    cells = D * S * T * (T + 1) / 2
    print(json.dumps({"numpy_mc_s": s, "numpy_mc_cells_per_s": cells / s, "threads": THREADS, "numpy": np.__version__,
                      "check_mean_stock_last_year": float(mean_out[:, -1].sum())}))


main()
