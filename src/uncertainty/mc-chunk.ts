/**
 * One chunk of a Monte Carlo job: some series of one lifetime group, every run. Pure
 * computation (no DuckDB, no threads): worker threads call it, and so can tests.
 *
 * Two ways to compute the runs, with the same results to rounding:
 *   by series   inflow-driven models whose group has one lifetime for every cohort, no stock in
 *               place, and an input error that is the same in every year (or none). The stock of
 *               a series is then a convolution of its inflow with each run's survival curve,
 *               stock_r(t) = Σ_k σ_r(k)·I(t − k): for all runs at once this is one product of the
 *               runs' curves (runs × T) with the inflow's Toeplitz matrix (T × T), done by the
 *               batched cohort kernel (cohortProduct), many runs per call. Outflow likewise with
 *               the leaving shares p_r(k); material flows with the inflow times content.
 *   by run      everything else: each run is a full model run of the chunk's series with that
 *               run's curves per cohort (and per age of the stock in place), input and content.
 * Runs are kept run-major (run r's cells contiguous) and summarised per cell at the end:
 * mean, sd and type-7 quantiles (summary.ts), or Sobol indices (sensitivity.ts).
 */
import { CohortGroup, curveOf, survivalVector, inflowDriven, stockDriven, composition, cohortProduct, makeLifetime, type Curve, type InitialContribution } from "../cohort/index.js";
import { yearFactors } from "./correlation.js";
import { splitMix64, Rng } from "./random.js";
import { factorMarginal } from "./spreads.js";
import { drawOrder, summarizeCells, summarizeDrawMajorSorted, type CellStats } from "./summary.js";
import { sobolIndices } from "./sensitivity.js";
import type { Marginal } from "./marginals.js";
import { LT_PARAMS, type McChunk, type McChunkResult, type McGroup, type McJob, type VarSobol, type VarStats } from "./mc-types.js";

/** A failure of one draw (an impossible parameter, say), reported with the step and draw. */
export class DrawError extends Error {}

/** The seed of the input errors of one series in one draw index: independent of chunking and threads. */
export function inputSeed(seed: number, draw: number, sid: number): number {
  const next = splitMix64(BigInt(seed) * 0x100000001b3n + BigInt(draw) * 0x9e3779b97f4a7c15n + BigInt(sid) * 0xd1b54a32d192ed03n);
  return Number(next() & 0x1fffffffffffffn);
}

/** Curve memory kept across the chunks of one job (bytes). */
const CURVE_CACHE_BYTES = 64 * 2 ** 20;

/** Survival curves of lifetimes rows with a run's drawn parameters, built once per (row, draw index). */
export class Curves {
  private readonly cache = new Map<number, Curve>();
  constructor(private readonly job: McJob) {}

  /** The curves of a job, kept across its chunks while they fit in CURVE_CACHE_BYTES. */
  static forJob(job: McJob, previous: Curves | null): Curves {
    if (previous && previous.job === job && previous.cache.size * job.curveLength * 16 < CURVE_CACHE_BYTES) return previous;
    return new Curves(job);
  }

  /** σ(0..n − 1) only (no leaving shares): what a stock needs. */
  sigma(q: number, li: number, n: number): Float64Array {
    const c = this.cache.get(this.key(q, li));
    if (c) return c.sigma;
    return survivalVector(this.lifetime(q, li), n);
  }

  private key(q: number, li: number): number {
    return this.job.ltValues ? q * this.job.ltDraws + li : q;
  }

  private lifetime(q: number, li: number) {
    const job = this.job;
    const row = job.rows[q]!;
    const p = { ...row };
    let drawn = "";
    if (job.ltValues) {
      LT_PARAMS.forEach((name, k) => {
        const v = job.ltValues![(q * 4 + k) * job.ltDraws + li]!;
        if (!Number.isNaN(v)) {
          p[name] = v;
          drawn += ` ${name} = ${v}`;
        }
      });
    }
    try {
      return makeLifetime(p, `lifetimes row ${row.label}`, (name) => job.tables[name]);
    } catch (e) {
      throw new DrawError(`step ${job.step}: uncertainty draw ${li + 1}:${drawn}: ${(e as Error).message}; a spread that can reach such values needs truncate_below (e.g. 0) or a narrower width`);
    }
  }

