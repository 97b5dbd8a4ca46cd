/** Reading a run directory for charts and the report: its manifest and its published tables. */
import { readFileSync } from "node:fs";
import path from "node:path";
import { DuckDBInstance } from "@duckdb/node-api";
import { ident, lit } from "../engine/sql.js";
import { chartRows } from "./lump.js";
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

  /** The Parquet files of a published table (one file, or the files of a folder). */
  files(name: string): string[] {
    const files = this.manifest.outputs.filter((o) => o.table === name && isParquet(o)).map((o) => path.join(this.dir, o.file));
    if (!files.length) throw new Error(`${this.dir}: no published table ${name}`);
    return files;
  }

  /** The relation that reads a published table (one file, or the files of a folder). */
  table(name: string): string {
    return `read_parquet([${this.files(name).map(lit).join(", ")}])`;
  }

  /**
   * Per row group of a table's column, what its Parquet statistics say (no data read): `bad` counts
   * the row groups holding values whose statistics are missing.
   */
  private async stats(name: string, column: string, select: string): Promise<Record<string, unknown> | null> {
    try {
      const x = await this.all(`SELECT count(*) FILTER (WHERE (stats_min_value IS NULL OR stats_max_value IS NULL)
          AND coalesce(stats_null_count, -1) <> row_group_num_rows) AS bad, count(*) AS groups, ${select}
        FROM parquet_metadata([${this.files(name).map(lit).join(", ")}]) WHERE path_in_schema = ${lit(column)}`);
      return x[0] && Number(x[0].groups) > 0 && Number(x[0].bad) === 0 ? x[0] : null;
    } catch {
      return null;
    }
  }

  /** The largest value of an integer column (the newest year): from the files' statistics when every row group has them, else read. */
  async maxOf(name: string, column: string): Promise<number | null> {
    const s = await this.stats(name, column, `max(TRY_CAST(stats_max_value AS BIGINT)) AS m,
      count(*) FILTER (WHERE stats_max_value IS NOT NULL AND TRY_CAST(stats_max_value AS BIGINT) IS NULL) AS odd`);
    if (s && Number(s.odd) === 0) return s.m == null ? null : Number(s.m);
    const m = (await this.all(`SELECT max(${ident(column)}) AS m FROM ${this.table(name)}`))[0]?.m;
    return m == null ? null : Number(m);
  }

  /**
   * The distinct non-null values of a text column (a table's units), in order: from the files'
   * statistics when every row group holds one value (or none), else read.
   */
  async distinctText(name: string, column: string): Promise<string[]> {
    const s = await this.stats(name, column, `count(*) FILTER (WHERE coalesce(stats_null_count, -1) <> row_group_num_rows
        AND stats_min_value IS DISTINCT FROM stats_max_value) AS mixed,
      list(DISTINCT stats_min_value ORDER BY stats_min_value) FILTER (WHERE coalesce(stats_null_count, -1) <> row_group_num_rows) AS v`);
    if (s && Number(s.mixed) === 0) {
      const v = (s.v as unknown[] | null) ?? [];
      if (v.length <= 1) return v.map(String);
    }
    return (await this.all(`SELECT DISTINCT CAST(${ident(column)} AS VARCHAR) AS u FROM ${this.table(name)} WHERE ${ident(column)} IS NOT NULL ORDER BY 1`)).map((x) => String(x.u));
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

/**
 * A variable (stock, inflow, outflow) of every cohort model summed by a column (product, material,
 * …) and year: the rows of lumpSeries(rows, max), the lumping done in DuckDB (at most `max`
 * series reach JavaScript; give Infinity for every series).
 */
export async function sumByYear(r: RunReader, variable: "stock" | "inflow" | "outflow", by: string, table: (s: ManifestStep) => string, max = 12): Promise<YearRow[]> {
  const parts: string[] = [];
  for (const [i, { step, phase }] of cohortSteps(r.manifest).entries()) {
    const t = table(step);
    if (!r.has(t)) continue;
    const cols = await r.all(`DESCRIBE SELECT * FROM ${r.table(t)}`);
    if (!cols.some((c) => c.column_name === by)) continue;
    parts.push(`SELECT ${i} AS part, ${lit(phase)} AS phase, coalesce(CAST(${ident(by)} AS VARCHAR), 'null') AS series, year,
      CAST(sum(${ident(variable)}) AS DOUBLE) AS value FROM ${r.table(t)} GROUP BY ALL`);
  }
  if (!parts.length) return [];
  const { rows } = await chartRows(r, parts.join(" UNION ALL "), { values: ["value"], order: ["part", "series", "year"], max });
  return rows.map((x) => ({ series: String(x.series), year: Number(x.year), value: Number(x.value), phase: String(x.phase) }));
}
