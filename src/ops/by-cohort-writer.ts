/**
 * Cohort-resolved output, streamed: rows (series × cohort × year) are buffered as typed
 * arrays up to a fixed size, put in order (series, cohort, year) in JavaScript and written as
 * one Parquet part file into the run's staging directory. Memory stays bounded whatever the
 * number of series; per series-year sums are kept for the audit against the totals.
 *
 * Where the time goes (README, "Performance"): a part's rows arrive as runs of one series and
 * cohort (years ascending), so ordering them is a sort of those runs, not of rows; DuckDB then
 * reads the ordered arrays in place (native hand-off: an Arrow view, in numbered batches, so the
 * order holds on every core) and writes them without ORDER BY or join (the series keys come
 * from a list indexed by the part's own series numbers, written into the statement), so it only
 * encodes and compresses. DuckDB writes two parts at once while the next one is being filled.
 */
import { mkdirSync } from "node:fs";
import path from "node:path";
import type { Session } from "../engine/session.js";
import { ident, lit } from "../engine/sql.js";
import { scanArrays, uniqueView, writeColumns } from "../engine/handoff.js";
import { sha256, type OutputFile } from "../publish/parquet.js";
import { renameSync, rmSync, statSync } from "node:fs";

/**
 * How the parts are written (a merge of shards writes the same table with the same options, so
 * that its bytes are a single run's). zstd at level 1: the parts are the largest output by far
 * and their encoding is most of the step's time; level 1 took about a fifth less time than the
 * default level 3 here, for files a few per cent larger.
 */
export const PART_OPTIONS = "(FORMAT parquet, COMPRESSION zstd, COMPRESSION_LEVEL 1, ROW_GROUP_SIZE 122880)";

/** Rows per part at the most: 2,000,000, or CAIRN_BY_COHORT_PART_ROWS (for tests; a merge of shards must see the same). */
export function partRows(): number {
  const v = Number(process.env.CAIRN_BY_COHORT_PART_ROWS ?? 2_000_000);
  return Number.isInteger(v) && v > 0 ? v : 2_000_000;
}

/**
 * The parts' sizes for additions of `adds` rows in turn, cut as the writer cuts them (add and
 * flush below): a part is written when the next addition does not fit in it, and an addition
 * larger than a part goes into parts of its own. A merge of shards cuts its table with it.
 */
export function partSizes(adds: Iterable<number>, cap: number): number[] {
  const parts: number[] = [];
  let used = 0;
  const add = (rows: number): void => {
    if (used + rows > cap && used > 0) {
      parts.push(used);
      used = 0;
    }
    if (rows > cap) {
      for (let at = 0; at < rows; at += cap) add(Math.min(cap, rows - at));
      return;
    }
    used += rows;
  };
  for (const r of adds) add(r);
  if (used > 0) parts.push(used);
  return parts;
}

/** Parts DuckDB writes at once (each reads its own set of columns in place). */
const MAX_IN_FLIGHT = 2;

/** Above this many series in one part, the keys are joined and the part sorted in DuckDB instead of listed in the statement. */
const MAX_LISTED_SERIES = 20000;

/** One set of part columns. */
interface Cols {
  sid: Int32Array;
  ci: Int32Array;
  yi: Int32Array;
  inflow: Float64Array;
  outflow: Float64Array;
  stock: Float64Array;
  /** The part's own series numbers (0, 1, … in output order), filled at flush. */
  lsid: Int32Array;
}

function newCols(n: number): Cols {
  return {
    sid: new Int32Array(n), ci: new Int32Array(n), yi: new Int32Array(n),
    inflow: new Float64Array(n), outflow: new Float64Array(n), stock: new Float64Array(n), lsid: new Int32Array(n),
  };
}

