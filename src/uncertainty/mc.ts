/**
 * Running a Monte Carlo job: chunks of series (fixed by the job's size, never by the number
 * of threads) computed on worker threads, or in this thread for small jobs; results placed per
 * series and the per-run totals summed in chunk order, so that a job gives the same bytes
 * whatever the number of threads.
 */
import { availableParallelism } from "node:os";
import { Worker } from "node:worker_threads";
import { bySeriesPath, computeChunk } from "./mc-chunk.js";
import { summarizeCells } from "./summary.js";
import { sobolIndices } from "./sensitivity.js";
import type { McChunk, McChunkResult, McJob, VarSobol, VarStats } from "./mc-types.js";

export interface McOutcome {
  /** Per variable (3 product variables, then stock and outflow per material), n·T cells (series-major), or null. */
  stats: (VarStats | null)[];
  sobol: (VarSobol | null)[];
  /** Totals: per-run sums [(cell·V + v)·runs·T + r·T + t], V = 3 + M, and their statistics (or indices) per (cell, v, t), at [(cell·V + v)·T + t]. */
  totals: Float64Array | null;
  totalStats: VarStats | null;
  totalSobol: VarSobol | null;
  chunks: number;
  threads: number;
}

/** Memory for one chunk's run-major buffers, by-run path (bytes). */
const CHUNK_BYTES = 128 * 2 ** 20;
/** Below this many cohort terms (runs × series × T(T+1)/2) a job runs in this thread. */
const IN_THREAD_TERMS = 5e7;

export function chunksOf(job: McJob): McChunk[] {
  const out: McChunk[] = [];
  const V = 3 + 2 * job.M;
  const perSeries = job.runs * job.T * 8 * V;
  const runSize = Math.max(1, Math.min(64, Math.floor(CHUNK_BYTES / perSeries)));
  job.groups.forEach((g, gi) => {
    // Series by series, a chunk needs one series' buffers: whole groups share the runs' curves.
    const size = bySeriesPath(job, g) ? 256 : runSize;
    for (let j0 = 0; j0 < g.sids.length; j0 += size) out.push({ group: gi, j0, j1: Math.min(g.sids.length, j0 + size) });
  });
  return out;
}

function workerFile(): URL {
  const here = import.meta.url;
  if (here.endsWith(".ts")) return new URL(here.replace(/\/src\/uncertainty\/mc\.ts$/, "/dist/uncertainty/mc-worker.js"));
  return new URL("./mc-worker.js", here);
}

/** Large arrays moved into shared memory, so that every worker sees them without a copy. */
function shareArrays(job: McJob): McJob {
  const sh = <A extends Float64Array | Int32Array | null>(a: A): A => {
    if (!a || a.buffer instanceof SharedArrayBuffer || a.length < 4096) return a;
    const b = new (a.constructor as Float64ArrayConstructor)(new SharedArrayBuffer(a.byteLength)) as unknown as Float64Array;
    b.set(a as unknown as Float64Array);
    return b as unknown as A;
  };
  return { ...job, values: sh(job.values), initAmounts: sh(job.initAmounts), content: sh(job.content), initContent: sh(job.initContent), idx: sh(job.idx), ltValues: sh(job.ltValues), totals: { ...job.totals, index: sh(job.totals.index) } };
}

async function onWorkers(job: McJob, chunks: McChunk[], threads: number, each: (i: number, r: McChunkResult) => void): Promise<void> {
  const shared = shareArrays(job);
  const workers = Array.from({ length: Math.min(threads, chunks.length) }, () => new Worker(workerFile()));
  let next = 0;
  try {
    await Promise.all(workers.map((w) => new Promise<void>((resolve, reject) => {
      let current = -1;
      const send = () => {
        if (next >= chunks.length) return resolve();
        current = next++;
        w.postMessage({ type: "chunk", chunk: chunks[current] });
      };
      w.on("message", (m: { ok: boolean; result?: McChunkResult; error?: string }) => {
        if (!m.ok) return reject(new Error(m.error));
        try {
          each(current, m.result!);
        } catch (e) {
          return reject(e as Error);
        }
        send();
      });
      w.on("error", reject);
      w.on("exit", (code) => (code !== 0 ? reject(new Error(`a Monte Carlo worker thread stopped (exit code ${code})`)) : undefined));
      w.postMessage({ type: "job", job: shared });
      send();
    })));
  } finally {
    await Promise.all(workers.map((w) => w.terminate()));
  }
}

