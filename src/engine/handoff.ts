/**
 * Columnar hand-off between DuckDB and the numeric kernels: no per-row JavaScript objects.
 * Reading copies each result chunk's vector data into typed arrays: with the native reader
 * (native/handoff.c, built at install when a C compiler is present) one memcpy per chunk and
 * column; without it, through the bindings' per-chunk calls (about half as fast).
 * writing copies typed-array ranges straight into one reused data chunk and appends it.
 * Both go through the low-level bindings under @duckdb/node-api (the wrapper objects it
 * builds per chunk cost more than the copy itself).
 */
import { DOUBLE, DuckDBDataChunk, INTEGER, type DuckDBType } from "@duckdb/node-api";
import duckdb from "@duckdb/node-bindings";
import { existsSync, readFileSync } from "node:fs";
import { createRequire } from "node:module";
import type { Session } from "./session.js";
import { ident } from "./sql.js";
import { largeFloat64Array, largeInt32Array } from "../cohort/native.js";

export type ColumnKind = "f64" | "i32";
const BYTES: Record<ColumnKind, number> = { f64: 8, i32: 4 };

interface NativeReader {
  copyColumns(result: duckdb.Result, targets: (Float64Array | Int32Array)[], widths: number[]): number;
  /** Runs `sql` on a connection of its own, off this thread, with the arrays as the view `view` (read in place, in order); resolves to the statement's row count. */
  scanArrays(db: duckdb.Database, view: string, sql: string, names: string[], sources: (Float64Array | Int32Array | BigInt64Array)[], rows: number, batch: number): Promise<number>;
  /** native/concsum.c: see src/ops/concordance-native.ts. */
  concordanceSums(db: duckdb.Database, sql: string, dims: number[], cstart: Int32Array, ck: Int32Array, factor: Float64Array, share: Float64Array, first: Int32Array):
    Promise<{ invalid: number; cells: number; ints: Int32Array; sums: BigInt64Array }>;
  /** native/keysort.c: see sortedKeys below. */
  sortedKeys(db: duckdb.Database, mode: 0 | 1, sql: string, bits: number, table: string, budget: number): Promise<SortedKeyCounts>;
}

let native: NativeReader | null | undefined;
/** Turns the native reader off (false) or back to its default (true), e.g. to compare the two paths. */
export function useNativeReader(on: boolean): void {
  native = on ? undefined : null;
}

/** The native reader if it was built (and CAIRN_NATIVE is not 0), else null. */
export function nativeReader(): NativeReader | null {
  if (native === undefined) {
    native = null;
    const file = new URL("../../build/cairn_handoff.node", import.meta.url);
    if (process.env.CAIRN_NATIVE !== "0" && existsSync(file)) {
      try {
        // Only for the bindings it was built against: it reads their handles.
        const require = createRequire(import.meta.url);
        const built = JSON.parse(readFileSync(`${file.pathname}.json`, "utf8")) as { bindings: string };
        const installed = JSON.parse(readFileSync(require.resolve("@duckdb/node-bindings/package.json"), "utf8")) as { version: string };
        if (built.bindings === installed.version) native = require(file.pathname) as NativeReader;
      } catch {
        native = null; // built for another Node or DuckDB: the bindings' path works the same
      }
    }
  }
  return native;
}

function allValid(vec: duckdb.Vector, n: number): boolean {
  const words = Math.ceil(n / 64);
  const bytes = duckdb.vector_get_validity(vec, words * 8);
  if (!bytes) return true;
  const w = new BigUint64Array(bytes.buffer, bytes.byteOffset, words);
  const full = (1n << 64n) - 1n;
  for (let i = 0; i < words - 1; i++) if (w[i] !== full) return false;
  const rest = n - (words - 1) * 64;
  const mask = rest === 64 ? full : (1n << BigInt(rest)) - 1n;
  return (w[words - 1]! & mask) === mask;
}

/**
 * Target arrays kept from one read to the next (owned by the caller, one per reading loop).
 * Fresh memory costs a page fault on its first touch: here (a virtual machine) filling 80 MB of
 * new memory took 0.23 s, as long as DuckDB's whole query, while the copy into memory already
 * touched took 0.05 s. A read through ReadBuffers returns views of the arrays it kept when they
 * are large enough, so the arrays of the previous read must no longer be in use.
 */
export class ReadBuffers {
  private readonly kept: (Float64Array | Int32Array | undefined)[] = [];

  /** An array of `rows` elements of `kind` for column `j`: a view of the kept one when it is large enough, else a new one (in huge pages where the system allows: its first touch, the copy, is most of the cost). */
  take(j: number, kind: ColumnKind, rows: number): Float64Array | Int32Array {
    const k = this.kept[j];
    if (k && k.length >= rows && (kind === "f64") === k instanceof Float64Array) return k.subarray(0, rows);
    const a = kind === "f64" ? largeFloat64Array(rows) : largeInt32Array(rows);
    this.kept[j] = a;
    return a;
  }
}

