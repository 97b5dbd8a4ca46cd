/**
 * Exporters: files for statistical offices made from published tables (the pipeline's
 * `exports:`). Each exporter declares its options (a zod schema with `format` and `table`),
 * checks them against the plan before anything runs, and writes its file at publish time.
 * The plan stage and the runner reach exporters only through this list, never by name.
 *
 * To add one: write a module that exports an `Exporter` (see sdmx.ts) and add it to EXPORTERS.
 */
import { z } from "zod";
import type { Session } from "../engine/session.js";
import type { TableSchema } from "../steps/types.js";
import type { OutputFile } from "./parquet.js";
import { sdmxCsv } from "./sdmx.js";

/** What the plan stage tells an exporter about the table it exports and the tables it may read. */
export interface ExportCheck {
  /** The exported table's columns and DuckDB types. */
  columns: Map<string, string>;
  /** Every table the plan knows (sources and steps' outputs), for code tables and the like. */
  schemas: Map<string, TableSchema>;
  /** Throw a pipeline error located at exports[i].<key>. */
  fail(key: string, message: string): never;
  /** Mark a table as read by this export (loaded whole and checked as a configuration table). */
  reads(table: string): void;
}

/** What the runner gives an exporter when it writes. */
export interface ExportContext {
  session: Session;
  /** The staging run directory; files go below it. */
  dir: string;
  baseUnit: string;
  /** The table comes from a modelled step (cohort-model, yearly-path): its values are estimates. */
  modelled: boolean;
  /** The newest year with reported data among the pipeline's sources, or null. */
  newestDataYear: number | null;
  /** The release is marked provisional. */
  provisional: boolean;
  /** An earlier release of the catalog exists. */
  replaces: boolean;
  /** The exported table's column names. */
  columns: string[];
}

export interface ExportBase {
  format: string;
  table: string;
}

export interface Exporter<T extends ExportBase = ExportBase> {
  format: string;
  schema: z.ZodType<T>;
  /** A short name for progress lines and errors, e.g. the dataflow id. */
  label(e: T): string;
  check(e: T, c: ExportCheck): void;
  write(e: T, x: ExportContext): Promise<OutputFile>;
}

export const EXPORTERS: Exporter<any>[] = [sdmxCsv];

export type ExportSpecT = ExportBase & Record<string, unknown>;
/** One entry of `exports:`: the exporters' schemas told apart by `format`. */
export const ExportSpec = z.discriminatedUnion("format", EXPORTERS.map((x) => x.schema) as unknown as [z.ZodObject<any>, ...z.ZodObject<any>[]]) as unknown as z.ZodType<ExportSpecT>;

export function exporterFor(format: string): Exporter<any> {
  const x = EXPORTERS.find((e) => e.format === format);
  if (!x) throw new Error(`no exporter for format ${format} (known: ${EXPORTERS.map((e) => e.format).join(", ")})`);
  return x;
}
