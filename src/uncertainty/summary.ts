/**
 * Per-cell sample statistics of Monte Carlo draws: mean, standard deviation and quantiles, for
 * many cells (e.g. series-years) with D draws each.
 *
 * Mean and sd: the corrected two-pass algorithm (Chan, Golub & LeVeque, "Algorithms for computing
 * the sample variance", The American Statistician 37(3), 1983, 242–247): m = Σx/n, then
 * d = Σ(x − m), s² = (Σ(x − m)² − d²/n)/(n − 1), mean m + d/n (the second pass shares its loop
 * with the bucketing of order-stats.ts; sums use two interleaved accumulators, so they are
 * deterministic but not in plain left-to-right order). The sd uses the n − 1 denominator
 * (the unbiased sample variance), so one draw gives sd NaN.
 * Quantiles: Hyndman & Fan, "Sample quantiles in statistical packages", The American
 * Statistician 50(4), 1996, 361–365, definition 7 (R's default, from memory): with the draws
 * sorted, x(0) ≤ … ≤ x(n−1), h = (n − 1)p, Q(p) = x(⌊h⌋) + (h − ⌊h⌋)(x(⌊h⌋+1) − x(⌊h⌋)). The
 * needed order statistics are found by bucketing and selection (order-stats.ts), not a full sort.
 * A cell holding any NaN gets NaN for every statistic. The input is never modified.
 *
 * Layouts: "cell-major" (each cell's D draws contiguous, cell c at [c·D, (c + 1)·D)) is the fast
 * one (read in place, no copy); "draw-major" (draw d of cell c at [d·C + c], as draws arrive one
 * at a time) is transposed block by block (64 cells at a time) into the cell-major form first.
 * Float32Array input is widened to double per cell (statistics are computed in double precision).
 */

import { OrderStats } from "./order-stats.js";

export const DEFAULT_PROBABILITIES: readonly number[] = [0.05, 0.25, 0.5, 0.75, 0.95];
export type DrawLayout = "cell-major" | "draw-major";

export interface CellStats {
  probabilities: number[];
  mean: Float64Array;
  sd: Float64Array;
  /** One array per probability, in the order given. */
  quantiles: Float64Array[];
}

export interface SummaryOptions {
  probabilities?: readonly number[];
  layout?: DrawLayout;
  /** Arrays to write into (from `offset`), e.g. the columns of a larger table. */
  into?: CellStats;
  offset?: number;
}

interface Plan {
  /** The order statistics needed, sorted, distinct. */
  ranks: Int32Array;
  /** Per probability: the slots in `ranks` of x(⌊h⌋) and x(⌊h⌋+1), and h − ⌊h⌋. */
  slotLo: Int32Array;
  slotHi: Int32Array;
  frac: Float64Array;
  os: OrderStats;
  vals: Float64Array;
}

function plan(draws: number, probabilities: readonly number[]): Plan {
  const lowRank: number[] = [];
  const frac = new Float64Array(probabilities.length);
  const needed = new Set<number>();
  probabilities.forEach((p, i) => {
    if (!(p >= 0 && p <= 1)) throw new RangeError(`quantile probability must lie between 0 and 1 (got ${p})`);
    const h = (draws - 1) * p;
    const j = Math.floor(h);
    lowRank.push(j);
    frac[i] = h - j;
    needed.add(j);
    if (h > j) needed.add(j + 1);
  });
  const ranks = Int32Array.from([...needed].sort((a, b) => a - b));
  const slot = (rank: number) => ranks.indexOf(rank);
  return {
    ranks,
    slotLo: Int32Array.from(lowRank.map(slot)),
    slotHi: Int32Array.from(lowRank.map((j, i) => (frac[i]! > 0 ? slot(j + 1) : slot(j)))),
    frac,
    os: new OrderStats(draws, Math.max(1, ranks.length)),
    vals: new Float64Array(ranks.length),
  };
}

