/**
 * The `uncertainty:` options of a cohort model: which assumptions are uncertain and how
 * (spreads, src/uncertainty/spreads.ts), how many draws, the seed, the sampling design, the
 * quantiles, totals and sensitivity.
 */
import { z } from "zod";
import { Name } from "../../spec/common.js";
import { Spread } from "../../uncertainty/spreads.js";
import { YearCorrelation } from "../../uncertainty/correlation.js";
import { DEFAULT_PROBABILITIES } from "../../uncertainty/summary.js";

export const UncertaintyOptions = z.object({
  draws: z.number().int().min(2).max(1_000_000).default(1000).describe("model runs (default 1,000)"),
  seed: z.number().int().min(0).max(Number.MAX_SAFE_INTEGER).default(1).describe("seed of the generator: the same seed gives the same bytes"),
  sampling: z.enum(["random", "lhs"]).default("random").describe("random: plain Monte Carlo; lhs: Latin hypercube over the lifetime and content draws (input errors are always plain random)"),
  quantiles: z.array(z.number().gt(0).lt(1)).min(1).default([...DEFAULT_PROBABILITIES])
    .refine((q) => q.every((x, i) => i === 0 || x > q[i - 1]!), "quantiles in increasing order, each once")
    .describe("probabilities of the quantiles published (Hyndman & Fan type 7); default 0.05, 0.25, 0.5, 0.75, 0.95"),
  variables: z.array(z.enum(["inflow", "outflow", "stock"])).min(1).default(["inflow", "outflow", "stock"])
    .describe("product variables summarised; material stock and outflow follow stock and outflow"),
  lifetimes: z.object({ mean: Spread.optional(), sd: Spread.optional(), shape: Spread.optional(), scale: Spread.optional() }).strict().optional()
    .describe("spread of each lifetime parameter around every lifetimes row's value; one draw per row and run (the row's series share it). A lifetimes table column <param>_rel_sd sets a normal relative spread for its row instead"),
  content: Spread.optional().describe("multiplicative spread of material content: one factor per material and run, for every series and cohort (rel_sd or rel_half_width)"),
  input: z.object({
    spread: Spread.describe("multiplicative error of the input (inflow, or the stock path of a stock-driven model): rel_sd or rel_half_width"),
    correlation: YearCorrelation.default({ kind: "full" }),
  }).strict().optional().describe("an error on the model's input per series, correlated across years as given (default: fully, one factor per series and run)"),
  totals: z.array(z.array(Name)).default([[]])
    .describe("totals with ranges from per-draw sums: each a list of the keys kept (the others summed over); [] is the total over all series"),
  sensitivity: z.object({
    base: z.number().int().min(8).max(100_000).default(256).describe("N, the base sample size: N·(k + 2) runs for k uncertain assumptions"),
    resamples: z.number().int().min(10).max(10_000).default(200).describe("bootstrap resamples for the confidence intervals"),
    confidence: z.number().gt(0).lt(1).default(0.95),
  }).strict().optional().describe("variance-based sensitivity indices (first order and total effect) of stock and outflow for each uncertain assumption: <id>_sensitivity"),
}).strict();

export type UncertaintyT = z.output<typeof UncertaintyOptions>;

/** Lifetimes table columns that give a row its own spread (normal, relative sd, truncated at 0). */
export const LIFETIME_SPREAD_COLUMNS = ["mean_rel_sd", "sd_rel_sd", "shape_rel_sd", "scale_rel_sd"] as const;

/** The column name of a quantile: 0.05 → q05, 0.5 → q50, 0.025 → q02_5. */
export function quantileColumn(p: number): string {
  const pct = Math.round(p * 1e8) / 1e6;
  const [i, f] = String(pct).split(".");
  return `q${i!.padStart(2, "0")}${f ? `_${f}` : ""}`;
}