  of(q: number, li: number): Curve {
    const key = this.key(q, li);
    let c = this.cache.get(key);
    if (c) return c;
    c = curveOf(this.lifetime(q, li), this.job.curveLength);
    this.cache.set(key, c);
    return c;
  }
}

interface Ctx {
  job: McJob;
  gn: number;
  sids: Int32Array;
  R: number;
  T: number;
  M: number;
  V: number; // product variables + material variables
  curves: Curves;
  inputMarginal: Marginal | null;
  totals: Float64Array | null;
  /** Product variable v (0 inflow, 1 outflow, 2 stock) is summarised (and totalled). */
  wanted: (v: number) => boolean;
}

/** Input factors of series sid in draw index di (T values). */
function inputFactors(c: Ctx, di: number, sid: number, out: Float64Array): Float64Array {
  const inp = c.job.input!;
  return yearFactors(c.inputMarginal!, inp.correlation, 1, c.T, new Rng(inputSeed(inp.seed, di, sid)), out);
}

function addTotals(c: Ctx, r: number, j: number, v: number, row: Float64Array, at: number): void {
  const { job, T, R } = c;
  const tot = c.totals!;
  const V = 3 + c.M;
  for (let l = 0; l < job.totals.levels; l++) {
    const cell = job.totals.index[l * job.n + c.sids[j]!]!;
    if (cell < 0) continue;
    const base = (cell * V + v) * R * T + r * T;
    for (let t = 0; t < T; t++) tot[base + t]! += row[at + t]!;
  }
}

function newStats(cells: number, P: number): VarStats {
  return { mean: new Float64Array(cells), sd: new Float64Array(cells), quantiles: Array.from({ length: P }, () => new Float64Array(cells)) };
}

function newSobol(cells: number, k: number): VarSobol {
  const a = () => new Float64Array(cells * k);
  return { first: a(), total: a(), firstLow: a(), firstHigh: a(), totalLow: a(), totalHigh: a() };
}

/** Summaries (or Sobol indices) of a run-major block (R × cells) into the chunk's arrays at `offset` cells. */
function summarise(c: Ctx, buf: Float64Array, cells: number, offset: number, stats: VarStats | null, sobol: VarSobol | null, sorted?: { on: boolean; order: Int32Array | null; tries: number }): void {
  if (stats && sorted?.on) {
    // The years of one series often rank the draws alike, and so do the series of one group
    // (one quantity drives them): order statistics are read off one ordering of the draws,
    // checked cell by cell. An ordering that fits fewer than half the cells is made afresh;
    // after three such misses the chunk goes the general way.
    let direct = sorted.order ? summarizeDrawMajorSorted(buf, c.R, cells, c.job.probabilities, stats as CellStats & VarStats, offset, sorted.order) : 0;
    if (direct < cells / 2) {
      sorted.order = drawOrder(buf, c.R, cells);
      direct = summarizeDrawMajorSorted(buf, c.R, cells, c.job.probabilities, stats as CellStats & VarStats, offset, sorted.order);
      if (direct < cells / 2 && ++sorted.tries >= 3) sorted.on = false;
    }
  } else if (stats) summarizeCells(buf, c.R, cells, { probabilities: c.job.probabilities, layout: "draw-major", into: stats as CellStats & VarStats, offset });
  if (sobol) {
    const s = c.job.sobol!;
    const k = s.assumptions.length;
    const r = sobolIndices(buf.subarray(0, c.R * cells), s.base, k, { outputsPerRun: cells, bootstrap: { resamples: s.resamples, seed: s.seed, confidence: s.confidence } });
    const b = r.bootstrap!;
    const at = offset * k;
    sobol.first.set(r.first, at);
    sobol.total.set(r.total, at);
    sobol.firstLow.set(b.firstLow, at);
    sobol.firstHigh.set(b.firstHigh, at);
    sobol.totalLow.set(b.totalLow, at);
    sobol.totalHigh.set(b.totalHigh, at);
  }
}

/** Variables with Sobol indices: the product's outflow and stock. */
const SOBOL_VARS = new Set([1, 2]);

let lastCurves: Curves | null = null;

