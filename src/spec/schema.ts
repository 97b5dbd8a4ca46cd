/** The pipeline-file schema: the single source of the types, the messages and the JSON Schema. */
import { z } from "zod";
import { MassUnit, Name, Severity, UnitText } from "./common.js";
import { STEP_KINDS, stepSchemaFor } from "../steps/registry.js";
import { ExportSpec, EXPORTERS } from "../publish/exporters.js";

export const ColumnType = z.enum(["text", "integer", "number", "quantity", "boolean"]);

export const ColumnSpec = z.union([
  ColumnType,
  z
    .object({
      type: ColumnType,
      key: z.boolean().optional().describe("part of the row's key: must be present, and the key combination unique"),
      allow_negative: z.boolean().optional().describe("accept negative values (number and quantity; default false)"),
      nullable: z.boolean().optional().describe("accept empty cells (default false; keys never)"),
    })
    .strict(),
]);

export const RejectLimits = z
  .object({
    max_rows: z.number().int().min(0).optional().describe("most rejected rows tolerated before the run stops (exit 3)"),
    max_share: z.number().min(0).max(1).optional().describe("most rejected share of rows tolerated (0..1)"),
  })
  .strict();

export const CsvOptions = z
  .object({
    delimiter: z.string().min(1).max(4).default(","),
    header: z.boolean().default(true),
    decimal: z.enum([".", ","]).default("."),
    quote: z.string().length(1).default('"'),
  })
  .strict();

export const Source = z
  .object({
    path: z.string().min(1).describe("file, glob (*.csv, **/*.parquet) or folder; relative to the pipeline file"),
    format: z.enum(["csv", "parquet"]).optional().describe("default: from the file extension"),
    hive: z.boolean().default(false).describe("read hive-partitioned folders (key=value/…) and add their keys as columns"),
    csv: CsvOptions.optional(),
    rename: z.record(z.string(), Name).optional().describe("file column → table column, applied before `columns`"),
    columns: z.record(Name, ColumnSpec).describe("declared columns (after rename) with their types"),
    unit: UnitText.optional().describe("unit of every quantity column"),
    unit_column: Name.optional().describe("a column that gives each row's unit (instead of `unit`)"),
    filter: z.string().optional().describe("DuckDB SQL condition over the typed columns; rows failing it are counted, not rejected"),
    rejects: RejectLimits.optional(),
    allow_empty: z.boolean().default(false).describe("accept a source with no data rows (default: an error naming the file)"),
  })
  .strict();

export const AuditOptions = z
  .object({
    balance_rtol: z.number().min(0).default(1e-9),
    balance_atol: z.number().min(0).default(1e-6),
    share_tolerance: z.number().min(0).default(1e-6),
    conservation_rtol: z.number().min(0).default(1e-9),
    asymmetry_threshold: z.number().min(0).default(0.25),
    asymmetry_severity: Severity.default("warning"),
    negative_severity: Severity.default("warning"),
    unmapped_severity: Severity.default("warning"),
    unmapped_max_share: z.number().min(0).max(1).default(0.01).describe("largest share of a value's mass (production, imports, …) a concordance may leave unmapped before the unmapped-share audit fails"),
    unweighed_max_share: z.number().min(0).max(1).default(0.05).describe("largest share of a product's input rows counted in pieces without a unit_mass (mass unknown, left out) before the unweighed-product audit fails"),
    unmapped_limit_severity: Severity.default("error").describe("severity of the unmapped-share and unweighed-product audits (error stops the run, exit 4)"),
    below_zero_threshold: z.number().min(0).max(1).default(0.05),
    beyond_horizon_threshold: z.number().min(0).max(1).default(0.05),
    lifetime_severity: Severity.default("warning"),
    revision_threshold: z.number().min(0).default(0.05).describe("relative revision beyond which a past year's figure is flagged by the revision audit"),
    revision_severity: Severity.default("warning").describe("severity of the revision audit"),
    content_severity: Severity.default("error").describe("severity of content-total: a cohort's content summed over materials above 1 (more material than product mass)"),
  })
  .strict();

export const Years = z
  .object({ first: z.number().int(), last: z.number().int() })
  .strict()
  .refine((y) => y.first <= y.last, { message: "first must not be after last" });

const StepKindNames = STEP_KINDS.map((k) => k.kind);

export const PipelineBase = z
  .object({
    name: Name.describe("the pipeline's name; runs go to runs/<name>/<timestamp>/ without --out"),
    description: z.string().optional(),
    base_unit: MassUnit.default("t").describe("every mass is converted to this unit"),
    years: Years.optional().describe("the horizon: rows with a year outside it are rejected"),
    variables: z
      .record(Name, z.union([z.string(), z.number(), z.null()]))
      .optional()
      .describe("defaults for ${NAME}; null means it must be given with --set"),
    rejects: RejectLimits.optional().describe("default limits for every source (default: max_rows 0)"),
    catalog: z.string().min(1).optional().describe("a folder of releases (relative to the pipeline file); `cairn run --release ID` publishes into it"),
    audit: AuditOptions.optional(),
    sources: z.record(Name, Source),
    exports: z.array(ExportSpec).optional().describe(`files for statistical offices made from published tables (format: ${EXPORTERS.map((x) => x.format).join(", ")})`),
    labels: z.record(Name, Name).optional().describe("key column → a table with the column (or code) and label (or name): labels in the data dictionary"),
    steps: z.array(z.unknown()).describe("the steps, run in order"),
  })
  .strict();

/** The full schema, with every step kind, used for the JSON Schema export. */
export function pipelineJsonSchemaZod() {
  const stepUnion = z.discriminatedUnion(
    "kind",
    StepKindNames.map((k) => stepSchemaFor(k)) as unknown as [z.ZodObject, ...z.ZodObject[]],
  );
  return PipelineBase.extend({ steps: z.array(stepUnion) });
}

export type ColumnSpecT = z.infer<typeof ColumnSpec>;
export type SourceT = z.infer<typeof Source>;
export type AuditOptionsT = z.output<typeof AuditOptions>;
export type PipelineBaseT = z.output<typeof PipelineBase>;

export interface StepBase {
  id: string;
  kind: string;
  publish?: boolean | { partition_by?: string[]; formats?: ("arrow" | "csv")[] };
  [k: string]: unknown;
}

export interface Pipeline extends Omit<PipelineBaseT, "steps" | "audit"> {
  audit: AuditOptionsT;
  steps: StepBase[];
}
