/**
 * Columnar hand-off between DuckDB and the numeric kernels: no per-row JavaScript objects.
 * Reading views each chunk's vector data as a typed array and copies it with `.set`; writing
 * fills data chunks by raw copies and appends them.
 */
import { DOUBLE, DuckDBDataChunk, INTEGER, type DuckDBType } from "@duckdb/node-api";
import type { Session } from "./session.js";
import { ident } from "./sql.js";

export type ColumnKind = "f64" | "i32";

interface RawVector {
  items?: Float64Array | Int32Array;
  validity?: { data: BigUint64Array | null; itemValid(i: number): boolean };
}

function rawItems(v: unknown, kind: ColumnKind, col: string): Float64Array | Int32Array {
  const items = (v as RawVector).items;
  const ok = kind === "f64" ? items instanceof Float64Array : items instanceof Int32Array;
  if (!ok) throw new Error(`hand-off: column ${col} is not ${kind === "f64" ? "DOUBLE" : "INTEGER"} (cast it in the query)`);
  return items!;
}

function hasNulls(v: unknown, n: number): boolean {
  const val = (v as RawVector).validity;
  if (!val || !val.data) return false;
  for (let i = 0; i < n; i++) if (!val.itemValid(i)) return true;
  return false;
}

/**
 * Runs `sql` and returns its columns as typed arrays. `expectedRows` sizes the buffers
 * (they grow if the result is larger). NULLs are refused: filter or coalesce them first.
 */
export async function readColumns(s: Session, sql: string, kinds: readonly ColumnKind[], expectedRows = 0): Promise<{ rows: number; columns: (Float64Array | Int32Array)[] }> {
  const res = await s.conn.stream(sql);
  let cap = Math.max(expectedRows, 2048);
  let cols = kinds.map((k) => (k === "f64" ? new Float64Array(cap) : new Int32Array(cap)));
  let rows = 0;
  for (;;) {
    const chunk = await res.fetchChunk();
    if (!chunk || chunk.rowCount === 0) break;
    const n = chunk.rowCount;
    if (rows + n > cap) {
      cap = Math.max(cap * 2, rows + n);
      cols = cols.map((c) => {
        const g = c instanceof Float64Array ? new Float64Array(cap) : new Int32Array(cap);
        g.set(c.subarray(0, rows) as never);
        return g;
      });
    }
    for (let j = 0; j < kinds.length; j++) {
      const v = chunk.getColumnVector(j);
      if (hasNulls(v, n)) throw new Error(`hand-off: column ${j} holds NULLs`);
      (cols[j] as Float64Array).set(rawItems(v, kinds[j]!, String(j)).subarray(0, n) as Float64Array, rows);
    }
    rows += n;
  }
  return { rows, columns: cols.map((c) => (c.length === rows ? c : c.subarray(0, rows))) as (Float64Array | Int32Array)[] };
}

export interface OutColumn {
  name: string;
  kind: ColumnKind;
  data: Float64Array | Int32Array;
}

/** Creates `table` with the given columns and appends `rows` rows from the typed arrays. */
export async function writeColumns(s: Session, table: string, columns: readonly OutColumn[], rows: number, opts: { create?: boolean } = {}): Promise<void> {
  if (opts.create !== false) {
    await s.run(`CREATE OR REPLACE TABLE ${ident(table)} (${columns.map((c) => `${ident(c.name)} ${c.kind === "f64" ? "DOUBLE" : "INTEGER"}`).join(", ")})`);
  }
  const appender = await s.conn.createAppender(table);
  const types: DuckDBType[] = columns.map((c) => (c.kind === "f64" ? DOUBLE : INTEGER));
  const size = 2048;
  for (let off = 0; off < rows; off += size) {
    const n = Math.min(size, rows - off);
    const chunk = DuckDBDataChunk.create(types, n);
    for (let j = 0; j < columns.length; j++) {
      const v = chunk.getColumnVector(j);
      const items = rawItems(v, columns[j]!.kind, columns[j]!.name);
      (items as Float64Array).set(columns[j]!.data.subarray(off, off + n) as Float64Array);
      v.flush();
    }
    appender.appendDataChunk(chunk);
  }
  appender.closeSync();
}
