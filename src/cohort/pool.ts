/**
 * Worker threads for the cohort kernels: groups (or parts of groups) of series run on every
 * core. Each task carries its group's survival and leaving matrices, so a worker needs nothing
 * else; results come back as transferred typed arrays.
 */
import { availableParallelism } from "node:os";
import { Worker } from "node:worker_threads";
import type { CohortGroup, InitialContribution, ModelResult } from "./models.js";

export type TaskKind = "inflow" | "stock" | "composition";

export interface CohortTask {
  kind: TaskKind;
  T: number;
  n: number;
  S: Float64Array;
  P: Float64Array;
  rate: number | null;
  /** n × T inflow (inflow, composition) or target stock (stock). */
  values: Float64Array;
  indicators?: boolean;
  clamp?: boolean;
  initial?: InitialContribution | null;
  /** composition: (n·M) × T content and M. */
  content?: Float64Array;
  M?: number;
  /** Result arrays allocated by the caller and moved to the worker (it allocates none). */
  out?: { inflow?: Float64Array; outflow: Float64Array; stock: Float64Array; stockChange: Float64Array };
}

export function taskFor(kind: TaskKind, g: CohortGroup, values: Float64Array, n: number, extra: Partial<CohortTask> = {}): CohortTask {
  return { kind, T: g.T, n, S: g.S, P: g.P, rate: g.exponentialRate, values, ...extra };
}

/** The compiled worker script (from TypeScript sources under test, the built copy in dist/). */
function workerFile(): URL {
  const here = import.meta.url;
  if (here.endsWith(".ts")) return new URL(here.replace(/\/src\/cohort\/pool\.ts$/, "/dist/cohort/worker.js"));
  return new URL("./worker.js", here);
}

type Pending = { task: CohortTask; resolve: (r: ModelResult) => void; reject: (e: Error) => void };

export class CohortPool {
  private static instance: CohortPool | null = null;
  private readonly workers: Worker[] = [];
  private readonly idle: Worker[] = [];
  private readonly queue: Pending[] = [];
  private readonly busy = new Map<Worker, Pending>();

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
      const w = new Worker(workerFile());
      w.unref();
      w.on("message", (msg: { ok: boolean; result?: ModelResult; error?: string }) => {
        const p = this.busy.get(w)!;
        this.busy.delete(w);
        if (msg.ok) p.resolve(msg.result!);
        else p.reject(new Error(msg.error));
        this.idle.push(w);
        this.pump();
      });
      w.on("error", (e) => {
        const p = this.busy.get(w);
        if (p) p.reject(e);
      });
      this.workers.push(w);
      this.idle.push(w);
    }
  }

  run(task: CohortTask): Promise<ModelResult> {
    return new Promise((resolve, reject) => {
      this.queue.push({ task, resolve, reject });
      this.pump();
    });
  }

  private pump(): void {
    while (this.idle.length && this.queue.length) {
      const w = this.idle.pop()!;
      const p = this.queue.shift()!;
      this.busy.set(w, p);
      w.ref();
      w.postMessage(p.task, buffersOf(p.task));
    }
    if (this.busy.size === 0) for (const w of this.workers) w.unref();
  }

  async close(): Promise<void> {
    await Promise.all(this.workers.map((w) => w.terminate()));
  }
}

const FIELDS = ["inflow", "outflow", "stock", "stockChange", "meanAgeStock", "meanAgeOutflow", "unmet"] as const;

/**
 * Reused buffers by length. Writing to freshly allocated memory costs a page fault per 4 KiB,
 * which here costs about as much as the kernel itself; buffers that travel to a worker and
 * back are kept for the next task of the same size. `recycle()` returns results to it.
 */