export function computeChunk(job: McJob, chunk: McChunk): McChunkResult {
  const g = job.groups[chunk.group]!;
  const sids = g.sids.subarray(chunk.j0, chunk.j1);
  const gn = sids.length;
  const { T, runs: R } = job;
  const M = job.M;
  const V = 3 + 2 * M;
  const c: Ctx = {
    job, gn, sids, R, T, M, V, curves: (lastCurves = Curves.forJob(job, lastCurves)),
    inputMarginal: job.input ? factorMarginal(job.input.spread, "uncertainty.input") : null,
    totals: job.totals.levels ? new Float64Array(job.totals.cells * (3 + M) * T * R) : null,
    wanted: () => true,
  };
  const cells = gn * T;
  const P = job.probabilities.length;
  const k = job.sobol?.assumptions.length ?? 0;
  const wanted = (v: number) => job.variables.includes(v < 3 ? (["inflow", "outflow", "stock"] as const)[v]! : (v - 3) % 2 === 0 ? "stock" : "outflow");
  c.wanted = wanted;
  const stats = Array.from({ length: V }, (_, v) => (job.sobol || !wanted(v) ? null : newStats(cells, P)));
  const sobol = Array.from({ length: V }, (_, v) => (job.sobol && SOBOL_VARS.has(v) && wanted(v) ? newSobol(cells, k) : null));
  if (bySeriesPath(job, g)) bySeries(c, g.cohortRow[0]!, stats, sobol);
  else byRun(c, g, chunk.j0, stats, sobol);
  return { chunk, stats, sobol, totals: c.totals };
}

/** Whether a group's runs can be computed series by series (see the file's header). */
export function bySeriesPath(job: McJob, g: McGroup): boolean {
  const first = g.cohortRow[0]!;
  return job.mode === "inflow-driven" && g.cohortRow.every((q) => q === first) && !g.initRow && !g.initFixed && (!job.input || job.input.correlation.kind === "full");
}

/** Toeplitz matrix of a series: M[k·T + t] = x(t − k) for t ≥ k. */
function toeplitz(x: Float64Array, T: number, out: Float64Array): Float64Array {
  out.fill(0);
  for (let k = 0; k < T; k++) for (let t = k; t < T; t++) out[k * T + t] = x[t - k]!;
  return out;
}

function bySeries(c: Ctx, row: number, stats: (VarStats | null)[], sobol: (VarSobol | null)[]): void {
  const { job, R, T, M } = c;
  // The runs' curves, one row each: survival σ_r(0..T−1) and leaving shares p_r(0..T−1).
  const sig = new Float64Array(R * T);
  const lea = new Float64Array(R * T);
  for (let r = 0; r < R; r++) {
    const li = job.idx[3 * r]!;
    if (job.variables.includes("outflow")) {
      const cu = c.curves.of(row, li);
      sig.set(cu.sigma.subarray(0, T), r * T);
      lea.set(cu.leave.subarray(0, T), r * T);
    } else sig.set(c.curves.sigma(row, li, T), r * T);
  }
  const toe = new Float64Array(T * T);
  const bufs = Array.from({ length: 3 + 2 * M }, () => new Float64Array(R * T));
  const needOut = job.variables.includes("outflow");
  const sorted = bufs.map(() => ({ on: true, order: null as Int32Array | null, tries: 0 }));
  const needIn = job.variables.includes("inflow");
  const x = new Float64Array(T);
  const F = new Float64Array(R); // the input factor of each run (the same in every year)
  const f1 = new Float64Array(T);
  for (let j = 0; j < c.gn; j++) {
    const sid = c.sids[j]!;
    const I = job.values.subarray(sid * T, sid * T + T);
    for (let r = 0; r < R; r++) F[r] = job.input ? inputFactors(c, job.idx[3 * r + 2]!, sid, f1)[0]! : 1;
    const [bIn, bOut, bSt] = bufs as [Float64Array, Float64Array, Float64Array];
    toeplitz(I, T, toe);
    cohortProduct(sig, R, T, toe, bSt);
    if (needOut) cohortProduct(lea, R, T, toe, bOut);
    if (job.input) for (let r = 0; r < R; r++) {
      const f = F[r]!;
      for (let t = 0; t < T; t++) {
        bSt[r * T + t]! *= f;
        bOut[r * T + t]! *= f;
      }
    }
    if (needIn) for (let r = 0; r < R; r++) for (let t = 0; t < T; t++) bIn[r * T + t] = I[t]! * F[r]!;
    for (let m = 0; m < M; m++) {
      const bs = bufs[3 + 2 * m]!;
      const bo = bufs[4 + 2 * m]!;
      const cont = job.content!.subarray((sid * M + m) * T, (sid * M + m) * T + T);
      for (let t = 0; t < T; t++) x[t] = I[t]! * cont[t]!;
      toeplitz(x, T, toe);
      cohortProduct(sig, R, T, toe, bs);
      if (needOut) cohortProduct(lea, R, T, toe, bo);
      for (let r = 0; r < R; r++) {
        const f = F[r]! * (job.ctFactors ? job.ctFactors[m * job.ctDraws + job.idx[3 * r + 1]!]! : 1);
        if (f === 1) continue;
        for (let t = 0; t < T; t++) {
          bs[r * T + t]! *= f;
          bo[r * T + t]! *= f;
        }
      }
    }
    if (c.totals) for (let r = 0; r < R; r++) {
      for (let v = 0; v < 3; v++) if (c.wanted(v)) addTotals(c, r, j, v, bufs[v]!, r * T);
      for (let m = 0; m < M; m++) if (c.wanted(2)) addTotals(c, r, j, 3 + m, bufs[3 + 2 * m]!, r * T);
    }
    for (let v = 0; v < bufs.length; v++) if (stats[v] || sobol[v]) summarise(c, bufs[v]!, T, j * T, stats[v]!, sobol[v]!, sorted[v]);
  }
}

