/** The `cohort-model` step's options: one zod schema for the types, the messages and the JSON Schema. */
import { z } from "zod";
import { Name } from "../../spec/common.js";
import { UncertaintyOptions } from "./uncertainty-options.js";

export const Options = z.object({
  mode: z.enum(["inflow-driven", "stock-driven"]),
  input: Name.describe("long table: keys…, year, value column (inflow or stock)"),
  keys: z.array(Name).min(1).describe("series key columns"),
  value: Name.default("value").describe("the input column holding the inflow or the stock (default value)"),
  lifetimes: Name.describe("lifetimes table: any subset of the key columns, first_cohort, last_cohort, distribution, mean, sd, shape, scale, curve"),
  curves: Name.optional().describe("curves table (curve, age, survival) for distribution table"),
  initial_stock: Name.optional().describe("table: keys…, value (stock at the end of the year before the first model year), optional age"),
  continues: z
    .object({
      step: Name.describe("an earlier cohort-model step with the same keys"),
      year: z.number().int().optional().describe("the year whose end state is taken (default: that step's last year); this step's input starts the year after"),
    })
    .strict()
    .optional()
    .describe("start from the end state of an earlier cohort-model step: every cohort's remaining amount, its own lifetime and its own material content"),
  content: Name.optional().describe("table: key columns (empty = any), material, first_cohort, last_cohort, content (material per unit of product)"),
  by_cohort: z.boolean().default(false).describe("also produce <id>_by_cohort (adds cohort)"),
  negative_inflow: z.enum(["keep", "clamp"]).default("keep").describe("negative inflow: keep it (flagged), or clamp it to 0 (inflow-driven: the negative amount does not enter the stock and is reported; stock-driven: the unmet stock change is reported)"),
  indicators: z.boolean().default(true).describe("mean age of the stock and of the outflow per series-year"),
  convention: z.enum(["midpoint"]).default("midpoint").describe("discrete-time convention (DOMAIN: items enter mid-year)"),
  uncertainty: UncertaintyOptions.optional().describe("Monte Carlo ranges (<id>_uncertainty) and sensitivity (<id>_sensitivity) over uncertain lifetimes, content and input"),
});

export type O = z.output<typeof Options> & { id: string };

export const LIFETIME_KEYS = ["first_cohort", "last_cohort", "distribution"] as const;
export const CONTENT_COLUMNS = ["material", "first_cohort", "last_cohort", "content"] as const;
