/**
 * The one small interface every step kind implements. The runner and the plan know nothing
 * else about a kind: a kind declares what it reads and what it produces (names, roles, key
 * columns, typed and described columns) before it runs, then runs.
 */
import type { z } from "zod";
import type { AuditLog } from "../audit/log.js";
import type { Session } from "../engine/session.js";
import type { Exact } from "../engine/sql.js";
import type { Pipeline, StepBase } from "../spec/schema.js";
import type { Progress } from "../run/progress.js";
import type { OutputFile } from "../publish/parquet.js";
import type { CarryStore } from "./cohort-model/carry.js";

/**
 * The unit of a column's values, for the data dictionary and exports:
 * `unit-column` the unit named in the row's `unit` column (the base mass unit, or piece);
 * `year` a calendar year; `years` an age or duration in years; `1` dimensionless (a share,
 * a factor); `count` a number of rows or items; `per-unit` material per unit of product.
 */
export type ColumnUnit = "unit-column" | "year" | "years" | "1" | "count" | "per-unit";

export interface ColumnDecl {
  name: string;
  /** DuckDB type as DESCRIBE reports it (VARCHAR, BIGINT, INTEGER, DOUBLE, BOOLEAN, …). */
  type: string;
  /** What the column holds, in one sentence (the data dictionary's text). */
  description: string;
  unit?: ColumnUnit;
  /** The column holds groups of the upstream column of the same name, given by a table (member → group). */
  groups?: { table: string; member: string; group: string };
}

export interface TableSchema {
  columns: ColumnDecl[];
  /** Key columns: series keys, then `year` (also the published sort order). */
  keys: string[];
}

export interface OutputDecl extends TableSchema {
  name: string;
  /** `main`: the step's own result, named after its id; `detail`: a table beside it. */
  role: "main" | "detail";
  description: string;
  /** Written straight into the run directory by the step (streamed); later steps read it as a view. */
  streamed?: boolean;
}

/** A table a step reads, and through which option. `config`: a small table that configures the step (read whole by `check`). */
export interface ReadDecl {
  table: string;
  option: string;
  config?: boolean;
}

/** What a kind may use to declare its outputs without running. */
export interface PlanContext {
  pipeline: Pipeline;
  /** The schema of a source or an earlier step's output; fails (exit 2) naming the option when unknown. */
  schemaOf(table: string, option: string): TableSchema;
  /** Binds a SELECT over empty tables of the declared inputs: its output columns, or a PipelineError. */
  bind(sql: string, inputs: string[], option: string): Promise<{ name: string; type: string }[]>;
  /** A PipelineError at the step's option (file:line:col, key path, message). */
  fail(option: string, message: string): never;
}

/** A table known to the run: a loaded source or a step's output. */
export interface TableInfo {
  name: string;
  keys: string[];
  /** Produced by this step id (undefined for sources). */
  step?: string;
  /** Published in the run directory. */
  publish: false | { partition_by?: string[]; formats?: ("arrow" | "csv")[] };
  /** Already written into the run directory by the step (streamed output). */
  files?: OutputFile[];
}

export interface StepContext {
  session: Session;
  pipeline: Pipeline;
  /** Exact sums at the run's resolution (1 g whatever the base unit). */
  exact: Exact;
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
  /** Files a step wrote itself for a declared streamed output. */
  streamed(name: string, files: OutputFile[]): void;
  /** End states of earlier cohort models, for steps that continue them. */
  carry: CarryStore;
  /** Settings of this run (worker pool threshold and the like), never module-level state. */
  settings: RunSettings;
}

export interface RunSettings {
  /** Below this many cells a cohort step runs its models in the main thread. */
  poolMinCells: number;
}

export interface StepKind<O extends z.ZodObject = z.ZodObject> {
  kind: string;
  /** One line for `--help` and the README. */
  summary: string;
  /** Options besides id, kind and publish. */
  options: O;
  /** Tables (sources or earlier step outputs) this step reads; the pipeline for what depends on other steps. */
  reads(step: z.output<O> & StepBase, pipeline: Pipeline): ReadDecl[];
  /** The tables it will produce, from its options and its inputs' schemas, without running. */
  outputs(ctx: PlanContext, step: z.output<O> & StepBase): OutputDecl[] | Promise<OutputDecl[]>;
  /** Checks of the small tables that configure the step (loaded whole), run by `check` and before any step runs. */
  check?(ctx: StepContext, step: z.output<O> & StepBase): Promise<void>;
  /** Runs the step: creates every declared output (a DuckDB table, or files reported with ctx.streamed). */
  run(ctx: StepContext, step: z.output<O> & StepBase): Promise<void>;
}

export function defineStep<O extends z.ZodObject>(k: StepKind<O>): StepKind<O> {
  return k;
}
