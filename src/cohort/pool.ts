/**
 * Worker threads for the cohort kernels: groups (or parts of groups) of series run on every
 * core. Inputs, results and each group's matrices live in the shared cohort arena
 * (./arena.ts), so a task message carries only offsets and the workers compute in place.
 */
import { availableParallelism } from "node:os";
import { Worker } from "node:worker_threads";
import { KernelArena } from "./arena.js";
import { MAX_PAGES, inArena } from "./wasm/index.js";
import type { CohortGroup, InitialContribution, ModelResult } from "./models.js";

export type TaskKind = "inflow" | "stock" | "composition";

export interface CohortTask {
  kind: TaskKind;
  T: number;
  n: number;
  S: Float64Array;
  P: Float64Array;
  /** Stock-driven: the transposed survival matrix (row = year, column = cohort). */
  St?: Float64Array;
  rate: number | null;
  /** n × T inflow (inflow, composition) or target stock (stock). */
  values: Float64Array;
  indicators?: boolean;
  clamp?: boolean;
  initial?: InitialContribution | null;
  /** composition: (n·M) × T content and M. */
  content?: Float64Array;
  M?: number;
}

export function taskFor(kind: TaskKind, g: CohortGroup, values: Float64Array, n: number, extra: Partial<CohortTask> = {}): CohortTask {
  return { kind, T: g.T, n, S: g.S, P: g.P, St: kind === "stock" ? g.transposedS() : undefined, rate: g.exponentialRate, values, ...extra };
}

/** An array in the arena, as sent to a worker: byte offset and length in doubles. */
export type ArenaRef = [number, number];

/** What a worker receives: the task with every array as an arena reference. */
export interface ArenaTask {
  kind: TaskKind;
  T: number;
  n: number;
  rate: number | null;
  indicators?: boolean;
  clamp?: boolean;
  M?: number;
  S: ArenaRef;
  P: ArenaRef;
  panels: ArenaRef;
  St: ArenaRef | null;
  values: ArenaRef;
  content: ArenaRef | null;
  initial: { stock0: ArenaRef; stock: ArenaRef; outflow: ArenaRef; ageSum: ArenaRef; outAgeSum: ArenaRef; tooOld: ArenaRef } | null;
  out: { inflow: ArenaRef | null; outflow: ArenaRef; stock: ArenaRef; stockChange: ArenaRef };
}

/** What a worker sends back besides the arena results: arrays it made itself (moved, not copied). */
export interface TaskExtras {
  meanAgeStock?: Float64Array;
  meanAgeOutflow?: Float64Array;
  unmet?: Float64Array;
}

/** The compiled worker script (from TypeScript sources under test, the built copy in dist/). */
function workerFile(): URL {
  const here = import.meta.url;
  if (here.endsWith(".ts")) return new URL(here.replace(/\/src\/cohort\/pool\.ts$/, "/dist/cohort/worker.js"));
  return new URL("./worker.js", here);
}

type Pending = { task: ArenaTask; resolve: (r: TaskExtras) => void; reject: (e: Error) => void };

export class CohortPool {
  private static instance: CohortPool | null = null;
  private readonly workers: Worker[] = [];
  private readonly queue: Pending[] = [];
  /** Tasks sent to each worker and not answered yet, in order (a worker answers in order). */
  private readonly sent = new Map<Worker, Pending[]>();
  /** Tasks in flight per worker: the next one waits in the worker's queue, so it never idles between tasks. */
  private static readonly DEPTH = 2;

  /** The process-wide pool (size: CAIRN_WORKERS, default the number of cores). */
  static shared(): CohortPool {
    if (!CohortPool.instance) {
      const n = Number(process.env.CAIRN_WORKERS ?? availableParallelism());
      CohortPool.instance = new CohortPool(Math.max(1, n));
    }
    return CohortPool.instance;
  }

  static async closeShared(): Promise<void> {
    if (CohortPool.instance) await CohortPool.instance.close();
    CohortPool.instance = null;
  }

