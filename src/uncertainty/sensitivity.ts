/**
 * Variance-based sensitivity indices from batched model runs.
 *
 * Design (Saltelli et al., "Variance based sensitivity analysis of model output. Design and
 * estimator for the total sensitivity index", Computer Physics Communications 181 (2010)
 * 259–270, §3): two independent N × k sample matrices A and B, and for each input i the matrix
 * A_B^(i): A with its column i taken from B. N·(k + 2) runs in all.
 * Estimators (same paper, Table 2):
 *   first order  V_i  = (1/N) Σ_j f(B)_j · (f(A_B^(i))_j − f(A)_j)          (their (b))
 *   total effect VT_i = (1/(2N)) Σ_j (f(A)_j − f(A_B^(i))_j)²                 (their (f), Jansen 1999)
 *   S_i = V_i / V(Y), ST_i = VT_i / V(Y).
 * V(Y) is the sample variance (n − 1 denominator) of the 2N outputs of A and B together, and f(B)
 * in V_i is centred on their mean f0 — (f(B) − f0) instead of f(B); this leaves the estimator's
 * expectation unchanged (the bracket has mean 0) and removes the noise a large output mean
 * would add (common practice, no source in the paper). An output with V(Y) = 0 gets NaN indices.
 *
 * Batches: `sobolDesign` returns every parameter row at once; the caller evaluates them in any
 * batches and hands back one Float64Array of M outputs per run (run-major: output m of run r at
 * [r·M + m], e.g. M series-years). `sobolIndices` computes all M × k indices in one pass over
 * the runs.
 * Confidence intervals: bootstrap over the N base rows (the rows j of A, B and every A_B^(i)
 * resampled together; Efron & Tibshirani, An Introduction to the Bootstrap, 1993, ch. 13,
 * percentile interval), seeded; the sd of the replicates is reported as the standard error.
 */
import { sampleInputs, type SamplingDesign } from "./designs.js";
import type { Marginal } from "./marginals.js";
import { Rng } from "./random.js";
import { summarizeCells } from "./summary.js";

export interface SobolDesign {
  /** N: rows of A (and of B and of each A_B^(i)). */
  base: number;
  /** k: number of inputs. */
  inputs: number;
  /** N·(k + 2) */
  runs: number;
  /** runs × k, row-major: rows [0, N) are A, [N, 2N) B, [(2 + i)N, (3 + i)N) A_B^(i). */
  rows: Float64Array;
}

export function sobolDesign(marginals: readonly Marginal[], base: number, rng: Rng, sampling: SamplingDesign = "random"): SobolDesign {
  if (!Number.isInteger(base) || base < 2) throw new RangeError(`base sample size N must be a whole number ≥ 2 (got ${base})`);
  const k = marginals.length;
  if (k < 1) throw new RangeError("sensitivity needs at least one uncertain input");
  const A = sampleInputs(marginals, sampling, base, rng);
  const B = sampleInputs(marginals, sampling, base, rng);
  const runs = base * (k + 2);
  const rows = new Float64Array(runs * k);
  rows.set(A, 0);
  rows.set(B, base * k);
  for (let i = 0; i < k; i++) {
    const block = (2 + i) * base * k;
    rows.set(A, block);
    for (let j = 0; j < base; j++) rows[block + j * k + i] = B[j * k + i]!;
  }
  return { base, inputs: k, runs, rows };
}

export interface SobolOptions {
  /** M: outputs per run (default 1). */
  outputsPerRun?: number;
  bootstrap?: { resamples: number; seed: number; confidence?: number };
}

export interface SobolResult {
  base: number;
  inputs: number;
  outputs: number;
  runs: number;
  /** V(Y) per output. */
  variance: Float64Array;
  /** S_i and ST_i, output-major: [m·k + i]. */
  first: Float64Array;
  total: Float64Array;
  bootstrap?: {
    resamples: number;
    confidence: number;
    firstSe: Float64Array;
    totalSe: Float64Array;
    firstLow: Float64Array;
    firstHigh: Float64Array;
    totalLow: Float64Array;
    totalHigh: Float64Array;
  };
}

/** Largest bootstrap store (replicates × outputs × inputs × 2) accepted, in numbers. */
const MAX_BOOTSTRAP_VALUES = 2 ** 27;