/**
 * The stock in place's stock and outflow (n rows × T) from amounts by age and each age's curve:
 * what initialContribution computes (q·σ(a + t + 1)/σ(a) left, q·p(a + t + 1)/σ(a) leaving; all
 * of an age whose σ(a) is 0 leaves in the first year), read from the curves' vectors instead of
 * evaluating the distribution per age and year. Mean ages are not computed (zeros).
 */
export function initialFromVectors(amounts: Float64Array, n: number, A: number, curves: (Curve | undefined)[], T: number): InitialContribution {
  const stock0 = new Float64Array(n);
  const stock = new Float64Array(n * T);
  const outflow = new Float64Array(n * T);
  const tooOld = new Float64Array(n);
  for (let a = 0; a < A; a++) {
    const cu = curves[a];
    if (!cu) continue;
    const sa = cu.sigma[a]!;
    for (let s = 0; s < n; s++) {
      const q = amounts[s * A + a]!;
      if (q === 0) continue;
      stock0[s]! += q;
      if (!(sa > 0)) {
        tooOld[s]! += q;
        if (T > 0) outflow[s * T]! += q;
        continue;
      }
      const k = q / sa;
      for (let t = 0; t < T; t++) {
        stock[s * T + t]! += k * cu.sigma[a + t + 1]!;
        outflow[s * T + t]! += k * cu.leave[a + t + 1]!;
      }
    }
  }
  return { stock0, stock, outflow, ageSum: new Float64Array(n * T), outAgeSum: new Float64Array(n * T), tooOld };
}

/** A stock in place with central survival (carried), rows j0.. of the group, materials scaled by factors. */
function fixedInitial(f: NonNullable<McGroup["initFixed"]>, j0: number, gn: number, T: number, rowsPer: number, factor: ((row: number) => number) | null,
  which: "product" | "material"): InitialContribution {
  const s0 = which === "product" ? f.stock0 : f.matStock0!;
  const st = which === "product" ? f.stock : f.matStock!;
  const of = which === "product" ? f.outflow : f.matOutflow!;
  const n = gn * rowsPer;
  const from = j0 * rowsPer;
  const out: InitialContribution = {
    stock0: s0.slice(from, from + n), stock: st.slice(from * T, (from + n) * T), outflow: of.slice(from * T, (from + n) * T),
    ageSum: new Float64Array(n * T), outAgeSum: new Float64Array(n * T), tooOld: new Float64Array(n),
  };
  if (factor) for (let i = 0; i < n; i++) {
    const x = factor(i);
    if (x === 1) continue;
    out.stock0[i]! *= x;
    for (let t = 0; t < T; t++) {
      out.stock[i * T + t]! *= x;
      out.outflow[i * T + t]! *= x;
    }
  }
  return out;
}