  constructor(readonly size: number) {
    for (let i = 0; i < size; i++) {
      const w = new Worker(workerFile(), { workerData: { arena: KernelArena.shared().memory } });
      w.unref();
      this.sent.set(w, []);
      w.on("message", (msg: { ok: boolean; result?: TaskExtras; error?: string }) => {
        const p = this.sent.get(w)!.shift()!;
        if (msg.ok) p.resolve(msg.result!);
        else p.reject(new Error(msg.error));
        this.pump();
      });
      // A worker that dies takes its tasks with it: they fail, and it gets no more.
      const dead = (e: Error) => {
        const i = this.workers.indexOf(w);
        if (i < 0) return;
        this.workers.splice(i, 1);
        for (const p of this.sent.get(w)!.splice(0)) p.reject(e);
        if (this.workers.length === 0) for (const p of this.queue.splice(0)) p.reject(new Error(`cohort worker threads failed: ${e.message}`));
        this.pump();
      };
      w.on("error", dead);
      w.on("exit", (code) => dead(new Error(`a cohort worker thread stopped (exit code ${code})`)));
      this.workers.push(w);
    }
  }

  run(task: ArenaTask): Promise<TaskExtras> {
    return new Promise((resolve, reject) => {
      this.queue.push({ task, resolve, reject });
      this.pump();
    });
  }

  private pump(): void {
    // Fill the least loaded worker first, up to DEPTH tasks each.
    for (;;) {
      if (!this.queue.length) break;
      let best: Worker | null = null;
      for (const w of this.workers) {
        const n = this.sent.get(w)!.length;
        if (n < CohortPool.DEPTH && (!best || n < this.sent.get(best)!.length)) best = w;
      }
      if (!best) break;
      const p = this.queue.shift()!;
      this.sent.get(best)!.push(p);
      best.ref();
      best.postMessage(p.task);
    }
    for (const w of this.workers) if (this.sent.get(w)!.length === 0) w.unref();
  }

  async close(): Promise<void> {
    const ws = this.workers.splice(0);
    await Promise.all(ws.map((w) => w.terminate()));
  }
}

const EXTRAS = ["meanAgeStock", "meanAgeOutflow", "unmet"] as const;

/** Hands results no longer needed (arrays, or objects holding them) back to the arena for reuse. */
export function recycle(...arrays: (Float64Array | undefined | null | object)[]): void {
  const arena = KernelArena.existing();
  if (!arena) return;
  for (const a of arrays) {
    if (a instanceof Float64Array) arena.release(a);
    else if (a && typeof a === "object") recycle(...Object.values(a));
  }
}

/**
 * Runs many tasks over the pool; each task is split in parts (multiples of 4 series) so that
 * every worker has work. Inputs that are not already in the arena are copied there once;
 * results (inflow, outflow, stock, stock change) are arena arrays: pass them to `recycle`
 * when done with them, or they keep their memory until the process ends. A call that needs
 * more arena than CAIRN_ARENA_BUDGET_MB (default 3072, and at most what the arena has left) runs in waves and returns ordinary
 * arrays (recycle ignores them).
 */
export async function runTasks(tasks: CohortTask[], pool = CohortPool.shared()): Promise<ModelResult[]> {
  // What the arena can still take: the budget, and never more than its 4 GiB less what is in
  // use and a margin for the groups' matrices.
  const arena = KernelArena.shared();
  const budget = Math.min(Number(process.env.CAIRN_ARENA_BUDGET_MB ?? 3072) * 2 ** 20, MAX_PAGES * 65536 - arena.liveBytes - 2 ** 28);
  if (tasks.reduce((a, t) => a + arenaBytes(t, t.n), 0) > budget) return runInWaves(tasks, pool, budget > 0 ? budget : 2 ** 20);
  return runInArena(tasks, pool);
}

/** Arena bytes a task needs for `n` of its series: the inputs not in the arena yet (copied in), and the results. */
function arenaBytes(t: CohortTask, n: number): number {
  const per = t.kind === "composition" ? t.M ?? 1 : 1;
  const copied = (a: Float64Array | undefined | null, width: number) => (a && !inArena(a) ? width : 0);
  const i = t.initial;
  return 8 * n * (copied(t.values, t.T) + 4 * per * t.T + copied(t.content, per * t.T) + (i ? copied(i.stock, t.T) + copied(i.outflow, t.T) + copied(i.ageSum, t.T) + copied(i.outAgeSum, t.T) : 0));
}

