/** The one small interface every step kind implements. The runner knows nothing else about a kind. */
import type { z } from "zod";
import type { AuditLog } from "../audit/log.js";
import type { Session } from "../engine/session.js";
import type { Pipeline, StepBase } from "../spec/schema.js";
import type { Progress } from "../run/progress.js";
import type { OutputFile } from "../publish/parquet.js";

/** A table known to the run: a loaded source or a step's output. */
export interface TableInfo {
  name: string;
  /** Key columns (series keys then `year`), also the published sort order. */
  keys: string[];
  /** Produced by this step id (undefined for sources). */
  step?: string;
  /** Published as Parquet in the run directory. */
  publish: false | { partition_by?: string[] };
  /** Already written into the run directory by the step (streamed output); not a DuckDB table. */
  files?: OutputFile[];
}

export interface StepContext {
  session: Session;
  pipeline: Pipeline;
  /** The folder of the pipeline file (paths in step options resolve against it). */
  dir: string;
  audits: AuditLog;
  progress: Progress;
  tables: Map<string, TableInfo>;
  /** A table must exist; names the step and option when it does not. */
  requireTable(name: string, option: string): TableInfo;
  /** The run's staging directory, for steps that stream their output straight to files. */
  outputDir: string;
  /** Columns of a table as DuckDB reports them. */
  columnsOf(name: string): Promise<string[]>;
}

export interface StepKind<O extends z.ZodObject = z.ZodObject> {
  kind: string;
  /** One line for `--help` and the README. */
  summary: string;
  /** Options besides id, kind and publish. */
  options: O;
  /** Names of tables (sources or earlier step outputs) this step reads. */
  reads(step: z.output<O> & StepBase): string[];
  /** Runs the step; returns the tables it produced (the first is its main output). */
  run(ctx: StepContext, step: z.output<O> & StepBase): Promise<Omit<TableInfo, "publish" | "step">[]>;
}

export function defineStep<O extends z.ZodObject>(k: StepKind<O>): StepKind<O> {
  return k;
}