export class ByCohortWriter {
  private readonly cap: number;
  /** The set being filled, and sets free for reuse (a set DuckDB reads comes back once its part is written). */
  private fill: Cols;
  private readonly free: Cols[] = [];
  private used = 0;
  private part = 0;
  /** The key values of every series (as text) and the key columns' types, read once from the series table. */
  private keys: { names: string[]; types: string[]; values: (string | null)[][] } | null = null;
  /** Parts DuckDB is writing, oldest first, with the set of columns each reads in place. */
  private readonly inFlight: { done: Promise<void>; set: Cols | null }[] = [];
  /** Parts DuckDB has written and that are not hashed yet. */
  private readonly written: { entry: OutputFile; file: string }[] = [];
  readonly files: OutputFile[] = [];
  /** Σ over cohorts of stock and outflow per series-year (n × T). */
  readonly sumStock: Float64Array;
  readonly sumOutflow: Float64Array;

  constructor(
    private readonly s: Session,
    private readonly table: string,
    private readonly outDir: string,
    private readonly runDir: string,
    private readonly selectKeys: string,
    private readonly sidTable: string,
    private readonly y0: number,
    private readonly unit: string,
    private readonly T: number,
    n: number,
    rowsPerPart = partRows(),
  ) {
    this.cap = rowsPerPart;
    this.fill = newCols(this.cap);
    this.sumStock = new Float64Array(n * T);
    this.sumOutflow = new Float64Array(n * T);
    mkdirSync(outDir, { recursive: true });
  }

  /** Adds one series' rows (any order; a generator's arrays may be reused after the call). */
  async add(sid: number, cohort: Int32Array, year: Int32Array, inflow: Float64Array, outflow: Float64Array, stock: Float64Array): Promise<void> {
    const rows = cohort.length;
    if (this.used + rows > this.cap) await this.flush();
    if (rows > this.cap) {
      // One series larger than a part: in parts of its own.
      for (let at = 0; at < rows; at += this.cap) {
        const e = Math.min(rows, at + this.cap);
        await this.add(sid, cohort.subarray(at, e), year.subarray(at, e), inflow.subarray(at, e), outflow.subarray(at, e), stock.subarray(at, e));
      }
      return;
    }
    const o = this.used;
    const f = this.fill;
    f.sid.fill(sid, o, o + rows);
    f.ci.set(cohort, o);
    f.yi.set(year, o);
    f.inflow.set(inflow, o);
    f.outflow.set(outflow, o);
    f.stock.set(stock, o);
    const base = sid * this.T;
    const ss = this.sumStock, so = this.sumOutflow;
    for (let k = 0; k < rows; k++) {
      const y = base + year[k]!;
      ss[y] += stock[k]!;
      so[y] += outflow[k]!;
    }
    this.used += rows;
  }

  /**
   * The rows of `f` in output order (series, cohort, year): `f` itself when they came in that
   * order (the usual case), else a copy into `out` made by moving runs (a run is rows of one
   * series and cohort with years ascending), or null when runs overlap (the caller then sorts
   * in DuckDB).
   */
  private order(f: Cols, n: number): Cols | null {
    const { sid, ci, yi } = f;
    const starts: number[] = [];
    let sorted = true;
    for (let i = 0; i < n; i++) {
      if (i === 0 || sid[i] !== sid[i - 1] || ci[i] !== ci[i - 1] || yi[i]! <= yi[i - 1]!) {
        starts.push(i);
        if (i > 0 && !(sid[i]! > sid[i - 1]! || (sid[i] === sid[i - 1] && ci[i]! > ci[i - 1]!))) sorted = false;
      }
    }
    if (sorted) return f;
    const R = starts.length;
    const idx = new Int32Array(R).map((_, k) => k);
    const runs = Int32Array.from(starts);
    idx.sort((a, b) => sid[runs[a]!]! - sid[runs[b]!]! || ci[runs[a]!]! - ci[runs[b]!]! || yi[runs[a]!]! - yi[runs[b]!]!);
    const end = (r: number) => (r + 1 < R ? runs[r + 1]! : n);
    // Runs of one series and cohort must not overlap in years once ordered.
    for (let k = 1; k < R; k++) {
      const p = idx[k - 1]!, q = idx[k]!;
      if (sid[runs[p]!] === sid[runs[q]!] && ci[runs[p]!] === ci[runs[q]!] && yi[end(p) - 1]! >= yi[runs[q]!]!) return null;
    }
    const o = this.free.pop() ?? newCols(this.cap);
    let at = 0;
    for (let k = 0; k < R; k++) {
      const r = idx[k]!;
      const a = runs[r]!, b = end(r);
      o.sid.set(sid.subarray(a, b), at);
      o.ci.set(ci.subarray(a, b), at);
      o.yi.set(yi.subarray(a, b), at);
      o.inflow.set(f.inflow.subarray(a, b), at);
      o.outflow.set(f.outflow.subarray(a, b), at);
      o.stock.set(f.stock.subarray(a, b), at);
      at += b - a;
    }
    return o;
  }