/** Series s0..s1 of a task, as a task of its own (views, no copies). */
function sliceTask(t: CohortTask, s0: number, s1: number): CohortTask {
  const per = t.kind === "composition" ? t.M ?? 1 : 1;
  const rows = (a: Float64Array, width: number) => a.subarray(s0 * width, s1 * width);
  const i = t.initial;
  return {
    ...t, n: s1 - s0, values: rows(t.values, t.T), content: t.content ? rows(t.content, per * t.T) : undefined,
    initial: i ? { stock0: rows(i.stock0, 1), stock: rows(i.stock, t.T), outflow: rows(i.outflow, t.T), ageSum: rows(i.ageSum, t.T), outAgeSum: rows(i.outAgeSum, t.T), tooOld: rows(i.tooOld, 1) } : i,
  };
}

/**
 * A call too large for the arena: the series run in waves that fit the budget, and each wave's
 * results are copied out of the arena into ordinary arrays (one copy, which a call that fits
 * does not pay) before the next wave reuses its memory.
 */
async function runInWaves(tasks: CohortTask[], pool: CohortPool, budget: number): Promise<ModelResult[]> {
  const results: ModelResult[] = tasks.map((t) => {
    const per = t.kind === "composition" ? t.M ?? 1 : 1;
    const len = t.n * per * t.T;
    const r: ModelResult = { inflow: t.kind === "inflow" ? t.values : new Float64Array(len), outflow: new Float64Array(len), stock: new Float64Array(len), stockChange: new Float64Array(len) };
    if (t.indicators) { r.meanAgeStock = new Float64Array(len); r.meanAgeOutflow = new Float64Array(len); }
    if (t.kind === "stock") { r.stockTarget = t.values; if (t.clamp) r.unmet = new Float64Array(len); }
    if (t.initial) r.initialTooOld = t.initial.tooOld;
    return r;
  });
  // Units of at most half the budget, gathered into waves of at most the budget.
  type Unit = { ti: number; s0: number; s1: number };
  const waves: Unit[][] = [[]];
  let used = 0;
  tasks.forEach((t, ti) => {
    const perSeries = arenaBytes(t, 1);
    const step = Math.max(4, Math.floor(budget / 2 / perSeries) & ~3);
    for (let s0 = 0; s0 < t.n; s0 += step) {
      const s1 = Math.min(t.n, s0 + step);
      const b = perSeries * (s1 - s0);
      if (used + b > budget && waves[waves.length - 1]!.length) { waves.push([]); used = 0; }
      waves[waves.length - 1]!.push({ ti, s0, s1 });
      used += b;
    }
  });
  for (const wave of waves) {
    const subs = wave.map((u) => sliceTask(tasks[u.ti]!, u.s0, u.s1));
    const part = await runInArena(subs, pool);
    wave.forEach((u, k) => {
      const t = tasks[u.ti]!;
      const at = u.s0 * (t.kind === "composition" ? t.M ?? 1 : 1) * t.T;
      const r = results[u.ti]!, p = part[k]!;
      for (const f of ["inflow", "outflow", "stock", "stockChange", "meanAgeStock", "meanAgeOutflow", "unmet"] as const) {
        if (f === "inflow" && t.kind === "inflow") continue;
        if (r[f] && p[f]) r[f]!.set(p[f]!, at);
      }
      recycle({ inflow: p.inflow !== subs[k]!.values ? p.inflow : undefined, outflow: p.outflow, stock: p.stock, stockChange: p.stockChange });
    });
  }
  return results;
}