/**
 * Runs `sql` and returns its columns as typed arrays (DOUBLE → Float64Array, INTEGER →
 * Int32Array, in that order of `kinds`). NULLs are refused: filter or coalesce them first.
 * With `into`, the arrays are views of the buffers it keeps (see ReadBuffers).
 */
export async function readColumns(s: Session, sql: string, kinds: readonly ColumnKind[], into?: ReadBuffers): Promise<{ rows: number; columns: (Float64Array | Int32Array)[] }> {
  const targets = into ?? new ReadBuffers(); // fresh ones: new arrays
  const res = await s.conn.run(sql);
  const types = res.columnTypes();
  kinds.forEach((k, j) => {
    const want = k === "f64" ? "DOUBLE" : "INTEGER";
    if (types[j]?.toString() !== want) throw new Error(`hand-off: column ${j} of the query is ${types[j]?.toString()}, not ${want} (cast it in the query)`);
  });
  const raw = (res as unknown as { result: duckdb.Result }).result;
  const nat = nativeReader();
  if (nat) {
    const rows = Number((res as unknown as { rowCount: number }).rowCount);
    const cols = kinds.map((k, j) => targets.take(j, k, rows));
    try {
      const copied = nat.copyColumns(raw, cols, kinds.map((k) => BYTES[k]));
      if (copied !== rows) throw new Error(`${copied} rows copied of ${rows}`);
    } catch (e) {
      const m = /NULL in column (\d+)/.exec((e as Error).message);
      throw new Error(m ? `hand-off: column ${m[1]} holds NULLs` : `hand-off: ${(e as Error).message}`);
    }
    return { rows, columns: cols };
  }
  const count = duckdb.result_chunk_count(raw);
  let rows = 0;
  const chunks: duckdb.DataChunk[] = [];
  for (let i = 0; i < count; i++) {
    const ch = duckdb.result_get_chunk(raw, i);
    chunks.push(ch);
    rows += duckdb.data_chunk_get_size(ch);
  }
  const cols = kinds.map((k, j) => targets.take(j, k, rows));
  let off = 0;
  for (const ch of chunks) {
    const n = duckdb.data_chunk_get_size(ch);
    for (let j = 0; j < kinds.length; j++) {
      const vec = duckdb.data_chunk_get_vector(ch, j);
      if (!allValid(vec, n)) throw new Error(`hand-off: column ${j} holds NULLs`);
      const d = duckdb.vector_get_data(vec, n * BYTES[kinds[j]!]);
      if (kinds[j] === "f64") (cols[j] as Float64Array).set(new Float64Array(d.buffer, d.byteOffset, n), off);
      else (cols[j] as Int32Array).set(new Int32Array(d.buffer, d.byteOffset, n), off);
    }
    off += n;
  }
  return { rows, columns: cols };
}

export interface OutColumn {
  name: string;
  kind: ColumnKind;
  data: Float64Array | Int32Array;
}

/**
 * Creates `table` with the given columns (unless `create: false`) and appends `rows` rows from
 * the typed arrays, in their order. With the native hand-off DuckDB reads the arrays in place
 * (an Arrow view over them, in batches it numbers, so the insert runs on every core and keeps
 * the order); without it, one data chunk is filled by raw copies and appended, 2048 rows at a
 * time.
 */
export async function writeColumns(s: Session, table: string, columns: readonly OutColumn[], rows: number, opts: { create?: boolean } = {}): Promise<void> {
  if (opts.create !== false) {
    await s.run(`CREATE OR REPLACE TABLE ${ident(table)} (${columns.map((c) => `${ident(c.name)} ${c.kind === "f64" ? "DOUBLE" : "INTEGER"}`).join(", ")})`);
  }
  const view = uniqueView("__cairn_arrays");
  const inPlace = rows > 0 ? scanArrays(s, view, `INSERT INTO ${ident(table)} (${columns.map((c) => ident(c.name)).join(", ")}) SELECT ${columns.map((_, j) => `c${j}`).join(", ")} FROM ${view}`,
    columns.map((_, j) => `c${j}`), columns.map((c) => c.data), rows) : null;
  if (inPlace) return inPlace;
  const appender = await s.conn.createAppender(table);
  const types: DuckDBType[] = columns.map((c) => (c.kind === "f64" ? DOUBLE : INTEGER));
  const size = 2048;
  const chunk = DuckDBDataChunk.create(types, size).chunk;
  const vecs = columns.map((_, j) => duckdb.data_chunk_get_vector(chunk, j));
  const rawAppender = (appender as unknown as { appender: duckdb.Appender }).appender;
  for (let off = 0; off < rows; off += size) {
    const n = Math.min(size, rows - off);
    duckdb.data_chunk_set_size(chunk, n);
    for (let j = 0; j < columns.length; j++) {
      const c = columns[j]!;
      const b = BYTES[c.kind];
      duckdb.copy_data_to_vector(vecs[j]!, 0, c.data.buffer as ArrayBuffer, c.data.byteOffset + off * b, n * b);
    }
    duckdb.append_data_chunk(rawAppender, chunk);
  }
  appender.closeSync();
}