  /** The key columns for the series of a part, as lists written into the statement, indexed by the part's own series numbers. */
  private async keyLists(sids: number[]): Promise<string> {
    if (!this.keys) {
      const desc = await this.s.all(`DESCRIBE SELECT ${this.selectKeys} FROM ${ident(this.sidTable)} m`);
      const names = desc.map((d) => String(d.column_name));
      const types = desc.map((d) => String(d.column_type));
      const rows = await this.s.all(`SELECT ${names.map((c, j) => `CAST(m.${ident(c)} AS VARCHAR) AS k${j}`).join(", ")} FROM ${ident(this.sidTable)} m ORDER BY m.sid`);
      this.keys = { names, types, values: names.map((_, j) => rows.map((r) => (r[`k${j}`] == null ? null : String(r[`k${j}`])))) };
    }
    const k = this.keys;
    return k.names.map((name, j) => {
      const list = `[${sids.map((sid) => lit(k.values[j]![sid] ?? null)).join(", ")}]`;
      return `CAST(${list} AS ${k.types[j]}[])[r.lsid + 1] AS ${ident(name)}`;
    }).join(", ");
  }

  async flush(): Promise<void> {
    if (this.used === 0) return;
    const rows = this.used;
    const filled = this.fill;
    // The part is put in order while DuckDB still writes the previous ones (they read other sets).
    const ordered = this.order(filled, rows);
    const src = ordered ?? filled;
    // The part's own series numbers, in output order (each series' rows are contiguous there).
    const sids: number[] = [];
    for (let i = 0; i < rows; i++) {
      const v = src.sid[i]!;
      if (i === 0 || v !== src.sid[i - 1]) sids.push(v);
      src.lsid[i] = sids.length - 1;
    }
    const listed = ordered !== null && sids.length <= MAX_LISTED_SERIES;
    const file = path.join(this.outDir, `part-${String(this.part).padStart(5, "0")}.parquet`);
    const entry: OutputFile = { table: this.table, file: path.relative(this.runDir, file), rows, bytes: 0, sha256: "" };
    this.files.push(entry);
    const cols = `CAST(r.ci + ${this.y0} AS BIGINT) AS cohort, CAST(r.yi + ${this.y0} AS BIGINT) AS year, r.inflow, r.outflow, r.stock, ${lit(this.unit)} AS unit`;
    const to = `TO ${lit(file)} ${PART_OPTIONS}`;
    const keys = listed ? await this.keyLists(sids) : null;
    // At most MAX_IN_FLIGHT parts in DuckDB's hands: a part's encoding does not keep both cores
    // busy, two at once do (each COPY on a connection of its own, each set read in place).
    while (this.inFlight.length >= MAX_IN_FLIGHT) await this.settleOne();
    const done = (): void => {
      this.written.push({ entry, file });
    };
    // DuckDB reads the ordered arrays in place and writes the file while the caller fills the
    // next part (into another set when DuckDB reads the filled one). The query reads every
    // column of the view: DuckDB's Arrow scan through its C API passes no projection on.
    const view = uniqueView("__cairn_part");
    const inPlace = keys
      ? scanArrays(this.s, view, `COPY (SELECT ${keys}, ${cols} FROM ${view} r) ${to}`,
        ["lsid", "ci", "yi", "inflow", "outflow", "stock"], [src.lsid, src.ci, src.yi, src.inflow, src.outflow, src.stock], rows)
      : null;
    let pending: Promise<void>;
    let reading: Cols | null = null;
    if (inPlace) {
      // DuckDB reads `src` until the part is written; the next part fills another set.
      reading = src;
      // (When `src` is an ordered copy, the filled set's rows are in it, and that set fills again.)
      if (src === filled) this.fill = this.free.pop() ?? newCols(this.cap);
      pending = inPlace.then(done);
    } else {
      // Without the native hand-off (or with runs that overlap, or very many series): a table, then the COPY.
      // One part at a time on this path: the table and the COPY use the session's own connection.
      await this.settle();
      const tmp = `__${this.table}_part`;
      await writeColumns(this.s, tmp, [
        { name: "sid", kind: "i32", data: src.sid }, { name: "lsid", kind: "i32", data: src.lsid }, { name: "ci", kind: "i32", data: src.ci }, { name: "yi", kind: "i32", data: src.yi },
        { name: "inflow", kind: "f64", data: src.inflow }, { name: "outflow", kind: "f64", data: src.outflow }, { name: "stock", kind: "f64", data: src.stock },
      ], rows);
      if (src !== filled) this.free.push(src); // copied into the table: the ordered copy is free again
      const query = keys
        ? `SELECT ${keys}, ${cols} FROM ${ident(tmp)} r`
        : `SELECT ${this.selectKeys}, ${cols} FROM ${ident(tmp)} r JOIN ${ident(this.sidTable)} m USING (sid) ORDER BY r.sid, r.ci, r.yi`;
      pending = (async () => {
        await this.s.run(`COPY (${query}) ${to}`);
        await this.s.run(`DROP TABLE ${ident(tmp)}`);
        done();
      })();
    }
    pending.catch(() => {}); // observed by settleOne()
    this.inFlight.push({ done: pending, set: reading });
    this.part++;
    this.used = 0;
    // The parts written before this one are hashed while DuckDB writes it.
    this.hashWritten();
  }