async function runInArena(tasks: CohortTask[], pool: CohortPool): Promise<ModelResult[]> {
  const arena = KernelArena.shared();
  arena.beginCall();
  const ref = (a: Float64Array): ArenaRef => [a.byteOffset, a.length];
  const totalSeries = tasks.reduce((a, t) => a + t.n, 0);
  const target = (Math.max(16, Math.ceil(totalSeries / (pool.size * 8))) + 3) & ~3;
  const results: ModelResult[] = [];
  const temporary: Float64Array[] = [];
  const jobs: Promise<void>[] = [];
  const pinned: Float64Array[] = [];
  const owned: Float64Array[] = []; // result arrays made here (not the caller's inputs)
  try {
    tasks.forEach((t, ti) => {
      const per = t.kind === "composition" ? t.M ?? 1 : 1;
      const T = t.T;
      const rows = t.n * per;
      const mats = arena.groupMatrices(T, t.S, t.P, t.kind === "stock" ? t.St ?? transpose(t.S, T) : null);
      pinned.push(t.P);
      const input = (a: Float64Array) => {
        const b = arena.copyIn(a);
        if (b !== a) temporary.push(b);
        return b;
      };
      const values = t.kind === "inflow" ? arena.copyIn(t.values) : input(t.values);
      const content = t.content ? input(t.content) : null;
      const init = t.initial
        ? { stock0: input(t.initial.stock0), stock: input(t.initial.stock), outflow: input(t.initial.outflow), ageSum: input(t.initial.ageSum), outAgeSum: input(t.initial.outAgeSum), tooOld: input(t.initial.tooOld) }
        : null;
      const r: ModelResult = {
        inflow: t.kind === "inflow" ? values : arena.alloc(rows * T),
        outflow: arena.alloc(rows * T), stock: arena.alloc(rows * T), stockChange: arena.alloc(rows * T),
      };
      owned.push(r.outflow, r.stock, r.stockChange);
      if (r.inflow !== t.values) owned.push(r.inflow);
      const extras: (typeof EXTRAS)[number][] = [];
      if (t.indicators) extras.push("meanAgeStock", "meanAgeOutflow");
      if (t.kind === "stock" && t.clamp) extras.push("unmet");
      for (const f of extras) r[f] = new Float64Array(rows * T);
      if (t.kind === "stock") r.stockTarget = t.values;
      if (t.initial) r.initialTooOld = t.initial.tooOld;
      results[ti] = r;
      for (let from = 0; from < t.n; from += target) {
        const n = Math.min(target, t.n - from);
        const part = (a: Float64Array, width: number): ArenaRef => ref(a.subarray(from * width, (from + n) * width));
        const msg: ArenaTask = {
          kind: t.kind, T, n, rate: t.rate, indicators: t.indicators, clamp: t.clamp, M: t.M,
          S: ref(mats.S), P: ref(mats.P), panels: ref(mats.panels), St: mats.St ? ref(mats.St) : null,
          values: part(values, T), content: content ? part(content, per * T) : null,
          initial: init ? { stock0: part(init.stock0, 1), stock: part(init.stock, T), outflow: part(init.outflow, T), ageSum: part(init.ageSum, T), outAgeSum: part(init.outAgeSum, T), tooOld: part(init.tooOld, 1) } : null,
          out: { inflow: t.kind === "inflow" ? null : part(r.inflow, per * T), outflow: part(r.outflow, per * T), stock: part(r.stock, per * T), stockChange: part(r.stockChange, per * T) },
        };
        jobs.push(pool.run(msg).then((back) => {
          for (const f of extras) if (back[f]) r[f]!.set(back[f]!, from * per * T);
        }));
      }
    });
    await Promise.all(jobs);
  } catch (e) {
    await Promise.allSettled(jobs);
    for (const a of owned) arena.release(a);
    throw e;
  } finally {
    await Promise.allSettled(jobs);
    for (const a of temporary) arena.release(a);
    for (const P of pinned) arena.unpin(P);
  }
  return results;
}

function transpose(S: Float64Array, T: number): Float64Array {
  const St = new Float64Array(T * T);
  for (let c = 0; c < T; c++) for (let t = c; t < T; t++) St[t * T + c] = S[c * T + t]!;
  return St;
}

/** Buffers of a result to move instead of cloning. */
export function buffersOf(o: object): ArrayBuffer[] {
  const out = new Set<ArrayBuffer>();
  const visit = (v: unknown) => {
    if (v instanceof Float64Array && !(v.buffer instanceof SharedArrayBuffer)) out.add(v.buffer as ArrayBuffer);
    else if (v && typeof v === "object") for (const x of Object.values(v)) visit(x);
  };
  visit(o);
  return [...out];
}
