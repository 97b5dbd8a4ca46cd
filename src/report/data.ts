/** Reading a run directory for charts and the report: its manifest and its published tables. */
import { readFileSync } from "node:fs";
import path from "node:path";
import { DuckDBInstance } from "@duckdb/node-api";
import { lit } from "../engine/sql.js";
import type { YearRow } from "./render.js";

export interface ManifestStep {
  id: string;
  kind: string;
  reads: string[];
  continues?: string;
  outputs: { name: string; role: string; keys: string[] }[];
}

export interface Manifest {
  status: string;
  pipeline: { name: string; base_unit: string };
  steps: ManifestStep[];
  outputs: { table: string; file: string; rows: number; step?: string; role?: string; format?: string }[];
  [k: string]: unknown;
}

/** A Parquet output (the canonical copy; Arrow, CSV and SDMX-CSV copies have their own `format`). */
export function isParquet(o: { file: string; format?: string }): boolean {
  return (o.format === undefined || o.format === "parquet") && o.file.endsWith(".parquet");
}

export function readManifest(dir: string): Manifest {
  return JSON.parse(readFileSync(path.join(dir, "manifest.json"), "utf8")) as Manifest;
}

/** A small DuckDB reader over a run directory's files. */
export class RunReader {
  private constructor(readonly dir: string, readonly manifest: Manifest, private readonly inst: DuckDBInstance, private readonly conn: Awaited<ReturnType<DuckDBInstance["connect"]>>) {}

  static async open(dir: string): Promise<RunReader> {
    const inst = await DuckDBInstance.create(":memory:", { autoinstall_known_extensions: "false", autoload_known_extensions: "false" });
    return new RunReader(dir, readManifest(dir), inst, await inst.connect());
  }

  /** The relation that reads a published table (one file, or the files of a folder). */
  table(name: string): string {
    const files = this.manifest.outputs.filter((o) => o.table === name && isParquet(o)).map((o) => path.join(this.dir, o.file));
    if (!files.length) throw new Error(`${this.dir}: no published table ${name}`);
    return `read_parquet([${files.map(lit).join(", ")}])`;
  }

  has(name: string): boolean {
    return this.manifest.outputs.some((o) => o.table === name && isParquet(o));
  }

  async all(sql: string): Promise<Record<string, unknown>[]> {
    const r = await this.conn.runAndReadAll(sql);
    return r.getRowObjectsJS().map((row) => Object.fromEntries(Object.entries(row).map(([k, v]) => [k, typeof v === "bigint" ? Number(v) : v])));
  }

  close(): void {
    this.conn.closeSync();
    this.inst.closeSync();
  }
}

/** Cohort-model steps, each with its phase: a model that continues another is a scenario. */
export function cohortSteps(m: Manifest): { step: ManifestStep; phase: "history" | "scenario" }[] {
  return m.steps.filter((s) => s.kind === "cohort-model").map((s) => ({ step: s, phase: s.continues ? "scenario" : "history" }));
}

/** A variable (stock, inflow, outflow) of every cohort model summed by a column (product, material, …) and year. */
export async function sumByYear(r: RunReader, variable: "stock" | "inflow" | "outflow", by: string, table: (s: ManifestStep) => string): Promise<YearRow[]> {
  const rows: YearRow[] = [];
  for (const { step, phase } of cohortSteps(r.manifest)) {
    const t = table(step);
    if (!r.has(t)) continue;
    const cols = await r.all(`DESCRIBE SELECT * FROM ${r.table(t)}`);
    if (!cols.some((c) => c.column_name === by)) continue;
    for (const x of await r.all(`SELECT CAST("${by}" AS VARCHAR) AS series, year, sum(${variable}) AS value FROM ${r.table(t)} GROUP BY ALL ORDER BY 1, 2`)) {
      rows.push({ series: String(x.series), year: Number(x.year), value: Number(x.value), phase });
    }
  }
  return rows;
}