export async function runMonteCarlo(job: McJob, opts: { threads?: number; progress?: (done: number, total: number) => void; inThreadBelow?: number } = {}): Promise<McOutcome> {
  const { n, T, runs: R, M } = job;
  const V = 3 + 2 * M;
  const chunks = chunksOf(job);
  const P = job.probabilities.length;
  const k = job.sobol?.assumptions.length ?? 0;
  const full = (v: number): VarStats | null => (job.sobol || !job.variables.includes(v < 3 ? (["inflow", "outflow", "stock"] as const)[v]! : (v - 3) % 2 === 0 ? "stock" : "outflow") ? null : { mean: new Float64Array(n * T), sd: new Float64Array(n * T), quantiles: Array.from({ length: P }, () => new Float64Array(n * T)) });
  const stats = Array.from({ length: V }, (_, v) => full(v));
  const sobolFull = (): VarSobol => {
    const a = () => new Float64Array(n * T * k).fill(NaN);
    return { first: a(), total: a(), firstLow: a(), firstHigh: a(), totalLow: a(), totalHigh: a() };
  };
  const sobol: (VarSobol | null)[] = Array.from({ length: V }, () => null);
  const TV = 3 + M;
  const totals = job.totals.levels ? new Float64Array(job.totals.cells * TV * T * R) : null;
  // Results arrive in any order; totals are added in chunk order (the same sums whatever the threads).
  const waiting = new Map<number, Float64Array>();
  let flushed = 0;
  let done = 0;
  const place = (i: number, r: McChunkResult) => {
    const g = job.groups[r.chunk.group]!;
    const sids = g.sids.subarray(r.chunk.j0, r.chunk.j1);
    r.stats.forEach((s, v) => {
      if (!s) return;
      const dst = stats[v]!;
      sids.forEach((sid, j) => {
        const from = j * T;
        dst.mean.set(s.mean.subarray(from, from + T), sid * T);
        dst.sd.set(s.sd.subarray(from, from + T), sid * T);
        s.quantiles.forEach((q, p) => dst.quantiles[p]!.set(q.subarray(from, from + T), sid * T));
      });
    });
    r.sobol.forEach((s, v) => {
      if (!s) return;
      const dst = (sobol[v] ??= sobolFull());
      sids.forEach((sid, j) => {
        for (const f of ["first", "total", "firstLow", "firstHigh", "totalLow", "totalHigh"] as const) dst[f].set(s[f].subarray(j * T * k, (j + 1) * T * k), sid * T * k);
      });
    });
    if (totals && r.totals) {
      waiting.set(i, r.totals);
      while (waiting.has(flushed)) {
        const t = waiting.get(flushed)!;
        for (let x = 0; x < t.length; x++) totals[x]! += t[x]!;
        waiting.delete(flushed++);
      }
    }
    opts.progress?.(++done, chunks.length);
  };
  const terms = R * n * T * (T + 1) / 2;
  const threads = Math.max(1, opts.threads ?? Number(process.env.CAIRN_WORKERS ?? availableParallelism()));
  const used = terms < (opts.inThreadBelow ?? IN_THREAD_TERMS) || threads === 1 || chunks.length === 1 ? 1 : threads;
  if (used === 1) chunks.forEach((c, i) => place(i, computeChunk(job, c)));
  else await onWorkers(job, chunks, used, place);
  let totalStats: VarStats | null = null;
  let totalSobol: VarSobol | null = null;
  if (totals) {
    const blocks = job.totals.cells * TV;
    const cells = blocks * T;
    if (!job.sobol) {
      totalStats = { mean: new Float64Array(cells), sd: new Float64Array(cells), quantiles: job.probabilities.map(() => new Float64Array(cells)) };
      for (let b = 0; b < blocks; b++) {
        summarizeCells(totals.subarray(b * R * T, (b + 1) * R * T), R, T, { probabilities: job.probabilities, layout: "draw-major", into: { probabilities: job.probabilities, ...totalStats }, offset: b * T });
      }
    } else {
      // Run-major over every (cell, v, t) for the estimator.
      const y = new Float64Array(R * cells);
      for (let b = 0; b < blocks; b++) for (let r = 0; r < R; r++) for (let t = 0; t < T; t++) y[r * cells + b * T + t] = totals[b * R * T + r * T + t]!;
      const s = job.sobol;
      const res = sobolIndices(y, s.base, k, { outputsPerRun: cells, bootstrap: { resamples: s.resamples, seed: s.seed, confidence: s.confidence } });
      const b = res.bootstrap!;
      totalSobol = { first: res.first, total: res.total, firstLow: b.firstLow, firstHigh: b.firstHigh, totalLow: b.totalLow, totalHigh: b.totalHigh };
    }
  }
  return { stats, sobol, totals, totalStats, totalSobol, chunks: chunks.length, threads: used };
}
