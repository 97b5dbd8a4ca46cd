/** Schemas shared by the pipeline file and the step kinds. */
import { z } from "zod";
import { acceptedUnits, isMassUnit, isPieceUnit, MASS_UNITS } from "../units.js";

export const Name = z
  .string()
  .regex(/^[A-Za-z_][A-Za-z0-9_]*$/, "must start with a letter or _ and hold only letters, digits and _");

export const StepId = z
  .string()
  .regex(/^[A-Za-z_][A-Za-z0-9_]*$/, "a step id must start with a letter or _ and hold only letters, digits and _");

export const MassUnit = z.enum(Object.keys(MASS_UNITS) as [string, ...string[]]);

export const UnitText = z
  .string()
  .refine((u) => isMassUnit(u) || isPieceUnit(u), { message: `unknown unit; accepted: ${acceptedUnits()}` });

export const Severity = z.enum(["error", "warning"]);

export const PUBLISH_FORMATS = ["arrow", "csv"] as const;

export const Publish = z
  .union([
    z.boolean(),
    z
      .object({
        partition_by: z.array(Name).min(1).optional().describe("key columns to partition the Parquet output by (one folder per value)"),
        formats: z.array(z.enum(PUBLISH_FORMATS)).min(1).optional()
          .describe("files written beside the Parquet file (which is always written): arrow (Arrow IPC file, key columns dictionary-encoded), csv"),
      })
      .strict(),
  ])
  .describe("publish this step's tables in the run directory (default true); or {partition_by: [...], formats: [arrow, csv]}");

/** Column name mapping for a step's inputs: contract name → column in the table. */
export const ColumnMap = (names: readonly string[]) =>
  z
    .object(Object.fromEntries(names.map((n) => [n, Name.optional()])))
    .strict()
    .describe(`which table column plays each role (defaults: ${names.join(", ")})`);
