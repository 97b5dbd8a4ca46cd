/** Parquet writers (zstd, fixed row order) and output hashing. */
import { createHash } from "node:crypto";
import { mkdirSync, readdirSync, readFileSync, statSync } from "node:fs";
import path from "node:path";
import type { Session } from "../engine/session.js";
import { ident, idents, lit } from "../engine/sql.js";

export interface OutputFile {
  table: string;
  /** parquet (the default, the run's canonical copy), arrow or csv (beside it), sdmx-csv (exports). */
  format?: string;
  file: string;
  rows: number;
  bytes: number;
  sha256: string;
}

function walk(dir: string): string[] {
  const out: string[] = [];
  for (const e of readdirSync(dir, { withFileTypes: true }).sort((a, b) => a.name.localeCompare(b.name))) {
    const full = path.join(dir, e.name);
    if (e.isDirectory()) out.push(...walk(full));
    else out.push(full);
  }
  return out;
}

export function sha256(file: string): string {
  return createHash("sha256").update(readFileSync(file)).digest("hex");
}

/** Writes `sql` (or a table, sorted by its keys then every other column) as Parquet under `dir`. */
export async function writeParquet(s: Session, opts: { table: string; sql?: string; keys?: string[]; dir: string; name: string; partitionBy?: string[]; metadata?: Record<string, string> }): Promise<OutputFile[]> {
  let query = opts.sql;
  if (!query) {
    const cols = (await s.columns(opts.table)).map((c) => c.name);
    const keys = (opts.keys ?? []).filter((k) => cols.includes(k));
    const order = [...keys, ...cols.filter((c) => !keys.includes(c))];
    query = `SELECT * FROM ${ident(opts.table)} ORDER BY ${idents(order)}`;
  }
  const rel = opts.partitionBy?.length ? opts.name : `${opts.name}.parquet`;
  const target = path.join(opts.dir, rel);
  mkdirSync(path.dirname(target), { recursive: true });
  const part = opts.partitionBy?.length ? `, PARTITION_BY (${idents(opts.partitionBy)}), OVERWRITE_OR_IGNORE true` : "";
  // Key-value metadata in the file's footer: a reader of this file alone knows its units and meaning.
  const kv = opts.metadata && Object.keys(opts.metadata).length
    ? `, KV_METADATA {${Object.entries(opts.metadata).map(([k, v]) => `${lit(k)}: ${lit(v)}`).join(", ")}}` : "";
  await s.run(`COPY (${query}) TO ${lit(target)} (FORMAT parquet, COMPRESSION zstd, ROW_GROUP_SIZE 122880${part}${kv})`);
  const files = opts.partitionBy?.length ? walk(target) : [target];
  const out: OutputFile[] = [];
  for (const f of files) {
    const rows = Number(await s.scalar(`SELECT count(*) FROM read_parquet(${lit(f)})`));
    out.push({ table: opts.table, file: path.relative(opts.dir, f), rows, bytes: statSync(f).size, sha256: sha256(f) });
  }
  return out;
}