/** S and ST for the base rows idx (all rows in order when idx is null), into first/total at [m·k + i]. */
function estimate(y: Float64Array, N: number, k: number, M: number, idx: Int32Array | null, first: Float64Array, total: Float64Array, variance: Float64Array | null, at: number, stride: number): void {
  const f0 = new Float64Array(M);
  for (let jj = 0; jj < N; jj++) {
    const j = idx ? idx[jj]! : jj;
    const a = j * M;
    const b = (N + j) * M;
    for (let m = 0; m < M; m++) f0[m]! += y[a + m]! + y[b + m]!;
  }
  for (let m = 0; m < M; m++) f0[m]! /= 2 * N;
  const ss = new Float64Array(M);
  const vi = new Float64Array(M * k);
  const vt = new Float64Array(M * k);
  for (let jj = 0; jj < N; jj++) {
    const j = idx ? idx[jj]! : jj;
    const a = j * M;
    const b = (N + j) * M;
    for (let m = 0; m < M; m++) {
      const fa = y[a + m]!;
      const fb = y[b + m]! - f0[m]!;
      const ea = fa - f0[m]!;
      ss[m]! += ea * ea + fb * fb;
      for (let i = 0; i < k; i++) {
        const fab = y[((2 + i) * N + j) * M + m]!;
        const diff = fab - fa;
        vi[m * k + i]! += fb * diff;
        vt[m * k + i]! += diff * diff;
      }
    }
  }
  for (let m = 0; m < M; m++) {
    const v = ss[m]! / (2 * N - 1);
    if (variance) variance[m] = v;
    for (let i = 0; i < k; i++) {
      const c = m * k + i;
      first[at + c * stride] = v > 0 ? vi[c]! / N / v : NaN;
      total[at + c * stride] = v > 0 ? vt[c]! / (2 * N) / v : NaN;
    }
  }
}

export function sobolIndices(outputs: Float64Array, base: number, inputs: number, options: SobolOptions = {}): SobolResult {
  const N = base;
  const k = inputs;
  const M = options.outputsPerRun ?? 1;
  if (!Number.isInteger(N) || N < 2) throw new RangeError(`base sample size N must be a whole number ≥ 2 (got ${N})`);
  if (!Number.isInteger(k) || k < 1) throw new RangeError(`number of inputs must be a whole number ≥ 1 (got ${k})`);
  if (!Number.isInteger(M) || M < 1) throw new RangeError(`outputsPerRun must be a whole number ≥ 1 (got ${M})`);
  const runs = N * (k + 2);
  if (outputs.length !== runs * M) {
    throw new RangeError(`outputs hold ${outputs.length} numbers; N·(k + 2)·M = ${N}·${k + 2}·${M} = ${runs * M} expected (run-major, M outputs per run)`);
  }
  const variance = new Float64Array(M);
  const first = new Float64Array(M * k);
  const total = new Float64Array(M * k);
  estimate(outputs, N, k, M, null, first, total, variance, 0, 1);
  const result: SobolResult = { base: N, inputs: k, outputs: M, runs, variance, first, total };
  const bs = options.bootstrap;
  if (!bs) return result;
  const R = bs.resamples;
  const conf = bs.confidence ?? 0.95;
  if (!Number.isInteger(R) || R < 2) throw new RangeError(`bootstrap resamples must be a whole number ≥ 2 (got ${R})`);
  if (!(conf > 0 && conf < 1)) throw new RangeError(`bootstrap confidence must lie strictly between 0 and 1 (got ${conf})`);
  if (R * M * k * 2 > MAX_BOOTSTRAP_VALUES) {
    throw new RangeError(`bootstrap of ${R} resamples × ${M} outputs × ${k} inputs needs ${R * M * k * 2} stored values; at most ${MAX_BOOTSTRAP_VALUES} accepted (fewer resamples, or bootstrap a summary output)`);
  }
  // Replicates stored cell-major (cell = m·k + i, R values each) for summarizeCells.
  const repFirst = new Float64Array(M * k * R);
  const repTotal = new Float64Array(M * k * R);
  const rng = new Rng(bs.seed);
  const idx = new Int32Array(N);
  for (let r = 0; r < R; r++) {
    for (let j = 0; j < N; j++) idx[j] = rng.below(N);
    estimate(outputs, N, k, M, idx, repFirst, repTotal, null, r, R);
  }
  const probabilities = [(1 - conf) / 2, (1 + conf) / 2];
  const sf = summarizeCells(repFirst, R, M * k, { probabilities });
  const st = summarizeCells(repTotal, R, M * k, { probabilities });
  result.bootstrap = {
    resamples: R,
    confidence: conf,
    firstSe: sf.sd,
    totalSe: st.sd,
    firstLow: sf.quantiles[0]!,
    firstHigh: sf.quantiles[1]!,
    totalLow: st.quantiles[0]!,
    totalHigh: st.quantiles[1]!,
  };
  return result;
}