/** Statistics of the cell whose n draws are x[off..off+n) (x is not changed). */
function summarizeOne(x: Float64Array, off: number, n: number, p: Plan, out: CellStats, at: number): void {
  let s0 = 0;
  let s1 = 0;
  let min = Infinity;
  let max = -Infinity;
  let i = 0;
  for (; i + 1 < n; i += 2) {
    const a = x[off + i]!;
    const b = x[off + i + 1]!;
    s0 += a;
    s1 += b;
    if (a < min) min = a;
    if (a > max) max = a;
    if (b < min) min = b;
    if (b > max) max = b;
  }
  if (i < n) {
    const a = x[off + i]!;
    s0 += a;
    if (a < min) min = a;
    if (a > max) max = a;
  }
  const sum = s0 + s1;
  if (Number.isNaN(sum)) {
    let hasNaN = false;
    for (let j = 0; j < n; j++) if (Number.isNaN(x[off + j]!)) hasNaN = true;
    if (hasNaN) {
      out.mean[at] = NaN;
      out.sd[at] = NaN;
      for (const q of out.quantiles) q[at] = NaN;
      return;
    }
  }
  const m = sum / n;
  const vals = p.vals;
  const os = p.os;
  os.select(x, off, n, min, max, p.ranks, p.ranks.length, vals, m);
  const d = os.dev;
  out.mean[at] = m + d / n;
  out.sd[at] = Math.sqrt(Math.max(0, os.dev2 - (d * d) / n) / (n - 1));
  for (let k = 0; k < p.frac.length; k++) {
    const g = p.frac[k]!;
    const lo = vals[p.slotLo[k]!]!;
    out.quantiles[k]![at] = g > 0 ? lo + g * (vals[p.slotHi[k]!]! - lo) : lo;
  }
}

export function summarizeCells(values: Float64Array | Float32Array, draws: number, cells: number, options: SummaryOptions = {}): CellStats {
  if (!Number.isInteger(draws) || draws < 1) throw new RangeError(`number of draws must be a whole number ≥ 1 (got ${draws})`);
  if (!Number.isInteger(cells) || cells < 0) throw new RangeError(`number of cells must be a whole number ≥ 0 (got ${cells})`);
  if (values.length < draws * cells) throw new RangeError(`values hold ${values.length} numbers; ${draws} draws × ${cells} cells = ${draws * cells} needed`);
  const probabilities = [...(options.probabilities ?? DEFAULT_PROBABILITIES)];
  const p = plan(draws, probabilities);
  const offset = options.offset ?? 0;
  const out: CellStats = options.into ?? {
    probabilities,
    mean: new Float64Array(cells),
    sd: new Float64Array(cells),
    quantiles: probabilities.map(() => new Float64Array(cells)),
  };
  if (out.quantiles.length !== probabilities.length) throw new RangeError(`into holds ${out.quantiles.length} quantile arrays; ${probabilities.length} probabilities given`);
  for (const a of [out.mean, out.sd, ...out.quantiles]) {
    if (a.length < offset + cells) throw new RangeError(`an output array holds ${a.length} values; offset ${offset} + ${cells} cells needed`);
  }
  const layout = options.layout ?? "cell-major";
  if (layout === "cell-major") {
    if (values instanceof Float64Array) {
      for (let c = 0; c < cells; c++) summarizeOne(values, c * draws, draws, p, out, offset + c);
    } else {
      const buf = new Float64Array(draws);
      for (let c = 0; c < cells; c++) {
        const base = c * draws;
        for (let i = 0; i < draws; i++) buf[i] = values[base + i]!;
        summarizeOne(buf, 0, draws, p, out, offset + c);
      }
    }
  } else if (layout === "draw-major") {
    const B = 64;
    const block = new Float64Array(B * draws);
    for (let c0 = 0; c0 < cells; c0 += B) {
      const nb = Math.min(B, cells - c0);
      for (let d = 0; d < draws; d++) {
        const row = d * cells + c0;
        for (let b = 0; b < nb; b++) block[b * draws + d] = values[row + b]!;
      }
      for (let b = 0; b < nb; b++) summarizeOne(block, b * draws, draws, p, out, offset + c0 + b);
    }
  } else {
    throw new RangeError(`unknown layout ${JSON.stringify(layout)}; accepted: cell-major, draw-major`);
  }
  return out;
}

