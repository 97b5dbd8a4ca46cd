/**
 * Arrow IPC files with the `apache-arrow` package: a published table written beside its Parquet
 * file as `<table>.arrow` (the Arrow IPC file format), in the same row order, its text columns
 * dictionary-encoded (one dictionary per column, shared by every record batch), NULLs kept.
 * And the other way: a run's table read back as an Arrow `Table` (library API).
 * Columns move as typed arrays (engine/handoff.ts), never as JavaScript objects per row.
 */
import { statSync, writeFileSync } from "node:fs";
import path from "node:path";
import {
  Bool, Dictionary, Float64, Int32, Int64, makeData, makeVector, RecordBatch, RecordBatchFileWriter, Schema, Field, Struct, Table, Utf8, vectorFromArray,
  type Data, type DataType, type Vector,
} from "apache-arrow";
import type { Session } from "../engine/session.js";
import { ident, idents, lit } from "../engine/sql.js";
import { readColumns } from "../engine/handoff.js";
import { sha256, type OutputFile } from "./parquet.js";

const BATCH = 1 << 20;

type Kind = "dict" | "f64" | "i64" | "i32" | "bool";

function kindOf(type: string): Kind {
  if (type === "VARCHAR") return "dict";
  if (type === "DOUBLE" || type === "FLOAT") return "f64";
  if (type === "BIGINT" || type === "HUGEINT" || type === "UBIGINT") return "i64";
  if (type === "INTEGER" || type === "SMALLINT" || type === "TINYINT") return "i32";
  if (type === "BOOLEAN") return "bool";
  throw new Error(`Arrow output: column type ${type} is not supported`);
}

/** Validity bitmap (1 = valid) from a 0/1 null flag per row. */
function validity(isNull: Int32Array): Uint8Array | undefined {
  let any = false;
  for (let i = 0; i < isNull.length; i++) if (isNull[i]) { any = true; break; }
  if (!any) return undefined;
  const bits = new Uint8Array(Math.ceil(isNull.length / 8));
  for (let i = 0; i < isNull.length; i++) if (!isNull[i]) bits[i >> 3]! |= 1 << (i & 7);
  return bits;
}

/** Writes `table` (ordered by `order`) as an Arrow IPC file; returns its output record. */
export async function writeArrow(s: Session, table: string, order: string[], file: string): Promise<OutputFile> {
  const cols = await s.columns(table);
  const kinds = cols.map((c) => kindOf(c.type));
  const dicts = new Map<string, string[]>();
  const dictTables: string[] = [];
  for (const [i, c] of cols.entries()) {
    if (kinds[i] !== "dict") continue;
    const t = `__arrow_dict_${i}`;
    await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(t)} AS SELECT v, CAST(row_number() OVER (ORDER BY v) - 1 AS INTEGER) AS idx FROM (SELECT DISTINCT ${ident(c.name)} AS v FROM ${ident(table)} WHERE ${ident(c.name)} IS NOT NULL)`);
    dicts.set(c.name, (await s.all(`SELECT v FROM ${ident(t)} ORDER BY idx`)).map((r) => String(r.v)));
    dictTables.push(t);
  }
  const fields = cols.map((c, i) => {
    const k = kinds[i]!;
    const type: DataType = k === "dict" ? new Dictionary(new Utf8(), new Int32(), i) : k === "f64" ? new Float64() : k === "i64" ? new Int64() : k === "i32" ? new Int32() : new Bool();
    return new Field(c.name, type, true);
  });
  const schema = new Schema(fields);
  const dictVectors = new Map<string, Vector<Utf8>>();
  for (const [name, values] of dicts) dictVectors.set(name, vectorFromArray(values, new Utf8()));
  // The rows in order, numbered, with each text column as its dictionary index and a NULL flag per column.
  const ordered = "__arrow_rows";
  const sel = cols.map((c, i) => {
    const k = kinds[i]!;
    const v = k === "dict" ? `coalesce(d${i}.idx, -1)` : k === "bool" ? `coalesce(CAST(t.${ident(c.name)} AS INTEGER), 0)` : k === "i32" ? `coalesce(CAST(t.${ident(c.name)} AS INTEGER), 0)` : `coalesce(CAST(t.${ident(c.name)} AS DOUBLE), 0)`;
    return `${v} AS v${i}, CAST(t.${ident(c.name)} IS NULL AS INTEGER) AS n${i}`;
  });
  const joins = cols.map((c, i) => (kinds[i] === "dict" ? `LEFT JOIN ${ident(`__arrow_dict_${i}`)} d${i} ON d${i}.v = t.${ident(c.name)}` : "")).join(" ");
  const orderBy = order.length ? idents(order.map((o) => o)).split(", ").map((x) => `t.${x}`).join(", ") : "1";
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ordered} AS SELECT row_number() OVER (ORDER BY ${orderBy}, ${cols.map((c) => `t.${ident(c.name)}`).join(", ")}) - 1 AS __i, ${sel.join(", ")}
    FROM ${ident(table)} t ${joins}`);
  const total = Number(await s.scalar(`SELECT count(*) FROM ${ordered}`));
  const writer = new RecordBatchFileWriter();
  for (let from = 0; from < total || (from === 0 && total === 0); from += BATCH) {
    const n = Math.min(BATCH, total - from);
    const readKinds = cols.flatMap((_c, i) => [kinds[i] === "f64" || kinds[i] === "i64" ? "f64" as const : "i32" as const, "i32" as const]);
    const { columns } = await readColumns(s, `SELECT ${cols.map((_c, i) => `v${i}, n${i}`).join(", ")} FROM ${ordered} WHERE __i >= ${from} AND __i < ${from + n} ORDER BY __i`, readKinds);
    const children: Data[] = cols.map((c, i) => {
      const v = columns[2 * i]!;
      const nulls = validity(columns[2 * i + 1] as Int32Array);
      const k = kinds[i]!;
      const field = fields[i]!;
      if (k === "dict") return makeData({ type: field.type as Dictionary, length: n, data: v as Int32Array, nullBitmap: nulls, dictionary: dictVectors.get(c.name)! });
      if (k === "f64") return makeData({ type: new Float64(), length: n, data: v as Float64Array, nullBitmap: nulls });
      if (k === "i64") return makeData({ type: new Int64(), length: n, data: BigInt64Array.from(v as Float64Array, (x) => BigInt(x)), nullBitmap: nulls });
      if (k === "i32") return makeData({ type: new Int32(), length: n, data: v as Int32Array, nullBitmap: nulls });
      const bits = new Uint8Array(Math.ceil(n / 8));
      (v as Int32Array).forEach((x, j) => { if (x) bits[j >> 3]! |= 1 << (j & 7); });
      return makeData({ type: new Bool(), length: n, data: bits, nullBitmap: nulls });
    });
    writer.write(new RecordBatch(schema, makeData({ type: new Struct(fields), length: n, children })));
    if (n <= 0) break;
  }
  writer.finish();
  writeFileSync(file, writer.toUint8Array(true));
  await s.run(`DROP TABLE ${ordered}`);
  for (const t of dictTables) await s.run(`DROP TABLE ${ident(t)}`);
  return { table, file: path.basename(file), rows: total, bytes: statSync(file).size, sha256: sha256(file) };
}