/**
 * A view name no other scan uses: DuckDB's views of Arrow streams are seen by every connection,
 * so two scans at once under one name would read each other's arrays.
 */
let views = 0;
export function uniqueView(prefix: string): string {
  return `${prefix}_${process.pid}_${++views}`;
}

/** Rows per batch of an in-place scan: DuckDB's row group size, so that each batch fills one. */
const SCAN_BATCH = 122880;

/**
 * Runs `sql` (a COPY … TO or INSERT … SELECT … FROM `view`, one row out per row in) with the
 * typed arrays as the view `view` (a name of its own: uniqueView; columns `names`;
 * Float64Array → DOUBLE, Int32Array → INTEGER, BigInt64Array → BIGINT), read in place and in
 * order, on a connection of its own: no copy into a table first. The arrays must not change until
 * the promise settles; it fails unless the statement took every row. Null when the native
 * hand-off is not built (the caller then writes a table with writeColumns).
 *
 * The query must read every column of the view and filter nothing in the view's own scan:
 * DuckDB's Arrow scan through its C API passes neither a projection nor a filter on to the
 * arrays, and would misread columns left out (compute in the SELECT list, or select from a
 * subquery that uses every column).
 */
export function scanArrays(s: Session, view: string, sql: string, names: string[], sources: (Float64Array | Int32Array | BigInt64Array)[], rows: number): Promise<void> | null {
  const nat = nativeReader();
  if (!nat) return null;
  const db = (s.instance as unknown as { db: duckdb.Database }).db;
  // Every row must have gone through: the statement's count (rows written or inserted) is checked.
  return nat.scanArrays(db, view, sql, names, sources, rows, SCAN_BATCH).then((n) => {
    if (n !== rows) throw new Error(`hand-off: the statement over ${view} took ${n} rows of ${rows}`);
  });
}

export interface SortedKeyCounts {
  /** Rows the statement gave. */
  rows: number;
  /** Rows with a NULL key (or, for pairs, value): left out. */
  nulls: number;
  /** Rows whose key lies outside [0, 2^bits): left out. */
  outOfRange: number;
  /** Keys equal to the key before them in sorted order. */
  equal: number;
  /** Pairs appended (pairs only). */
  pairs: number;
  /** 1 when the rows would not fit the memory budget: nothing was counted or appended; sort in SQL. */
  overBudget: number;
}

/**
 * Bytes the native sorts may hold: DuckDB's memory limit (the user's --memory-limit, or
 * DuckDB's default of 80 % of the memory), so that rows beyond it are sorted by DuckDB, which
 * can spill to disk; CAIRN_SINK_MAX_BYTES overrides it (tests).
 */
async function sinkBudget(s: Session): Promise<number> {
  const env = Number(process.env.CAIRN_SINK_MAX_BYTES);
  if (env > 0) return env;
  const v = String(await s.scalar("SELECT current_setting('memory_limit')"));
  const m = /^([\d.]+)\s*(bytes|[KMGTP]i?B)$/i.exec(v.trim());
  if (!m) return 0;
  const unit = m[2]!.toUpperCase();
  const pow = unit === "BYTES" ? 0 : "KMGTP".indexOf(unit[0]!) + 1;
  return Number(m[1]) * (unit.includes("I") || unit === "BYTES" ? 1024 : 1000) ** pow;
}

/**
 * Key statistics from sorted 64-bit keys, sorted outside DuckDB (native/keysort.c): `sql`
 * selects one UBIGINT key (e.g. a hash of a source's key columns; NULL for rows to leave out);
 * returns how many rows, NULL keys, and keys equal to the one before them. Null without the
 * native library or beyond the memory budget (callers then sort in SQL).
 */
export async function sortedKeyCounts(s: Session, sql: string): Promise<SortedKeyCounts | null> {
  const nat = nativeReader();
  if (!nat?.sortedKeys) return null;
  const r = await nat.sortedKeys((s.instance as unknown as { db: duckdb.Database }).db, 0, sql, 64, "", await sinkBudget(s));
  return r.overBudget ? null : r;
}

/**
 * Report pairs from sorted keys (native/keysort.c): `sql` selects a BIGINT key in [0, 2^bits),
 * 2·pair + flow, and a BIGINT value; an odd key right after key − 1 closes a pair, appended to
 * `table` (pair BIGINT, value of the odd key BIGINT, value of the even key BIGINT; a table of
 * the main schema, not TEMP: the work runs on a connection of its own) in key order, unless
 * some key repeats (`equal` > 0: nothing is appended). Null without the native library or
 * beyond the memory budget (nothing appended; callers then sort in SQL).
 */
export async function sortedKeyPairs(s: Session, sql: string, bits: number, table: string): Promise<SortedKeyCounts | null> {
  const nat = nativeReader();
  if (!nat?.sortedKeys) return null;
  const r = await nat.sortedKeys((s.instance as unknown as { db: duckdb.Database }).db, 1, sql, bits, table, await sinkBudget(s));
  return r.overBudget ? null : r;
}