/**
 * Draw-major blocks (draws × C cells, draw d of cell c at [d·C + c]) whose cells tend to rank
 * the draws alike, e.g. the years of one series when one uncertain quantity drives them all.
 * The draws are ordered once by the last cell's values; a cell whose values are non-decreasing
 * in that order (checked for every cell, one comparison per value) has its order statistics
 * read off directly: x(k) is the value at position k. Every other cell (and any cell holding a
 * NaN) goes through the general path above. The quantiles are the same numbers either way (the
 * same order statistics, the same type-7 interpolation); mean and sd sum the draws in sorted
 * order with the same corrected two-pass formula, so they may differ from the general path in
 * the last bits. Returns the number of cells read off directly.
 */
export function drawOrder(values: Float64Array, draws: number, cells: number): Int32Array {
  const key = new Float64Array(draws);
  for (let d = 0; d < draws; d++) key[d] = values[d * cells + cells - 1]!;
  const idx = Array.from({ length: draws }, (_, i) => i).sort((a, b) => key[a]! - key[b]! || a - b);
  return Int32Array.from(idx);
}

const plans = new Map<string, Plan>();

export function summarizeDrawMajorSorted(values: Float64Array, draws: number, cells: number, probabilities: readonly number[], into: CellStats, offset = 0,
  order: Int32Array = drawOrder(values, draws, cells)): number {
  const R = draws;
  const C = cells;
  const pk = `${R}:${probabilities.join(",")}`;
  let p = plans.get(pk);
  if (!p) plans.set(pk, (p = plan(R, probabilities)));
  // One pass over the draws in the given order (by default the last cell's; ties by draw
  // index): whether each cell's values are non-decreasing in that order, and the sums of the
  // deviations from the cell's middle draw in that order (shifted data: the variance from
  // Σd and Σd² around a value inside the sample, as the corrected two-pass formula does around
  // the mean; Chan, Golub & LeVeque 1983).
  const ok = new Uint8Array(C).fill(1);
  const mid = order[R >> 1]! * C;
  const x0 = values.slice(mid, mid + C); // the middle draw: a shift near the mean
  const dev = new Float64Array(C);
  const dev2 = new Float64Array(C);
  const a0 = order[0]! * C;
  for (let t = 0; t < C; t++) {
    const e = values[a0 + t]! - x0[t]!;
    dev[t] = e;
    dev2[t] = e * e;
  }
  for (let i = 1; i < R; i++) {
    const a = order[i]! * C;
    const b = order[i - 1]! * C;
    for (let t = 0; t < C; t++) {
      const x = values[a + t]!;
      const e = x - x0[t]!;
      dev[t]! += e;
      dev2[t]! += e * e;
      ok[t]! &= x >= values[b + t]! ? 1 : 0;
    }
  }
  for (let t = 0; t < C; t++) if (Number.isNaN(dev[t]!) || Number.isNaN(x0[t]!)) ok[t] = 0;
  const m = x0;
  let direct = 0;
  const col = new Float64Array(R);
  for (let t = 0; t < C; t++) {
    const at = offset + t;
    if (!ok[t]) {
      for (let i = 0; i < R; i++) col[i] = values[i * C + t]!;
      summarizeOne(col, 0, R, p, into, at);
      continue;
    }
    direct++;
    const d = dev[t]!;
    into.mean[at] = m[t]! + d / R;
    into.sd[at] = Math.sqrt(Math.max(0, dev2[t]! - (d * d) / R) / (R - 1));
    for (let k = 0; k < p.frac.length; k++) {
      const g = p.frac[k]!;
      const lo = values[order[p.ranks[p.slotLo[k]!]!]! * C + t]!;
      into.quantiles[k]![at] = g > 0 ? lo + g * (values[order[p.ranks[p.slotHi[k]!]!]! * C + t]! - lo) : lo;
    }
  }
  return direct;
}