/** Writes `table` (ordered by `order`) as CSV with a header (RFC 4180 quoting), beside the Parquet file. */
export async function writeCsv(s: Session, table: string, order: string[], file: string): Promise<OutputFile> {
  const cols = (await s.columns(table)).map((c) => c.name);
  const by = [...order, ...cols.filter((c) => !order.includes(c))];
  await s.run(`COPY (SELECT * FROM ${ident(table)} ORDER BY ${idents(by)}) TO ${lit(file)} (FORMAT csv, HEADER true)`);
  const rows = Number(await s.scalar(`SELECT count(*) FROM ${ident(table)}`));
  return { table, file: path.basename(file), rows, bytes: statSync(file).size, sha256: sha256(file) };
}

/** A table of a run directory as an Arrow Table: its Arrow file when there is one, else its Parquet file(s) through DuckDB. */
export async function readRunTable(runDir: string, table: string): Promise<Table> {
  const { readFileSync, existsSync } = await import("node:fs");
  const { tableFromIPC } = await import("apache-arrow");
  const arrowFile = path.join(runDir, `${table}.arrow`);
  if (existsSync(arrowFile)) return tableFromIPC(readFileSync(arrowFile));
  const manifest = JSON.parse(readFileSync(path.join(runDir, "manifest.json"), "utf8")) as { outputs: { table: string; file: string }[] };
  const files = manifest.outputs.filter((o) => o.table === table && !/\.(arrow|csv)$/.test(o.file)).map((o) => path.join(runDir, o.file));
  if (!files.length) throw new Error(`${runDir}: no published table ${table}`);
  const { Session } = await import("../engine/session.js");
  const s = await Session.open({ threads: 2 });
  try {
    await s.run(`CREATE VIEW ${ident(table)} AS SELECT * FROM read_parquet([${files.map(lit).join(", ")}])`);
    const tmp = path.join(path.dirname(files[0]!), `.${table}.${process.pid}.arrow`);
    const { rmSync } = await import("node:fs");
    const keys = (JSON.parse(readFileSync(path.join(runDir, "manifest.json"), "utf8")).steps ?? [])
      .flatMap((st: { outputs: { name: string; keys: string[] }[] }) => st.outputs).find((o: { name: string }) => o.name === table)?.keys ?? [];
    try {
      const { mkdtempSync } = await import("node:fs");
      const { tmpdir } = await import("node:os");
      const dir = mkdtempSync(path.join(tmpdir(), "cairn-arrow-"));
      const f = path.join(dir, "t.arrow");
      await writeArrow(s, table, keys, f);
      const t = tableFromIPC(readFileSync(f));
      rmSync(dir, { recursive: true, force: true });
      return t;
    } finally {
      rmSync(tmp, { force: true });
    }
  } finally {
    s.close();
  }
}

export { makeVector };