  /** Waits for the oldest part DuckDB is writing (rethrows its error); its set is free again. */
  private async settleOne(): Promise<void> {
    const f = this.inFlight.shift();
    if (!f) return;
    await f.done;
    if (f.set) this.free.push(f.set);
  }

  /** Waits for every part DuckDB is writing. */
  private async settle(): Promise<void> {
    while (this.inFlight.length) await this.settleOne();
  }

  /** Size and SHA-256 of the parts DuckDB has finished. */
  private hashWritten(): void {
    for (const { entry, file } of this.written.splice(0)) {
      entry.bytes = statSync(file).size;
      entry.sha256 = sha256(file);
    }
  }

  /**
   * Publishes the parts: a single part becomes `<table>.parquet`; several stay as the folder
   * `<table>/part-NNNNN.parquet` (concatenating them into one file took a gigabyte more memory
   * in DuckDB, which defeats the streaming).
   */
  async finish(): Promise<OutputFile[]> {
    await this.flush();
    await this.settle();
    this.hashWritten();
    const single = path.join(this.runDir, `${this.table}.parquet`);
    if (this.files.length === 0) {
      await this.s.run(`COPY (SELECT ${this.selectKeys}, CAST(NULL AS BIGINT) AS cohort, CAST(NULL AS BIGINT) AS year, CAST(NULL AS DOUBLE) AS inflow,
          CAST(NULL AS DOUBLE) AS outflow, CAST(NULL AS DOUBLE) AS stock, ${lit(this.unit)} AS unit FROM ${ident(this.sidTable)} m WHERE FALSE)
        TO ${lit(single)} ${PART_OPTIONS}`);
      rmSync(this.outDir, { recursive: true, force: true });
      return [{ table: this.table, file: path.relative(this.runDir, single), rows: 0, bytes: statSync(single).size, sha256: sha256(single) }];
    }
    if (this.files.length === 1) {
      renameSync(path.join(this.runDir, this.files[0]!.file), single);
      rmSync(this.outDir, { recursive: true, force: true });
      return [{ ...this.files[0]!, file: path.relative(this.runDir, single) }];
    }
    const folder = path.join(this.runDir, this.table);
    renameSync(this.outDir, folder);
    return this.files.map((f) => ({ ...f, file: path.join(this.table, path.basename(f.file)) }));
  }
}