const free = new Map<number, Float64Array[]>();
function take(len: number): Float64Array {
  return free.get(len)?.pop() ?? new Float64Array(len);
}
function copyOf(a: Float64Array, from: number, to: number): Float64Array {
  const b = take(to - from);
  b.set(a.subarray(from, to));
  return b;
}
/** Hands arrays (e.g. results no longer needed) back for reuse by later tasks. */
export function recycle(...arrays: (Float64Array | undefined | object)[]): void {
  for (const a of arrays) {
    if (a instanceof Float64Array) {
      if (a.byteOffset !== 0 || a.length * 8 !== a.buffer.byteLength || a.buffer instanceof SharedArrayBuffer) continue;
      const l = free.get(a.length) ?? [];
      if (!l.includes(a)) l.push(a);
      free.set(a.length, l);
    } else if (a && typeof a === "object") recycle(...Object.values(a));
  }
}

/**
 * Runs many tasks over the pool; each task is split in parts so that every worker has work.
 * Each part travels as compact copies whose buffers are transferred (moved, not cloned) both
 * ways. (Shared memory would save the copies, but element access to SharedArrayBuffer-backed
 * arrays is several times slower in this V8.)
 */
export async function runTasks(tasks: CohortTask[], pool = CohortPool.shared()): Promise<ModelResult[]> {
  const totalSeries = tasks.reduce((a, t) => a + t.n, 0);
  const target = Math.max(16, Math.ceil(totalSeries / (pool.size * 8)));
  const results: ModelResult[] = [];
  const jobs: Promise<void>[] = [];
  tasks.forEach((t, ti) => {
    const per = t.kind === "composition" ? t.M ?? 1 : 1;
    const T = t.T;
    const rows = t.n * per;
    const fields: (typeof FIELDS)[number][] = ["inflow", "outflow", "stock", "stockChange"];
    if (t.indicators) fields.push("meanAgeStock", "meanAgeOutflow");
    if (t.kind === "stock" && t.clamp) fields.push("unmet");
    const r = {} as ModelResult;
    const split = t.n > target;
    if (split) for (const f of fields) r[f] = new Float64Array(rows * T);
    if (split && t.initial) r.initialTooOld = new Float64Array(t.n);
    if (t.kind === "stock") r.stockTarget = t.values;
    results[ti] = r;
    for (let from = 0; from < t.n; from += target) {
      const n = Math.min(target, t.n - from);
      const rowsOf = (a: Float64Array, width: number) => copyOf(a, from * width, (from + n) * width);
      const init = t.initial
        ? { stock0: t.initial.stock0.slice(from, from + n), stock: rowsOf(t.initial.stock, T), ageSum: rowsOf(t.initial.ageSum, T), outAgeSum: rowsOf(t.initial.outAgeSum, T), tooOld: t.initial.tooOld.slice(from, from + n) }
        : null;
      const len = n * per * T;
      const part: CohortTask = {
        ...t, n, S: copyOf(t.S, 0, t.S.length), P: copyOf(t.P, 0, t.P.length), values: rowsOf(t.values, T), content: t.content ? rowsOf(t.content, per * T) : undefined, initial: init,
        out: t.kind === "inflow" ? { outflow: take(len), stock: take(len), stockChange: take(len) }
          : { inflow: take(len), outflow: take(len), stock: take(len), stockChange: take(len) },
      };
      const whole = from === 0 && n === t.n;
      jobs.push(pool.run(part).then((res) => {
        const back = res as ModelResult & { inputs?: object };
        recycle(back.inputs);
        if (whole) {
          for (const f of fields) r[f] = res[f]!;
          if (res.initialTooOld) r.initialTooOld = res.initialTooOld;
          return;
        }
        for (const f of fields) r[f]!.set(res[f]!, from * per * T);
        if (res.initialTooOld) r.initialTooOld!.set(res.initialTooOld, from);
        recycle(...fields.map((f) => res[f]));
      }));
    }
  });
  await Promise.all(jobs);
  return results;
}

/** Buffers of a task or result to move instead of cloning. */
export function buffersOf(o: object): ArrayBuffer[] {
  const out = new Set<ArrayBuffer>();
  const visit = (v: unknown) => {
    if (v instanceof Float64Array) out.add(v.buffer as ArrayBuffer);
    else if (v && typeof v === "object") for (const x of Object.values(v)) visit(x);
  };
  visit(o);
  return [...out];
}