function byRun(c: Ctx, g: McGroup, j0: number, stats: (VarStats | null)[], sobol: (VarSobol | null)[]): void {
  const { job, R, T, M, gn, sids } = c;
  const A = job.A;
  const cells = gn * T;
  const bufs = Array.from({ length: 3 + 2 * M }, () => new Float64Array(R * cells));
  const vals = new Float64Array(cells);
  const f = new Float64Array(T);
  const amounts = g.initRow && job.initAmounts ? new Float64Array(gn * A) : null;
  if (amounts) sids.forEach((sid, j) => amounts.set(job.initAmounts!.subarray(sid * A, sid * A + A), j * A));
  const matAmounts = amounts && M ? new Float64Array(gn * M * A) : null;
  const content = M ? new Float64Array(gn * M * T) : null;
  const fixed = g.initFixed ? fixedInitial(g.initFixed, j0, gn, T, 1, null, "product") : null;
  for (let r = 0; r < R; r++) {
    const li = job.idx[3 * r]!;
    const ci = job.idx[3 * r + 1]!;
    const di = job.idx[3 * r + 2]!;
    const curves: Curve[] = [];
    for (let t = 0; t < T; t++) curves.push(c.curves.of(g.cohortRow[t]!, li));
    const group = new CohortGroup(T, curves);
    sids.forEach((sid, j) => {
      const base = job.values.subarray(sid * T, sid * T + T);
      if (job.input) inputFactors(c, di, sid, f);
      for (let t = 0; t < T; t++) vals[j * T + t] = job.input ? base[t]! * f[t]! : base[t]!;
    });
    let initial: InitialContribution | null = fixed;
    let initCurves: (Curve | undefined)[] | null = null;
    if (amounts && g.initRow) {
      initCurves = Array.from(g.initRow, (q) => (q < 0 ? undefined : c.curves.of(q, li)));
      initial = initialFromVectors(amounts, gn, A, initCurves, T);
    }
    const res = job.mode === "inflow-driven"
      ? inflowDriven(group, vals, gn, { initial, indicators: false })
      : stockDriven(group, vals, gn, { initial, indicators: false, clamp: job.clamp });
    bufs[0]!.set(res.inflow, r * cells);
    bufs[1]!.set(res.outflow, r * cells);
    bufs[2]!.set(res.stock, r * cells);
    if (M) {
      sids.forEach((sid, j) => {
        for (let m = 0; m < M; m++) {
          const fm = job.ctFactors ? job.ctFactors[m * job.ctDraws + ci]! : 1;
          const src = (sid * M + m) * T;
          const dst = (j * M + m) * T;
          for (let t = 0; t < T; t++) content![dst + t] = job.content![src + t]! * fm;
          if (matAmounts) for (let a = 0; a < A; a++) matAmounts[(j * M + m) * A + a] = amounts![j * A + a]! * job.initContent![(sid * M + m) * A + a]! * fm;
        }
      });
      let initMat: InitialContribution | null = null;
      if (matAmounts && initCurves) initMat = initialFromVectors(matAmounts, gn * M, A, initCurves, T);
      else if (g.initFixed?.matStock) {
        const ct = job.ctFactors;
        initMat = fixedInitial(g.initFixed, j0, gn, T, M, ct ? (i) => ct[(i % M) * job.ctDraws + ci]! : null, "material");
      }
      const rm = composition(group, res.inflow, gn, content!, M, initMat);
      for (let j = 0; j < gn; j++) for (let m = 0; m < M; m++) {
        bufs[3 + 2 * m]!.set(rm.stock.subarray((j * M + m) * T, (j * M + m) * T + T), r * cells + j * T);
        bufs[4 + 2 * m]!.set(rm.outflow.subarray((j * M + m) * T, (j * M + m) * T + T), r * cells + j * T);
      }
    }
    if (c.totals) for (let j = 0; j < gn; j++) {
      for (let v = 0; v < 3; v++) if (c.wanted(v)) addTotals(c, r, j, v, bufs[v]!, r * cells + j * T);
      for (let m = 0; m < M; m++) if (c.wanted(2)) addTotals(c, r, j, 3 + m, bufs[3 + 2 * m]!, r * cells + j * T);
    }
  }
  for (let v = 0; v < bufs.length; v++) if (stats[v] || sobol[v]) summarise(c, bufs[v]!, cells, 0, stats[v]!, sobol[v]!);
}
